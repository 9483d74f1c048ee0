"""Tests of the pre-publish audit library (``reduce.audit``).

External references are named beside each check: Python's gzip (RFC 1952) and the brotli
module (RFC 7932) for sizes, hashlib for SHA-256, the stdlib json and csv modules for the
encodings, pyarrow for Arrow IPC, Python's shortest round-trip float repr for decimals,
JavaScript's Number.MAX_SAFE_INTEGER (ECMA-262) for safe integers.
"""

from __future__ import annotations

import csv
import gzip
import hashlib
import io
import json
import os
import random
from pathlib import Path
from typing import Any

import brotli
import numpy as np
import orjson
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pyarrow import feather, ipc

from reduce import audit as audit_module
from reduce.audit import (
    AuditReport,
    FileAudit,
    advice,
    audit_paths,
    load_budgets,
    render_markdown,
    render_table,
    report_to_json,
    transfer_seconds,
)
from reduce.errors import AuditError
from tests import _builders as builders

columns_payload = builders.columns_payload
dump = builders.dump
write_bytes = builders.write_bytes
write_manifest = builders.write_manifest
write_payload = builders.write_payload

SAFE = "outside the JavaScript safe range ±(2^53-1)"


def audit_one(path: Path, **kwargs: Any) -> FileAudit:
    report = audit_paths([path], **kwargs)
    assert len(report.files) == 1
    return report.files[0]


def repr_decimals(x: float) -> int:
    """Decimals of Python's shortest round-trip repr, exponent included."""
    mantissa, _, exponent = repr(x).partition("e")
    return max(len(mantissa.partition(".")[2]) - int(exponent or 0), 0)


# ---------------------------------------------------------------------------- sizes


def test_sizes_equal_stdlib_gzip_and_brotli_module(tmp_path: Path) -> None:
    rng = random.Random(7)
    payload = columns_payload(
        rows=400,
        columns={
            "count": [rng.randint(0, 1000) for _ in range(400)],
            "share": [round(rng.random(), 3) for _ in range(400)],
        },
        accounting={
            "input_rows": 400,
            "filtered_rows": 0,
            "invalid_rows": 0,
            "suppressed_rows": 0,
            "represented_rows": 400,
        },
    )
    del payload["dictionaries"]
    path = write_payload(tmp_path / "p.json", payload)
    other = write_bytes(tmp_path / "notes.txt", bytes(rng.getrandbits(8) for _ in range(5000)))
    report = audit_paths([path, other])
    for f, p in zip(report.files, (path, other)):
        data = p.read_bytes()
        assert f.raw == len(data)
        # Python stdlib gzip (RFC 1952), level 9, zero mtime.
        assert f.gzip == len(gzip.compress(data, 9, mtime=0))
        # The brotli module (RFC 7932), quality 11.
        assert f.brotli == len(brotli.compress(data, quality=11))
        assert f.sizes is not None and f.sizes.as_dict() == {
            "raw": f.raw,
            "gzip": f.gzip,
            "brotli": f.brotli,
        }
    assert report.files[0].problems == ()
    assert report.files[1].kind == "other"
    assert report.files[1].rows is None and report.files[1].fields == ()
    assert "not a recognised layout: sizes only" in report.files[1].notes


def test_brotli_deferred_above_threshold_unless_asked(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = write_payload(tmp_path / "x.json")
    data = path.read_bytes()
    monkeypatch.setattr(audit_module, "BROTLI_AUTO_MAX_BYTES", 10)
    f = audit_one(path)
    assert f.brotli is None and f.sizes is None
    assert "brotli not measured (file over 10 B; use --brotli)" in f.notes
    assert (
        "manifest x.json.manifest.json: bytes.brotli not verified (brotli not measured)" in f.notes
    )
    assert "not measured (use --brotli)" in render_table(audit_paths([path]))
    expected = len(brotli.compress(data, quality=11))  # the brotli module, RFC 7932
    assert audit_one(path, brotli=True).brotli == expected
    # A brotli budget needs the exact figure, so it is measured without being asked.
    assert audit_one(path, budget="1MB", on="brotli").brotli == expected
    assert audit_one(path, total="1MB", on="brotli").brotli == expected
    assert audit_one(path, on="brotli").brotli == expected
    assert audit_one(path, budget="1MB", on="gzip").brotli is None


# ---------------------------------------------------------------------------- columns payload


def test_valid_columns_payload_with_manifest(tmp_path: Path) -> None:
    path = write_payload(tmp_path / "x.json")
    f = audit_one(path)
    payload = columns_payload()
    assert f.kind == "columns"
    assert f.problems == ()
    assert (f.rows, f.elements, f.element_kind) == (3, 3, "cells")
    assert f.surface == "SVG/DOM"
    # Bytes per column: the compact JSON text of each column array (stdlib json).
    by_name = {c.name: c.bytes for c in f.fields}
    for name, values in payload["columns"].items():
        assert by_name[name] == len(dump(values))
    assert by_name["kind (dictionary)"] == len(dump(payload["dictionaries"]["kind"]))
    assert [c.bytes for c in f.fields] == sorted((c.bytes for c in f.fields), reverse=True)
    assert not any("manifest" in n for n in f.notes)


def test_a_run_on_a_gzip_budget_audits_clean_with_brotli_not_recorded(tmp_path: Path) -> None:
    import reduce

    recipe = builders.project(tmp_path)
    out = reduce.run(recipe, budget="15KB", use_cache=False)
    assert out.path is not None and out.manifest is not None
    assert out.manifest["bytes"]["brotli"] is None  # a gzip budget does not measure brotli
    f = audit_one(out.path, brotli=True)
    assert f.problems == ()
    name = out.path.name + ".manifest.json"
    assert f"manifest {name}: bytes.brotli not recorded (the run did not measure it)" in f.notes
    # The audit measures it itself: the brotli module, RFC 7932.
    assert f.brotli == len(brotli.compress(out.path.read_bytes(), quality=11))


def test_payload_without_manifest_is_audited_with_a_note(tmp_path: Path) -> None:
    path = write_payload(tmp_path / "x.json", manifest=False)
    f = audit_one(path)
    assert f.problems == ()
    assert "no manifest beside it (x.json.manifest.json): checksum and sizes not checked" in f.notes


def _broken(tmp_path: Path, **overrides: Any) -> FileAudit:
    return audit_one(write_payload(tmp_path / "x.json", columns_payload(**overrides)))


def test_a_column_shorter_than_rows_is_a_problem(tmp_path: Path) -> None:
    columns = columns_payload()["columns"] | {"count": [12, 5]}
    f = _broken(tmp_path, columns=columns)
    assert f.problems == ("column 'count' has 2 values, expected rows = 3",)


def test_nan_written_by_hand(tmp_path: Path) -> None:
    text = dump(columns_payload()).replace(b'"count":[12,5,7]', b'"count":[12,NaN,7]')
    path = write_bytes(tmp_path / "x.json", text)
    write_manifest(path)  # stdlib json reads NaN, so the manifest itself is consistent
    f = audit_one(path)
    byte = text.index(b"NaN")
    assert f.problems == (
        (
            f"not valid JSON (RFC 8259): NaN is not a JSON value at line 1 column {byte + 1} "
            f"(byte {byte})"
        ),
    )


@pytest.mark.parametrize(
    ("text", "message"),
    [
        # Positions counted by hand on the literal text.
        (b'{"a":\n  [1, NaN]}', "NaN is not a JSON value at line 2 column 7 (byte 12)"),
        (b'{"a":\n [1, Infinity]}', "Infinity is not a JSON value at line 2 column 6 (byte 11)"),
        (b'{"a":\n [-Infinity]}', "-Infinity is not a JSON value at line 2 column 3 (byte 8)"),
        ('["é", NaN]'.encode(), "NaN is not a JSON value at line 1 column 7 (byte 7)"),
        (b"[1, 2,]", "trailing comma is not allowed at line 1 column 6 (byte 5)"),
    ],
)
def test_invalid_json_is_a_problem_naming_line_and_column(
    tmp_path: Path, text: bytes, message: str
) -> None:
    f = audit_one(write_bytes(tmp_path / "any.json", text))
    assert f.problems == (f"not valid JSON (RFC 8259): {message}",)


def test_integer_beyond_safe_range(tmp_path: Path) -> None:
    columns = columns_payload()["columns"] | {"count": [12, 2**60, 7]}
    f = _broken(tmp_path, columns=columns)
    assert f.problems == (f"column 'count': integer 1152921504606846976 at row 1 is {SAFE}",)


def test_integers_up_to_2_53_minus_1_pass_and_beyond_fail(tmp_path: Path) -> None:
    # Number.MAX_SAFE_INTEGER = 2**53 - 1 (ECMA-262): allowed; 2**53 and beyond are not.
    ok = columns_payload()["columns"] | {"count": [2**53 - 1, -(2**53 - 1), 0]}
    assert _broken(tmp_path, columns=ok).problems == ()
    bad = columns_payload()["columns"] | {"count": [2**53, 0, -(2**53)]}
    assert _broken(tmp_path, columns=bad).problems == (
        f"column 'count': integer 9007199254740992 at row 0 is {SAFE} (2 such values)",
    )


def test_integer_literal_beyond_64_bits(tmp_path: Path) -> None:
    text = dump(columns_payload()).replace(
        b'"count":[12,5,7]', b'"count":[12,123456789012345678901234,7]'
    )
    path = write_bytes(tmp_path / "x.json", text)
    write_manifest(path)
    byte = text.index(b"123456789012345678901234")
    assert audit_one(path).problems == (
        (
            f"integer literal 123456789012345678901234 at line 1 column {byte + 1} (byte {byte}) "
            f"is {SAFE}"
        ),
    )


def test_unsafe_integer_elsewhere_in_payload(tmp_path: Path) -> None:
    f = _broken(tmp_path, meta={"ids": [1, 2**60]})
    assert f.problems == (f"key 'meta': integer 1152921504606846976 is {SAFE}",)


def test_a_manifest_checksum_that_differs_is_a_problem(tmp_path: Path) -> None:
    path = write_payload(tmp_path / "x.json")
    write_manifest(path, sha256="0" * 64)
    digest = hashlib.sha256(path.read_bytes()).hexdigest()  # hashlib SHA-256 (FIPS 180-4)
    assert audit_one(path).problems == (
        (
            "manifest x.json.manifest.json key 'sha256': \"0000000000000000…\" does not "
            f'match the payload\'s sha256 "{digest[:16]}…"'
        ),
    )


def test_manifest_sizes_and_rows_checked(tmp_path: Path) -> None:
    path = write_payload(tmp_path / "x.json")
    data = path.read_bytes()
    true_gzip = len(gzip.compress(data, 9, mtime=0))  # stdlib gzip, RFC 1952
    true_brotli = len(brotli.compress(data, quality=11))  # brotli module, RFC 7932
    write_manifest(
        path,
        bytes={"raw": len(data) + 1, "gzip": true_gzip + 2, "brotli": true_brotli - 3},
        rows=4,
    )
    assert audit_one(path).problems == (
        (
            f"manifest x.json.manifest.json key 'bytes.raw': {len(data) + 1}, but the file "
            f"measures {len(data)}"
        ),
        (
            f"manifest x.json.manifest.json key 'bytes.gzip': {true_gzip + 2}, but the file "
            f"measures {true_gzip}"
        ),
        (
            f"manifest x.json.manifest.json key 'bytes.brotli': {true_brotli - 3}, but the "
            f"file measures {true_brotli}"
        ),
        "manifest x.json.manifest.json key 'rows': 4, but the payload has 3 rows",
    )


def test_manifest_naming_another_payload(tmp_path: Path) -> None:
    path = write_payload(tmp_path / "x.json")
    write_manifest(path, payload="y.json", format="reduce.manifest/9")
    assert audit_one(path).problems == (
        (
            "manifest x.json.manifest.json key 'format': \"reduce.manifest/9\", expected "
            '"reduce.manifest/1"'
        ),
        'manifest x.json.manifest.json key \'payload\': "y.json", expected "x.json"',
    )


def test_accounting_that_does_not_add_up_is_a_problem(tmp_path: Path) -> None:
    accounting = columns_payload()["accounting"] | {"represented_rows": 23}
    f = _broken(tmp_path, accounting=accounting)
    assert f.problems == (
        (
            "accounting: input_rows 30 != filtered_rows 2 + invalid_rows 1 + suppressed_rows 3 "
            "+ represented_rows 23 (= 29)"
        ),
    )


def test_accounting_with_unassigned_rows(tmp_path: Path) -> None:
    balanced = columns_payload()["accounting"] | {"represented_rows": 20, "unassigned_rows": 4}
    assert _broken(tmp_path, accounting=balanced).problems == ()
    unbalanced = balanced | {"unassigned_rows": 5}
    assert _broken(tmp_path, accounting=unbalanced).problems == (
        (
            "accounting: input_rows 30 != filtered_rows 2 + invalid_rows 1 + suppressed_rows 3 "
            "+ represented_rows 20 + unassigned_rows 5 (= 31)"
        ),
    )


def test_accounting_keys_missing_or_wrong(tmp_path: Path) -> None:
    accounting = columns_payload()["accounting"]
    del accounting["invalid_rows"]
    accounting["filtered_rows"] = 2.5
    assert _broken(tmp_path, accounting=accounting).problems == (
        "accounting: key 'filtered_rows': expected a non-negative integer, got 2.5",
        "accounting: key 'invalid_rows' is missing",
    )


def test_a_dictionary_index_outside_its_labels_is_a_problem(tmp_path: Path) -> None:
    columns = columns_payload()["columns"] | {"kind": [0, 3, 1]}
    f = _broken(tmp_path, columns=columns)
    assert f.problems == (
        "column 'kind': index 3 at row 1 is outside its dictionary of 3 labels (valid 0..2)",
    )


def test_non_integer_dictionary_index(tmp_path: Path) -> None:
    columns = columns_payload()["columns"] | {"kind": [0, "bus", -1]}
    f = _broken(tmp_path, columns=columns)
    assert f.problems == (
        "column 'kind': value \"bus\" at row 1 is not an integer index into its dictionary",
        "column 'kind': index -1 at row 2 is outside its dictionary of 3 labels (valid 0..2)",
    )


def test_dictionary_without_column_and_missing_keys(tmp_path: Path) -> None:
    payload = columns_payload(dictionaries={"mode": ["a"]})
    del payload["recipe"]
    f = audit_one(write_payload(tmp_path / "x.json", payload))
    assert f.problems == ("key 'recipe' is missing", "dictionary 'mode': no column of that name")


def test_column_that_is_not_an_array(tmp_path: Path) -> None:
    columns = columns_payload()["columns"] | {"count": {"a": 1}}
    f = _broken(tmp_path, columns=columns)
    assert f.problems == ("column 'count': expected an array, got object",)


# ---------------------------------------------------------------------------- precision


def test_precision_counts_against_float_repr(tmp_path: Path) -> None:
    rng = random.Random(3)
    lat = [round(rng.uniform(-80, 80), rng.randint(0, 10)) for _ in range(300)]
    lat += [1.5e-7, 0.000001, 123456.1234567, 1e-7]
    n = len(lat)
    payload = columns_payload(
        rows=n,
        columns={"lat": lat, "lon": [0.5] * n},
        accounting=columns_payload()["accounting"] | {"input_rows": n + 6, "represented_rows": n},
    )
    del payload["dictionaries"]
    f = audit_one(write_payload(tmp_path / "x.json", payload))
    assert f.problems == ()
    expected = sum(1 for v in lat if repr_decimals(v) > 6)  # Python's shortest repr
    assert 0 < expected < n
    counts = {c.name: c.too_precise for c in f.fields}
    assert counts == {"lat": expected, "lon": 0}
    assert f.element_kind == "points"
    assert [c.name for c in f.too_precise_fields] == ["lat"]
    assert f"more than 6 decimals in lat ({expected:,} values)" in render_table(
        audit_paths([tmp_path / "x.json"])
    )


@settings(max_examples=300, deadline=None)
@given(st.lists(st.floats(allow_nan=False, allow_infinity=False, width=64), max_size=50))
def test_precision_helper_matches_repr(values: list[float]) -> None:
    expected = sum(1 for v in values if repr_decimals(v) > 6)  # Python's shortest repr
    assert audit_module._count_too_precise(np.asarray(values, dtype=np.float64)) == expected


# ---------------------------------------------------------------------------- other layouts


def _compact_len(value: Any) -> int:
    return len(dump(value))


def test_row_json_is_measured_field_by_field_with_precision_notes(tmp_path: Path) -> None:
    rows = [
        {"id": 1, "lat": 52.5200001, "lon": 13.4, "name": "Mitte"},
        {"id": 2, "lat": 52.51, "lon": 13.3999999, "name": "Kreuzberg"},
        {"id": 3, "lat": 52.5, "lon": 13.41},
    ]
    path = write_bytes(tmp_path / "rows.json", dump(rows))
    f = audit_one(path)
    assert (f.kind, f.rows, f.elements, f.element_kind) == ("rows", 3, 3, "points")
    assert f.problems == ()
    expected = {}
    for row in rows:  # "key":value as the stdlib json module writes it compactly
        for key, value in row.items():
            expected[key] = expected.get(key, 0) + _compact_len(key) + 1 + _compact_len(value)
    assert {c.name: c.bytes for c in f.fields} == expected
    assert {c.name: c.too_precise for c in f.fields} == {"id": 0, "lat": 1, "lon": 1, "name": 0}


def test_row_json_unsafe_integer_names_the_row(tmp_path: Path) -> None:
    rows = [{"a": 1}, {"b": 2}, {"a": 2**60}]
    f = audit_one(write_bytes(tmp_path / "rows.json", dump(rows)))
    assert f.problems == (f"key 'a': integer 1152921504606846976 at row 2 is {SAFE}",)


def test_geojson_is_measured_with_coordinate_precision_notes(tmp_path: Path) -> None:
    features = [
        {
            "type": "Feature",
            "geometry": {"type": "Point", "coordinates": [13.4049541, 52.52]},
            "properties": {"name": "a", "value": 1.25},
        },
        {
            "type": "Feature",
            "geometry": {
                "type": "Polygon",
                "coordinates": [[[13.0, 52.0], [13.1, 52.0], [13.1, 52.1234567], [13.0, 52.0]]],
            },
            "properties": {"name": "b"},
        },
        {"type": "Feature", "geometry": None, "properties": None},
    ]
    doc = {"type": "FeatureCollection", "features": features}
    f = audit_one(write_bytes(tmp_path / "areas.geojson", dump(doc)))
    assert (f.kind, f.rows, f.elements, f.element_kind) == ("geojson", 3, 3, "features")
    assert f.problems == ()
    geometry = sum(len('"geometry":') + _compact_len(ft["geometry"]) for ft in features)
    name = sum(len('"name":') + _compact_len(ft["properties"]["name"]) for ft in features[:2])
    value = len('"value":') + _compact_len(1.25)
    assert {c.name: c.bytes for c in f.fields} == {
        "geometry": geometry,
        "name": name,
        "value": value,
    }
    assert {c.name: c.too_precise for c in f.fields} == {"geometry": 2, "name": 0, "value": 0}
    assert f.fields[0].name == "geometry"  # the costliest field comes first


def test_csv_is_measured_column_by_column(tmp_path: Path) -> None:
    text = (
        "hex,count,share,label\n"
        '8928308280fffff,12,0.1234567,"a, quoted"\n'
        "89283082807ffff,5,0.5,b\n"
        "89283082803ffff,7,1.5e-7,\n"
    )
    path = write_bytes(tmp_path / "cells.csv", text.encode())
    f = audit_one(path)
    assert (f.kind, f.rows, f.elements, f.element_kind) == ("csv", 3, 3, "cells")
    assert f.problems == ()
    # Field values as the stdlib csv module reads them, in UTF-8 bytes.
    records = list(csv.DictReader(io.StringIO(text)))
    expected = {k: sum(len(r[k].encode()) for r in records) for k in records[0]}
    assert {c.name: c.bytes for c in f.fields} == expected
    assert {c.name: c.too_precise for c in f.fields} == {
        "hex": 0,
        "count": 0,
        "share": 2,
        "label": 0,
    }


def test_unreadable_csv_is_a_finding(tmp_path: Path) -> None:
    f = audit_one(write_bytes(tmp_path / "bad.csv", b"a,b\n1,2,3\n"))
    assert len(f.problems) == 1 and f.problems[0].startswith("not readable as CSV: ")


@pytest.mark.parametrize("fmt", ["file", "stream", "feather"])
def test_arrow_ipc_is_measured_column_by_column(tmp_path: Path, fmt: str) -> None:
    table = pa.table(
        {
            "lat": pa.array([52.1234567, 52.5, None, 48.1], pa.float64()),
            "lon": pa.array([13.4, 13.41, 13.0, 11.5751234], pa.float64()),
            "count": pa.array([1, 2, 3, 4], pa.int32()),
        }
    )
    if fmt == "file":
        path = tmp_path / "t.arrow"
        with ipc.new_file(path, table.schema) as writer:
            writer.write_table(table)
    elif fmt == "stream":
        path = tmp_path / "t.arrow"
        with ipc.new_stream(path, table.schema) as writer:
            writer.write_table(table)
    else:
        path = tmp_path / "t.feather"
        feather.write_feather(table, path, compression="uncompressed")
    f = audit_one(path)
    assert (f.kind, f.rows, f.elements, f.element_kind) == ("arrow", 4, 4, "points")
    assert f.problems == ()
    # In-memory Arrow buffer sizes as pyarrow reports them for the same table.
    assert {c.name: c.bytes for c in f.fields} == {
        name: table.column(name).nbytes for name in table.column_names
    }
    assert {c.name: c.too_precise for c in f.fields} == {"lat": 1, "lon": 1, "count": 0}


def test_arrow_h3_integer_cells(tmp_path: Path) -> None:
    import h3

    cells = ["8928308280fffff", "89283082807ffff"]
    table = pa.table({"cell": pa.array([h3.str_to_int(c) for c in cells], pa.uint64())})
    path = tmp_path / "cells.arrow"
    with ipc.new_file(path, table.schema) as writer:
        writer.write_table(table)
    assert audit_one(path).element_kind == "cells"
    plain = pa.table({"cell": pa.array([1, 2], pa.uint64())})
    path2 = tmp_path / "plain.arrow"
    with ipc.new_file(path2, plain.schema) as writer:
        writer.write_table(plain)
    assert audit_one(path2).element_kind == "rows"


def test_broken_arrow_is_a_finding(tmp_path: Path) -> None:
    f = audit_one(write_bytes(tmp_path / "t.arrow", b"not arrow at all"))
    assert f.kind == "arrow"
    assert len(f.problems) == 1
    assert f.problems[0].startswith("not readable as Arrow IPC (file or stream format): ")


def test_json_of_unknown_layout(tmp_path: Path) -> None:
    f = audit_one(write_bytes(tmp_path / "cfg.json", dump({"format": "other/1", "x": [1]})))
    assert f.kind == "json" and f.rows is None and f.problems == ()
    assert f.notes[:2] == (
        "format 'other/1' is not a layout this audit knows",
        "JSON of another layout: sizes and safe-integer check only",
    )


# ---------------------------------------------------------------------------- paths


def test_folders_walked_sorted_manifests_and_hidden_skipped(tmp_path: Path) -> None:
    write_payload(tmp_path / "b" / "z.json")
    write_payload(tmp_path / "a.json")
    write_bytes(tmp_path / "b" / "c.csv", b"x\n1\n")
    write_bytes(tmp_path / ".git" / "config.json", b"{}")
    write_bytes(tmp_path / ".hidden.json", b"{}")
    report = audit_paths([tmp_path])
    names = [Path(f.path).relative_to(tmp_path).as_posix() for f in report.files]
    assert names == ["a.json", "b/c.csv", "b/z.json"]
    # Given twice (and via its folder): audited once.
    again = audit_paths([tmp_path / "a.json", tmp_path, tmp_path / "a.json"])
    assert len(again.files) == 3


def test_manifest_given_alone_is_not_a_payload(tmp_path: Path) -> None:
    write_payload(tmp_path / "x.json")
    with pytest.raises(AuditError, match="no payload files to audit"):
        audit_paths([tmp_path / "x.json.manifest.json"])


def test_missing_path_is_an_audit_error(tmp_path: Path) -> None:
    with pytest.raises(AuditError) as info:
        audit_paths([tmp_path / "nope.json"])
    assert info.value.exit_code == 2
    assert info.value.message == f"{tmp_path / 'nope.json'}: no such file or folder"


def test_unreadable_file_is_an_audit_error(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = write_payload(tmp_path / "x.json")
    real = os.open

    def deny(file: Any, flags: int, *args: Any, **kwargs: Any) -> int:
        # Tests run as root here, so a chmod would not deny the read: refuse the open.
        if Path(file).name == "x.json":
            raise PermissionError(13, "Permission denied", str(file))
        return real(file, flags, *args, **kwargs)

    monkeypatch.setattr(os, "open", deny)
    with pytest.raises(AuditError) as info:
        audit_paths([path])
    assert info.value.message == f"{path}: cannot read (Permission denied)"


# ---------------------------------------------------------------------------- budgets


def _budgets(tmp_path: Path, text: str) -> Path:
    return write_bytes(tmp_path / "budgets.toml", text.encode())


def test_budgets_globs_first_match_and_total(tmp_path: Path) -> None:
    small = write_payload(tmp_path / "data" / "small.json")
    big = write_bytes(tmp_path / "data" / "deep" / "big.json", dump(list(range(3000))))
    other = write_bytes(tmp_path / "other.txt", random.Random(1).randbytes(100))
    budgets = _budgets(
        tmp_path,
        """
[[file]]
glob = "data/*.json"
max = "10KB"
on = "raw"

[[file]]
glob = "data/**/*.json"
max = 1000
on = "gzip"

[total]
max = "1KB"
""",
    )
    report = audit_paths([tmp_path / "data", other], budgets_file=budgets)
    by_name = {Path(f.path).name: f for f in report.files}
    s, b, o = by_name["small.json"].budget, by_name["big.json"].budget, by_name["other.txt"].budget
    assert s is not None and (s.on, s.limit, s.over) == ("raw", 10_000, False)
    assert s.source == f"{budgets} [[file]] #1 glob 'data/*.json'"
    assert s.size == small.stat().st_size
    big_gzip = len(gzip.compress(big.read_bytes(), 9, mtime=0))  # stdlib gzip, RFC 1952
    assert big_gzip > 1000  # precondition: the second rule must be exceeded
    assert b is not None and (b.on, b.limit, b.size, b.over) == ("gzip", 1000, big_gzip, True)
    assert o is None  # no rule matches other.txt, and no --budget
    assert report.total is not None
    assert report.total.size == sum(f.gzip for f in report.files)
    assert report.total.source == f"{budgets} [total]"
    assert report.total.over
    assert [p for p, _ in report.findings] == [str(big), "total"]
    # The command line wins over the file, for every file and for the total alike.
    both = audit_paths([tmp_path / "data", other], budgets_file=budgets, budget=50, total="1MB")
    assert {(f.budget.limit, f.budget.on, f.budget.source) for f in both.files if f.budget} == {
        (50, "gzip", "--budget")
    }
    assert both.total is not None and (both.total.limit, both.total.source) == (
        1_000_000,
        "--total",
    )


def test_glob_is_also_matched_against_the_given_path(tmp_path: Path) -> None:
    budgets_dir = tmp_path / "site"
    budgets = write_bytes(budgets_dir / "budgets.toml", b'[[file]]\nglob = "*/p.json"\nmax = 5\n')
    payload = write_payload(tmp_path / "out" / "p.json")
    rule = load_budgets(budgets).rule_for(payload, "out/p.json")
    assert rule is not None and rule.limit == 5
    assert load_budgets(budgets).rule_for(payload, "elsewhere/deep/p.json") is None


@pytest.mark.parametrize(
    ("glob", "path", "matches"),
    [
        ("data/*.json", "data/a.json", True),
        ("data/*.json", "data/sub/a.json", False),
        ("data/**/*.json", "data/a.json", True),
        ("data/**/*.json", "data/sub/deeper/a.json", True),
        ("data/?.json", "data/ab.json", False),
        ("data/[ab].json", "data/b.json", True),
        ("data/[!ab].json", "data/b.json", False),
        ("./data/a.json", "data/a.json", True),
    ],
)
def test_budget_globs_match_paths_as_documented(glob: str, path: str, matches: bool) -> None:
    assert bool(audit_module._glob_regex(glob).fullmatch(path)) is matches


@pytest.mark.parametrize(
    ("text", "message"),
    [
        (
            '[[file]]\nglob = "*.json"\nmaxx = "1KB"\n',
            "[[file]] #1: unknown key 'maxx' (did you mean 'max'?); allowed: glob, max, on",
        ),
        (
            '[totl]\nmax = "1MB"\n',
            (
                "unknown key 'totl' (did you mean 'total'?); expected [[file]] entries and an "
                "optional [total]"
            ),
        ),
        (
            '[total]\nmax = "1MB"\non = "gzp"\n',
            (
                "[total] key 'on': 'gzp' is not a measure (did you mean 'gzip'?); use raw, gzip or "
                "brotli"
            ),
        ),
        (
            '[[file]]\nglob = "*.json"\nmax = "lots"\n',
            "[[file]] #1 key 'max': 'lots' is not a size; use e.g. 300KB, 1.5MB, 200KiB or 250000",
        ),
        ('[[file]]\nmax = "1KB"\n', "[[file]] #1: key 'glob' is missing"),
        ("[[file]\n", None),
    ],
)
def test_a_malformed_budgets_file_is_one_error_naming_the_key(
    tmp_path: Path, text: str, message: str | None
) -> None:
    path = _budgets(tmp_path, text)
    with pytest.raises(AuditError) as info:
        load_budgets(path)
    assert info.value.exit_code == 2
    if message is None:
        assert info.value.message.startswith(f"{path}: not valid TOML: ")
    else:
        assert info.value.message == f"{path}: {message}"


def test_a_missing_budgets_file_is_an_error(tmp_path: Path) -> None:
    with pytest.raises(AuditError, match="budgets file not found"):
        audit_paths([write_payload(tmp_path / "x.json")], budgets_file=tmp_path / "no.toml")


def test_bad_budget_and_measure(tmp_path: Path) -> None:
    path = write_payload(tmp_path / "x.json")
    with pytest.raises(AuditError) as info:
        audit_paths([path], budget="0KB")
    assert info.value.message.startswith("--budget: '0KB' is not a positive size")
    with pytest.raises(AuditError) as info:
        audit_paths([path], on="brotly")
    assert info.value.message == (
        "--on: 'brotly' is not a measure (did you mean 'brotli'?); use raw, gzip or brotli"
    )


def test_a_file_exactly_at_its_budget_passes_and_one_byte_over_fails(tmp_path: Path) -> None:
    path = write_payload(tmp_path / "x.json")
    size = path.stat().st_size
    at = audit_one(path, budget=size, on="raw")
    assert at.budget is not None and not at.budget.over and at.findings == ()
    over = audit_one(path, budget=size - 1, on="raw")
    assert over.budget is not None and over.budget.over
    assert over.findings == (
        (
            f"over budget: raw {size:,} B > {size - 1:,} B ({audit_module.format_size(size)} > "
            f"{audit_module.format_size(size - 1)}; --budget)"
        ),
    )


# ---------------------------------------------------------------------------- advice, output


@pytest.mark.parametrize(
    ("elements", "surface"),
    [
        (0, "SVG/DOM"),
        (1_000, "SVG/DOM"),
        (1_001, "canvas 2D"),
        (100_000, "canvas 2D"),
        (100_001, "WebGL (GPU)"),
        (10**9, "WebGL (GPU)"),
    ],
)
def test_advice_names_the_surface_for_the_element_count(elements: int, surface: str) -> None:
    # Rules of thumb (common practice): ~1,000 DOM nodes, ~100,000 canvas marks.
    assert advice(elements) == surface


def test_advice_rejects_bad_counts() -> None:
    for bad in (-1, 1.5, True):
        with pytest.raises(ValueError):
            advice(bad)  # type: ignore[arg-type]


def test_transfer_estimate_on_the_assumed_slow_link() -> None:
    # 1 Mbit/s: 125,000 bytes = 1,000,000 bits = 1 s.
    assert transfer_seconds(125_000) == pytest.approx(1.0)
    assert transfer_seconds(0) == 0.0


def _mixed_report(tmp_path: Path) -> AuditReport:
    write_payload(tmp_path / "x.json")
    columns = columns_payload()["columns"] | {"count": [1, 2]}
    write_payload(tmp_path / "y.json", columns_payload(columns=columns))
    return audit_paths([tmp_path], budget="100KB", total="1KB", on="gzip")


def test_the_table_report_names_files_sizes_and_surfaces(tmp_path: Path) -> None:
    report = _mixed_report(tmp_path)
    text = render_table(report)
    assert f"{tmp_path / 'x.json'}  [reduce.columns/1]" in text
    assert "elements 3 cells -> SVG/DOM" in text
    assert "a slow link of 1 Mbit/s assumed" in text
    assert "rule of thumb (common practice)" in text
    assert "PROBLEM    column 'count' has 2 values, expected rows = 3" in text
    assert f"{len(report.findings)} problem(s)" in text


def test_the_markdown_report_has_one_row_per_file(tmp_path: Path) -> None:
    report = _mixed_report(tmp_path)
    text = render_markdown(report)
    assert text.startswith("### reduce audit\n")
    rows = [line for line in text.splitlines() if line.startswith("| `")]
    assert [r.split("|")[1].strip() for r in rows] == [
        f"`{tmp_path / 'x.json'}`",
        f"`{tmp_path / 'y.json'}`",
    ]
    assert f"- `{tmp_path / 'y.json'}`: column 'count' has 2 values, expected rows = 3" in text


def test_report_json_stable_and_complete(tmp_path: Path) -> None:
    report = _mixed_report(tmp_path)
    raw = report_to_json(report)
    assert raw == report_to_json(report) and raw.endswith(b"\n")
    doc = json.loads(raw)  # stdlib json parses it
    assert list(doc) == [
        "format",
        "on",
        "ok",
        "assumptions",
        "files",
        "total",
        "total_size",
        "findings",
        "commits",
    ]
    assert doc["format"] == "reduce.audit/1" and doc["ok"] is False
    assert doc["assumptions"]["transfer"] == {
        "name": "slow link",
        "bits_per_second": 1_000_000,
        "on": "gzip",
    }
    first = doc["files"][0]
    assert list(first) == [
        "path",
        "kind",
        "bytes",
        "rows",
        "elements",
        "element_kind",
        "surface",
        "transfer_seconds",
        "fields",
        "budget",
        "problems",
        "notes",
    ]
    data = (tmp_path / "x.json").read_bytes()
    assert first["bytes"] == {
        "raw": len(data),
        "gzip": len(gzip.compress(data, 9, mtime=0)),
        "brotli": len(brotli.compress(data, quality=11)),
    }
    assert doc["total_size"] == sum(f["bytes"]["gzip"] for f in doc["files"])
    assert {
        "path": str(tmp_path / "y.json"),
        "message": "column 'count' has 2 values, expected rows = 3",
    } in doc["findings"]
    assert orjson.loads(raw) == doc


def test_dictionary_column_may_hold_null(tmp_path: Path) -> None:
    # A missing category is written as null (RFC 8259 has no other "absent" value).
    columns = columns_payload()["columns"] | {"kind": [0, None, 2]}
    assert _broken(tmp_path, columns=columns).problems == ()


def test_hex_cells_with_nulls_and_empty_hex_column(tmp_path: Path) -> None:
    columns = columns_payload()["columns"] | {"hex": ["8928308280fffff", None, "89283082803ffff"]}
    assert _broken(tmp_path, columns=columns).element_kind == "cells"
    not_cells = columns_payload()["columns"] | {"hex": ["8928308280fffff", "x", "y"]}
    assert _broken(tmp_path, columns=not_cells).element_kind == "rows"
    empty = columns_payload(
        rows=0,
        columns={"hex": [], "count": []},
        accounting=columns_payload()["accounting"] | {"suppressed_rows": 27, "represented_rows": 0},
    )
    del empty["dictionaries"]
    f = audit_one(write_payload(tmp_path / "empty.json", empty))
    assert (f.problems, f.rows, f.elements, f.element_kind) == ((), 0, 0, "cells")


def test_geojson_unsafe_property_names_the_feature(tmp_path: Path) -> None:
    features = [
        {"type": "Feature", "geometry": None, "properties": None},
        {"type": "Feature", "geometry": None, "properties": {"osm": 2**60}},
    ]
    doc = {"type": "FeatureCollection", "features": features}
    f = audit_one(write_bytes(tmp_path / "f.geojson", dump(doc)))
    assert f.problems == (f"property 'osm': integer 1152921504606846976 at feature 1 is {SAFE}",)


def test_sibling_manifest_belongs_to_its_own_payload(tmp_path: Path) -> None:
    write_payload(tmp_path / "x.json")
    csv_file = write_bytes(tmp_path / "x.csv", b"a\n1\n")
    assert audit_one(csv_file).problems == ()
    # Manifests are named after the whole payload file name, so x.csv has its own.
    csv_manifest = builders.manifest_for(tmp_path / "x.json") | {"payload": "x.csv"}
    write_bytes(tmp_path / "x.csv.manifest.json", dump(csv_manifest))
    problems = audit_one(csv_file).problems
    assert "manifest x.csv.manifest.json key 'rows': 3, but the payload has 1 rows" in problems
    assert any(p.startswith("manifest x.csv.manifest.json key 'sha256'") for p in problems)
    assert audit_one(tmp_path / "x.json").problems == ()


def test_brotli_auto_limit_is_the_one_run_uses() -> None:
    from reduce import sizes

    assert audit_module.BROTLI_AUTO_MAX_BYTES == sizes.BROTLI_AUTO_MAX
