"""Files written beside a payload on ``reduce run``: pre-compressed copies and previews.

With ``[output] precompress = true`` the payload ``x.json`` gets ``x.json.gz`` (gzip level
9, zero timestamp, as :mod:`reduce.sizes` measures it, RFC 1952) and ``x.json.br`` (brotli
quality 11, RFC 7932), for static hosts that serve pre-compressed files. They are written in
the payload's journalled commit (:func:`reduce.publish.publish`), so a reader never sees a
new payload with old siblings, and their lengths are the manifest's ``bytes.gzip`` and
``bytes.brotli``. When precompress is off, siblings left by an earlier run are removed (a
static host would otherwise serve yesterday's bytes). With ``[output] preview = true`` the
picture and page of :mod:`reduce.preview` are written beside the payload after the commit.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

from reduce.recipe import Recipe

SUFFIXES = (".gz", ".br")


def sibling_paths(payload: Path) -> dict[str, Path]:
    """``{"gzip": x.json.gz, "brotli": x.json.br}`` for payload ``x.json``."""
    return {
        "gzip": payload.with_name(payload.name + ".gz"),
        "brotli": payload.with_name(payload.name + ".br"),
    }


def precompressed(payload: Path, data: bytes) -> dict[str, bytes]:
    """File name -> bytes of the pre-compressed siblings of ``payload``."""
    from reduce.sizes import brotli_bytes, gzip_bytes

    paths = sibling_paths(payload)
    return {paths["gzip"].name: gzip_bytes(data), paths["brotli"].name: brotli_bytes(data)}


def publish_run(recipe: Recipe, path: Path, payload: bytes, manifest: dict[str, Any]) -> None:
    """Publish a run's payload and manifest, with the siblings the recipe asks for."""
    from reduce.publish import publish

    extras: Mapping[str, bytes] | None = None
    if recipe.output.precompress:
        extras = precompressed(path, payload)
        paths = sibling_paths(path)
        gz, br = extras[paths["gzip"].name], extras[paths["brotli"].name]
        manifest["bytes"] = {**manifest.get("bytes", {}), "gzip": len(gz), "brotli": len(br)}
        notes = [n for n in manifest.get("notes", []) if not n.startswith("brotli not measured")]
        if notes:
            manifest["notes"] = notes
        else:
            manifest.pop("notes", None)
        manifest["precompressed"] = {"gzip": paths["gzip"].name, "brotli": paths["brotli"].name}
    publish(path, payload, manifest, extras=extras)
    if not recipe.output.precompress:
        for p in sibling_paths(path).values():
            if p.is_file():
                p.unlink(missing_ok=True)
    if recipe.output.preview:
        from reduce.preview import write_previews

        write_previews(path)
