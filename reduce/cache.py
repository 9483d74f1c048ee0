"""The partial cache: the finest partial of a recipe, kept on disk for fast re-fits.

Re-fitting a recipe with another budget, measure or order (``reduce ladder --budget ...``,
``reduce.fit(...)``) needs only the finest partial, not the source. The partial is stored
under a key made of the recipe's scan-relevant content (source, grouping keys, measures) and
the source fingerprint (every input file's path, size and modification time), so changing
either makes a new entry; storing it removes the entries of the same recipe over older
versions of the source, so a nightly job keeps one entry. A merged entry records the keys of
its files; before it is replaced, a run over more files (only added ones) reads what the
earlier entry measured (:func:`earlier`). A large, sparse source's entry holds its spilled
keyed rows (see ``aggregate.Spilled``). Entries are plain parquet and JSON files; the whole
folder is safe to delete at any time (not while a run is using it).

Entries prove themselves: every file of an entry has its sha256 in the entry's
``sums.json``, written last (:func:`write_file`, :func:`seal`) and checked whenever a file
is read (:func:`read_file`, :func:`verified_path`). A damaged, truncated, unreadable or
unverifiable entry is set aside (removed, when no other run is reading it) and the source is
scanned again, with one :class:`CacheWarning` saying so (the command line prints it as one
``warning:`` line); it is never used and never fatal.

An entry in use is not deleted under its reader: a reader holds a shared ``flock`` on the
entry's ``.lock`` file (while loading; for a spilled partial, whose files are read lazily, as
long as the returned object lives); removal takes the lock exclusively without waiting and
skips entries in use.

Location: ``$REDUCE_CACHE_DIR`` if set, else ``$XDG_CACHE_HOME/reduce``, else
``~/.cache/reduce``.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import hashlib
import io
import os
import shutil
import stat
import warnings
import weakref
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import TypeVar

import orjson
import polars as pl

from reduce._util.atomic import write_atomic
from reduce._util.procs import process_alive
from reduce._version import __version__
from reduce.aggregate import Accounting, Partial, Spilled
from reduce.recipe import Recipe, parse_time_bin
from reduce.source import FileState

SUMS = "sums.json"
SUMS_FORMAT = "reduce.cache-sums/1"
_LOCK = ".lock"

T = TypeVar("T")


class CacheWarning(UserWarning):
    """A cache entry could not be used (it is set aside and the source scanned again)."""


class DamagedEntry(Exception):
    """A file of a cache entry does not match its recorded checksum, or cannot be read."""


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
    shapes = [
        b
        for b in (
            recipe.region.boundaries if recipe.region else None,
            recipe.flow.boundaries if recipe.flow else None,
        )
        if b is not None
    ]
    stamps = "\0".join(file_stamp(b) for b in shapes)
    h = hashlib.sha256(
        f"{__version__}\0{ENTRY_FORMAT}\0{recipe.scan_hash}\0{fingerprint}\0{stamps}".encode()
    )
    return h.hexdigest()[:40]


def file_key(recipe: Recipe, state: FileState, frame_schema: str) -> str:
    """The key of one source file's partial: :func:`cache_key` over the file's path, size,
    modification time and content hash (``source.FileState``: the parquet footer, or the
    text's last bytes) and the column types the whole source reads it with (``frame_schema``:
    a text file's types, or hive columns, depend on the other files)."""
    stamp = (
        f"file\0{state.path.resolve()}\0{state.size}\0{state.mtime_ns}\0{state.digest}"
        f"\0{frame_schema}"
    )
    return cache_key(recipe, hashlib.sha256(stamp.encode()).hexdigest()[:32])


def files_key(recipe: Recipe, keys: list[str] | tuple[str, ...]) -> str:
    """The key of the merged partial of a set of files (from their :func:`file_key`), which
    also holds the store of measured levels: any change of the file set is a new entry."""
    joined = "\0".join(sorted(keys))
    return cache_key(recipe, "files:" + hashlib.sha256(joined.encode()).hexdigest()[:32])


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
        _sweep(root)
        import tempfile

        return Path(tempfile.mkdtemp(prefix=f".{key}.{os.getpid()}.", suffix=".spill", dir=root))
    except OSError:
        return None


def _sweep(root: Path) -> None:
    """Remove unfinished entries (``.KEY.PID.tmp``) and entries set aside for removal
    (``.KEY.PID.gone``) left by processes that no longer run."""
    for pattern in (".*.tmp", ".*.gone"):
        for old in root.glob(pattern):
            parts = old.name.split(".")  # "", key, pid, "tmp" or "gone"
            if (
                len(parts) == 4
                and parts[2].isdigit()
                and old.is_dir()
                and not old.is_symlink()
                and not process_alive(int(parts[2]))
            ):
                shutil.rmtree(old, ignore_errors=True)


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


# --------------------------------------------------------------------------------------------
# Files that prove themselves (usable for any file an entry holds)
# --------------------------------------------------------------------------------------------


def _plain_name(name: str) -> bool:
    parts = name.split("/")
    return (
        bool(name)
        and not name.startswith("/")
        and "\\" not in name
        and "\0" not in name
        and all(p not in ("", ".", "..") for p in parts)
    )


def _sums(entry: Path) -> dict[str, str]:
    try:
        st = os.lstat(entry / SUMS)
        if not stat.S_ISREG(st.st_mode) or st.st_size > 16 * 1024 * 1024:
            raise DamagedEntry(f"{SUMS} is not a regular file of a plausible size")
        doc = orjson.loads((entry / SUMS).read_bytes())
    except FileNotFoundError:
        raise DamagedEntry(
            f"no {SUMS} (an entry written before checksums, or unfinished)"
        ) from None
    except (OSError, orjson.JSONDecodeError) as e:
        raise DamagedEntry(f"{SUMS} unreadable ({e})") from None
    sums = doc.get("sha256") if isinstance(doc, dict) else None
    if (
        not isinstance(doc, dict)
        or doc.get("format") != SUMS_FORMAT
        or not isinstance(sums, dict)
        or not all(
            isinstance(k, str) and _plain_name(k) and isinstance(v, str) for k, v in sums.items()
        )
    ):
        raise DamagedEntry(f"{SUMS} is not a checksum list")
    return sums


def _write_sums(entry: Path, sums: dict[str, str]) -> None:
    data = orjson.dumps({"format": SUMS_FORMAT, "sha256": dict(sorted(sums.items()))})
    write_atomic(entry / SUMS, data)


def _digest_file(path: Path) -> str:
    """sha256 of a regular file (never a link, FIFO or device: those raise DamagedEntry)."""
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC)
    except OSError as e:
        raise DamagedEntry(f"{path.name}: cannot open ({e.strerror})") from None
    try:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            raise DamagedEntry(f"{path.name}: not a regular file")
        with open(fd, "rb", closefd=False) as f:
            return hashlib.file_digest(f, "sha256").hexdigest()
    except OSError as e:
        raise DamagedEntry(f"{path.name}: cannot read ({e.strerror})") from None
    finally:
        os.close(fd)


def write_file(entry_dir: Path, name: str, data: bytes) -> None:
    """Write ``data`` as file ``name`` of a cache entry (atomically) and record its sha256
    in the entry's ``sums.json`` (rewritten after the file, atomically)."""
    if not _plain_name(name) or name == SUMS:
        raise ValueError(f"cache file name {name!r} must be a relative path inside the entry")
    path = entry_dir / name
    path.parent.mkdir(parents=True, exist_ok=True)
    write_atomic(path, data)
    with _sums_lock(entry_dir):
        try:
            sums = _sums(entry_dir)
        except DamagedEntry:
            sums = {}
        sums[name] = hashlib.sha256(data).hexdigest()
        _write_sums(entry_dir, sums)


@contextlib.contextmanager
def _sums_lock(entry_dir: Path) -> Iterator[None]:
    """Two runs adding files to one entry update ``sums.json`` one after the other."""
    fd = os.open(
        entry_dir / ".sums-lock", os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW | os.O_CLOEXEC, 0o644
    )
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)


def seal(entry_dir: Path, names: list[str] | tuple[str, ...]) -> None:
    """Record the sha256 of files already in the entry (e.g. spilled parts) in
    ``sums.json``, with any recorded before."""
    with _sums_lock(entry_dir):
        try:
            sums = _sums(entry_dir)
        except DamagedEntry:
            sums = {}
        for name in names:
            if not _plain_name(name) or name == SUMS:
                raise ValueError(
                    f"cache file name {name!r} must be a relative path inside the entry"
                )
            sums[name] = _digest_file(entry_dir / name)
        _write_sums(entry_dir, sums)


def _recorded(entry_dir: Path, name: str) -> str:
    want = _sums(entry_dir).get(name)
    if want is None:
        if not os.path.lexists(entry_dir / name):
            raise FileNotFoundError(errno.ENOENT, "not stored in the entry", name)
        raise DamagedEntry(f"{name}: no checksum recorded")
    return want


def read_file(entry_dir: Path, name: str) -> bytes:
    """The bytes of file ``name`` of a cache entry, after checking them against
    ``sums.json``; raises :class:`DamagedEntry` if they do not match or cannot be read,
    ``FileNotFoundError`` if the entry never stored that file (an optional file)."""
    want = _recorded(entry_dir, name)
    path = entry_dir / name
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC)
    except OSError as e:
        raise DamagedEntry(f"{name}: cannot open ({e.strerror})") from None
    try:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            raise DamagedEntry(f"{name}: not a regular file")
        with open(fd, "rb", closefd=False) as f:
            data = f.read()
    except OSError as e:
        raise DamagedEntry(f"{name}: cannot read ({e.strerror})") from None
    finally:
        os.close(fd)
    if hashlib.sha256(data).hexdigest() != want:
        raise DamagedEntry(f"{name}: checksum mismatch")
    return data


def verified_path(entry_dir: Path, name: str) -> Path:
    """The path of file ``name`` after checking it against ``sums.json`` (for large files
    read lazily by polars); raises :class:`DamagedEntry` (or ``FileNotFoundError``, as
    :func:`read_file`) otherwise."""
    want = _recorded(entry_dir, name)
    if _digest_file(entry_dir / name) != want:
        raise DamagedEntry(f"{name}: checksum mismatch")
    return entry_dir / name


def _parquet(entry: Path, name: str) -> pl.DataFrame:
    try:
        return pl.read_parquet(io.BytesIO(read_file(entry, name)))
    except pl.exceptions.PolarsError as e:
        raise DamagedEntry(f"{name}: not readable as parquet ({e})") from None


# --------------------------------------------------------------------------------------------
# Readers' locks
# --------------------------------------------------------------------------------------------


def _lock_shared(entry: Path) -> int | None:
    """A shared lock on an entry (None if it has none or vanished meanwhile)."""
    try:
        fd = os.open(entry / _LOCK, os.O_RDONLY | os.O_NOFOLLOW | os.O_CLOEXEC)
    except OSError:
        return None
    try:
        fcntl.flock(fd, fcntl.LOCK_SH)
        # A remover renames the entry away before deleting it: is this still the entry?
        if os.stat(entry / _LOCK).st_ino != os.fstat(fd).st_ino:
            raise FileNotFoundError
        return fd
    except OSError:
        os.close(fd)
        return None


def _hold(reader: Spilled, fd: int) -> Spilled:
    """Keep the entry's shared lock while ``reader`` (which reads its files lazily) lives."""
    weakref.finalize(reader, os.close, fd)
    return reader


def _remove(entry: Path) -> bool:
    """Remove an entry unless a reader holds it (its lock taken exclusively, no waiting):
    renamed aside first, so no new reader opens it, then deleted."""
    fd = None
    with contextlib.suppress(OSError):
        fd = os.open(entry / _LOCK, os.O_RDONLY | os.O_NOFOLLOW | os.O_CLOEXEC)
    try:
        if fd is not None:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:
                return False  # in use
        aside = entry.with_name(f".{entry.name}.{os.getpid()}.gone")
        try:
            os.replace(entry, aside)
        except OSError:
            return False
        shutil.rmtree(aside, ignore_errors=True)
        return True
    finally:
        if fd is not None:
            os.close(fd)


def _set_aside(entry: Path, why: str) -> None:
    removed = _remove(entry)
    warnings.warn(
        CacheWarning(
            f"cache entry {entry} is damaged ({why}); "
            f"{'removed' if removed else 'not used (another run is reading it)'}, scanning the "
            "source again"
        ),
        stacklevel=3,
    )


# --------------------------------------------------------------------------------------------
# Load and store
# --------------------------------------------------------------------------------------------


def load(key: str) -> Partial | Spilled | None:
    """The cached partial for ``key``, or None: absent, or damaged (set aside, with a
    :class:`CacheWarning`). A spilled partial's entry stays locked for reading while the
    returned object lives."""
    d = cache_dir() / key
    if not d.is_dir() or d.is_symlink():
        return None
    fd = _lock_shared(d)
    if fd is None:
        if (d / _LOCK).exists() or not d.exists():
            return None  # removed meanwhile
        # An entry without a lock file was not written by this version: not verifiable.
    keep = False
    try:
        meta = orjson.loads(read_file(d, "meta.json"))
        if isinstance(meta, dict) and "files" in meta and "keys" not in meta:
            return None  # a file set's entry holding measured levels only (see mark_files)
        tb = parse_time_bin(meta["time_bin"]) if meta["time_bin"] else None
        acc = Accounting(**meta["accounting"])
        if "parts" in meta:
            parts = tuple(tuple(str(f) for f in part) for part in meta["parts"])
            for part in parts:
                for f in part:
                    verified_path(d, f)
            spilled = Spilled(
                keys=tuple(meta["keys"]),
                root=d,
                parts=parts,
                rows=int(meta["rows"]),
                hex_res=meta["hex_res"],
                time_bin=tb,
                accounting=acc,
            )
            if fd is not None:
                keep = True
                return _hold(spilled, fd)
            return spilled
        table = _parquet(d, "table.parquet")
        pairs = {name: _parquet(d, f"pairs-{i}.parquet") for i, name in enumerate(meta["pairs"])}
        values = {
            name: _parquet(d, f"values-{i}.parquet").to_series()
            for i, name in enumerate(meta["pairs"])
        }
        return Partial(
            keys=tuple(meta["keys"]),
            table=table,
            pairs=pairs,
            values=values,
            hex_res=meta["hex_res"],
            time_bin=tb,
            accounting=acc,
        )
    except DamagedEntry as e:
        why = str(e)
    except FileNotFoundError as e:  # a file the entry needs was never stored
        why = f"{e.filename}: missing"
    except (KeyError, TypeError, ValueError, AttributeError, orjson.JSONDecodeError) as e:
        why = f"meta.json: {type(e).__name__}: {e}"
    finally:
        if fd is not None and not keep:
            os.close(fd)
    _set_aside(d, why)
    return None


def _meta(p: Partial | Spilled) -> dict[str, object]:
    return {
        "keys": list(p.keys),
        "hex_res": p.hex_res,
        "time_bin": p.time_bin.text if p.time_bin else None,
        "accounting": {
            "input_rows": p.accounting.input_rows,
            "filtered_rows": p.accounting.filtered_rows,
            "invalid_rows": p.accounting.invalid_rows,
            "invalid_by_reason": p.accounting.invalid_by_reason,
        },
    }


def _parquet_bytes(df: pl.DataFrame) -> bytes:
    buf = io.BytesIO()
    df.write_parquet(buf, compression="zstd")
    return buf.getvalue()


def store(
    key: str,
    p: Partial | Spilled,
    *,
    recipe: str = "",
    drop_others: bool = True,
    files: list[str] | None = None,
) -> Partial | Spilled | None:
    """Store a partial; returns it as stored (a spilled partial's files move into the
    entry, locked for reading while the returned object lives) or None on failure, which is
    otherwise ignored (the cache is an optimisation).

    ``recipe`` (the recipe's scan-relevant hash) is recorded, and the entries of the same
    recipe over other versions of the source are removed (unless a run is reading them): a
    nightly job keeps one entry, not one per night. ``drop_others=False`` keeps them (the
    entries of one file each, pruned by :func:`drop_except`). ``files``: the keys of the
    source files merged into ``p`` (:func:`file_key`), recorded sorted (see :func:`earlier`).
    """
    listed = {} if files is None else {"files": sorted(files)}
    root = cache_dir()
    final = root / key
    if final.exists() and not _remove_if_damaged(final):
        # Another run stored this entry meanwhile and may be reading it: leave it alone (a
        # spilled partial keeps its own files, removed when its run ends).
        return None
    if isinstance(p, Spilled):
        folder = p.root
        fd = None
        try:
            if folder.parent.resolve() != root.resolve():
                return None
            meta = {
                **_meta(p),
                "recipe": recipe,
                **listed,
                "parts": [list(part) for part in p.parts],
                "rows": p.rows,
            }
            fd = os.open(
                folder / _LOCK, os.O_RDONLY | os.O_CREAT | os.O_NOFOLLOW | os.O_CLOEXEC, 0o644
            )
            fcntl.flock(fd, fcntl.LOCK_SH)  # this run reads the parts after storing them
            seal(folder, [f for part in p.parts for f in part])
            write_file(folder, "meta.json", orjson.dumps(meta))
            os.replace(folder, final)
            stored, fd = _hold(p.moved(final), fd), None
            if drop_others:
                _drop_others(root, key, recipe)
            return stored
        except OSError:
            return None
        finally:
            if fd is not None:
                os.close(fd)
    try:
        with _new_entry(root, key) as tmp:
            write_file(tmp, "table.parquet", _parquet_bytes(p.table))
            names = sorted(p.pairs)
            for i, name in enumerate(names):
                write_file(tmp, f"pairs-{i}.parquet", _parquet_bytes(p.pairs[name]))
                write_file(tmp, f"values-{i}.parquet", _parquet_bytes(p.values[name].to_frame("v")))
            meta = {**_meta(p), "recipe": recipe, **listed, "pairs": names}
            write_file(tmp, "meta.json", orjson.dumps(meta))
    except OSError:
        return None
    if drop_others:
        _drop_others(root, key, recipe)
    return p


@contextlib.contextmanager
def _new_entry(root: Path, key: str) -> Iterator[Path]:
    """A temporary folder to fill with an entry's files, renamed to the entry ``key`` when
    the block ends without error; whatever happens otherwise (a full disk, a signal), no
    half-written entry stays behind."""
    tmp = root / f".{key}.{os.getpid()}.tmp"
    try:
        tmp.mkdir(parents=True, exist_ok=True)
        (tmp / _LOCK).touch()
        yield tmp
        os.replace(tmp, root / key)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)


def _remove_if_damaged(entry: Path) -> bool:
    """Whether ``entry`` is gone after this: a damaged one not in use is removed; a sound
    or in-use one stays (False)."""
    fd = _lock_shared(entry)
    try:
        try:
            orjson.loads(read_file(entry, "meta.json"))
            return False
        except (DamagedEntry, FileNotFoundError, orjson.JSONDecodeError):
            pass
    finally:
        if fd is not None:
            os.close(fd)
    return _remove(entry)


def _drop_others(root: Path, key: str, recipe: str) -> None:
    """Remove the entries of ``recipe`` other than ``key`` (older versions of its source),
    except those another run is reading."""
    if not recipe:
        return
    for d in root.iterdir():
        if d.name == key or d.name.startswith("."):
            continue
        with contextlib.suppress(OSError, orjson.JSONDecodeError, AttributeError):
            if orjson.loads((d / "meta.json").read_bytes()).get("recipe") == recipe:
                _remove(d)


# --------------------------------------------------------------------------------------------
# Per-file entries
# --------------------------------------------------------------------------------------------


def mark_files(key: str, files: list[str], *, recipe: str) -> Path | None:
    """An entry for a file set whose merged partial is not stored (spilled files, merged
    from their own entries each run): it holds the list of file entries and, later, the
    store of measured levels. Entries of ``recipe`` over other file sets are removed.
    Returns its folder, or None when the cache cannot be written."""
    root = cache_dir()
    final = root / key
    if final.is_dir() and not _remove_if_damaged(final):
        return final
    try:
        with _new_entry(root, key) as tmp:
            meta = {"files": sorted(files), "recipe": recipe}
            write_file(tmp, "meta.json", orjson.dumps(meta))
    except OSError:
        return None
    _drop_others(root, key, recipe)
    return final


def earlier(
    recipe: str, files: Sequence[str], key: str, read: Callable[[Path], T | None]
) -> tuple[T, int] | None:
    """What ``read`` takes from the entry of ``recipe`` over an earlier set of files: one
    whose recorded files (``meta.json``'s "files", see :func:`store` and :func:`mark_files`)
    are a strict subset of ``files``, i.e. files were only added since (a changed, removed or
    renamed file has another key, so its old key is not among ``files``). Entries over more
    of the files are tried first (ties by name); ``read`` is called under the entry's shared
    lock and returns None when the entry holds nothing usable, and then the next is tried.
    Returns what ``read`` returned and how many files that entry covered, or None. An entry
    that cannot be read or verified is skipped without a word: it is no evidence, and it is
    removed when this run stores its own entry of ``recipe``."""
    root = cache_dir()
    today = set(files)
    found: list[tuple[int, str, Path]] = []
    try:
        listing = sorted(root.iterdir())
    except OSError:
        return None
    for d in listing:
        if d.name == key or d.name.startswith(".") or d.is_symlink() or not d.is_dir():
            continue
        try:
            meta = orjson.loads(read_file(d, "meta.json"))
        except (OSError, DamagedEntry, orjson.JSONDecodeError):
            continue
        if not isinstance(meta, dict) or meta.get("recipe") != recipe:
            continue
        listed = meta.get("files")
        if not isinstance(listed, list) or not all(isinstance(f, str) for f in listed):
            continue
        older = set(listed)
        if older and older < today:
            found.append((-len(older), d.name, d))
    for size, _, d in sorted(found):
        fd = _lock_shared(d)
        if fd is None:
            continue  # removed meanwhile
        try:
            out = read(d)
        finally:
            os.close(fd)
        if out is not None:
            return out, -size
    return None


def remove(key: str) -> bool:
    """Remove the entry ``key`` unless a run is reading it."""
    d = cache_dir() / key
    return d.is_dir() and not d.is_symlink() and _remove(d)


def drop_except(recipe: str, keep: set[str]) -> None:
    """Remove the entries tagged ``recipe`` whose key is not in ``keep`` (files removed
    from the source, or changed since), except those another run is reading."""
    root = cache_dir()
    with contextlib.suppress(OSError):
        for d in root.iterdir():
            if d.name in keep or d.name.startswith("."):
                continue
            with contextlib.suppress(OSError, orjson.JSONDecodeError, AttributeError):
                if orjson.loads((d / "meta.json").read_bytes()).get("recipe") == recipe:
                    _remove(d)
