"""Per-file partials computed on a Dask cluster's workers and merged on the client.

``reduce run --cluster tcp://host:8786`` (or ``$REDUCE_CLUSTER``; from Python, ``with
cluster.using("tcp://host:8786"): reduce.run(...)``) connects to a running Dask scheduler;
``--cluster local:N`` starts a local cluster of N worker processes for one run. The client
submits one task per source file that is not cached: the task is :func:`scan_file_task`, a
function of this package, called with plain arguments (the recipe file's path, its ``--set``
overrides, the file's path and state). Each worker loads the recipe, opens the source and
scans that one file itself, so **every worker must see the recipe, the source files and any
boundaries file at the same paths as the client** (shared storage: NFS, a mounted bucket,
the same disk for a local cluster). No user code is sent: the recipe is data, and a partial
comes back as Arrow tables (pyarrow; Int128 sums as decimal text, which Arrow cannot hold)
with a small JSON-like header.

A file too sparse to group in memory is spilled by its worker, as a local scan would spill
it (same probe, same parts), into a temporary folder on the worker; its keyed rows come back
as the bytes of the parquet files written there, which the client writes into its own spill
folder (in the cache when it is used) and removes from the worker: neither a worker nor the
client holds a sparse file's groups in memory. The merge, the fit and the publishing happen
on the client, exactly as for a local run, so the payload's bytes are the same.

The extra is optional: ``pip install 'reduce[cluster]'`` (``dask[distributed]``).
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import polars as pl

from reduce.errors import ReduceError

# Seconds to wait for the scheduler to answer before giving up (one error line, exit 2):
# ``$REDUCE_CLUSTER_TIMEOUT`` or 10.
CONNECT_TIMEOUT = 10.0


def connect_timeout() -> float:
    env = os.environ.get("REDUCE_CLUSTER_TIMEOUT", "")
    try:
        return max(0.5, float(env)) if env else CONNECT_TIMEOUT
    except ValueError:
        return CONNECT_TIMEOUT


# Seconds a local cluster (``local:N``) may take to start its workers.
LOCAL_START_TIMEOUT = 60.0

_address: str | None = None


class ClusterError(ReduceError, OSError):
    """The cluster cannot be used: the extra is missing, or the scheduler does not answer."""


def current() -> str | None:
    """The cluster the runs use (set by :func:`using`; ``reduce run`` reads ``--cluster`` or
    ``$REDUCE_CLUSTER``), or None: scan in this process."""
    return _address


def _distributed() -> Any:
    try:
        import distributed
    except ImportError:
        raise ClusterError(
            "--cluster needs Dask's distributed scheduler, which is not "
            "installed; run pip install 'reduce[cluster]' (or pip install "
            "'dask[distributed]')"
        ) from None
    return distributed


@contextlib.contextmanager
def using(address: str | None) -> Iterator[str | None]:
    """Use ``address`` for the runs inside (``local:N`` starts N local worker processes,
    closed on the way out); None: no cluster (this process scans)."""
    global _address
    if not address:
        yield current()
        return
    previous = _address
    cluster = None
    try:
        if address.startswith("local:"):
            n = address.split(":", 1)[1]
            if not n.isdigit() or not 1 <= int(n) <= 256:
                raise ClusterError(
                    f"--cluster {address}: local:N needs a number of workers "
                    "from 1 to 256, e.g. local:2"
                )
            cluster = _local_cluster(int(n))
            address = str(cluster.scheduler_address)
        elif "://" not in address:
            raise ClusterError(
                f"--cluster {address}: give a scheduler address such as tcp://host:8786, or local:N"
            )
        else:
            # The scheduler must answer now, even when every file's partial is cached and
            # nothing is sent to it: a wrong address fails the run it was given to.
            with _client(address):
                pass
        _address = address
        yield address
    finally:
        _address = previous
        if cluster is not None:
            with contextlib.suppress(Exception):
                cluster.close()


def _local_cluster(n: int) -> Any:
    distributed = _distributed()
    try:
        return distributed.LocalCluster(
            n_workers=n,
            threads_per_worker=1,
            processes=True,
            host="127.0.0.1",
            dashboard_address=None,
            silence_logs=50,
            timeout=LOCAL_START_TIMEOUT,
        )
    except Exception as e:  # noqa: BLE001 - Dask raises many kinds; one line says which
        raise ClusterError(
            f"--cluster local:{n}: cannot start a local cluster ({type(e).__name__}: {_first(e)})"
        ) from None


def _first(e: BaseException) -> str:
    lines = str(e).strip().splitlines()
    return lines[0] if lines else type(e).__name__


@contextlib.contextmanager
def _client(address: str) -> Iterator[Any]:
    distributed = _distributed()
    wait = connect_timeout()
    try:
        client = distributed.Client(address, timeout=wait, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as e:
        raise ClusterError(
            f"cluster {address}: the scheduler does not answer within "
            f"{wait:g} s ({_first(e) or type(e).__name__}); start "
            "it (dask scheduler) or check the address and port"
        ) from None
    try:
        yield client
    finally:
        with contextlib.suppress(Exception):
            client.close()


def scan_files(
    address: str,
    recipe: Any,
    files: Sequence[Any],
    *,
    progress: Callable[[str], None] | None = None,
    spill: Sequence[tuple[int | None, int]] | None = None,
    spill_dir: Callable[[int], Path] | None = None,
) -> list[Any]:
    """The finest partial of each of ``files`` (``source.FileState``: each file as the
    client saw it, which the worker checks before it scans) of ``recipe``'s source, scanned by
    the cluster's workers, in the order given.

    With ``spill`` (per file: the number of parts and the probe rows, as a local scan of that
    file would use them) a file too sparse to group in memory is spilled by its worker, and
    its keyed rows come back as the parquet files the worker wrote, into ``spill_dir(i)`` (a
    fresh folder for file ``i``): the result is then a :class:`~reduce.aggregate.Spilled`."""
    from reduce.aggregate import Partial, Spilled

    overrides = [list(kv) for kv in recipe.overrides]
    recipe_path = str(Path(recipe.file).resolve())
    with _client(address) as client:
        futures = [
            client.submit(
                scan_file_task,
                recipe_path,
                overrides,
                str(Path(f.path).resolve()),
                recipe.scan_hash,
                [f.size, f.mtime_ns, f.digest],
                list(spill[i]) if spill is not None else None,
                pure=False,
                key=f"reduce-scan-{i}-{os.getpid()}-{id(files)}",
            )
            for i, f in enumerate(files)
        ]
        out: list[Partial | Spilled] = []
        for i, fut in enumerate(futures, start=1):
            try:
                doc = fut.result()
            except ReduceError:
                raise
            except (OSError, TimeoutError) as e:
                raise ClusterError(
                    f"cluster {address}: lost while scanning "
                    f"{Path(files[i - 1].path).name} ({_first(e)}); check the "
                    "workers and run again"
                ) from None
            if "spilled" in doc:
                assert spill_dir is not None
                out.append(spilled_from_wire(doc, spill_dir(i - 1)))
            else:
                out.append(from_wire(doc))
            del doc
            fut.release()  # the worker's copy goes: one file's rows held at a time
            if progress:
                progress(f"cluster: {i:,} of {len(files):,} files scanned")
        return out


def scan_file_task(
    recipe_path: str,
    overrides: list[list[str]],
    path: str,
    scan_hash: str,
    seen: list[Any],
    spill: list[int | None] | None = None,
) -> dict[str, Any]:
    """Runs on a worker: the finest partial of one source file, as Arrow tables (see the
    module docstring). The recipe is loaded from its path (shared storage) and must be the
    one the client loaded (same scan-relevant content); the file must be as the client saw
    it (``seen``: size, modification time, content digest), since the client caches the
    partial under that state. ``spill`` (parts, probe rows): a file too sparse to group in
    memory is spilled into a temporary folder of the worker instead, and its keyed rows are
    sent as the bytes of the parquet files written there (removed before returning)."""
    import shutil
    import tempfile

    from reduce import aggregate
    from reduce.errors import RecipeError, SourceError, shown_path
    from reduce.recipe import load_recipe
    from reduce.source import file_source, file_state, open_source

    recipe = load_recipe(recipe_path, overrides=dict((k, v) for k, v in overrides))
    if recipe.scan_hash != scan_hash:
        raise RecipeError(
            f"{shown_path(Path(recipe_path))}: differs on the worker from the "
            "client's copy; the workers must see the same files (shared storage)"
        )
    state = file_state(Path(path))
    if [state.size, state.mtime_ns, state.digest] != list(seen):
        raise SourceError(
            f"{shown_path(Path(path))}: differs on the worker from what the "
            "client saw (changed meanwhile, or not the same shared file); nothing "
            "was published or cached: run again once the file is complete"
        )
    src = open_source(recipe)
    fsrc = file_source(src, state)
    folders: list[Path] = []

    def spill_dir() -> Path:
        folders.append(Path(tempfile.mkdtemp(prefix="reduce-worker-spill-")))
        return folders[-1]

    try:
        try:
            p = aggregate.scan_partial(
                recipe,
                fsrc,
                whole=False,
                spill_dir=spill_dir if spill is not None else None,
                parts=spill[0] if spill is not None else None,
                probe=spill[1] if spill is not None else None,
            )
        except pl.exceptions.PolarsError as e:
            raise (fsrc.read_error(e) or e) from None
        fsrc.check_unchanged()
        if isinstance(p, aggregate.Spilled):
            return spilled_to_wire(p)
        return to_wire(p)
    finally:
        for d in folders:
            shutil.rmtree(d, ignore_errors=True)


def _accounting_wire(a: Any) -> list[Any]:
    return [a.input_rows, a.filtered_rows, a.invalid_rows, dict(a.invalid_by_reason)]


def _accounting_of(doc: dict[str, Any]) -> Any:
    from reduce.aggregate import Accounting

    inp, filt, inv, by = doc["accounting"]
    return Accounting(int(inp), int(filt), int(inv), {str(k): int(n) for k, n in by.items()})


def spilled_to_wire(p: Any) -> dict[str, Any]:
    """A :class:`~reduce.aggregate.Spilled` partial as plain data: its parquet files' bytes
    by part (paths relative to its folder)."""
    return {
        "spilled": True,
        "keys": list(p.keys),
        "hex_res": p.hex_res,
        "time_bin": p.time_bin.text if p.time_bin else None,
        "accounting": _accounting_wire(p.accounting),
        "rows": p.rows,
        "parts": [[[f, (p.root / f).read_bytes()] for f in part] for part in p.parts],
    }


def spilled_from_wire(doc: dict[str, Any], folder: Path) -> Any:
    """The partial sent by :func:`spilled_to_wire`, its files written under ``folder``."""
    from reduce.aggregate import Spilled
    from reduce.recipe import parse_time_bin

    parts: list[tuple[str, ...]] = []
    for part in doc["parts"]:
        names: list[str] = []
        for rel, data in part:
            rel_path = Path(rel)
            if rel_path.is_absolute() or ".." in rel_path.parts:
                raise ClusterError(f"a worker sent a spill file outside its folder: {rel!r}")
            target = folder / rel_path
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes(data)
            names.append(rel_path.as_posix())
        parts.append(tuple(names))
    return Spilled(
        keys=tuple(doc["keys"]),
        root=folder,
        parts=tuple(parts),
        rows=int(doc["rows"]),
        hex_res=doc["hex_res"],
        time_bin=parse_time_bin(doc["time_bin"]) if doc["time_bin"] else None,
        accounting=_accounting_of(doc),
    )


def _arrow(df: pl.DataFrame) -> tuple[Any, list[str]]:
    """A frame as an Arrow table, Int128 columns as decimal text (Arrow has no Int128)."""
    wide = [c for c, t in df.schema.items() if t == pl.Int128]
    return df.with_columns(pl.col(c).cast(pl.String) for c in wide).to_arrow(), wide


def _frame(table: Any, wide: list[str]) -> pl.DataFrame:
    df = pl.from_arrow(table)
    assert isinstance(df, pl.DataFrame)
    return df.with_columns(pl.col(c).cast(pl.Int128) for c in wide)


def to_wire(p: Any) -> dict[str, Any]:
    """A :class:`~reduce.aggregate.Partial` as plain data and Arrow tables."""
    table, wide = _arrow(p.table)
    return {
        "keys": list(p.keys),
        "hex_res": p.hex_res,
        "time_bin": p.time_bin.text if p.time_bin else None,
        "accounting": [
            p.accounting.input_rows,
            p.accounting.filtered_rows,
            p.accounting.invalid_rows,
            dict(p.accounting.invalid_by_reason),
        ],
        "table": table,
        "wide": wide,
        "pairs": {k: _arrow(v)[0] for k, v in p.pairs.items()},
        "values": {k: _arrow(v.to_frame("v"))[0] for k, v in p.values.items()},
    }


def from_wire(doc: dict[str, Any]) -> Any:
    """The :class:`~reduce.aggregate.Partial` sent by :func:`to_wire`."""
    from reduce.aggregate import Accounting, Partial
    from reduce.recipe import parse_time_bin

    inp, filt, inv, by = doc["accounting"]
    return Partial(
        keys=tuple(doc["keys"]),
        table=_frame(doc["table"], doc["wide"]),
        pairs={k: _frame(v, []) for k, v in doc["pairs"].items()},
        values={k: _frame(v, []).to_series() for k, v in doc["values"].items()},
        hex_res=doc["hex_res"],
        time_bin=parse_time_bin(doc["time_bin"]) if doc["time_bin"] else None,
        accounting=Accounting(
            int(inp), int(filt), int(inv), {str(k): int(n) for k, n in by.items()}
        ),
    )
