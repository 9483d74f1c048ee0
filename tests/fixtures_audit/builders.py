"""Builders for audit tests: valid ``reduce.columns/1`` payloads and their manifests.

Manifests are computed here with the standard library and the brotli module directly
(hashlib SHA-256, gzip RFC 1952 at level 9 with mtime 0, brotli RFC 7932 at quality 11), not
with ``reduce.sizes``, so the audit is checked against an independent computation.
"""

from __future__ import annotations

import gzip
import hashlib
import json
from pathlib import Path
from typing import Any

import brotli


def columns_payload(**overrides: Any) -> dict[str, Any]:
    """A small, consistent columns payload: 3 H3 cells at resolution 9, a dictionary column."""
    payload: dict[str, Any] = {
        "format": "reduce.columns/1",
        "recipe": "demo",
        "level": {"space": 9, "time": "day"},
        "rows": 3,
        "columns": {
            "hex": ["8928308280fffff", "89283082807ffff", "89283082803ffff"],
            "t": [1700000000, 1700086400, 1700172800],
            "count": [12, 5, 7],
            "kind": [0, 2, 1],
        },
        "dictionaries": {"kind": ["bike", "bus", "car"]},
        "accounting": {
            "input_rows": 30,
            "filtered_rows": 2,
            "invalid_rows": 1,
            "suppressed_rows": 3,
            "represented_rows": 24,
        },
        "meta": {"source": "test"},
    }
    payload.update(overrides)
    return payload


def dump(obj: Any) -> bytes:
    """Compact JSON as our writers emit it (stdlib json, no spaces, UTF-8)."""
    return json.dumps(obj, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode()


def write_bytes(path: Path, data: bytes) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    return path


def manifest_for(payload_path: Path, **overrides: Any) -> dict[str, Any]:
    data = payload_path.read_bytes()
    doc = json.loads(data)
    manifest: dict[str, Any] = {
        "format": "reduce.manifest/1",
        "payload": payload_path.name,
        "layout": "columns",
        "sha256": hashlib.sha256(data).hexdigest(),
        "bytes": {
            "raw": len(data),
            "gzip": len(gzip.compress(data, 9, mtime=0)),
            "brotli": len(brotli.compress(data, quality=11)),
        },
        "rows": doc.get("rows"),
        "elements": doc.get("rows"),
        "recipe": {"name": doc.get("recipe")},
        "level": doc.get("level"),
    }
    manifest.update(overrides)
    return manifest


def write_manifest(payload_path: Path, **overrides: Any) -> Path:
    path = payload_path.with_name(payload_path.name + ".manifest.json")
    return write_bytes(path, dump(manifest_for(payload_path, **overrides)))


def write_payload(
    path: Path, payload: dict[str, Any] | None = None, *, manifest: bool = True
) -> Path:
    write_bytes(path, dump(columns_payload() if payload is None else payload))
    if manifest:
        write_manifest(path)
    return path
