"""Time building and encoding levels in-process: ranking, top-k, sorting and encoding, the
current implementation against the previous one (kept in ``tests/reference``), and check
that both give the same ranks, rows and payload bytes.

    python bench/encode_bench.py [RECIPE] [--repeat 5] [--levels 6/1w/12,7/1d/12]
                                 [--layouts columns,rows,csv]

RECIPE defaults to ``bench/data/1M/recipe_a.toml`` (write it first: see bench/README.md).
The finest partial comes from the cache (``$REDUCE_CACHE_DIR``) or one scan. Each step is
timed old and new in turn (interleaved), ``--repeat`` times, on the same input; the median
seconds and the old/new ratio are printed. Run from the repository root.
"""

from __future__ import annotations

import argparse
import dataclasses
import statistics
import sys
import time
from collections.abc import Callable
from functools import partial
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from reference import encode_v1, prune_v1  # noqa: E402

from reduce import aggregate, encode, prune  # noqa: E402
from reduce.pipeline import Reducer  # noqa: E402
from reduce.recipe import load_recipe  # noqa: E402


def interleaved(old: Callable[[], Any], new: Callable[[], Any], repeat: int) -> tuple[float, float]:
    """Median seconds of ``old`` and ``new``, run alternately ``repeat`` times each."""
    a: list[float] = []
    b: list[float] = []
    for _ in range(repeat):
        for f, out in ((old, a), (new, b)):
            t = time.perf_counter()
            f()
            out.append(time.perf_counter() - t)
    return statistics.median(a), statistics.median(b)


def bench_level(recipe: Any, reducer: Reducer, text: str, args: argparse.Namespace) -> bool:
    """Time and compare every step at one level ("hex/time/top"); True when all agree."""
    ok = True
    h, t, k = text.split("/")
    level = {"hex": int(h), "time": t, "top": int(k), "digits": args.digits}
    p = reducer._visible(level["hex"], level["time"])
    rows = p.table.height

    def line(step: str, n: int, old_s: float, new_s: float, same: bool) -> None:
        print(
            f"{text:<12} {step:<14} {n:>9,} {old_s:>8.3f} {new_s:>8.3f} "
            f"{old_s / new_s:>8.2f}  {'yes' if same else 'NO'}"
        )

    old_ranks = prune_v1.rank_rows(recipe, p)
    new_ranks = prune.rank_rows(recipe, p)
    times = interleaved(
        lambda: prune_v1.rank_rows(recipe, p), lambda: prune.rank_rows(recipe, p), args.repeat
    )
    same = old_ranks.equals(new_ranks)
    line("rank_rows", rows, *times, same)
    ok = ok and same

    kk = level["top"]
    old_top = prune_v1.top_k(recipe, p, kk, old_ranks)
    new_top = prune.top_k(recipe, p, kk, new_ranks)
    times = interleaved(
        lambda: prune_v1.top_k(recipe, p, kk, old_ranks),
        lambda: prune.top_k(recipe, p, kk, new_ranks),
        args.repeat,
    )
    final = aggregate.finalize(recipe, old_top)
    old_sorted = encode_v1.sort_rows(recipe, final)
    new_sorted = encode.sort_rows(recipe, aggregate.finalize(recipe, new_top))
    same = old_sorted.equals(new_sorted)
    line("top_k", final.height, *times, same)
    ok = ok and same

    times = interleaved(
        lambda: encode_v1.sort_rows(recipe, final),
        lambda: encode.sort_rows(recipe, final),
        args.repeat,
    )
    line("sort_rows", final.height, *times, same)

    accounting = reducer.accounting(level)
    sizes: dict[str, int] = {}
    meta = {"time_zone": "UTC", "rest": recipe.top.rest if recipe.top else "other"}
    for layout in args.layouts.split(","):
        r = dataclasses.replace(recipe, output=dataclasses.replace(recipe.output, layout=layout))

        def enc(module: Any, r: Any = r) -> bytes:
            out: bytes = module.encode(
                r,
                old_sorted,
                level=level,
                accounting=accounting,
                digits=args.digits,
                meta=meta,
            )
            return out

        payload = enc(encode)
        same = enc(encode_v1) == payload
        sizes[layout] = len(payload)
        times = interleaved(partial(enc, encode_v1), partial(enc, encode), args.repeat)
        line(f"encode {layout}", old_sorted.height, *times, same)
        ok = ok and same
    print(f"{text:<12} payload bytes: " + ", ".join(f"{k} {v:,}" for k, v in sizes.items()))
    return ok


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("recipe", nargs="?", type=Path, default=ROOT / "bench/data/1M/recipe_a.toml")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--levels", default="6/1w/12,7/1d/12", help="hex/time/top, comma-separated")
    ap.add_argument("--layouts", default="columns,rows,csv")
    ap.add_argument("--digits", type=int, default=4)
    args = ap.parse_args(argv)

    recipe = load_recipe(args.recipe)
    reducer = Reducer(recipe)
    reducer.finest()
    ok = True
    print(f"{'level':<12} {'step':<14} {'rows':>9} {'old s':>8} {'new s':>8} {'old/new':>8}  same")
    for text in args.levels.split(","):
        ok &= bench_level(recipe, reducer, text, args)
    print("bytes, ranks and rows identical" if ok else "DIFFERENCES FOUND")
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
