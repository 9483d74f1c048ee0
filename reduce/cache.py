"""The partial cache: the finest partial of a recipe, kept on disk for fast re-fits.

Re-fitting a recipe with another budget, measure or order (``reduce ladder --budget ...``,
``reduce.fit(...)``) needs only the finest partial, not the source. The partial is stored
under a key made of the recipe's scan-relevant content (source, grouping keys, measures) and
the source fingerprint (every input file's path, size and modification time), so changing
either makes a new entry and the old one is simply never read again. Entries are plain parquet
and JSON files; the whole folder is safe to delete at any time.

Location: ``$REDUCE_CACHE_DIR`` if set, else ``$XDG_CACHE_HOME/reduce``, else
``~/.cache/reduce``.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import shutil
from pathlib import Path

import orjson
import polars as pl

from reduce import __version__
from reduce.aggregate import Accounting, Partial
from reduce.recipe import Recipe, parse_time_bin


def cache_dir() -> Path:
    env = os.environ.get("REDUCE_CACHE_DIR")
    if env:
        return Path(env)
    xdg = os.environ.get("XDG_CACHE_HOME")
    return (Path(xdg) if xdg else Path.home() / ".cache") / "reduce"


def cache_key(recipe: Recipe, fingerprint: str) -> str:
    h = hashlib.sha256(f"{__version__}\0{recipe.scan_hash}\0{fingerprint}".encode())
    return h.hexdigest()[:40]


def load(key: str) -> Partial | None:
    """The cached partial for ``key``, or None (a damaged entry counts as absent)."""
    d = cache_dir() / key
    try:
        meta = orjson.loads((d / "meta.json").read_bytes())
        table = pl.read_parquet(d / "table.parquet")
        pairs = {name: pl.read_parquet(d / f"pairs-{i}.parquet")
                 for i, name in enumerate(meta["pairs"])}
        values = {name: pl.read_parquet(d / f"values-{i}.parquet").to_series()
                  for i, name in enumerate(meta["pairs"])}
        acc = Accounting(**meta["accounting"])
        tb = parse_time_bin(meta["time_bin"]) if meta["time_bin"] else None
        return Partial(keys=tuple(meta["keys"]), table=table, pairs=pairs, values=values,
                       hex_res=meta["hex_res"], time_bin=tb, accounting=acc)
    except (OSError, KeyError, TypeError, ValueError, orjson.JSONDecodeError,
            pl.exceptions.PolarsError):
        return None


def store(key: str, p: Partial) -> Path | None:
    """Store a partial; failures are ignored (the cache is an optimisation)."""
    root = cache_dir()
    final = root / key
    tmp = root / f".{key}.{os.getpid()}.tmp"
    try:
        tmp.mkdir(parents=True, exist_ok=True)
        p.table.write_parquet(tmp / "table.parquet", compression="zstd")
        names = sorted(p.pairs)
        for i, name in enumerate(names):
            p.pairs[name].write_parquet(tmp / f"pairs-{i}.parquet", compression="zstd")
            p.values[name].to_frame("v").write_parquet(tmp / f"values-{i}.parquet",
                                                       compression="zstd")
        meta = {"keys": list(p.keys), "hex_res": p.hex_res,
                "time_bin": p.time_bin.text if p.time_bin else None, "pairs": names,
                "accounting": {"input_rows": p.accounting.input_rows,
                               "filtered_rows": p.accounting.filtered_rows,
                               "invalid_rows": p.accounting.invalid_rows,
                               "invalid_by_reason": p.accounting.invalid_by_reason}}
        (tmp / "meta.json").write_bytes(orjson.dumps(meta))
        if final.exists():
            shutil.rmtree(final, ignore_errors=True)
        os.replace(tmp, final)
        return final
    except OSError:
        with contextlib.suppress(OSError):
            shutil.rmtree(tmp, ignore_errors=True)
        return None
