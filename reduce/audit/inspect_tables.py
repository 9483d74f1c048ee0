"""Inspecting CSV and Arrow IPC payloads."""

from __future__ import annotations

from collections.abc import Callable, Sequence

import h3
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.feather as pafeather
import pyarrow.ipc as paipc

from reduce.audit.inspect_json import _count_too_precise, _is_h3_strings
from reduce.audit.model import (
    _DECIMAL_TEXT_RE,
    _HEX_NAMES,
    _LAT_NAMES,
    _LON_NAMES,
    PRECISION_DECIMALS,
    FieldCost,
    _Findings,
)

# --------------------------------------------------------------------------------------------
# CSV and Arrow
# --------------------------------------------------------------------------------------------


def _analyse_csv(data: bytes, out: _Findings) -> None:
    out.kind = "csv"
    try:
        names = pacsv.open_csv(pa.BufferReader(data)).schema.names
        table = pacsv.read_csv(
            pa.BufferReader(data),
            convert_options=pacsv.ConvertOptions(column_types={n: pa.string() for n in names}),
        )
    except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
        out.problems.append(f"not readable as CSV: {str(exc).splitlines()[0]}")
        return
    out.rows = out.elements = table.num_rows
    hex_found = False
    for name, column in zip(table.column_names, table.columns):
        nbytes = pc.sum(pc.binary_length(column)).as_py() or 0
        parts = pc.extract_regex(column, _DECIMAL_TEXT_RE)
        frac = pc.utf8_length(pc.struct_field(parts, "frac"))
        exp_text = pc.struct_field(parts, "exp")
        exponent = pc.cast(pc.if_else(pc.equal(exp_text, ""), "0", exp_text), pa.int64())
        decimals = pc.subtract(pc.cast(frac, pa.int64()), exponent)
        too_precise = pc.sum(pc.greater(decimals, PRECISION_DECIMALS).cast(pa.int64())).as_py()
        out.fields.append(FieldCost(name, int(nbytes), int(too_precise or 0)))
        if not hex_found and table.num_rows:
            hex_found = _is_h3_strings(pc.unique(column).to_pylist())
    out.element_kind = _arrow_element_kind(table.column_names, hex_found, table.num_rows)
    out.notes.append("bytes per column count the field values as written (no quotes, commas)")


def _read_arrow(data: bytes) -> pa.Table:
    errors = []
    readers: tuple[Callable[[], pa.Table], ...] = (
        lambda: paipc.open_file(pa.BufferReader(data)).read_all(),
        lambda: paipc.open_stream(pa.BufferReader(data)).read_all(),
        lambda: pafeather.read_table(pa.BufferReader(data)),
    )
    for reader in readers:
        try:
            return reader()
        except (pa.ArrowException, OSError, ValueError) as exc:
            errors.append(str(exc).splitlines()[0] if str(exc) else type(exc).__name__)
    raise ValueError(errors[0])


def _analyse_arrow(data: bytes, out: _Findings) -> None:
    out.kind = "arrow"
    try:
        table = _read_arrow(data)
    except ValueError as exc:
        out.problems.append(f"not readable as Arrow IPC (file or stream format): {exc}")
        return
    out.rows = out.elements = table.num_rows
    hex_found = False
    for name, column in zip(table.column_names, table.columns):
        kind = column.type
        too_precise = 0
        if pa.types.is_floating(kind):
            values = pc.drop_null(column).to_numpy().astype(np.float64)
            too_precise = _count_too_precise(values)
        if not hex_found and table.num_rows:
            hex_found = _is_h3_arrow(column)
        out.fields.append(FieldCost(name, int(column.nbytes), too_precise))
    out.element_kind = _arrow_element_kind(table.column_names, hex_found, table.num_rows)
    out.notes.append("bytes per column are the Arrow buffers in memory (before any compression)")


def _is_h3_arrow(column: pa.ChunkedArray) -> bool:
    kind = column.type
    if pa.types.is_dictionary(kind):
        column = column.cast(kind.value_type)
        kind = kind.value_type
    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        return _is_h3_strings(pc.unique(pc.drop_null(column)).to_pylist())
    if pa.types.is_integer(kind) and kind.bit_width == 64:
        ints = pc.drop_null(column).to_numpy().astype(np.uint64)
        # Mode 1 (cell) sits in bits 59-62 with the reserved top bit clear.
        if ints.size == 0 or not bool(np.all((ints >> np.uint64(59)) == 1)):
            return False
        return all(h3.is_valid_cell(h3.int_to_str(int(v))) for v in np.unique(ints)[:64])
    return False


def _arrow_element_kind(names: Sequence[str], hex_found: bool, rows: int) -> str:
    lowered = {n.lower() for n in names}
    if hex_found or (rows == 0 and lowered & _HEX_NAMES):
        return "cells"
    if lowered & _LAT_NAMES and lowered & _LON_NAMES:
        return "points"
    return "rows"
