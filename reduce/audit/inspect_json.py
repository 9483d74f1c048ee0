"""Inspecting JSON payloads: our columns layout, row JSON and GeoJSON (RFC 7946)."""

from __future__ import annotations

import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import h3
import numpy as np
import orjson

from reduce.audit.model import (
    _ACCOUNTING_KEYS,
    _H3_CELL_RE,
    _HEX_NAMES,
    _LAT_NAMES,
    _LON_NAMES,
    PRECISION_DECIMALS,
    FieldCost,
    _Findings,
)
from reduce.contract import COLUMNS_FORMAT, MAX_SAFE_INTEGER

# --------------------------------------------------------------------------------------------
# JSON
# --------------------------------------------------------------------------------------------


def _parse_json(data: bytes) -> tuple[Any, str | None]:
    """``(document, None)`` or ``(None, message)`` naming the line, column and byte offset."""
    try:
        return orjson.loads(data), None
    except orjson.JSONDecodeError as exc:
        # orjson counts characters; convert to a byte offset for the report.
        text = data.decode("utf-8", errors="replace")
        pos = min(exc.pos, len(text))
        byte = len(text[:pos].encode("utf-8", errors="replace"))
        what = exc.msg
        if data.startswith(b"NaN", byte):
            what = "NaN is not a JSON value"
        elif data.startswith(b"Infinity", byte) or data.startswith(b"-Infinity", byte):
            if data[byte : byte + 1] != b"-" and byte > 0 and data[byte - 1 : byte] == b"-":
                byte -= 1  # orjson points past the sign of -Infinity
            token = "-Infinity" if data[byte : byte + 1] == b"-" else "Infinity"
            what = f"{token} is not a JSON value"
        return None, f"not valid JSON (RFC 8259): {what} at {_position(data, byte)}"


def _position(data: bytes, byte: int) -> str:
    """``line L column C (byte B)``; the column counts characters, as editors do."""
    line_start = data.rfind(b"\n", 0, byte) + 1
    line = data.count(b"\n", 0, byte) + 1
    column = len(data[line_start:byte].decode("utf-8", errors="replace")) + 1
    return f"line {line} column {column} (byte {byte})"


def _analyse_json(data: bytes, suffix: str, out: _Findings) -> None:
    out.kind = "json"
    doc, error = _parse_json(data)
    if error is not None:
        out.problems.append(error)
        return
    if isinstance(doc, dict) and doc.get("format") == COLUMNS_FORMAT:
        out.kind = "columns"
        _analyse_columns(doc, out)
    elif isinstance(doc, dict) and doc.get("type") == "FeatureCollection":
        out.kind = "geojson"
        _analyse_geojson(doc, out)
    elif isinstance(doc, list) and all(type(row) is dict for row in doc):
        out.kind = "rows"
        _analyse_rows(doc, out)
    else:
        if isinstance(doc, dict) and isinstance(doc.get("format"), str):
            out.notes.append(f"format '{doc['format']}' is not a layout this audit knows")
        elif suffix == ".geojson":
            out.notes.append("not a GeoJSON FeatureCollection")
        out.notes.append("JSON of another layout: sizes and safe-integer check only")
        _check_tree_integers(doc, "document", out)
    if out.suspect_big_floats:
        _check_integer_literals(data, out)


def _type_name(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, int):
        return "integer"
    if isinstance(value, float):
        return "number"
    if isinstance(value, str):
        return "string"
    if isinstance(value, list):
        return "array"
    return "object"


def _show(value: Any, limit: int = 40) -> str:
    text = orjson.dumps(value).decode() if not isinstance(value, int) else str(value)
    return text if len(text) <= limit else text[: limit - 1] + "…"


@dataclass(slots=True)
class _Scan:
    """Numbers of one column: unsafe integers (count and first) and too-precise floats."""

    unsafe: int = 0
    first_unsafe: tuple[int, int] | None = None
    too_precise: int = 0
    big_integral_floats: int = 0


def _count_too_precise(values: np.ndarray) -> int:
    """Finite floats whose shortest decimal form has more than six decimals.

    ``round(x, 6) != x`` decides it exactly (Python rounds on the exact decimal value). Below
    1e6 in magnitude the vectorised ``rint(x * 1e6) / 1e6`` gives the same answer: the product
    errs by far less than half a unit and the division rounds correctly.
    """
    a = np.asarray(values, dtype=np.float64)
    a = a[np.isfinite(a)]
    small = np.abs(a) < 1e6
    count = int(np.count_nonzero(np.round(a[small], PRECISION_DECIMALS) != a[small]))
    for v in a[~small].tolist():
        if round(v, PRECISION_DECIMALS) != v:
            count += 1
    return count


def _scan(values: list[Any]) -> _Scan:
    scan = _Scan()
    types = set(map(type, values))
    if types <= {int}:
        if values and (min(values) < -MAX_SAFE_INTEGER or max(values) > MAX_SAFE_INTEGER):
            _scan_ints(values, scan)
        return scan
    if types <= {int, float}:
        floats = [v for v in values if type(v) is float] if int in types else values
        arr = np.asarray(floats, dtype=np.float64)
        scan.too_precise = _count_too_precise(arr)
        big = np.abs(arr) > MAX_SAFE_INTEGER
        if big.any():
            scan.big_integral_floats = int(np.count_nonzero(big & (arr == np.floor(arr))))
        if int in types:
            ints = [v for v in values if type(v) is int]
            if min(ints) < -MAX_SAFE_INTEGER or max(ints) > MAX_SAFE_INTEGER:
                _scan_ints(values, scan)
        return scan
    floats_seen: list[float] = []
    for index, value in enumerate(values):
        kind = type(value)
        if kind is int:
            _note_int(value, index, scan)
        elif kind is float:
            floats_seen.append(value)
        elif kind is list or kind is dict:
            for number in _numbers(value):
                if type(number) is int:
                    _note_int(number, index, scan)
                else:
                    floats_seen.append(number)
    if floats_seen:
        arr = np.asarray(floats_seen, dtype=np.float64)
        scan.too_precise = _count_too_precise(arr)
        big = np.abs(arr) > MAX_SAFE_INTEGER
        scan.big_integral_floats = int(np.count_nonzero(big & (arr == np.floor(arr))))
    return scan


def _scan_ints(values: list[Any], scan: _Scan) -> None:
    for index, value in enumerate(values):
        if type(value) is int:
            _note_int(value, index, scan)


def _note_int(value: int, index: int, scan: _Scan) -> None:
    if value > MAX_SAFE_INTEGER or value < -MAX_SAFE_INTEGER:
        scan.unsafe += 1
        if scan.first_unsafe is None:
            scan.first_unsafe = (index, value)


def _numbers(value: Any) -> Iterator[int | float]:
    """Every int and float nested inside lists and objects (booleans excluded)."""
    stack = [value]
    while stack:
        item = stack.pop()
        kind = type(item)
        if kind is int or kind is float:
            yield item
        elif kind is list:
            stack.extend(reversed(item))
        elif kind is dict:
            stack.extend(reversed(list(item.values())))


def _unsafe_message(where: str, scan: _Scan, index_word: str = "row") -> str:
    assert scan.first_unsafe is not None
    index, value = scan.first_unsafe
    more = f" ({scan.unsafe:,} such values)" if scan.unsafe > 1 else ""
    return (
        f"{where}: integer {value} at {index_word} {index} is outside the JavaScript safe "
        f"range ±(2^53-1){more}"
    )


def _check_tree_integers(value: Any, where: str, out: _Findings) -> None:
    """Unsafe integers anywhere in ``value`` (reported once, with a count)."""
    scan = _scan([value])
    if scan.unsafe:
        assert scan.first_unsafe is not None
        more = f" ({scan.unsafe:,} such values)" if scan.unsafe > 1 else ""
        out.problems.append(
            f"{where}: integer {scan.first_unsafe[1]} is outside the JavaScript safe range "
            f"±(2^53-1){more}"
        )
    if scan.big_integral_floats:
        out.suspect_big_floats = True


def _check_integer_literals(data: bytes, out: _Findings) -> None:
    """Integers too long even for 64 bits parse as floats: find them in the text itself."""
    token = re.compile(rb'"(?:[^"\\]|\\.)*"|-?\d+(?:\.\d+)?(?:[eE][+-]?\d+)?')
    for match in token.finditer(data):
        text = match.group()
        if text[:1] == b'"' or b"." in text or b"e" in text or b"E" in text:
            continue
        value = int(text)
        if -(2**63) <= value < 2**64:
            continue  # parsed as an integer, so the column scan has reported it already
        out.problems.append(
            f"integer literal {_show(value)} at {_position(data, match.start())} is "
            "outside the JavaScript safe range ±(2^53-1)"
        )
        return


def _element_kind(columns: dict[str, list[Any]]) -> str:
    """``cells`` with a hex column, ``points`` with lat/lon columns, else ``rows``."""
    names = {name.lower() for name in columns}
    for name, values in columns.items():
        # An empty payload still names its hex column; its (absent) values cannot say so.
        if _is_h3_strings(values) or (not values and name.lower() in _HEX_NAMES):
            return "cells"
    if names & _LAT_NAMES and names & _LON_NAMES:
        return "points"
    return "rows"


def _is_h3_strings(values: Sequence[Any]) -> bool:
    """All non-null values are H3 cells as 15-character lowercase hex strings (and some are)."""
    if not values or type(values[0]) not in (str, type(None)):
        return False
    try:
        unique = set(values)
    except TypeError:
        return False
    unique.discard(None)
    if not unique or not all(type(v) is str and _H3_CELL_RE.fullmatch(v) for v in unique):
        return False
    return all(h3.is_valid_cell(v) for v in sorted(unique)[:64])


def _analyse_columns(doc: dict[str, Any], out: _Findings) -> None:
    expected = {
        "recipe": str,
        "level": dict,
        "rows": int,
        "columns": dict,
        "accounting": dict,
    }
    for key, kind in expected.items():
        if key not in doc:
            out.problems.append(f"key '{key}' is missing")
        elif type(doc[key]) is not kind:
            want = {str: "string", dict: "object", int: "integer"}[kind]
            out.problems.append(
                f"key '{key}': expected {want}, got {_type_name(doc[key])} {_show(doc[key])}"
            )
    rows = doc.get("rows")
    if type(rows) is int and rows < 0:
        out.problems.append(f"key 'rows': expected a non-negative integer, got {rows}")
    rows_ok = type(rows) is int and rows >= 0
    if rows_ok:
        out.rows = out.elements = rows

    raw_columns = doc.get("columns")
    columns: dict[str, Any] = raw_columns if isinstance(raw_columns, dict) else {}
    dictionaries = doc.get("dictionaries", {})
    if not isinstance(dictionaries, dict):
        out.problems.append(f"key 'dictionaries': expected object, got {_type_name(dictionaries)}")
        dictionaries = {}

    arrays: dict[str, list[Any]] = {}
    for name, values in columns.items():
        if not isinstance(values, list):
            out.problems.append(f"column '{name}': expected an array, got {_type_name(values)}")
            continue
        arrays[name] = values
        if rows_ok and len(values) != rows:
            out.problems.append(
                f"column '{name}' has {len(values):,} values, expected rows = {rows:,}"
            )
        scan = _scan(values)
        if scan.unsafe:
            out.problems.append(_unsafe_message(f"column '{name}'", scan))
        if scan.big_integral_floats:
            out.suspect_big_floats = True
        out.fields.append(FieldCost(name, len(orjson.dumps(values)), scan.too_precise))

    labels_by_column: dict[str, list[Any]] = {}
    for name, labels in dictionaries.items():
        if not isinstance(labels, list):
            out.problems.append(
                f"dictionary '{name}': expected an array of labels, got {_type_name(labels)}"
            )
            continue
        out.fields.append(FieldCost(f"{name} (dictionary)", len(orjson.dumps(labels))))
        _check_tree_integers(labels, f"dictionary '{name}'", out)
        if name not in columns:
            out.problems.append(f"dictionary '{name}': no column of that name")
        elif name in arrays:
            labels_by_column[name] = labels
            _check_indexes(name, arrays[name], len(labels), out)

    for key, value in doc.items():
        if key not in ("columns", "dictionaries"):
            _check_tree_integers(value, f"key '{key}'", out)

    if isinstance(doc.get("accounting"), dict):
        _check_accounting(doc["accounting"], out)

    decoded = {name: labels_by_column.get(name, values) for name, values in arrays.items()}
    out.element_kind = _element_kind(decoded) if rows_ok else None
    if not rows_ok:
        out.elements = None


def _check_indexes(name: str, values: list[Any], size: int, out: _Findings) -> None:
    """Dictionary indexes are integers in ``0..size-1``; null stands for a missing value."""
    types = set(map(type, values))
    if types <= {int} and (not values or (min(values) >= 0 and max(values) < size)):
        return
    wrong_type = out_of_range = 0
    first_type: tuple[int, Any] | None = None
    first_range: tuple[int, int] | None = None
    for index, value in enumerate(values):
        if value is None:
            continue
        if type(value) is not int:
            wrong_type += 1
            if first_type is None:
                first_type = (index, value)
        elif not 0 <= value < size:
            out_of_range += 1
            if first_range is None:
                first_range = (index, value)
    if first_type is not None:
        more = f" ({wrong_type:,} such values)" if wrong_type > 1 else ""
        out.problems.append(
            f"column '{name}': value {_show(first_type[1])} at row {first_type[0]} is not an "
            f"integer index into its dictionary{more}"
        )
    if first_range is not None:
        more = f" ({out_of_range:,} such values)" if out_of_range > 1 else ""
        valid = f"0..{size - 1}" if size else "none"
        out.problems.append(
            f"column '{name}': index {first_range[1]} at row {first_range[0]} is outside its "
            f"dictionary of {size:,} labels (valid {valid}){more}"
        )


def _check_accounting(accounting: dict[str, Any], out: _Findings) -> None:
    keys = list(_ACCOUNTING_KEYS)
    if "unassigned_rows" in accounting:
        keys.append("unassigned_rows")
    values: dict[str, int] = {}
    for key in keys:
        if key not in accounting:
            out.problems.append(f"accounting: key '{key}' is missing")
            continue
        value = accounting[key]
        if type(value) is not int or value < 0:
            out.problems.append(
                f"accounting: key '{key}': expected a non-negative integer, got {_show(value)}"
            )
            continue
        values[key] = value
    if len(values) != len(keys):
        return
    right = keys[1:]
    total = sum(values[k] for k in right)
    if values["input_rows"] != total:
        terms = " + ".join(f"{k} {values[k]:,}" for k in right)
        out.problems.append(
            f"accounting: input_rows {values['input_rows']:,} != {terms} (= {total:,})"
        )


def _bucket_cost(key: str, values: list[Any]) -> int:
    """Bytes of ``"key":value`` over all values, as a row-oriented encoding writes them."""
    if not values:
        return 0
    key_cost = len(orjson.dumps(key)) + 1  # quoted key and the colon
    array = len(orjson.dumps(values))  # "[v1,v2,...]": values plus brackets and commas
    return len(values) * key_cost + array - 2 - (len(values) - 1)


def _buckets(rows: list[dict[str, Any]]) -> dict[str, list[Any]]:
    buckets: dict[str, list[Any]] = {}
    for row in rows:
        for key, value in row.items():
            bucket = buckets.get(key)
            if bucket is None:
                buckets[key] = [value]
            else:
                bucket.append(value)
    return buckets


def _row_of(rows: list[dict[str, Any]], key: str, nth: int) -> int:
    """Index of the row holding the ``nth`` occurrence of ``key``."""
    seen = -1
    for index, row in enumerate(rows):
        if key in row:
            seen += 1
            if seen == nth:
                return index
    return nth


def _analyse_properties(
    rows: list[dict[str, Any]], out: _Findings, where: str, index_word: str
) -> dict[str, list[Any]]:
    buckets = _buckets(rows)
    for key, values in buckets.items():
        scan = _scan(values)
        if scan.unsafe:
            assert scan.first_unsafe is not None
            row = _row_of(rows, key, scan.first_unsafe[0])
            scan.first_unsafe = (row, scan.first_unsafe[1])
            out.problems.append(_unsafe_message(f"{where} '{key}'", scan, index_word))
        if scan.big_integral_floats:
            out.suspect_big_floats = True
        out.fields.append(FieldCost(key, _bucket_cost(key, values), scan.too_precise))
    return buckets


def _analyse_rows(rows: list[dict[str, Any]], out: _Findings) -> None:
    out.rows = out.elements = len(rows)
    buckets = _analyse_properties(rows, out, "key", "row")
    out.element_kind = _element_kind(buckets)
    out.notes.append('bytes per field count "key":value in compact JSON over all rows')


def _analyse_geojson(doc: dict[str, Any], out: _Findings) -> None:
    features = doc.get("features")
    if not isinstance(features, list):
        out.problems.append(f"key 'features': expected an array, got {_type_name(features)}")
        return
    out.rows = out.elements = len(features)
    out.element_kind = "features"
    geometries: list[Any] = []
    properties: list[dict[str, Any]] = []
    ids: list[Any] = []
    for index, feature in enumerate(features):
        if not isinstance(feature, dict) or feature.get("type") != "Feature":
            out.problems.append(
                f'feature {index}: expected an object with "type": "Feature", got {_show(feature)}'
            )
            return
        if "geometry" in feature:
            geometries.append(feature["geometry"])
        props = feature.get("properties")
        properties.append(props if isinstance(props, dict) else {})  # aligned with features
        if "id" in feature:
            ids.append(feature["id"])
    buckets = _analyse_properties(properties, out, "property", "feature")
    reserved = {"geometry", "id"} & set(buckets)
    if reserved:
        out.fields = [
            FieldCost(f"properties.{f.name}", f.bytes, f.too_precise) if f.name in reserved else f
            for f in out.fields
        ]
    if ids:
        out.fields.append(FieldCost("id", _bucket_cost("id", ids), _scan(ids).too_precise))
    coordinates = _coordinates(geometries)
    out.fields.append(
        FieldCost(
            "geometry",
            _bucket_cost("geometry", geometries),
            _count_too_precise(np.asarray(coordinates, dtype=np.float64)),
        )
    )
    out.notes.append(
        'bytes per field count "key":value in compact JSON over all features; geometry is one entry'
    )


def _coordinates(geometries: list[Any]) -> list[float]:
    """All coordinate numbers of GeoJSON geometries (collections included)."""
    numbers: list[float] = []
    stack: list[Any] = []
    for geometry in geometries:
        if isinstance(geometry, dict):
            stack.append(geometry)
    while stack:
        item = stack.pop()
        if isinstance(item, dict):
            if "geometries" in item and isinstance(item["geometries"], list):
                stack.extend(item["geometries"])
            if "coordinates" in item:
                stack.append(item["coordinates"])
        elif isinstance(item, list):
            if item and type(item[0]) in (int, float):
                numbers.extend(v for v in item if type(v) in (int, float))
            else:
                stack.extend(item)
    return numbers
