"""The one error hierarchy of ``reduce``.

Every problem the user can fix (a recipe key, a source column, a denominators file, an
output folder) raises a subclass of :class:`ReduceError`. Its message is one line that names
*where* (file, recipe key or column), *what* went wrong and *what to do*. The command line
turns any ``ReduceError`` into that single line on stderr and the error's ``exit_code``, in
one place (``reduce.cli``); tracebacks are shown only with ``--debug``.

Exit codes follow the command-line contract: 2 for bad recipes and inputs, 1 for a budget
that cannot be met or an audit that finds a file over budget or inconsistent.

Classes also subclass the builtin they resemble (``ValueError``, ``OSError``) so library
callers may catch either.
"""

from __future__ import annotations

import difflib
import os
from collections.abc import Iterable
from pathlib import Path


class ReduceError(Exception):
    """Root of every error raised on purpose by ``reduce``."""

    exit_code: int = 2

    def __init__(self, message: str) -> None:
        # Messages are single lines by contract: fold any newline a value smuggled in, and
        # show every other unprintable character (\r, \x1e, U+2028, bidi controls ...) as
        # an escape, so that a terminal shows exactly one line.
        text = " ".join(str(message).split("\n"))
        super().__init__(
            "".join(
                ch if ch.isprintable() else ch.encode("unicode_escape").decode("ascii")
                for ch in text
            )
        )

    @property
    def message(self) -> str:
        return str(self.args[0])


class RecipeError(ReduceError, ValueError):
    """A recipe is malformed: syntax, unknown key, wrong type or value, bad combination."""


class SourceError(ReduceError, ValueError):
    """The event source cannot be read or does not fit the recipe (missing column, dtype)."""


class DenominatorError(SourceError):
    """The denominators table cannot be read or is unusable (missing key, duplicates)."""


class OutputError(ReduceError, OSError):
    """The output cannot be written safely (unwritable folder, path escaping, foreign file)."""


class BudgetError(ReduceError):
    """No level on the ladder fits the byte budget."""

    exit_code = 1


class OptionError(ReduceError, ValueError):
    """A command-line option has a bad value (``--budget 3XB``, ``--on foo``)."""


class AuditError(ReduceError):
    """A payload file cannot be read by the audit (exit 2); findings are not errors."""


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """Return ``" (did you mean 'x'?)"`` for the closest choice, or ``""``."""
    matches = difflib.get_close_matches(word, sorted(choices), n=1, cutoff=0.6)
    return f" (did you mean '{matches[0]}'?)" if matches else ""


def shown_path(p: str | os.PathLike[str]) -> str:
    """A path as messages show it: relative to the working folder when inside it."""
    path = Path(p)
    try:
        return str(path.resolve().relative_to(Path.cwd().resolve()))
    except (ValueError, OSError):
        return str(path)
