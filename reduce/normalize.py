"""Normalisation: rates per N from a denominators table, shares, location quotients.

This module owns the denominators table (read once per run, checked: key column present,
no duplicate keys, no keys that differ only in case or padding, values numeric and not
negative or NaN) and three derived measures computed on the finalized rows of a level:

- ``<m>_per_<N>``: the measure divided by the row's denominator, times N (a crude rate, e.g.
  per 100,000 residents). A zero or missing denominator gives null, never inf or NaN, and is
  counted.
- ``<m>_share``: the row's share of its group's total (``within`` keys).
- ``<m>_lq``: the location quotient (e_ij / e_j) / (E_i / E) of category i in region (or
  hex cell) j, within each time bin when the recipe has one.

Keys present only in the data or only in the denominators are reported (run summary,
``--json`` and manifest) as warnings; a table none of whose keys is in the data is an
error. Denominators keyed by H3 cell are summed to the parent cell at the level's
resolution.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import polars as pl
import polars_h3 as plh3

from reduce.errors import DenominatorError, shown_path
from reduce.keys import HEX, TIME
from reduce.recipe import Denominators, Recipe
from reduce.source import _first_line

DEN = "__den"


@dataclass(frozen=True)
class NormalizeReport:
    """What normalisation could not match, for the run summary and the manifest."""

    rows_without_denominator: int = 0
    data_only_keys: tuple[str, ...] = ()
    denominator_only_keys: tuple[str, ...] = ()
    notes: dict[str, int] = field(default_factory=dict)

    def as_dict(self) -> dict[str, object]:
        return {
            "rows_without_denominator": self.rows_without_denominator,
            "data_only_keys": list(self.data_only_keys),
            "denominator_only_keys": list(self.denominator_only_keys),
        }


def load_denominators(d: Denominators) -> pl.DataFrame:
    """Read and check the denominators table: columns ``key`` (String) and ``__den``."""
    shown = shown_path(d.path)
    where = f"{shown} (normalize.denominators)"
    if not Path(d.path).is_file():
        raise DenominatorError(
            f"{where}: file not found; check normalize.denominators.path, "
            "which is relative to the recipe file"
        )
    try:
        if d.path.suffix.lower() in (".parquet", ".pq"):
            df = pl.read_parquet(d.path)
        else:
            df = pl.read_csv(d.path, infer_schema_length=10000)
    except (pl.exceptions.PolarsError, OSError) as e:
        raise DenominatorError(f"{where}: cannot read ({_first_line(e)})") from None
    for col, key in ((d.key, "key"), (d.value, "value")):
        if col not in df.columns:
            raise DenominatorError(
                f"{where}: column {col!r} (normalize.denominators.{key}) is "
                f"missing; columns are: {', '.join(df.columns)}"
            )
    if df.height == 0:
        raise DenominatorError(f"{where}: has no rows; add one row per key")
    val = df.get_column(d.value)
    if not val.dtype.is_numeric():
        raise DenominatorError(
            f"{where}: column {d.value!r} holds {val.dtype}, not numbers; fix the values"
        )
    keys = df.get_column(d.key).cast(pl.String)
    if keys.null_count():
        raise DenominatorError(
            f"{where}: column {d.key!r} has an empty key; fill or remove that row"
        )
    dup = keys.filter(keys.is_duplicated())
    if dup.len():
        raise DenominatorError(
            f"{where}: key {dup[0]!r} appears more than once in column "
            f"{d.key!r}; keep one row per key"
        )
    folded = keys.str.strip_chars().str.to_lowercase()
    near = folded.is_duplicated()
    if near.any():
        pair = keys.filter(near).sort().to_list()
        raise DenominatorError(
            f"{where}: keys {pair[0]!r} and {pair[1]!r} differ only in case "
            "or padding; keep one spelling"
        )
    vf = val.cast(pl.Float64)
    bad = df.filter(vf.is_nan() | (vf < 0))
    if bad.height:
        k = bad.get_column(d.key).cast(pl.String)[0]
        v = bad.get_column(d.value)[0]
        raise DenominatorError(
            f"{where}: key {k!r} has value {v!r} in column {d.value!r}; a "
            "denominator must be a non-negative number"
        )
    inf = df.filter(vf.is_infinite())
    if inf.height:
        k = inf.get_column(d.key).cast(pl.String)[0]
        v = inf.get_column(d.value)[0]
        raise DenominatorError(
            f"{where}: key {k!r} has value {v!r} in column {d.value!r}; a "
            "denominator must be a finite, non-negative number"
        )
    out = pl.DataFrame({"key": keys, DEN: vf})
    if d.on == "hex":
        cells = out.with_columns(plh3.str_to_int("key").alias("__cell"))
        if cells.get_column("__cell").null_count() or not bool(
            cells.select(plh3.is_valid_cell("__cell").all()).item()
        ):
            raise DenominatorError(
                f"{where}: column {d.key!r} must hold H3 cells as 15-character hex strings"
            )
        out = cells.select(pl.col("__cell").alias("key"), DEN)
    return out


def _den_for_level(den: pl.DataFrame, d: Denominators, hex_res: int | None) -> pl.DataFrame:
    if d.on != "hex":
        return den
    assert hex_res is not None
    res = den.select(plh3.get_resolution("key").unique()).to_series().to_list()
    if any(r < hex_res for r in res):
        raise DenominatorError(
            f"{shown_path(d.path)} (normalize.denominators): cells at "
            f"resolution {min(res)} cannot give denominators at the finer "
            f"resolution {hex_res}; supply cells at resolution {hex_res} or "
            "finer"
        )
    return (
        den.with_columns(plh3.cell_to_parent("key", hex_res).alias("key"))
        .group_by("key")
        .agg(pl.col(DEN).sum())
    )


def apply(
    recipe: Recipe, final: pl.DataFrame, *, den: pl.DataFrame | None, hex_res: int | None
) -> tuple[pl.DataFrame, NormalizeReport]:
    """Add rate, share and location-quotient columns to finalized rows."""
    n = recipe.normalize
    if n is None:
        return final, NormalizeReport()
    out = final
    report = NormalizeReport()
    if n.rate_measures and n.denominators is not None and den is not None:
        d = n.denominators
        key_col = HEX if d.on == "hex" else recipe.region.column  # type: ignore[union-attr]
        dl = _den_for_level(den, d, hex_res)
        left = out.with_columns(pl.col(key_col).alias("__key"))
        if d.on == "region":
            left = left.with_columns(pl.col("__key").cast(pl.String))
        joined = left.join(dl.rename({"key": "__key"}), on="__key", how="left")
        ok = pl.col(DEN).is_not_null() & (pl.col(DEN) > 0)
        out = joined.with_columns(
            [
                pl.when(ok)
                .then(pl.col(m).cast(pl.Float64) / pl.col(DEN) * n.per)
                .alias(f"{m}_per_{n.per}")
                for m in n.rate_measures
            ]
        ).drop(["__key", DEN])
        missing = int(joined.select((~ok).sum()).item())
        data_keys = set(left.get_column("__key").unique().to_list())
        den_keys = set(dl.get_column("key").to_list())
        fmt = (lambda k: plh3_str(k)) if d.on == "hex" else str  # noqa: E731
        data_keys.discard(None)
        if data_keys and den_keys and not data_keys & den_keys:
            raise _no_match(d, key_col, sorted(map(fmt, data_keys)), sorted(map(fmt, den_keys)))
        report = NormalizeReport(
            rows_without_denominator=missing,
            data_only_keys=tuple(sorted(fmt(k) for k in data_keys - den_keys)),
            denominator_only_keys=tuple(sorted(fmt(k) for k in den_keys - data_keys)),
        )
    if n.share:
        within = _cols(recipe, n.share.within)
        exprs = []
        for m in n.share.measures:
            tot = pl.col(m).sum().over(within) if within else pl.col(m).sum()
            exprs.append(
                pl.when(tot > 0).then(pl.col(m).cast(pl.Float64) / tot).alias(f"{m}_share")
            )
        out = out.with_columns(exprs)
    if n.location_quotient:
        m = n.location_quotient
        place = HEX if recipe.hex and not recipe.region else recipe.region.column  # type: ignore[union-attr]
        t = [TIME] if recipe.time else []
        cats = list(recipe.categories)
        e = pl.col(m).cast(pl.Float64)
        e_j = e.sum().over([*t, place])
        e_i = e.sum().over([*t, *cats])
        e_all = e.sum().over(t) if t else e.sum()
        ok = (e_j > 0) & (e_i > 0) & (e_all > 0)
        out = out.with_columns(pl.when(ok).then((e / e_j) / (e_i / e_all)).alias(f"{m}_lq"))
    return out, report


def _no_match(d: Denominators, key_col: str, data: list[str], table: list[str]) -> DenominatorError:
    """A denominators table none of whose keys occurs in the data: every rate would be
    empty, so it is an error (not a warning)."""

    def sample(keys: list[str]) -> str:
        return ", ".join(repr(k) for k in keys[:3]) + (" ..." if len(keys) > 3 else "")

    return DenominatorError(
        f"{shown_path(d.path)} (normalize.denominators): none of its {len(table):,} keys in "
        f"column {d.key!r} matches the {len(data):,} {key_col} keys in the data (data: "
        f"{sample(data)}; table: {sample(table)}); make the table's keys match the data's"
    )


def plh3_str(cell: int) -> str:
    return format(int(cell), "x")


def _cols(recipe: Recipe, within: tuple[str, ...]) -> list[str]:
    from reduce.prune import within_columns

    return within_columns(recipe, within)
