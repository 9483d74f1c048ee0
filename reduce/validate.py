"""Validation of many recipes at once, without scanning the data (``reduce.check``).

Each recipe is loaded (every key checked), its source resolved and schema-checked, its
denominators table read and checked, and, when asked, its output location checked; every
problem of every recipe is collected rather than stopping at the first, so ``reduce check``
can list them all and ``reduce run`` can refuse to publish anything when any recipe is bad.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from reduce.errors import OutputError, ReduceError, shown_path
from reduce.recipe import Recipe, load_recipe


@dataclass(frozen=True)
class Checked:
    """One recipe's check: the loaded recipe (None if it failed to load) or its problem."""

    file: Path
    recipe: Recipe | None = None
    source_files: int = 0
    columns: tuple[str, ...] = ()
    output: Path | None = None
    error: ReduceError | None = None


@dataclass(frozen=True)
class CheckReport:
    results: tuple[Checked, ...] = field(default_factory=tuple)

    @property
    def errors(self) -> list[ReduceError]:
        return [r.error for r in self.results if r.error is not None]

    @property
    def ok(self) -> bool:
        return not self.errors

    @property
    def exit_code(self) -> int:
        return max((e.exit_code for e in self.errors), default=0)

    @property
    def recipes(self) -> list[Recipe]:
        return [r.recipe for r in self.results if r.recipe is not None]


def check(
    recipes: Sequence[str | Path],
    *,
    overrides: Mapping[str, str] | None = None,
    outputs: bool = False,
    out_dir: Path | None = None,
) -> CheckReport:
    """Check every recipe and its source and denominators (and, with ``outputs``, that its
    payload can be written and that no two recipes write the same file); never scans."""
    from reduce.normalize import load_denominators
    from reduce.source import needed_columns, open_source

    results: list[Checked] = []
    for file in map(Path, recipes):
        try:
            rec = load_recipe(file, overrides=overrides)
        except ReduceError as e:
            results.append(Checked(file, error=e))
            continue
        try:
            src = open_source(rec)
            if rec.normalize and rec.normalize.denominators:
                load_denominators(rec.normalize.denominators)
            from reduce.encode import region_labels

            region_labels(rec)  # group.region.label: every polygon has one
            target = None
            if outputs:
                from reduce.pipeline import output_path
                from reduce.publish import check_target

                target = output_path(rec, out_dir)
                check_target(target, create=False)
            results.append(Checked(file, rec, len(src.files), tuple(needed_columns(rec)), target))
        except ReduceError as e:
            results.append(Checked(file, rec, error=e))
    if outputs:
        results = _same_outputs(results)
    return CheckReport(tuple(results))


def _same_outputs(results: list[Checked]) -> list[Checked]:
    """Two recipes writing one payload file: the second would replace the first's."""
    seen: dict[Path, Path] = {}
    out = []
    for r in results:
        if r.output is not None and r.error is None:
            key = r.output.resolve()
            if key in seen:
                r = Checked(
                    r.file,
                    r.recipe,
                    error=OutputError(
                        f"{shown_path(r.file)}: output.path: writes {shown_path(r.output)}, like "
                        f"{shown_path(seen[key])}; give each recipe its own output file"
                    ),
                )
            else:
                seen[key] = r.file
        out.append(r)
    return out
