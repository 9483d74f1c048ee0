"""Sources: find the input files, check their schema against the recipe, open them lazily.

This module owns everything about the event table before grouping: resolving the recipe's
path (one file, a glob, a folder, hive-partitioned folders), the file format (parquet, CSV,
NDJSON), the schema check of every column role (``reduce check`` runs only this), the
structured filters pushed into the scan, the input row count (parquet: from metadata), and
the source fingerprint used by manifests and the partial cache.

Only the columns the recipe needs are read. Nothing from a recipe is evaluated as code:
filters are literal values compared with a column.
"""

from __future__ import annotations

import datetime as dt
import glob as _glob
import hashlib
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import polars as pl

from reduce.errors import SourceError, did_you_mean, shown_path
from reduce.keys import parse_coordinate_text, parse_time_text
from reduce.recipe import Filter, Recipe
from reduce.recipe import filter_instant as _instant

_EXT = {
    ".parquet": "parquet",
    ".pq": "parquet",
    ".csv": "csv",
    ".ndjson": "ndjson",
    ".jsonl": "ndjson",
}


@dataclass(frozen=True, slots=True)
class OpenSource:
    """A source ready to scan: the lazy frame (filters pushed in) plus facts about it."""

    files: tuple[Path, ...]
    format: str
    schema: pl.Schema
    fingerprint: str
    frame: pl.LazyFrame  # needed columns only, recipe filters applied
    columns: tuple[str, ...] = ()
    filters: tuple[pl.Expr, ...] = ()
    null_values: tuple[str, ...] = ()
    text_columns: tuple[str, ...] = ()  # read as text, then converted by ``casts``
    casts: tuple[pl.Expr, ...] = ()
    states: tuple[FileState, ...] = ()  # each file as opened, see changed_files()
    hive: bool | None = None  # hive-partitioned folders (None: told by the files themselves)

    def changed_files(self) -> list[Path]:
        """The files that differ now from when the source was opened (size, modification
        time, or a hash of the parquet footer / the text's last bytes)."""
        return [s.path for s in self.states if file_state(s.path) != s]

    def check_unchanged(self) -> None:
        """Raise :class:`SourceError` naming the first file changed since the source was
        opened: a result scanned from it may mix two versions, so it must not be used."""
        changed = self.changed_files()
        if changed:
            raise SourceError(
                f"{shown_path(changed[0])}: changed while it was being read "
                "(size, modification time or content); nothing was published "
                "or cached: run again once the file is complete"
            )

    def read_error(self, e: pl.exceptions.PolarsError) -> SourceError | None:
        """For a scan polars could not complete: the bad NDJSON line if there is one, else
        a read error if the needed columns cannot be read at all, else None (not a problem
        of the input). Runs on the error path only."""
        named = self.line_error()
        if named is not None:
            return named
        try:
            self.frame.select(pl.all().null_count()).collect(engine="streaming")
        except pl.exceptions.PolarsError as read:
            return SourceError(
                f"{_files_label(self.files)}: cannot read as {self.format} "
                f"({_first_line(read)}); check that the files are complete "
                "and of that format"
            )
        return None

    def line_error(self) -> SourceError | None:
        """For an NDJSON source that polars cannot read: the first bad line, named."""
        return (
            ndjson_line_error(self.files, self.schema, self.columns)
            if self.format == "ndjson"
            else None
        )

    def rows_frame(self, offset: int, length: int) -> pl.LazyFrame:
        """Like ``frame``, over input rows ``offset`` to ``offset + length`` only (counted
        before filters, so consecutive ranges split the input without overlap)."""
        lf = _scan(
            self.files,
            self.format,
            list(self.columns),
            null_values=self.null_values,
            text_columns=self.text_columns,
            hive=self.hive,
        ).slice(offset, length)
        if self.casts:
            lf = lf.with_columns(self.casts)
        for e in self.filters:
            lf = lf.filter(e)
        return lf

    def count_rows(self) -> int:
        """Rows before filters (parquet: read from file metadata, no data scan)."""
        try:
            return int(
                _scan(self.files, self.format, None, null_values=self.null_values)
                .select(pl.len())
                .collect()
                .item()
            )
        except pl.exceptions.PolarsError as e:
            raise SourceError(
                f"{_files_label(self.files)}: cannot read ({_first_line(e)})"
            ) from None


def _first_line(e: BaseException) -> str:
    text = str(e).strip().splitlines()
    return text[0] if text else type(e).__name__


def _files_label(files: tuple[Path, ...] | list[Path]) -> str:
    if len(files) == 1:
        return shown_path(files[0])
    return f"{shown_path(files[0])} (+{len(files) - 1} more files)"


def resolve_files(pattern: str, display: str, fmt: str | None) -> tuple[list[Path], str]:
    """Expand the recipe's source path into a sorted list of files and their format."""
    where = f"source.path {display!r}"
    try:
        return _resolve_files(pattern, where, fmt)
    except OSError as e:  # a name too long for the file system, a loop of links ...
        raise SourceError(
            f"{where}: cannot read the path ({e.strerror}); check the path, "
            "which is relative to the recipe file"
        ) from None


def _resolve_files(pattern: str, where: str, fmt: str | None) -> tuple[list[Path], str]:
    p = Path(pattern)
    if any(ch in pattern for ch in "*?["):
        files = sorted(Path(f) for f in _glob.glob(pattern, recursive=True) if Path(f).is_file())
        if not files:
            raise SourceError(
                f"{where}: the pattern matches no file; check the path and the pattern"
            )
    elif p.is_dir():
        files = sorted(
            f
            for f in p.rglob("*")
            if f.is_file()
            and f.suffix.lower() in _EXT
            and not any(part.startswith((".", "_")) for part in f.relative_to(p).parts)
        )
        if not files:
            raise SourceError(f"{where}: the folder holds no .parquet, .csv or .ndjson file")
    elif p.is_file():
        files = [p]
    else:
        raise SourceError(
            f"{where}: no such file or folder ({shown_path(p)}); check the path, "
            "which is relative to the recipe file"
        )
    formats = {_EXT.get(f.suffix.lower()) for f in files}
    if fmt is None:
        if None in formats or len(formats) != 1:
            raise SourceError(
                f"{where}: cannot tell the file format from the file names; set "
                "source.format to parquet, csv or ndjson"
            )
        fmt = formats.pop()
        assert fmt is not None
    return files, fmt


def fingerprint(files: list[Path] | tuple[Path, ...]) -> str:
    """A digest of every input file's name, size and modification time (order-insensitive)."""
    h = hashlib.sha256()
    for f in sorted(files, key=lambda x: str(x.resolve())):
        st = f.stat()
        h.update(f"{f.resolve()}\0{st.st_size}\0{st.st_mtime_ns}\n".encode())
    return h.hexdigest()[:32]


def _hive(files: list[Path] | tuple[Path, ...]) -> bool:
    return len(files) > 1 and any("=" in part for f in files for part in f.parent.parts[-3:])


def _scan(
    files: list[Path] | tuple[Path, ...],
    fmt: str,
    columns: list[str] | None,
    *,
    null_values: tuple[str, ...] = (),
    text_columns: tuple[str, ...] = (),
    hive: bool | None = None,
) -> pl.LazyFrame:
    """The files as a lazy frame. Text equal to one of the markers (see :func:`_markers`) is
    null: CSV fields, quoted or not, and NDJSON strings (JSON has its own null too).
    CSV ``text_columns`` are read as text (converted afterwards, see :func:`_text_casts`)."""
    srcs = [str(f) for f in files]
    markers = _markers(null_values)
    if fmt == "parquet":
        lf = pl.scan_parquet(srcs, hive_partitioning=_hive(files) if hive is None else hive)
    elif fmt == "csv":
        # Invalid UTF-8 in text becomes U+FFFD (the documented policy), never a crash.
        lf = pl.scan_csv(
            srcs,
            try_parse_dates=True,
            infer_schema_length=10000,
            encoding="utf8-lossy",
            null_values=markers,
            schema_overrides={c: pl.String for c in text_columns} or None,
        )
    else:
        lf = pl.scan_ndjson(srcs, infer_schema_length=10000)
        text = [
            c
            for c, d in lf.collect_schema().items()
            if d == pl.String and (columns is None or c in columns)
        ]
        if text:
            lf = lf.with_columns(
                pl.when(~pl.col(c).is_in(markers)).then(pl.col(c)).alias(c) for c in text
            )
    return lf if columns is None else lf.select(columns)


def _markers(null_values: tuple[str, ...]) -> list[str]:
    """Text read as missing: the empty string always, and ``source.null_values``."""
    return list(dict.fromkeys(("", *null_values)))


def _text_casts(
    recipe: Recipe,
    fmt: str,
    schema: pl.Schema,
    label: str,
    files: list[Path],
    null_values: tuple[str, ...],
) -> tuple[tuple[str, ...], tuple[pl.Expr, ...], pl.Schema]:
    """CSV coordinates and times read as text and converted here, so that a value that
    cannot be read (``n/a`` in a latitude, ``unknown`` in a time) makes its row invalid (by
    reason, like an out-of-range value) instead of failing the scan or turning the whole
    column into text. Returns the text columns, their conversions and the schema after."""
    if fmt != "csv":
        return (), (), schema
    src = recipe.source
    coords: list[str] = []
    if recipe.needs_coordinates and src.lat and src.lon:
        coords += [src.lat, src.lon]
    if recipe.flow:
        coords += [
            c
            for end in (recipe.flow.origin, recipe.flow.destination)
            for c in (end.lat, end.lon)
            if c
        ]
    coords = [
        c
        for c in dict.fromkeys(coords)
        if c in schema and (schema[c] == pl.String or schema[c].is_numeric())
    ]
    casts = [parse_coordinate_text(c).alias(c) for c in coords]
    fixed: dict[str, Any] = dict(schema.items())
    for c in coords:
        fixed[c] = pl.Float64
    text = list(coords)
    t = src.time if recipe.time else None
    if (
        t
        and t in schema
        and (schema[t] == pl.String or isinstance(schema[t], (pl.Datetime, pl.Date)))
    ):
        raw = _scan(files, fmt, [t], null_values=null_values, text_columns=(t,))
        e, dtype = parse_time_text(raw, t, label)
        casts.append(e.alias(t))
        fixed[t] = dtype
        text.append(t)
    return tuple(text), tuple(casts), pl.Schema(fixed)


def _schema(
    files: list[Path], fmt: str, display: str, null_values: tuple[str, ...] = ()
) -> pl.Schema:
    """The common schema; every parquet file must agree (checked from metadata)."""
    try:
        if fmt == "parquet":
            first = pl.read_parquet_schema(files[0])
            for f in files[1:]:
                other = pl.read_parquet_schema(f)
                if other != first:
                    diff = sorted(set(first.items()) ^ set(other.items()), key=str)
                    col = diff[0][0] if diff else "?"
                    raise SourceError(
                        f"{shown_path(f)}: its schema differs from {shown_path(files[0])} at column "
                        f"{col!r} ({first.get(col, 'missing')} vs {other.get(col, 'missing')}); "
                        f"make every file of "
                        f"source.path {display!r} share one schema"
                    )
            return pl.Schema(_scan(files, fmt, None).collect_schema())
        return pl.Schema(_scan(files, fmt, None, null_values=null_values).collect_schema())
    except SourceError:
        raise
    except (pl.exceptions.PolarsError, OSError) as e:
        bad = files[0]
        if fmt == "parquet":
            for f in files:
                try:
                    pl.read_parquet_schema(f)
                except Exception:
                    bad = f
                    break
        raise SourceError(
            f"{shown_path(bad)}: cannot read as {fmt} ({_first_line(e)}); check that "
            "the file is complete and of that format"
        ) from None


def _is_numeric(dtype: pl.DataType) -> bool:
    return dtype.is_numeric()


def _is_time(dtype: pl.DataType) -> bool:
    return isinstance(dtype, (pl.Datetime, pl.Date)) or dtype == pl.String


def _is_key(dtype: pl.DataType) -> bool:
    return (
        dtype == pl.String
        or isinstance(dtype, (pl.Categorical, pl.Enum))
        or dtype.is_integer()
        or dtype == pl.Boolean
    )


def needed_columns(recipe: Recipe) -> list[str]:
    src = recipe.source
    cols: list[str] = []
    geo = recipe.needs_coordinates
    flow_cols: list[str | None] = []
    if recipe.flow:
        for end in (recipe.flow.origin, recipe.flow.destination):
            flow_cols += [end.column, end.lat, end.lon]
    for c in (
        src.time if recipe.time else None,
        src.lat if geo else None,
        src.lon if geo else None,
        recipe.region.source if recipe.region else None,
        *recipe.category_sources,
        *flow_cols,
        *(m.column for m in recipe.measures),
        *(f.column for f in src.filters),
        *(f.column for m in recipe.measures for f in m.where),
    ):
        if c is not None and c not in cols:
            cols.append(c)
    return cols


def column_roles(recipe: Recipe) -> list[tuple[str, str]]:
    """(recipe key, column) for the columns the recipe reads, for messages."""
    src = recipe.source
    roles: list[tuple[str, str]] = []
    if recipe.time and src.time:
        roles.append(("source.time", src.time))
    if recipe.needs_coordinates and src.lat and src.lon:
        roles += [("source.lat", src.lat), ("source.lon", src.lon)]
    if recipe.region and recipe.region.source:
        roles.append(("group.region.column", recipe.region.source))
    roles += [("group.category", c) for c in recipe.category_sources]
    roles += [(f"measures.{m.name}", m.column) for m in recipe.measures if m.column]
    roles += [(f"{f.key}.column", f.column) for f in src.filters]
    return roles


def check_schema(recipe: Recipe, schema: pl.Schema, label: str) -> None:
    """Every column the recipe names exists and its dtype fits its role."""
    src = recipe.source
    names = list(schema.names())

    def need(col: str, key: str) -> pl.DataType:
        if col not in schema:
            raise SourceError(
                f"{label}: column {col!r} (from {recipe.file.name}: {key}) is not "
                f"in the source{did_you_mean(col, names)}; columns are: "
                f"{', '.join(names[:12])}{' ...' if len(names) > 12 else ''}"
            )
        return schema[col]

    def wrong(col: str, key: str, dtype: pl.DataType, want: str) -> SourceError:
        return SourceError(
            f"{label}: column {col!r} (from {recipe.file.name}: {key}) is "
            f"{dtype}, but {key} needs {want}; convert the column or pick "
            "another"
        )

    if recipe.time and src.time:
        d = need(src.time, "source.time")
        if not _is_time(d):
            raise wrong(src.time, "source.time", d, "a datetime, date or ISO 8601 text")
    coords: list[tuple[str | None, str]] = []
    if recipe.needs_coordinates:
        coords += [(src.lat, "source.lat"), (src.lon, "source.lon")]
    if recipe.flow:
        for end, name in ((recipe.flow.origin, "origin"), (recipe.flow.destination, "destination")):
            if end.column is not None:
                d = need(end.column, f"group.flow.{name}")
                if not _is_key(d):
                    raise wrong(end.column, f"group.flow.{name}", d, "text or integers")
            else:
                coords += [(end.lat, f"group.flow.{name}.lat"), (end.lon, f"group.flow.{name}.lon")]
    for col, key in coords:
        assert col is not None
        d = need(col, key)
        if not _is_numeric(d):
            raise wrong(col, key, d, "numbers (decimal degrees)")
    if recipe.region and recipe.region.source:
        d = need(recipe.region.source, "group.region.column")
        if not _is_key(d):
            raise wrong(recipe.region.source, "group.region.column", d, "text or integers")
    for c in recipe.category_sources:
        d = need(c, "group.category")
        if not _is_key(d):
            raise wrong(c, "group.category", d, "text, integers or booleans")
    for m in recipe.measures:
        if m.column is None:
            continue
        key = f"measures.{m.name}"
        d = need(m.column, key)
        if m.kind in ("sum", "min", "max", "mean") and not (_is_numeric(d) or d == pl.Boolean):
            raise wrong(m.column, key, d, "numbers")
        if m.kind == "distinct" and d.is_nested():
            raise wrong(m.column, key, d, "plain values (not lists or structs)")
    for f in (*src.filters, *(f for m in recipe.measures for f in m.where)):
        d = need(f.column, f.key + ".column")
        _try_filter(f, _filter_expr(f, d, src.naive_zone, label), schema, label)


def where_mask(recipe: Recipe, where: tuple[Filter, ...], schema: pl.Schema, label: str) -> pl.Expr:
    """A measure's ``where``: true on rows every filter keeps (a null compares false, as in
    source.filter)."""
    return pl.all_horizontal(
        [
            _filter_expr(f, schema[f.column], recipe.source.naive_zone, label).fill_null(False)
            for f in where
        ]
    )


def _utc_instants(col: pl.Expr, dtype: pl.DataType, zone: str) -> pl.Expr:
    """A date or datetime column as UTC instants (naive values read in ``zone``, as the
    time key reads them; a date is its local midnight)."""
    if isinstance(dtype, pl.Date):
        col, dtype = col.cast(pl.Datetime("us")), pl.Datetime("us")
    assert isinstance(dtype, pl.Datetime)
    if dtype.time_zone is None:
        col = col.dt.replace_time_zone(zone, ambiguous="earliest", non_existent="null")
    return col.dt.convert_time_zone("UTC")


def _utc_lit(v: dt.datetime, dtype: pl.DataType) -> pl.Expr:
    unit = dtype.time_unit if isinstance(dtype, pl.Datetime) else "us"
    return pl.lit(v, dtype=pl.Datetime(unit or "us")).dt.replace_time_zone("UTC")


def _filter_expr(f: Filter, dtype: pl.DataType, zone: str, label: str) -> pl.Expr:
    """The filter as an expression. Time literals are compared as instants in UTC, whatever
    the column's zone (see :func:`reduce.recipe.filter_instant` for how each kind of literal
    is read); a date ``max`` covers that whole day (up to, not including, the next local
    midnight)."""
    col = pl.col(f.column)
    is_time_col = isinstance(dtype, (pl.Datetime, pl.Date))

    def check(v: Any, key: str) -> Any:
        ok = (
            (
                isinstance(v, str)
                and (dtype == pl.String or isinstance(dtype, (pl.Categorical, pl.Enum)))
            )
            or (isinstance(v, bool) and dtype == pl.Boolean)
            or (isinstance(v, (int, float)) and not isinstance(v, bool) and dtype.is_numeric())
            or (isinstance(v, (dt.datetime, dt.date)) and is_time_col)
        )
        if not ok:
            shown = v.isoformat() if isinstance(v, (dt.datetime, dt.date)) else repr(v)
            raise SourceError(
                f"{label}: {key}: value {shown} cannot be compared with column "
                f"{f.column!r} of type {dtype}; use a value of the column's type"
            )
        return v

    if f.op in ("in", "not_in"):
        vals = [check(v, f"{f.key}.{f.op}") for v in f.values]
        if is_time_col:
            inst = _utc_instants(col, dtype, zone)
            e = pl.any_horizontal([inst == _utc_lit(_instant(v, zone), dtype) for v in vals])
            return e if f.op == "in" else ~e
        if dtype.is_numeric() and any(isinstance(v, float) for v in vals):
            col, vals = col.cast(pl.Float64), [float(v) for v in vals]
        c = col.cast(pl.String) if isinstance(dtype, (pl.Categorical, pl.Enum)) else col
        e = c.is_in(vals)
        return e if f.op == "in" else ~e
    if f.op == "null":
        return col.is_null()
    if f.op == "not_null":
        return col.is_not_null()
    conds = []
    lo = None if f.lo is None else check(f.lo, f"{f.key}.min")
    hi = None if f.hi is None else check(f.hi, f"{f.key}.max")
    if is_time_col:
        inst = _utc_instants(col, dtype, zone)
        if lo is not None:
            conds.append(inst >= _utc_lit(_instant(lo, zone), dtype))
        if hi is not None and not isinstance(hi, dt.datetime):  # a date: the whole day
            conds.append(inst < _utc_lit(_instant(hi, zone, end_of_day=True), dtype))
        elif hi is not None:
            conds.append(inst <= _utc_lit(_instant(hi, zone), dtype))
    else:
        if lo is not None:
            conds.append(col >= lo)
        if hi is not None:
            conds.append(col <= hi)
    e = conds[0]
    for c2 in conds[1:]:
        e = e & c2
    return e


def _try_filter(f: Filter, expr: pl.Expr, schema: pl.Schema, label: str) -> None:
    """Evaluate a filter on an empty frame of the source's schema, so that ``reduce check``
    finds a literal the column cannot be compared with (not the scan, blaming the file)."""
    try:
        pl.DataFrame(schema=schema).lazy().filter(expr).collect()
    except pl.exceptions.PolarsError as e:
        raise SourceError(
            f"{label}: {f.key}: cannot compare column {f.column!r} "
            f"({schema[f.column]}) with the filter's values ({_first_line(e)}); "
            "use a value of the column's type"
        ) from None


def open_source(recipe: Recipe) -> OpenSource:
    """Resolve, schema-check and lazily open the recipe's source (no data is read)."""
    src = recipe.source
    files, fmt = resolve_files(src.path, src.display, src.format)
    label = _files_label(files)
    if src.null_values and fmt == "parquet":
        raise SourceError(
            f"{label}: source.null_values applies to CSV and NDJSON text; "
            "parquet stores missing values as nulls, so remove the key"
        )
    schema = _schema(files, fmt, src.display, src.null_values)
    text, casts, schema = _text_casts(recipe, fmt, schema, label, files, src.null_values)
    if fmt == "csv":
        _check_csv_numbers(recipe, schema, files, src.null_values)
    check_schema(recipe, schema, label)
    cols = needed_columns(recipe)
    lf = _scan(files, fmt, cols, null_values=src.null_values, text_columns=text)
    if casts:
        lf = lf.with_columns(casts)
    # in/not_in and ranges keep rows where the test is true; nulls in the column fail it.
    filters = tuple(
        _filter_expr(f, schema[f.column], src.naive_zone, label).fill_null(False)
        for f in src.filters
    )
    for e in filters:
        lf = lf.filter(e)
    states = tuple(file_state(f) for f in files)  # before the fingerprint: see changed_files
    return OpenSource(
        files=tuple(files),
        format=fmt,
        schema=schema,
        fingerprint=fingerprint(files),
        frame=lf,
        columns=tuple(cols),
        filters=filters,
        null_values=src.null_values,
        text_columns=text,
        casts=casts,
        states=states,
    )


def file_source(src: OpenSource, state: FileState) -> OpenSource:
    """One file of an opened source, read exactly as the whole source reads it (same column
    types, conversions, filters and hive columns), for a partial of that file alone."""
    f = state.path
    hive = _hive(src.files)
    lf = _scan(
        [f],
        src.format,
        list(src.columns),
        null_values=src.null_values,
        text_columns=src.text_columns,
        hive=hive,
    )
    if src.casts:
        lf = lf.with_columns(src.casts)
    want = src.frame.collect_schema()
    if lf.collect_schema() != want:  # a text file's types inferred from its own lines
        lf = lf.cast(dict(want.items()), strict=False)
    for e in src.filters:
        lf = lf.filter(e)
    return OpenSource(
        files=(f,),
        format=src.format,
        schema=src.schema,
        fingerprint=fingerprint([f]),
        frame=lf,
        columns=src.columns,
        filters=src.filters,
        null_values=src.null_values,
        text_columns=src.text_columns,
        casts=src.casts,
        states=(state,),
        hive=hive,
    )


def _check_csv_numbers(
    recipe: Recipe, schema: pl.Schema, files: list[Path], null_values: tuple[str, ...]
) -> None:
    """A CSV measure column read as text because some value in it is not a number: name the
    file, the first such value and its line (the column cannot be read at all)."""
    for m in recipe.measures:
        if (
            m.kind not in ("sum", "min", "max", "mean")
            or m.column is None
            or schema.get(m.column) != pl.String
        ):
            continue
        c = pl.col(m.column)
        for f in files:
            hit = (
                pl.scan_csv(
                    str(f),
                    infer_schema=False,
                    encoding="utf8-lossy",
                    null_values=_markers(null_values),
                )
                .select(c)
                .with_row_index("__line", offset=2)
                .filter(
                    c.is_not_null() & c.str.strip_chars().cast(pl.Float64, strict=False).is_null()
                )
                .head(1)
                .collect()
            )
            if hit.height:
                line, value = hit.row(0)
                raise SourceError(
                    f"{shown_path(f)}: column {m.column!r} (from {recipe.file.name}: "
                    f"measures.{m.name}) holds {value!r} at line {line:,}, which cannot be read "
                    "as a number; fix that value, list it in source.null_values, or convert "
                    "the column"
                )


def locate_value(src: OpenSource, column: str, value: str) -> tuple[Path, int] | None:
    """The file and line (the header is line 1; a quoted field holding a line break makes
    later lines one off) of the first CSV field of ``column`` holding ``value``: on the error
    path only, to say where a value that cannot be read is."""
    if src.format != "csv":
        return None
    for f in src.files:
        try:
            hit = (
                pl.scan_csv(
                    str(f),
                    infer_schema=False,
                    encoding="utf8-lossy",
                    null_values=_markers(src.null_values),
                )
                .select(pl.col(column))
                .with_row_index("__line", offset=2)
                .filter(pl.col(column) == value)
                .select("__line")
                .head(1)
                .collect()
            )
        except pl.exceptions.PolarsError:
            continue
        if hit.height:
            return f, int(hit.item())
    return None


# --------------------------------------------------------------------------------------------
# Files changed during a run
# --------------------------------------------------------------------------------------------

_TAIL_BYTES = 64 * 1024


@dataclass(frozen=True, slots=True)
class FileState:
    """What a source file looked like: size, modification time and a content hash (the
    parquet footer, which changes with any change of the data; for text, the last bytes)."""

    path: Path
    size: int
    mtime_ns: int
    digest: str


def file_state(path: Path) -> FileState:
    """The state of ``path`` now (a missing or unreadable file gets an empty digest)."""
    try:
        with open(path, "rb") as f:
            st = os.fstat(f.fileno())
            size = st.st_size
            n = min(size, _TAIL_BYTES)
            if size >= 12:
                f.seek(size - 8)
                tail = f.read(8)
                if tail[4:] == b"PAR1":  # footer length, then the magic (parquet format)
                    n = min(size, int.from_bytes(tail[:4], "little") + 8)
            f.seek(size - n)
            digest = hashlib.sha256(f.read(n)).hexdigest()
            return FileState(path, size, st.st_mtime_ns, digest)
    except OSError:
        return FileState(path, -1, -1, "")


# --------------------------------------------------------------------------------------------
# NDJSON lines that cannot be read
# --------------------------------------------------------------------------------------------


def _fits(value: Any, dtype: pl.DataType) -> bool:
    if value is None:
        return True
    if dtype == pl.Boolean:
        return isinstance(value, bool)
    if dtype.is_numeric():
        return isinstance(value, (int, float)) and not isinstance(value, bool)
    if dtype == pl.String or isinstance(dtype, (pl.Datetime, pl.Date)):
        return isinstance(value, str)
    return True


def ndjson_line_error(
    files: tuple[Path, ...], schema: pl.Schema, columns: tuple[str, ...]
) -> SourceError | None:
    """The first line of ``files`` that is not a JSON object, or whose value for one of
    ``columns`` does not fit the inferred type, as one error naming file and line number;
    None if every line reads (the problem is elsewhere). Read on the error path only."""
    import orjson

    for f in files:
        try:
            with open(f, "rb") as fh:
                for n, line in enumerate(fh, start=1):
                    if not line.strip():
                        continue
                    try:
                        doc = orjson.loads(line)
                    except orjson.JSONDecodeError as e:
                        why = f"not valid JSON ({e.msg})"
                    else:
                        if not isinstance(doc, dict):
                            why = f"a JSON {type(doc).__name__}, not an object"
                        else:
                            bad = next(
                                (
                                    c
                                    for c in columns
                                    if c in schema and not _fits(doc.get(c), schema[c])
                                ),
                                None,
                            )
                            if bad is None:
                                continue
                            why = (
                                f"key {bad!r} holds {str(doc.get(bad))[:40]!r}, which "
                                f"cannot be read as {schema[bad]} like the lines before it"
                            )
                    return SourceError(
                        f"{shown_path(f)}: line {n}: {why}; fix or remove "
                        "that line (NDJSON holds one JSON object per line)"
                    )
        except OSError as e:
            return SourceError(f"{shown_path(f)}: cannot read ({e.strerror})")
    return None
