"""Budgets files: per-file rules (globs) and a site total, parsed and matched."""

from __future__ import annotations

import os
import re
import tomllib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from reduce.errors import AuditError, did_you_mean
from reduce.sizes import Measure, parse_measure, parse_size

# --------------------------------------------------------------------------------------------
# Budgets
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FileRule:
    """One ``[[file]]`` entry of a budgets file."""

    glob: str
    limit: int
    on: Measure
    source: str
    pattern: re.Pattern[str] = field(compare=False, repr=False)

    def matches(self, candidates: Iterable[str]) -> bool:
        return any(self.pattern.fullmatch(c) for c in candidates)


@dataclass(frozen=True, slots=True)
class Budgets:
    """A parsed budgets file: per-file rules (first match wins) and an optional total."""

    path: Path
    rules: tuple[FileRule, ...]
    total: tuple[int, Measure] | None

    def rule_for(self, path: Path, given: str) -> FileRule | None:
        folder = self.path.parent.resolve()
        candidates = [_posix(given)]
        try:
            candidates.insert(0, path.resolve().relative_to(folder).as_posix())
        except ValueError:
            pass
        for rule in self.rules:
            if rule.matches(candidates):
                return rule
        return None


_BUDGET_TOP_KEYS = ("file", "total")
_BUDGET_FILE_KEYS = ("glob", "max", "on")
_BUDGET_TOTAL_KEYS = ("max", "on")


def load_budgets(path: str | os.PathLike[str], *, default_on: Measure = "gzip") -> Budgets:
    """Read and validate a TOML budgets file; any mistake raises one-line ``AuditError``."""
    p = Path(path)
    where = str(path)
    try:
        text = p.read_bytes()
    except FileNotFoundError:
        raise AuditError(f"{where}: budgets file not found") from None
    except OSError as exc:
        raise AuditError(f"{where}: cannot read budgets file ({exc.strerror or exc})") from None
    try:
        doc = tomllib.loads(text.decode("utf-8"))
    except UnicodeDecodeError:
        raise AuditError(f"{where}: budgets file is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise AuditError(f"{where}: not valid TOML: {exc}") from None

    for key in doc:
        if key not in _BUDGET_TOP_KEYS:
            raise AuditError(
                f"{where}: unknown key '{key}'{did_you_mean(key, _BUDGET_TOP_KEYS)}; "
                "expected [[file]] entries and an optional [total]"
            )
    entries = doc.get("file", [])
    if not isinstance(entries, list) or not all(isinstance(e, dict) for e in entries):
        raise AuditError(f"{where}: 'file' must be an array of tables, written [[file]]")
    rules = []
    for number, entry in enumerate(entries, start=1):
        label = f"[[file]] #{number}"
        _check_keys(entry, _BUDGET_FILE_KEYS, f"{where}: {label}")
        for required in ("glob", "max"):
            if required not in entry:
                raise AuditError(f"{where}: {label}: key '{required}' is missing")
        glob = entry["glob"]
        if not isinstance(glob, str) or not glob.strip():
            raise AuditError(f"{where}: {label} key 'glob': expected a non-empty string")
        limit = _budget_size(entry["max"], f"{where}: {label} key 'max'")
        on = _budget_measure(entry.get("on", default_on), f"{where}: {label} key 'on'")
        rules.append(
            FileRule(
                glob=glob,
                limit=limit,
                on=on,
                source=f"{where} {label} glob '{glob}'",
                pattern=_glob_regex(glob),
            )
        )
    total = None
    if "total" in doc:
        table = doc["total"]
        if not isinstance(table, dict):
            raise AuditError(f"{where}: 'total' must be a table, written [total]")
        _check_keys(table, _BUDGET_TOTAL_KEYS, f"{where}: [total]")
        if "max" not in table:
            raise AuditError(f"{where}: [total]: key 'max' is missing")
        total = (
            _budget_size(table["max"], f"{where}: [total] key 'max'"),
            _budget_measure(table.get("on", default_on), f"{where}: [total] key 'on'"),
        )
    return Budgets(path=p, rules=tuple(rules), total=total)


def _check_keys(table: dict[str, Any], allowed: Sequence[str], where: str) -> None:
    for key in table:
        if key not in allowed:
            raise AuditError(
                f"{where}: unknown key '{key}'{did_you_mean(key, allowed)}; "
                f"allowed: {', '.join(allowed)}"
            )


def _budget_size(value: object, where: str) -> int:
    try:
        return parse_size(value)
    except ValueError as exc:
        raise AuditError(f"{where}: {exc}") from None


def _budget_measure(value: object, where: str) -> Measure:
    try:
        return parse_measure(value)
    except ValueError as exc:
        raise AuditError(f"{where}: {exc}") from None


def _glob_regex(glob: str) -> re.Pattern[str]:
    """Shell-style glob to a regex: ``*`` and ``?`` stay inside one folder, ``**`` crosses."""
    pattern = glob.removeprefix("./")
    out: list[str] = []
    i = 0
    while i < len(pattern):
        c = pattern[i]
        if c == "*":
            if pattern.startswith("**", i):
                i += 2
                if pattern.startswith("/", i):
                    i += 1
                    out.append("(?:.*/)?")
                else:
                    out.append(".*")
                continue
            out.append("[^/]*")
        elif c == "?":
            out.append("[^/]")
        elif c == "[":
            end = pattern.find("]", i + 2)
            if end == -1:
                out.append(re.escape(c))
            else:
                body = pattern[i + 1 : end]
                if body.startswith("!"):
                    body = "^" + body[1:]
                out.append("[" + body.replace("\\", "\\\\") + "]")
                i = end + 1
                continue
        else:
            out.append(re.escape(c))
        i += 1
    return re.compile("".join(out))


def _posix(given: str) -> str:
    text = Path(given).as_posix()
    return text.removeprefix("./")
