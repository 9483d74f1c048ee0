"""Bad inputs through the command line: one exact line, the right exit code, nothing touched.

Every case below first publishes a good payload with a good recipe (``good.toml`` ->
``out/base.json`` + ``out/base.json.manifest.json``), then breaks one thing (the recipe, a source
file, the denominators table or the output location) and runs the bad recipe against the
same output. Each case asserts:

- the exit code (2 for bad recipes and inputs, 1 when no level fits the budget);
- stderr is exactly one line, ``error: <file or key or column>: <what>; <what to do>``,
  with no traceback;
- nothing changed on disk: every file and folder of the working folder (the payload and
  manifest written earlier included) is byte-for-byte what it was, and no temporary or
  partial file was left behind. Only the partial cache may change.

Messages are part of the command-line contract (README: "Errors are one line on stderr
naming the file, the recipe key or column, and what to do").
"""

from __future__ import annotations

import datetime as dt
import json
import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from tests._builders import FIXTURES, events, invoke

GOOD = (FIXTURES / "recipes" / "base.toml").read_text(encoding="utf-8")
POPULATION = (FIXTURES / "population.csv").read_text(encoding="utf-8")
CACHE = "cache"


@pytest.fixture(autouse=True)
def _isolated(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("REDUCE_CACHE_DIR", str(tmp_path / CACHE))


def one_line(stderr: str) -> str:
    assert "Traceback" not in stderr, stderr
    lines = stderr.strip("\n").splitlines()
    assert len(lines) == 1, stderr
    return lines[0]


def snapshot(root: Path) -> dict[str, object]:
    """Every file (bytes), folder and symbolic link under ``root``, except the cache."""
    out: dict[str, object] = {}
    for dirpath, dirnames, filenames in os.walk(root):
        rel = Path(dirpath).relative_to(root)
        if rel.parts[:1] == (CACHE,):
            continue
        for d in dirnames:
            p = Path(dirpath) / d
            out[str(rel / d)] = ("link", os.readlink(p)) if p.is_symlink() else "dir"
        for f in filenames:
            p = Path(dirpath) / f
            out[str(rel / f)] = ("link", os.readlink(p)) if p.is_symlink() else p.read_bytes()
    return out


def publish_good(tmp: Path, n: int = 500) -> None:
    events(n=n).write_parquet(tmp / "events.parquet")
    (tmp / "pop.csv").write_text(POPULATION)
    (tmp / "good.toml").write_text(GOOD)
    code, _, err = invoke("run", "good.toml", "--quiet")
    assert code == 0, err
    assert (tmp / "out" / "base.json").is_file()
    assert (tmp / "out" / "base.json.manifest.json").is_file()


# --------------------------------------------------------------------------------------------
# Preparations: each breaks one input in the working folder
# --------------------------------------------------------------------------------------------

Prepare = Callable[[Path], None]


def _csv_events(n: int) -> pl.DataFrame:
    """Events with text timestamps (ISO 8601 with Z) and the measure column as text."""
    return events(n=n).with_columns(
        pl.col("ts").dt.strftime("%Y-%m-%dT%H:%M:%SZ"), pl.col("sev").cast(pl.String)
    )


def csv_with_text_in_measure(n: int, row: int) -> Prepare:
    def prep(tmp: Path) -> None:
        df = _csv_events(n).with_columns(
            pl.when(pl.int_range(pl.len()) == row)
            .then(pl.lit("12x"))
            .otherwise(pl.col("sev"))
            .alias("sev")
        )
        df.write_csv(tmp / "events.csv")

    return prep


def csv_with_mixed_zones(tmp: Path) -> None:
    df = events(n=500).with_columns(pl.col("ts").dt.strftime("%Y-%m-%d %H:%M:%S"))
    df = df.with_columns(
        pl.when(pl.int_range(pl.len()) == 300)
        .then(pl.col("ts") + "+02:00")
        .otherwise(pl.col("ts"))
        .alias("ts")
    )
    df.write_csv(tmp / "events.csv")


def random_bytes_parquet(tmp: Path) -> None:
    (tmp / "corrupt.parquet").write_bytes(np.random.default_rng(1).bytes(4096))


def truncated_parquet(tmp: Path) -> None:
    data = (tmp / "events.parquet").read_bytes()
    (tmp / "half.parquet").write_bytes(data[: len(data) // 2])


def damaged_parquet_pages(tmp: Path) -> None:
    """Bytes of the data pages overwritten; the footer (schema) is intact."""
    data = bytearray((tmp / "events.parquet").read_bytes())
    rng = np.random.default_rng(0)
    for i in rng.integers(4, len(data) - 2000, 200):
        data[i] = int(rng.integers(0, 256))
    (tmp / "mid.parquet").write_bytes(bytes(data))


def parts(change: Callable[[int, pl.DataFrame], pl.DataFrame | bytes]) -> Prepare:
    """Four parquet files of 125 events each under parts/, one of them changed."""

    def prep(tmp: Path) -> None:
        (tmp / "parts").mkdir()
        df = events(n=500)
        for i in range(4):
            got = change(i, df.slice(i * 125, 125))
            target = tmp / "parts" / f"p{i}.parquet"
            if isinstance(got, bytes):
                target.write_bytes(got)
            else:
                got.write_parquet(target)

    return prep


def write(name: str, data: str | bytes) -> Prepare:
    def prep(tmp: Path) -> None:
        p = tmp / name
        p.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(data, bytes):
            p.write_bytes(data)
        else:
            p.write_text(data)

    return prep


def parquet_events(change: Callable[[pl.DataFrame], pl.DataFrame]) -> Prepare:
    def prep(tmp: Path) -> None:
        change(events(n=500)).write_parquet(tmp / "events.parquet")

    return prep


def symlink_out_of_folder(tmp: Path) -> None:
    elsewhere = tmp / "elsewhere"
    elsewhere.mkdir()
    (elsewhere / "x.json").write_text('{"format": "reduce.columns/1"}\n')
    (tmp / "out" / "base.json").unlink()
    (tmp / "out" / "base.json").symlink_to(elsewhere / "x.json")


def steps(*preps: Prepare) -> Prepare:
    def prep(tmp: Path) -> None:
        for p in preps:
            p(tmp)

    return prep


# --------------------------------------------------------------------------------------------
# The catalogue
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Bad:
    id: str
    expected: str  # the exact stderr line; {tmp} stands for the working folder
    edits: tuple[tuple[str, str], ...] = ()  # (old, new) replacements in GOOD -> bad.toml
    prepare: Prepare | None = None
    args: tuple[str, ...] = ()
    command: str = "run"
    recipe: str = "bad.toml"
    code: int = 2


def hex_group(extra: tuple[tuple[str, str], ...] = ()) -> tuple[tuple[str, str], ...]:
    return (
        ('region = { column = "prov" }', 'region = { column = "prov" }\nhex = { levels = [7, 6] }'),
        *extra,
    )


SOURCE_CSV = ('path = "events.parquet"', 'path = "events.csv"')

CASES = [
    # ---- recipes ------------------------------------------------------------------------
    Bad(
        "recipe-file-missing",
        recipe="nope.toml",
        expected="error: nope.toml: recipe file not found; check the path",
    ),
    Bad(
        "recipe-not-utf8",
        prepare=write("bad.toml", b'name = "b\xffse"\n'),
        expected="error: bad.toml: is not UTF-8 text; save the recipe as UTF-8",
    ),
    Bad(
        "recipe-is-a-folder",
        prepare=lambda tmp: ((tmp / "bad.toml").unlink(), (tmp / "bad.toml").mkdir()),
        expected="error: bad.toml: is a folder, not a recipe file",
    ),
    Bad(
        "toml-syntax-error-names-the-line",
        edits=(("per = 100000", "per = 100 000"),),
        expected="error: bad.toml: TOML syntax error: Expected newline or end of document "
        "after a statement (at line 21, column 11)",
    ),
    Bad(
        "unknown-top-level-key-with-hint",
        edits=(('name = "base"', 'nmae = "base"'),),
        expected="error: bad.toml: nmae: unknown key (did you mean 'name'?); allowed here: "
        "name, description, source, group, measures, normalize, prune, budget, "
        "output",
    ),
    Bad(
        "unknown-nested-key-with-hint",
        edits=(('on = "gzip"', 'on = "gzip"\nmaxx = 3'),),
        expected="error: bad.toml: budget.maxx: unknown key (did you mean 'max'?); allowed "
        "here: max, on, order",
    ),
    Bad(
        "wrong-type-text-for-an-integer",
        edits=(("per = 100000", 'per = "100000"'),),
        expected="error: bad.toml: normalize.per: must be an integer, got a string '100000'",
    ),
    Bad(
        "wrong-type-text-for-a-table",
        edits=(
            (
                '[source]\npath = "events.parquet"\ntime = "ts"\nlat = "lat"\nlon = "lon"\n',
                'source = "events.parquet"\n',
            ),
        ),
        expected="error: bad.toml: source: must be a table, got a string",
    ),
    Bad(
        "empty-time-ladder",
        edits=(('levels = ["1d", "1w"]', "levels = []"),),
        expected="error: bad.toml: group.time.levels: is empty; list at least one level, "
        "finest first",
    ),
    Bad(
        "time-ladder-coarsest-first",
        edits=(('levels = ["1d", "1w"]', 'levels = ["1w", "1d"]'),),
        expected="error: bad.toml: group.time.levels: must go from finest to coarsest, but 1w "
        "is followed by 1d",
    ),
    Bad(
        "hex-ladder-coarsest-first",
        edits=hex_group((("[7, 6]", "[6, 7]"),)),
        expected="error: bad.toml: group.hex.levels: must go from finest to coarsest "
        "(strictly decreasing resolutions), but 6 is followed by 7",
    ),
    Bad(
        "hex-resolution-above-15",
        edits=hex_group((("[7, 6]", "[16, 6]"),)),
        expected="error: bad.toml: group.hex.levels[0]: 16 is not an H3 resolution; use an "
        "integer 0..15",
    ),
    Bad(
        "hex-resolution-below-0",
        edits=hex_group((("[7, 6]", "[7, -1]"),)),
        expected="error: bad.toml: group.hex.levels[1]: -1 is not an H3 resolution; use an "
        "integer 0..15",
    ),
    Bad(
        "unknown-time-unit",
        edits=(('levels = ["1d", "1w"]', 'levels = ["1d", "1fortnight"]'),),
        expected="error: bad.toml: group.time.levels[1]: '1fortnight' is not a time bin; use "
        "minutes, hours, days, weeks, months or years such as 15m, 1h, 6h, 1d, 1w, "
        "1mo, 1y",
    ),
    Bad(
        "time-bin-not-dividing-its-unit",
        edits=(('levels = ["1d", "1w"]', 'levels = ["7m", "1d"]'),),
        expected="error: bad.toml: group.time.levels[0]: '7m' does not divide its parent unit "
        "evenly; use one of 1m, 2m, 3m, 4m, 5m, 6m, 10m, 12m, 15m, 20m, 30m",
    ),
    Bad(
        "time-bins-that-do-not-nest",
        edits=(('levels = ["1d", "1w"]', 'levels = ["1w", "1mo"]'),),
        expected="error: bad.toml: group.time.levels: 1mo bins are not made of whole 1w bins, "
        "so they cannot be rolled up exactly; drop one",
    ),
    Bad(
        "unknown-time-zone",
        edits=(('zone = "UTC"', 'zone = "Mars/Olympus"'),),
        expected="error: bad.toml: group.time.zone: unknown time zone 'Mars/Olympus'; use an "
        "IANA name such as UTC or Europe/Paris",
    ),
    # A zone name that is a folder of the time-zone database (a continent) is refused like
    # any other unknown zone, not left to zoneinfo's IsADirectoryError (exit 3).
    Bad(
        "time-zone-naming-a-continent",
        edits=(('zone = "UTC"', 'zone = "America"'),),
        expected="error: bad.toml: group.time.zone: unknown time zone 'America'; use an "
        "IANA name such as UTC or Europe/Paris",
    ),
    Bad(
        "top-k-zero",
        edits=(("k = [3, 2]", "k = [3, 0]"),),
        expected="error: bad.toml: prune.top.k: 0 is out of range; use >= 1",
    ),
    Bad(
        "top-k-negative",
        edits=(("k = [3, 2]", "k = -1"),),
        expected="error: bad.toml: prune.top.k: -1 is out of range; use >= 1",
    ),
    Bad(
        "top-k-not-decreasing",
        edits=(("k = [3, 2]", "k = [2, 3]"),),
        expected="error: bad.toml: prune.top.k: must go from most detail to least (strictly "
        "decreasing), but 2 is followed by 3",
    ),
    Bad(
        "budget-zero",
        edits=(('max = "1MB"', "max = 0"),),
        expected="error: bad.toml: budget.max: 0 is not a positive size; a budget must be "
        "above zero bytes",
    ),
    Bad(
        "budget-negative",
        edits=(('max = "1MB"', "max = -5"),),
        expected="error: bad.toml: budget.max: -5 is not a positive size; a budget must be "
        "above zero bytes",
    ),
    Bad(
        "budget-zero-with-unit",
        edits=(('max = "1MB"', 'max = "0KB"'),),
        expected="error: bad.toml: budget.max: '0KB' is not a positive size; a budget must be "
        "above zero bytes",
    ),
    Bad(
        "duplicate-measure-name",
        edits=(('reports = "count"', 'reports = "count"\nreports = "count"'),),
        expected="error: bad.toml: TOML syntax error: Cannot overwrite a value (at line 16, "
        "column 18)",
    ),
    # A measure named like the rate that normalize derives would be silently replaced by
    # the rate (exit 0, the declared sum lost).
    Bad(
        "measure-named-like-a-derived-rate",
        edits=(('reports = "count"', 'reports = "count"\nreports_per_100000 = { sum = "conf" }'),),
        expected="error: bad.toml: measures.reports_per_100000: has the same name as a column "
        "that normalize derives; rename the measure",
    ),
    # TOML integers are 64-bit; a longer one must be a recipe error, not an internal error.
    Bad(
        "integer-beyond-64-bits",
        edits=(("per = 100000", "per = 100000000000000000000000"),),
        expected="error: bad.toml: normalize.per: 100000000000000000000000 is beyond TOML's "
        "64-bit integer range; use a smaller number",
    ),
    # A key with a carriage return must be shown escaped: raw, "\r" sends a terminal's cursor
    # back and the line is overwritten (and str.splitlines() sees two lines).
    Bad(
        "unknown-key-with-a-control-character",
        edits=(('on = "gzip"', 'on = "gzip"\n"ma\\rx" = 3'),),
        expected="error: bad.toml: budget.ma\\rx: unknown key (did you mean 'max'?); allowed "
        "here: max, on, order",
    ),
    Bad(
        "measure-on-a-missing-column",
        edits=(('mean = "sev"', 'mean = "sevr"'),),
        expected="error: events.parquet: column 'sevr' (from bad.toml: measures.severity) is "
        "not in the source (did you mean 'sev'?); columns are: ts, lat, lon, kind, "
        "prov, sev, conf, who",
    ),
    Bad(
        "measure-on-a-text-column",
        edits=(('mean = "sev"', 'mean = "kind"'),),
        expected="error: events.parquet: column 'kind' (from bad.toml: measures.severity) is "
        "String, but measures.severity needs numbers; convert the column or pick "
        "another",
    ),
    Bad(
        "normalisation-without-denominators",
        edits=(('denominators = { path = "pop.csv", key = "prov", value = "pop" }\n', ""),),
        expected="error: bad.toml: normalize.measures: rates need denominators; add "
        "normalize.denominators = { path = ..., key = ..., value = ... }",
    ),
    Bad(
        "filter-value-of-another-type",
        edits=(('lon = "lon"', 'lon = "lon"\nfilter = [{ column = "sev", in = ["high"] }]'),),
        expected="error: events.parquet: source.filter[0].in: value 'high' cannot be compared "
        "with column 'sev' of type Int64; use a value of the column's type",
    ),
    Bad(
        "set-without-a-value",
        args=("--set", "budget.max"),
        expected="error: --set 'budget.max': use key.path=value, e.g. --set budget.max=200KB",
    ),
    Bad(
        "set-validated-like-the-file",
        args=("--set", "prune.top.k=[]"),
        expected="error: bad.toml: prune.top.k: is empty; list at least one k, largest first",
    ),
    # ---- sources ------------------------------------------------------------------------
    Bad(
        "source-file-missing",
        edits=(('path = "events.parquet"', 'path = "nope.parquet"'),),
        expected="error: source.path 'nope.parquet': no such file or folder (nope.parquet); "
        "check the path, which is relative to the recipe file",
    ),
    # A file name longer than the file system allows (255 bytes), not an internal error.
    Bad(
        "source-file-name-too-long",
        edits=(('path = "events.parquet"', f'path = "{"x" * 300}.parquet"'),),
        expected=f"error: source.path '{'x' * 300}.parquet': cannot read the path (File name "
        "too long); check the path, which is relative to the recipe file",
    ),
    Bad(
        "source-glob-matching-nothing",
        edits=(('path = "events.parquet"', 'path = "parts/*.parquet"'),),
        prepare=lambda tmp: (tmp / "parts").mkdir(),
        expected="error: source.path 'parts/*.parquet': the pattern matches no file; check "
        "the path and the pattern",
    ),
    Bad(
        "source-folder-without-data-files",
        edits=(('path = "events.parquet"', 'path = "parts"'),),
        prepare=write("parts/readme.txt", "nothing here\n"),
        expected="error: source.path 'parts': the folder holds no .parquet, .csv or .ndjson file",
    ),
    Bad(
        "source-format-not-inferable",
        edits=(('path = "events.parquet"', 'path = "events.txt"'),),
        prepare=write("events.txt", "a,b\n1,2\n"),
        expected="error: source.path 'events.txt': cannot tell the file format from the file "
        "names; set source.format to parquet, csv or ndjson",
    ),
    Bad(
        "source-with-zero-rows",
        edits=(('path = "events.parquet"', 'path = "empty.parquet"'),),
        prepare=lambda tmp: events(n=10).head(0).write_parquet(tmp / "empty.parquet"),
        expected="error: empty.parquet: the source has no rows; check that the export that "
        "writes it succeeded",
    ),
    Bad(
        "parquet-of-random-bytes",
        edits=(('path = "events.parquet"', 'path = "corrupt.parquet"'),),
        prepare=random_bytes_parquet,
        expected="error: corrupt.parquet: cannot read as parquet (parquet: File out of "
        "specification: The file must end with PAR1 or PARE); check that the file is "
        "complete and of that format",
    ),
    Bad(
        "parquet-cut-in-half",
        edits=(('path = "events.parquet"', 'path = "half.parquet"'),),
        prepare=truncated_parquet,
        expected="error: half.parquet: cannot read as parquet (parquet: File out of "
        "specification: The file must end with PAR1 or PARE); check that the file is "
        "complete and of that format",
    ),
    # Damaged data pages are found during the scan: the message must blame the file, not
    # the keys ("cannot compute the keys ...; check the column types named in the recipe").
    Bad(
        "parquet-with-damaged-pages",
        edits=(('path = "events.parquet"', 'path = "mid.parquet"'),),
        prepare=damaged_parquet_pages,
        expected="error: mid.parquet: cannot read as parquet (parquet: File out of "
        "specification: zstd error: Data corruption detected); check that the file is "
        "complete and of that format",
    ),
    Bad(
        "one-of-many-files-corrupt",
        edits=(('path = "events.parquet"', 'path = "parts/*.parquet"'),),
        prepare=parts(lambda i, df: np.random.default_rng(3).bytes(3000) if i == 2 else df),
        expected="error: parts/p2.parquet: cannot read as parquet (parquet: File out of "
        "specification: The file must end with PAR1 or PARE); check that the file is "
        "complete and of that format",
    ),
    Bad(
        "one-of-many-files-with-another-column-type",
        edits=(('path = "events.parquet"', 'path = "parts/*.parquet"'),),
        prepare=parts(
            lambda i, df: df.with_columns(pl.col("sev").cast(pl.Float64)) if i == 2 else df
        ),
        expected="error: parts/p2.parquet: its schema differs from parts/p0.parquet at column "
        "'sev' (Int64 vs Float64); make every file of source.path 'parts/*.parquet' "
        "share one schema",
    ),
    # A column absent from one file is "missing", not "None".
    Bad(
        "one-of-many-files-missing-a-column",
        edits=(('path = "events.parquet"', 'path = "parts/*.parquet"'),),
        prepare=parts(lambda i, df: df.drop("conf") if i == 2 else df),
        expected="error: parts/p2.parquet: its schema differs from parts/p0.parquet at column "
        "'conf' (Int64 vs missing); make every file of source.path 'parts/*.parquet' "
        "share one schema",
    ),
    Bad(
        "csv-text-in-a-measure-column",
        edits=(SOURCE_CSV,),
        prepare=csv_with_text_in_measure(3000, 2900),
        expected="error: events.csv: column 'sev' (from bad.toml: measures.severity) holds "
        "'12x' at line 2,902, which cannot be read as a number; fix that value, list "
        "it in source.null_values, or convert the column",
    ),
    # Beyond the rows used to infer the column types, "12x" fails the scan: the message must
    # name the value and the recipe key, not "cannot compute the keys".
    Bad(
        "csv-text-in-a-measure-column-far-down",
        edits=(SOURCE_CSV,),
        prepare=csv_with_text_in_measure(12000, 11000),
        expected="error: events.csv: column 'sev' (from bad.toml: measures.severity) holds "
        "'12x' at line 11,002, which cannot be read as i64 like the rows before it; "
        "fix that value, list it in source.null_values, or convert the column",
    ),
    Bad(
        "coordinates-stored-as-text",
        edits=hex_group(),
        prepare=parquet_events(lambda df: df.with_columns(pl.col("lat").cast(pl.String))),
        expected="error: events.parquet: column 'lat' (from bad.toml: source.lat) is String, "
        "but source.lat needs numbers (decimal degrees); convert the column or pick "
        "another",
    ),
    Bad(
        "timestamps-with-and-without-a-zone",
        edits=(SOURCE_CSV,),
        prepare=csv_with_mixed_zones,
        expected="error: events.csv: column 'ts' (source.time) mixes timestamps with a zone "
        "and without one (e.g. '2025-03-11 10:34:47+02:00' and '2025-03-14 "
        "05:29:17'); write them all with an offset or all without",
    ),
    Bad(
        "every-row-invalid-by-key",
        prepare=parquet_events(
            lambda df: df.with_columns(pl.lit(None, dtype=pl.String).alias("prov"))
        ),
        expected="error: events.parquet: every row is invalid (500 by key); check the region "
        "and category columns for empty values",
    ),
    Bad(
        "every-row-invalid-by-time",
        prepare=parquet_events(lambda df: df.with_columns(pl.lit("2025-13-45").alias("ts"))),
        expected="error: events.parquet: every row is invalid (500 by time); check source.time "
        "and its format",
    ),
    Bad(
        "every-row-filtered",
        edits=(('lon = "lon"', 'lon = "lon"\nfilter = [{ column = "kind", in = ["none"] }]'),),
        expected="error: events.parquet: source.filter removes all 500 rows; loosen the "
        "filters in bad.toml",
    ),
    # ---- denominators -------------------------------------------------------------------
    Bad(
        "denominators-file-missing",
        edits=(('path = "pop.csv"', 'path = "people.csv"'),),
        expected="error: people.csv (normalize.denominators): file not found; check "
        "normalize.denominators.path, which is relative to the recipe file",
    ),
    Bad(
        "denominators-missing-key-column",
        prepare=write("pop.csv", "province,pop\nAAA,1\nBBB,2\nCCC,3\nDDD,4\n"),
        expected="error: pop.csv (normalize.denominators): column 'prov' "
        "(normalize.denominators.key) is missing; columns are: province, pop",
    ),
    Bad(
        "denominators-missing-key-column-found-by-check",
        command="check",
        prepare=write("pop.csv", "province,pop\nAAA,1\nBBB,2\nCCC,3\nDDD,4\n"),
        expected="error: pop.csv (normalize.denominators): column 'prov' "
        "(normalize.denominators.key) is missing; columns are: province, pop",
    ),
    Bad(
        "denominators-missing-value-column",
        prepare=write("pop.csv", "prov,people\nAAA,1\nBBB,2\nCCC,3\nDDD,4\n"),
        expected="error: pop.csv (normalize.denominators): column 'pop' "
        "(normalize.denominators.value) is missing; columns are: prov, people",
    ),
    Bad(
        "denominators-duplicate-key",
        prepare=write("pop.csv", "prov,pop\nAAA,1\nBBB,2\nCCC,3\nDDD,4\nBBB,5\n"),
        expected="error: pop.csv (normalize.denominators): key 'BBB' appears more than once "
        "in column 'prov'; keep one row per key",
    ),
    Bad(
        "denominators-negative-value",
        prepare=write("pop.csv", "prov,pop\nAAA,1\nBBB,-2\nCCC,3\nDDD,4\n"),
        expected="error: pop.csv (normalize.denominators): key 'BBB' has value -2 in column "
        "'pop'; a denominator must be a non-negative number",
    ),
    Bad(
        "denominators-nan-value",
        prepare=write("pop.csv", "prov,pop\nAAA,1.5\nBBB,NaN\nCCC,3\nDDD,4\n"),
        expected="error: pop.csv (normalize.denominators): key 'BBB' has value nan in column "
        "'pop'; a denominator must be a non-negative number",
    ),
    # An infinite denominator would turn every rate of its key into 0.0, silently.
    Bad(
        "denominators-infinite-value",
        prepare=write("pop.csv", "prov,pop\nAAA,inf\nBBB,2\nCCC,3\nDDD,4\n"),
        expected="error: pop.csv (normalize.denominators): key 'AAA' has value inf in column "
        "'pop'; a denominator must be a finite, non-negative number",
    ),
    Bad(
        "denominators-text-values",
        prepare=write("pop.csv", "prov,pop\nAAA,1\nBBB,two\nCCC,3\nDDD,4\n"),
        expected="error: pop.csv (normalize.denominators): column 'pop' holds String, not "
        "numbers; fix the values",
    ),
    # A header and no rows is not "column 'pop' holds String, not numbers".
    Bad(
        "denominators-without-rows",
        prepare=write("pop.csv", "prov,pop\n"),
        expected="error: pop.csv (normalize.denominators): has no rows; add one row per key",
    ),
    Bad(
        "denominators-keys-differing-in-case",
        prepare=write("pop.csv", "prov,pop\nAAA,1\nBBB,2\nCCC,3\nDDD,4\naaa,5\n"),
        expected="error: pop.csv (normalize.denominators): keys 'AAA' and 'aaa' differ only "
        "in case or padding; keep one spelling",
    ),
    Bad(
        "denominators-keys-differing-in-padding",
        prepare=write("pop.csv", 'prov,pop\nAAA,1\nBBB,2\nCCC,3\nDDD,4\n" AAA",5\n'),
        expected="error: pop.csv (normalize.denominators): keys ' AAA' and 'AAA' differ only "
        "in case or padding; keep one spelling",
    ),
    # ---- outputs ------------------------------------------------------------------------
    Bad(
        "output-folder-is-a-file",
        edits=(('path = "out/base.json"', 'path = "blocker/base.json"'),),
        prepare=write("blocker", "not a folder\n"),
        expected="error: {tmp}/blocker: cannot create the output folder (File exists); choose "
        "another --out",
    ),
    Bad(
        "output-folder-under-a-file",
        edits=(('path = "out/base.json"', 'path = "blocker/sub/base.json"'),),
        prepare=write("blocker", "not a folder\n"),
        expected="error: {tmp}/blocker/sub: cannot create the output folder (Not a directory); "
        "choose another --out",
    ),
    # One line, like output.path under a file, not click's four-line usage screen.
    Bad(
        "out-option-naming-a-file",
        args=("--out", "blocker"),
        prepare=write("blocker", "not a folder\n"),
        expected="error: blocker: cannot create the output folder (File exists); choose "
        "another --out",
    ),
    Bad(
        "foreign-file-at-the-payload-path",
        edits=(('path = "out/base.json"', 'path = "out/notes.json"'),),
        prepare=write("out/notes.json", "my own notes\n"),
        expected="error: {tmp}/out/notes.json: exists and was not written by reduce; move it "
        "away or choose another output path",
    ),
    # A file of someone else's at the manifest path is never replaced.
    Bad(
        "foreign-file-at-the-manifest-path",
        edits=(('path = "out/base.json"', 'path = "out/notes.json"'),),
        prepare=write("out/notes.json.manifest.json", "my own notes\n"),
        expected="error: {tmp}/out/notes.json.manifest.json: exists and is not a reduce manifest; "
        "move it away",
    ),
    Bad(
        "foreign-file-at-the-manifest-path-beside-our-payload",
        prepare=write("out/base.json.manifest.json", "my own notes\n"),
        expected="error: {tmp}/out/base.json.manifest.json: exists and is not a reduce manifest; "
        "move it away",
    ),
    Bad(
        "payload-path-is-a-link-leaving-the-folder",
        prepare=symlink_out_of_folder,
        expected="error: {tmp}/out: output file 'base.json' resolves outside the output "
        "folder; write inside it",
    ),
    Bad(
        "output-file-name-with-a-nul-byte",
        edits=(('path = "out/base.json"', 'path = "out/ba\\u0000se.json"'),),
        expected="error: {tmp}/out: output file name 'ba\\x00se.json' must be a plain file "
        "name inside the output folder",
    ),
    Bad(
        "output-path-naming-a-folder",
        edits=(('path = "out/base.json"', 'path = "out/.."'),),
        expected="error: bad.toml: output.path: 'out/..' has no file extension; name the "
        "payload file, e.g. out/name.json",
    ),
    # ---- budget -------------------------------------------------------------------------
    Bad(
        "nothing-fits-the-budget",
        code=1,
        edits=(('max = "1MB"', 'max = "100B"'),),
        expected="error: bad.toml: no level fits the budget of 100 B gzip: the smallest "
        "payload is 606 B (606 bytes gzip) at time=1w, top=2, digits=4; raise "
        "budget.max (or --budget), add a wider time bin, lower prune.top.k",
    ),
]


def test_catalogue_has_at_least_forty_distinct_cases() -> None:
    ids = [c.id for c in CASES]
    assert len(ids) == len(set(ids))
    assert len(ids) >= 40


@pytest.mark.parametrize("bad", CASES, ids=[c.id for c in CASES])
def test_bad_input_gives_one_exact_line_and_changes_nothing(tmp_path: Path, bad: Bad) -> None:
    publish_good(tmp_path)
    text = GOOD
    for old, new in bad.edits:
        assert old in text, f"{bad.id}: {old!r} not in the good recipe"
        text = text.replace(old, new, 1)
    (tmp_path / "bad.toml").write_text(text)
    if bad.prepare is not None:
        bad.prepare(tmp_path)
    before = snapshot(tmp_path)

    code, _out, err = invoke(bad.command, bad.recipe, *bad.args)

    assert (code, err.strip()) == (bad.code, bad.expected.replace("{tmp}", str(tmp_path)))
    one_line(err)
    assert snapshot(tmp_path) == before


# --------------------------------------------------------------------------------------------
# Inputs that are not errors, or not only errors
# --------------------------------------------------------------------------------------------


def test_zero_denominator_gives_null_rate_and_is_counted(tmp_path: Path) -> None:
    publish_good(tmp_path)
    (tmp_path / "pop.csv").write_text("prov,pop\nAAA,0\nBBB,45000\nCCC,300000\nDDD,80000\n")
    code, out, err = invoke("run", "good.toml")
    assert code == 0, err
    payload = json.loads((tmp_path / "out" / "base.json").read_bytes())
    manifest = json.loads((tmp_path / "out" / "base.json.manifest.json").read_bytes())
    cols = payload["columns"]
    labels = payload.get("dictionaries", {}).get("prov")
    prov = [labels[i] for i in cols["prov"]] if labels else cols["prov"]
    rates = cols["reports_per_100000"]
    aaa = [r for p, r in zip(prov, rates) if p == "AAA"]
    assert aaa and all(r is None for r in aaa)
    assert all(r is not None for p, r in zip(prov, rates) if p != "AAA")
    assert manifest["denominators"]["rows_without_denominator"] == len(aaa)
    assert (
        f"warning: base: {len(aaa):,} rows have no usable denominator (rate left empty)"
        in err.splitlines()
    )


def test_mean_of_large_integers_does_not_wrap_around(tmp_path: Path) -> None:
    """Integer epoch nanoseconds (~1.7e18) overflow a 64-bit sum after six rows; a mean over
    them must still lie between the smallest and the largest value (a 64-bit sum wraps to
    negative numbers)."""
    publish_good(tmp_path)
    base = int(dt.datetime(2024, 1, 1, tzinfo=dt.UTC).timestamp()) * 10**9
    df = events(n=500).with_columns(
        (pl.lit(base, dtype=pl.Int64) + pl.int_range(pl.len(), dtype=pl.Int64) * 10**9).alias("sev")
    )
    df.write_parquet(tmp_path / "events.parquet")
    code, _, err = invoke("run", "good.toml", "--quiet")
    assert code == 0, err
    means = json.loads((tmp_path / "out" / "base.json").read_bytes())["columns"]["severity"]
    lo, hi = base, base + 499 * 10**9
    assert all(lo * (1 - 1e-12) <= m <= hi * (1 + 1e-12) for m in means), means[:5]


def test_filter_mixing_integers_and_decimals_keeps_the_matching_rows(tmp_path: Path) -> None:
    """``in = [1, 2.5]`` on an integer column keeps the rows equal to 1 (not exit 3,
    "unexpected value while building Series of type Int64")."""
    publish_good(tmp_path)
    text = GOOD.replace('lon = "lon"', 'lon = "lon"\nfilter = [{ column = "sev", in = [1, 2.5] }]')
    (tmp_path / "bad.toml").write_text(text)
    code, _, err = invoke("run", "bad.toml", "--quiet")
    assert code == 0, err
    acc = json.loads((tmp_path / "out" / "base.json").read_bytes())["accounting"]
    kept = int((events(n=500)["sev"] == 1).sum())
    assert acc["input_rows"] == 500
    assert acc["filtered_rows"] == 500 - kept
