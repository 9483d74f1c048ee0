"""Reference copy (kept for tests only: the current module must give identical results). Encoding: finalized rows into payload bytes (columns JSON, rows JSON, CSV).

This module owns the payload contract (see DESIGN notes): key order, row order, column order,
value forms (H3 cells as 15-character lowercase strings, time bins as integer epoch seconds
in UTC, floats rounded to the level's digits), dictionary-encoding of string columns where it
makes the payload smaller, the accounting block, and the guarantees every JSON payload keeps:
valid RFC 8259 JSON (no NaN or Infinity: they become null), every integer within ±2^53, and,
with ``inline``, no character that could close an HTML ``<script>`` element.

Encoding is deterministic: the same rows give the same bytes.
"""

from __future__ import annotations

import functools
import io
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import orjson
import polars as pl
import polars_h3 as plh3

from reduce.aggregate import N
from reduce.contract import ACCOUNTING_ORDER, COLUMNS_FORMAT, GEOJSON_FORMAT, MAX_SAFE_INTEGER
from reduce.errors import ReduceError
from reduce.keys import HEX, TIME
from reduce.recipe import Recipe

FORMAT = COLUMNS_FORMAT  # the names other modules used; the values live in reduce.contract
MAX_SAFE_INT = MAX_SAFE_INTEGER

# Characters that could end a <script> element or break a JavaScript string literal when a
# JSON payload is pasted inline into HTML; each is replaced by its JSON \u escape, which is
# the same string to any JSON parser (RFC 8259 §7).
_INLINE_ESCAPES = (
    (b"<", b"\\u003c"),
    (b">", b"\\u003e"),
    (b"&", b"\\u0026"),
    ("\u2028".encode(), b"\\u2028"),
    ("\u2029".encode(), b"\\u2029"),
)


def payload_columns(recipe: Recipe, df: pl.DataFrame) -> list[str]:
    """Output column order: keys, measures, derived columns (internal ``__`` columns dropped)."""
    keys = [k for k in recipe.key_names if k in df.columns]
    measures = [m.name for m in recipe.measures]
    derived = [
        c for c in df.columns if c not in keys and c not in measures and not c.startswith("__")
    ]
    return [*keys, *measures, *derived]


def sort_rows(recipe: Recipe, df: pl.DataFrame) -> pl.DataFrame:
    """Deterministic row order: by keys, with a group's remainder row after its categories."""
    keys = [k for k in recipe.key_names if k in df.columns]
    if not keys:
        return df
    cats = [c for c in recipe.categories if c in df.columns]
    if recipe.top is not None and cats:
        rest = recipe.top.rest
        df = df.with_columns(
            pl.all_horizontal([pl.col(c) == rest for c in cats]).alias("__is_rest")
        )
        non_cat = [k for k in keys if k not in cats]
        return df.sort([*non_cat, "__is_rest", *cats]).drop("__is_rest")
    return df.sort(keys)


def _plain(recipe: Recipe, df: pl.DataFrame, digits: int) -> pl.DataFrame:
    """Turn rows into plain JSON-able columns: cells as strings, times as epoch seconds,
    floats rounded (NaN and infinities become null)."""
    per_col = dict(recipe.output.column_digits)
    exprs = []
    for c in payload_columns(recipe, df):
        dtype = df.schema[c]
        e = pl.col(c)
        if c == HEX and recipe.hex:
            e = plh3.int_to_str(c)
        elif c == TIME and recipe.time:
            e = e.dt.epoch("s")
        elif dtype.is_float():
            d = per_col.get(c, digits)
            e = pl.when(e.is_finite()).then(e.round(d))
            # A float column whose values are all whole numbers after rounding to 0 digits is
            # written as integers, so 3.0 does not cost two extra bytes.
            if d == 0:
                e = e.cast(pl.Int64)
        elif isinstance(dtype, (pl.Categorical, pl.Enum)):
            e = e.cast(pl.String)
        exprs.append(e.alias(c))
    return df.select(exprs)


def _check_ints(df: pl.DataFrame, recipe: Recipe) -> None:
    for c in df.columns:
        s = df.get_column(c)
        if s.dtype.is_integer() and s.len() and s.null_count() < s.len():
            lo, hi = s.min(), s.max()
            if (lo is not None and int(lo) < -MAX_SAFE_INT) or (  # type: ignore[arg-type]
                hi is not None and int(hi) > MAX_SAFE_INT  # type: ignore[arg-type]
            ):
                raise ReduceError(
                    f"{recipe.file.name}: column {c!r} holds an integer beyond "
                    "±2^53, which a browser cannot represent exactly; scale the "
                    "measure down or use a mean"
                )


def _dictionary(values: list[Any]) -> tuple[list[str], list[int]] | None:
    """Sorted labels and indexes for a string column, or None if not smaller."""
    labels = sorted({v for v in values if v is not None})
    if len(labels) == len(values):
        return None
    pos = {v: i for i, v in enumerate(labels)}
    idx = [pos[v] if v is not None else None for v in values]
    plain = len(orjson.dumps(values))
    coded = len(orjson.dumps(labels)) + len(orjson.dumps(idx))
    return (labels, idx) if coded < plain else None  # type: ignore[return-value]


def inline_safe(data: bytes) -> bytes:
    """Escape ``<``, ``>``, ``&``, U+2028 and U+2029 so JSON can sit inside ``<script>``."""
    for raw, esc in _INLINE_ESCAPES:
        data = data.replace(raw, esc)
    return data


@functools.lru_cache(maxsize=8)
def _labels_of(path: str, mtime_ns: int, id_property: str, label_property: str) -> dict[str, str]:
    from reduce.maps import boundaries as geo

    return geo.region_labels(Path(path), id_property, label_property)


def region_labels(recipe: Recipe) -> dict[str, str] | None:
    """The labels of a recipe's boundary regions (``group.region.label``), or None."""
    r = recipe.region
    if r is None or r.label_property is None or r.boundaries is None:
        return None
    assert r.id_property is not None
    try:
        mtime = r.boundaries.stat().st_mtime_ns
    except OSError:
        mtime = 0  # load_boundaries says what is wrong with the file
    return _labels_of(str(r.boundaries), mtime, r.id_property, r.label_property)


def _with_labels(recipe: Recipe, plain: pl.DataFrame) -> pl.DataFrame:
    """The region label column, right after the region column (null for a region that is
    no polygon, such as ``outside``)."""
    labels = region_labels(recipe)
    r = recipe.region
    if labels is None or r is None or r.label_column is None or r.column not in plain.columns:
        return plain
    label = pl.col(r.column).replace_strict(labels, default=None, return_dtype=pl.String)
    cols = plain.columns
    at = cols.index(r.column) + 1
    return plain.with_columns(label.alias(r.label_column)).select(
        [*cols[:at], r.label_column, *cols[at:]]
    )


def encode(
    recipe: Recipe,
    df: pl.DataFrame,
    *,
    level: Mapping[str, Any],
    accounting: Mapping[str, int],
    digits: int,
    meta: Mapping[str, Any] | None = None,
    geometry: Callable[[pl.DataFrame], list[Any]] | None = None,
) -> bytes:
    """Encode finalized, sorted rows in the recipe's layout."""
    plain = _with_labels(recipe, _plain(recipe, df, digits))
    _check_ints(plain, recipe)
    layout = recipe.output.layout
    if layout == "geojson":
        if geometry is None:
            raise ValueError("the geojson layout needs a geometry provider")
        from reduce.maps import geojson

        geoms = geometry(plain)
        props = {c: plain.get_column(c).to_list() for c in plain.columns}
        extra = {
            "reduce": {
                "format": GEOJSON_FORMAT,
                "recipe": recipe.name,
                "level": dict(level),
                "rows": plain.height,
                "accounting": dict(accounting),
                **({"meta": dict(meta)} if meta else {}),
            }
        }
        body = geojson.feature_collection(geoms, props, extra=extra)
        return inline_safe(body) if recipe.output.inline else body
    if layout == "csv":
        buf = io.BytesIO()
        plain.write_csv(buf, line_terminator="\n")
        return buf.getvalue()
    if layout == "rows":
        body = orjson.dumps(plain.to_dicts())
        return inline_safe(body) if recipe.output.inline else body
    columns: dict[str, list[Any]] = {}
    dictionaries: dict[str, list[str]] = {}
    string_keys = {recipe.region.column} if recipe.region else set()
    if recipe.region and recipe.region.label_column:
        string_keys.add(recipe.region.label_column)
    string_keys |= set(recipe.categories)
    for c in plain.columns:
        values = plain.get_column(c).to_list()
        if c in string_keys and plain.schema[c] == pl.String:
            coded = _dictionary(values)
            if coded is not None:
                dictionaries[c], values = coded
        columns[c] = values
    doc: dict[str, Any] = {
        "format": FORMAT,
        "recipe": recipe.name,
        "level": dict(level),
        "rows": plain.height,
        "columns": columns,
    }
    if dictionaries:
        doc["dictionaries"] = dictionaries
    doc["accounting"] = dict(accounting)
    if meta:
        doc["meta"] = dict(meta)
    body = orjson.dumps(doc)
    return inline_safe(body) if recipe.output.inline else body


def elements(df: pl.DataFrame) -> int:
    """Drawn elements of a payload: one shape (cell, bar, point) per row."""
    return df.height


def represented(df: pl.DataFrame) -> int:
    return int(df.get_column(N).sum()) if df.height else 0


def accounting_block(
    *,
    input_rows: int,
    filtered_rows: int,
    invalid_rows: int,
    suppressed_rows: int,
    represented_rows: int,
    unassigned_rows: int | None = None,
) -> dict[str, int]:
    """The accounting identity's terms; ``unassigned_rows`` (events outside every boundary
    polygon) appears only for recipes that assign regions from boundaries."""
    terms = {
        "input_rows": input_rows,
        "filtered_rows": filtered_rows,
        "invalid_rows": invalid_rows,
        "unassigned_rows": unassigned_rows,
        "suppressed_rows": suppressed_rows,
        "represented_rows": represented_rows,
    }
    return {k: v for k in ACCOUNTING_ORDER if (v := terms[k]) is not None}


__all__: Sequence[str] = [
    "FORMAT",
    "encode",
    "inline_safe",
    "sort_rows",
    "payload_columns",
    "accounting_block",
]
