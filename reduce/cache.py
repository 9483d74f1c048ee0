"""The partial cache: the finest partial of a recipe, kept on disk for fast re-fits.

Re-fitting a recipe with another budget, measure or order (``reduce ladder --budget ...``,
``reduce.fit(...)``) needs only the finest partial, not the source. The partial is stored
under a key made of the recipe's scan-relevant content (source, grouping keys, measures) and
the source fingerprint (every input file's path, size and modification time), so changing
either makes a new entry; storing it removes the entries of the same recipe over older
versions of the source, so a nightly job keeps one entry. A large, sparse source's entry
holds its spilled keyed rows (see ``aggregate.Spilled``). Entries are plain parquet and JSON
files; the whole folder is safe to delete at any time (not while a run is using it).

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
from reduce.aggregate import Accounting, Partial, Spilled
from reduce.publish import process_alive
from reduce.recipe import Recipe, parse_time_bin


def cache_dir() -> Path:
    env = os.environ.get("REDUCE_CACHE_DIR")
    if env:
        return Path(env)
    xdg = os.environ.get("XDG_CACHE_HOME")
    return (Path(xdg) if xdg else Path.home() / ".cache") / "reduce"


# The layout of what an entry holds; raised when a partial's columns change meaning (2: exact
# cells of every hex level kept as hidden key columns), so older entries are never read.
ENTRY_FORMAT = 2


def file_stamp(path: Path | None) -> str:
    """A file's path, size and modification time (empty for None; "missing" if absent)."""
    if path is None:
        return ""
    try:
        st = os.stat(path)
    except OSError:
        return f"{path}:missing"
    return f"{path}:{st.st_size}:{st.st_mtime_ns}"


def cache_key(recipe: Recipe, fingerprint: str) -> str:
    """An entry's key: the software, the recipe's scan-relevant content, the source's
    fingerprint and the boundaries files regions are assigned from (a changed polygon file
    changes every region key)."""
    shapes = [b for b in (recipe.region.boundaries if recipe.region else None,
                          recipe.flow.boundaries if recipe.flow else None) if b is not None]
    stamps = "\0".join(file_stamp(b) for b in shapes)
    h = hashlib.sha256(f"{__version__}\0{ENTRY_FORMAT}\0{recipe.scan_hash}\0{fingerprint}"
                       f"\0{stamps}".encode())
    return h.hexdigest()[:40]


def spill_dir(key: str) -> Path | None:
    """A fresh folder in the cache for a scan's spill files (moved into the entry by
    :func:`store`), or None when the cache cannot be written. Spill folders of processes
    that no longer run are removed on the way."""
    root = cache_dir()
    try:
        root.mkdir(parents=True, exist_ok=True)
        for old in root.glob(".*.spill"):
            parts = old.name.split(".")  # "", key, pid, random, "spill"
            if len(parts) == 5 and parts[2].isdigit() and not process_alive(int(parts[2])):
                shutil.rmtree(old, ignore_errors=True)
        import tempfile

        return Path(tempfile.mkdtemp(prefix=f".{key}.{os.getpid()}.", suffix=".spill",
                                     dir=root))
    except OSError:
        return None


def temp_spill_dir() -> Path:
    """A fresh temporary folder for a scan's spill files when the cache is not used;
    folders left by processes that no longer run (killed mid-scan) are removed first."""
    import tempfile

    tmp = Path(tempfile.gettempdir())
    for old in tmp.glob("reduce-spill-*-*"):
        pid = old.name.split("-")[2]
        if pid.isdigit() and not process_alive(int(pid)):
            shutil.rmtree(old, ignore_errors=True)
    return Path(tempfile.mkdtemp(prefix=f"reduce-spill-{os.getpid()}-"))


def load(key: str) -> Partial | Spilled | None:
    """The cached partial for ``key``, or None (a damaged entry counts as absent)."""
    d = cache_dir() / key
    try:
        meta = orjson.loads((d / "meta.json").read_bytes())
        if "parts" in meta:
            parts = tuple(tuple(str(f) for f in part) for part in meta["parts"])
            if not all((d / f).is_file() for part in parts for f in part):
                return None
            tb = parse_time_bin(meta["time_bin"]) if meta["time_bin"] else None
            return Spilled(keys=tuple(meta["keys"]), root=d, parts=parts,
                           rows=int(meta["rows"]), hex_res=meta["hex_res"], time_bin=tb,
                           accounting=Accounting(**meta["accounting"]))
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


def _meta(p: Partial | Spilled) -> dict[str, object]:
    return {"keys": list(p.keys), "hex_res": p.hex_res,
            "time_bin": p.time_bin.text if p.time_bin else None,
            "accounting": {"input_rows": p.accounting.input_rows,
                           "filtered_rows": p.accounting.filtered_rows,
                           "invalid_rows": p.accounting.invalid_rows,
                           "invalid_by_reason": p.accounting.invalid_by_reason}}


def store(key: str, p: Partial | Spilled, *, recipe: str = "") -> Partial | Spilled | None:
    """Store a partial; returns it as stored (a spilled partial's files move into the
    entry) or None on failure, which is otherwise ignored (the cache is an optimisation).

    ``recipe`` (the recipe's scan-relevant hash) is recorded, and the entries of the same
    recipe over other versions of the source are removed: a nightly job keeps one entry, not
    one per night.
    """
    root = cache_dir()
    final = root / key
    if _usable(final):
        # Another run stored this entry meanwhile and may be reading it: leave it alone (a
        # spilled partial keeps its own files, removed when its run ends).
        return None
    if isinstance(p, Spilled):
        folder = p.root
        try:
            if folder.parent.resolve() != root.resolve():
                return None
            meta = {**_meta(p), "recipe": recipe, "parts": [list(part) for part in p.parts],
                    "rows": p.rows}
            (folder / "meta.json").write_bytes(orjson.dumps(meta))
            if final.exists():  # damaged
                shutil.rmtree(final, ignore_errors=True)
            os.replace(folder, final)
            _drop_others(root, key, recipe)
            return p.moved(final)
        except OSError:
            return None
    tmp = root / f".{key}.{os.getpid()}.tmp"
    try:
        tmp.mkdir(parents=True, exist_ok=True)
        p.table.write_parquet(tmp / "table.parquet", compression="zstd")
        names = sorted(p.pairs)
        for i, name in enumerate(names):
            p.pairs[name].write_parquet(tmp / f"pairs-{i}.parquet", compression="zstd")
            p.values[name].to_frame("v").write_parquet(tmp / f"values-{i}.parquet",
                                                       compression="zstd")
        meta = {**_meta(p), "recipe": recipe, "pairs": names}
        (tmp / "meta.json").write_bytes(orjson.dumps(meta))
        if final.exists():
            shutil.rmtree(final, ignore_errors=True)
        os.replace(tmp, final)
        _drop_others(root, key, recipe)
        return p
    except OSError:
        with contextlib.suppress(OSError):
            shutil.rmtree(tmp, ignore_errors=True)
        return None


def _usable(entry: Path) -> bool:
    """Whether an entry looks complete (its meta.json parses); damaged ones are replaced."""
    with contextlib.suppress(OSError, orjson.JSONDecodeError):
        return isinstance(orjson.loads((entry / "meta.json").read_bytes()), dict)
    return False


def _drop_others(root: Path, key: str, recipe: str) -> None:
    """Remove the entries of ``recipe`` other than ``key`` (older versions of its source)."""
    if not recipe:
        return
    for d in root.iterdir():
        if d.name == key or d.name.startswith("."):
            continue
        with contextlib.suppress(OSError, orjson.JSONDecodeError, AttributeError):
            if orjson.loads((d / "meta.json").read_bytes()).get("recipe") == recipe:
                shutil.rmtree(d, ignore_errors=True)
