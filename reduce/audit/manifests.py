"""Checking a payload against its manifest and its pre-compressed siblings."""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any

import orjson

from reduce.audit.files import _read
from reduce.audit.inspect_json import _parse_json, _show, _type_name
from reduce.audit.model import _Findings
from reduce.contract import MANIFEST_FORMAT
from reduce.sizes import (
    MEASURES,
)

# --------------------------------------------------------------------------------------------
# Manifest
# --------------------------------------------------------------------------------------------


def _check_manifest(
    path: Path,
    data: bytes,
    out: _Findings,
    gzip_size: int,
    brotli_size: int | None,
    read: tuple[Path, bytes | None, str | None],
) -> None:
    manifest_path, manifest_bytes, problem = read
    name = manifest_path.name
    if problem is not None:
        out.problems.append(problem)
        return
    if manifest_bytes is None:
        if out.kind == "columns":
            out.notes.append(f"no manifest beside it ({name}): checksum and sizes not checked")
        return
    manifest, error = _parse_json(manifest_bytes)
    where = f"manifest {name}"
    if error is not None:
        out.problems.append(f"{where}: {error}")
        return
    if not isinstance(manifest, dict):
        out.problems.append(f"{where}: expected a JSON object, got {_type_name(manifest)}")
        return
    claimed_payload = manifest.get("payload")
    if out.kind != "columns" and isinstance(claimed_payload, str) and claimed_payload != path.name:
        return  # the manifest of a sibling with the same stem (x.json beside x.csv)
    if manifest.get("format") != MANIFEST_FORMAT:
        out.problems.append(
            f"{where} key 'format': {_show(manifest.get('format'))}, expected \"{MANIFEST_FORMAT}\""
        )
    if manifest.get("payload") != path.name:
        out.problems.append(
            f"{where} key 'payload': {_show(manifest.get('payload'))}, expected \"{path.name}\""
        )
    digest = hashlib.sha256(data).hexdigest()
    claimed = manifest.get("sha256")
    if claimed != digest:
        shown = _show(claimed[:16] + "…") if isinstance(claimed, str) else _show(claimed)
        out.problems.append(
            f"{where} key 'sha256': {shown} does not match the payload's sha256 \"{digest[:16]}…\""
        )
    sizes = manifest.get("bytes")
    if not isinstance(sizes, dict):
        out.problems.append(f"{where} key 'bytes': expected an object with raw, gzip, brotli")
    else:
        measured = {"raw": len(data), "gzip": gzip_size, "brotli": brotli_size}
        for measure in MEASURES:
            value = measured[measure]
            if measure not in sizes:
                out.problems.append(f"{where} key 'bytes.{measure}' is missing")
            elif value is None:
                out.notes.append(f"{where}: bytes.brotli not verified (brotli not measured)")
            elif measure == "brotli" and sizes[measure] is None:
                # reduce run leaves brotli unmeasured unless the budget is on brotli.
                out.notes.append(f"{where}: bytes.brotli not recorded (the run did not measure it)")
            elif sizes[measure] != value:
                out.problems.append(
                    f"{where} key 'bytes.{measure}': {_show(sizes[measure])}, "
                    f"but the file measures {value}"
                )
    if "rows" in manifest and out.rows is not None and manifest["rows"] != out.rows:
        out.problems.append(
            f"{where} key 'rows': {_show(manifest['rows'])}, but the payload has {out.rows} rows"
        )


_SIBLING_SUFFIXES = {".gz": "gzip", ".br": "brotli"}


def _check_siblings(path: Path, data: bytes, out: _Findings, manifest_bytes: bytes | None) -> None:
    """Pre-compressed copies beside a payload (x.json.gz, x.json.br) must decompress to it
    (Python's gzip and brotli modules), and their lengths must be the manifest's sizes."""
    import contextlib
    import gzip
    import zlib

    import brotli

    manifest: Any = None
    with contextlib.suppress(ValueError, TypeError):
        manifest = orjson.loads(manifest_bytes) if manifest_bytes is not None else None
    sizes = manifest.get("bytes") if isinstance(manifest, dict) else None
    listed = manifest.get("precompressed") if isinstance(manifest, dict) else None
    for suffix, measure in _SIBLING_SUFFIXES.items():
        sib = path.with_name(path.name + suffix)
        if not sib.is_file():
            if isinstance(listed, dict) and measure in listed:
                out.problems.append(
                    f"{sib.name}: listed in the manifest but missing; run reduce run again"
                )
            continue
        packed = _read(sib, str(sib))
        try:
            unpacked = gzip.decompress(packed) if measure == "gzip" else brotli.decompress(packed)
        except (OSError, EOFError, zlib.error, brotli.error) as e:
            out.problems.append(f"{sib.name}: not valid {measure} ({e}); run reduce run again")
            continue
        if unpacked != data:
            out.problems.append(
                f"{sib.name}: does not decompress to the payload; run reduce run again or delete it"
            )
        elif (
            isinstance(sizes, dict)
            and isinstance(listed, dict)
            and sizes.get(measure) != len(packed)
        ):
            out.problems.append(
                f"{sib.name}: {len(packed):,} bytes, but the manifest's "
                f"bytes.{measure} is {_show(sizes.get(measure))}"
            )
