"""Encoding: finalized rows into payload bytes (columns JSON, rows JSON, CSV).

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

# numpy is imported here, by Python: otherwise polars' to_numpy imports it from inside its own
# code, where the exception of a SIGTERM arriving then cannot unwind (a panic, exit 1).
import numpy as np
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
    """Deterministic row order: by keys, with a group's remainder row after its categories.

    (Measured: sorting text keys through integer codes in label order was no faster, since
    polars' multi-column sort and the gather of the rows dominate; the labels are sorted as
    they are.)"""
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


def _plain(
    recipe: Recipe, df: pl.DataFrame, digits: int, *, cells_as_text: bool = True
) -> pl.DataFrame:
    """Turn rows into plain JSON-able columns: cells as strings, times as epoch seconds,
    floats rounded (NaN and infinities become null). With ``cells_as_text=False`` the hex
    column stays UInt64, for :func:`_cells_json` to write."""
    per_col = dict(recipe.output.column_digits)
    exprs = []
    for c in payload_columns(recipe, df):
        dtype = df.schema[c]
        e = pl.col(c)
        if c == HEX and recipe.hex:
            e = plh3.int_to_str(c) if cells_as_text else e
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
        if c == HEX and recipe.hex:
            continue  # cells, written as text
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


def _dictionary(s: pl.Series) -> tuple[bytes, bytes] | None:
    """A string column as (labels, indexes) JSON arrays, or None if that is not smaller.

    The labels are the column's distinct non-null values in code-point order (UTF-8 byte
    order is code-point order, so polars' sort agrees with Python's); a null stays null in
    the indexes. Both sizes are counted from each label's number of rows and the length of
    its JSON text, without writing out the plain column."""

    n = s.len()
    distinct = s.drop_nulls().unique().sort()
    if distinct.len() == n:
        return None
    labels = distinct.to_list()
    codes = s.cast(pl.Enum(labels)).to_physical()
    rows = np.bincount(codes.drop_nulls().to_numpy(), minlength=len(labels)).tolist()
    nulls = s.null_count()
    commas = max(n - 1, 0)
    plain = 2 + commas + 4 * nulls + sum(c * len(orjson.dumps(v)) for v, c in zip(labels, rows))
    labels_json = orjson.dumps(labels)
    index_text = 2 + commas + 4 * nulls + sum(c * len(str(i)) for i, c in enumerate(rows))
    if len(labels_json) + index_text >= plain:
        return None
    return labels_json, _ints_json(codes)


# --------------------------------------------------------------------- columns as JSON arrays
#
# Each payload column is written as one JSON array (bytes) and joined into the document, so
# no column becomes a Python list (the rows layout splits the arrays into value texts). Every
# writer gives the bytes ``orjson.dumps(series.to_list())`` gives (tests/test_encode_
# equivalence.py compares them on random columns): numbers through orjson's NumPy path, whose float text is the same as for Python
# floats (float64 only: a float32 column is widened first, as ``to_list`` does); strings
# joined by polars when none needs a JSON escape (orjson escapes only ``"``, ``\`` and
# U+0000..U+001F); anything else through ``to_list``.

_NUMPY = orjson.OPT_SERIALIZE_NUMPY
_NEEDS_ESCAPE = r'[\x00-\x1f"\\]'
H3_DIGITS = 15  # characters of an H3 cell's text: cells lie in [16^14, 16^15)


def _bracketed(joined: pl.Series, quote: str = "") -> bytes:
    """``[`` + quote + the one joined text + quote + ``]``, as bytes made by polars (no
    round trip through a Python str)."""
    text = pl.concat_str([pl.lit("[" + quote), pl.lit(joined), pl.lit(quote + "]")])
    out: bytes = pl.select(text.cast(pl.Binary)).item()
    return out


def _ints_json(s: pl.Series) -> bytes:
    """An integer column (values within ±2^53, see ``_check_ints``) as a JSON array."""
    if not s.null_count():
        return orjson.dumps(s.cast(pl.Int64).to_numpy(), option=_NUMPY)
    text = s.cast(pl.Int64).cast(pl.String).fill_null("null").str.join(",")
    return _bracketed(text)


def _floats_json(s: pl.Series) -> bytes:
    """A float column as a JSON array: NaN, infinities and nulls become null."""
    return orjson.dumps(s.cast(pl.Float64).to_numpy(), option=_NUMPY)


def _strings_json(s: pl.Series) -> bytes:
    """A string column as a JSON array."""
    if s.len() and not s.null_count() and not s.str.contains(_NEEDS_ESCAPE).any():
        return _bracketed(s.str.join('","'), '"')
    return orjson.dumps(s.to_list())


def _cells_json(s: pl.Series) -> bytes | None:
    """A column of H3 cells (UInt64) as a JSON array of their 15-character lowercase texts,
    written with NumPy; None when a value is null or not a valid cell (``plh3.int_to_str``
    writes those as null: the caller falls back to it)."""
    n = s.len()
    if s.null_count() or not pl.select(plh3.is_valid_cell(pl.lit(s)).all()).item():
        return None
    if not n:
        return b"[]"
    import binascii

    # The big-endian bytes of each cell in hex: 16 digits, the first always 0 (a cell is
    # below 16^15), whose place the opening quote takes.
    digits = binascii.hexlify(s.to_numpy().astype(">u8").tobytes())
    width = H3_DIGITS + 3  # "…", per cell
    out = np.empty(n * width + 1, dtype=np.uint8)
    rows = out[1:].reshape(n, width)
    rows[:, :16] = np.frombuffer(digits, dtype=np.uint8).reshape(n, 16)
    rows[:, 0] = rows[:, H3_DIGITS + 1] = ord('"')
    rows[:, H3_DIGITS + 2] = ord(",")
    out[0] = ord("[")
    out[-1] = ord("]")  # in place of the last comma
    return out.tobytes()


def _column_json(s: pl.Series) -> bytes:
    """Any plain payload column as a JSON array (see above)."""
    dtype = s.dtype
    if dtype.is_integer():
        return _ints_json(s)
    if dtype.is_float():
        return _floats_json(s)
    if dtype == pl.String:
        return _strings_json(s)
    return orjson.dumps(s.to_list())


def _value_texts(s: pl.Series) -> pl.Series:
    """Each value of a plain column as its JSON text (a String series without nulls)."""
    dtype = s.dtype
    if dtype.is_integer():
        return s.cast(pl.Int64).cast(pl.String).fill_null("null")
    if dtype.is_float():
        if not s.len():
            return pl.Series(s.name, [], dtype=pl.String)
        # number texts hold no comma: split orjson's array text back into its values
        array = _floats_json(s)[1:-1].decode()
        return pl.Series(s.name, [array]).str.split(",").explode()
    if dtype == pl.String and not s.str.contains(_NEEDS_ESCAPE).any():
        quoted = pl.concat_str([pl.lit('"'), pl.lit(s), pl.lit('"')]).fill_null("null")
        return pl.select(quoted.alias(s.name)).to_series()
    return pl.Series(s.name, [orjson.dumps(v).decode() for v in s.to_list()], dtype=pl.String)


def _rows_json(plain: pl.DataFrame) -> bytes:
    """The rows layout: a JSON array of one object per row, members in column order (the
    bytes ``orjson.dumps(plain.to_dicts())`` gives), assembled by polars from each column's
    value texts; a text column that needs no escape and has no null is quoted in place."""
    if not plain.height:
        return b"[]"
    texts: dict[str, pl.Series] = {}
    parts: list[pl.Expr] = []
    pending = ""
    for i, c in enumerate(plain.columns):
        s = plain.get_column(c)
        pending += ("{" if i == 0 else ",") + orjson.dumps(c).decode() + ":"
        if s.dtype == pl.String and not s.null_count() and not s.str.contains(_NEEDS_ESCAPE).any():
            texts[c] = s
            parts += [pl.lit(pending + '"'), pl.col(c)]
            pending = '"'
        else:
            texts[c] = _value_texts(s)
            parts += [pl.lit(pending), pl.col(c)]
            pending = ""
    row = pl.concat_str([*parts, pl.lit(pending + "}")])
    body = pl.concat_str([pl.lit("["), row.str.join(","), pl.lit("]")]).cast(pl.Binary)
    out: bytes = pl.DataFrame(texts).select(body).item()
    return out


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
    layout = recipe.output.layout
    plain = _with_labels(recipe, _plain(recipe, df, digits, cells_as_text=layout != "columns"))
    _check_ints(plain, recipe)
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
        body = _rows_json(plain)
        return inline_safe(body) if recipe.output.inline else body
    columns: dict[str, bytes] = {}
    dictionaries: dict[str, orjson.Fragment] = {}
    string_keys = {recipe.region.column} if recipe.region else set()
    if recipe.region and recipe.region.label_column:
        string_keys.add(recipe.region.label_column)
    string_keys |= set(recipe.categories)
    for c in plain.columns:
        s = plain.get_column(c)
        if c == HEX and recipe.hex and s.dtype.is_integer():
            cells = _cells_json(s)
            if cells is not None:
                columns[c] = cells
                continue
            s = plain.select(plh3.int_to_str(c)).get_column(c)
        if c in string_keys and s.dtype == pl.String:
            coded = _dictionary(s)
            if coded is not None:
                labels, columns[c] = coded
                dictionaries[c] = orjson.Fragment(labels)
                continue
        columns[c] = _column_json(s)
    head: dict[str, Any] = {
        "format": FORMAT,
        "recipe": recipe.name,
        "level": dict(level),
        "rows": plain.height,
    }
    tail: dict[str, Any] = {}
    if dictionaries:
        tail["dictionaries"] = dictionaries
    tail["accounting"] = dict(accounting)
    if meta:
        tail["meta"] = dict(meta)
    # The document orjson would write for {**head, "columns": columns, **tail}, joined from
    # its parts (the columns are most of the bytes: each is copied once).
    parts = [orjson.dumps(head)[:-1], b',"columns":{']
    for i, (name, array) in enumerate(columns.items()):
        parts += [b"," if i else b"", orjson.dumps(name), b":", array]
    parts += [b"},", orjson.dumps(tail)[1:]]
    body = b"".join(parts)
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
