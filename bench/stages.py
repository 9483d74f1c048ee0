"""Where a ``reduce run`` spends its time and memory, stage by stage.

    python bench/stages.py RECIPE [--budget 2MB] [--no-cache] [--out DIR] [--json FILE]

Runs :func:`reduce.pipeline.run` in this process with a progress callback that stamps every
progress message (checking the source, scanning, building the partial, measuring each
candidate level, ...) with the elapsed seconds, the process CPU seconds and the peak resident
memory seen since the previous message (sampled every 20 ms by a thread, via /proc). The
last stage, after the final message, is the publishing of the chosen level. Run it from the
repository root (or with the repository on PYTHONPATH) to measure the working tree.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import threading
import time
from pathlib import Path
from typing import Any

PAGE = os.sysconf("SC_PAGE_SIZE")


def rss_bytes() -> int:
    with open("/proc/self/statm", "rb") as f:
        return int(f.read().split()[1]) * PAGE


class Sampler(threading.Thread):
    """Peak RSS since the last :meth:`take`, sampled every ``every`` seconds."""

    def __init__(self, every: float = 0.02) -> None:
        super().__init__(daemon=True)
        self.every = every
        self.peak = rss_bytes()
        self.lock = threading.Lock()
        self.stop = threading.Event()

    def run(self) -> None:
        while not self.stop.wait(self.every):
            r = rss_bytes()
            with self.lock:
                self.peak = max(self.peak, r)

    def take(self) -> int:
        r = rss_bytes()
        with self.lock:
            peak, self.peak = max(self.peak, r), r
        return peak


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("recipe", type=Path)
    ap.add_argument("--budget", default=None)
    ap.add_argument("--no-cache", action="store_true")
    ap.add_argument("--out", type=Path, default=None)
    ap.add_argument("--json", type=Path, default=None)
    a = ap.parse_args(argv)

    t_start = time.perf_counter()
    from reduce.pipeline import run

    stages: list[dict[str, Any]] = []
    sampler = Sampler()
    sampler.start()
    last = {"name": "imports", "t": t_start, "cpu": 0.0}

    def close(next_name: str) -> None:
        now, cpu = time.perf_counter(), time.process_time()
        stages.append(
            {
                "stage": last["name"],
                "seconds": now - last["t"],
                "cpu": cpu - last["cpu"],
                "peak_mb": sampler.take() / 1e6,
            }
        )
        last.update(name=next_name, t=now, cpu=cpu)

    import inspect

    # The budget keyword was renamed once (budget_max -> budget): accept either.
    kw: dict[str, Any] = {}
    if a.budget is not None:
        name = "budget" if "budget" in inspect.signature(run).parameters else "budget_max"
        kw[name] = a.budget
    close("loading the recipe")
    try:
        run(a.recipe, out_dir=a.out, use_cache=not a.no_cache, progress=close, **kw)
        close("(end)")
    finally:
        sampler.stop.set()
    stages[-1]["stage"] = f"{stages[-1]['stage']} + publishing"
    total = time.perf_counter() - t_start
    width = max(len(s["stage"]) for s in stages)
    print(f"{'stage':<{width}} {'seconds':>8} {'cpu s':>8} {'peak MB':>8}")
    for s in stages:
        print(f"{s['stage']:<{width}} {s['seconds']:8.2f} {s['cpu']:8.2f} {s['peak_mb']:8.0f}")
    print(
        f"{'total':<{width}} {total:8.2f} {time.process_time():8.2f} "
        f"{max(s['peak_mb'] for s in stages):8.0f}"
    )
    if a.json:
        a.json.write_text(json.dumps({"stages": stages, "total": total}, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
