"""The demo: generate the bundled scenario when absent, then run every demo recipe.

The scenario (an invented island nation whose residents report weather sightings) is
generated locally and deterministically by :mod:`reduce._scenario` into ``fixtures/demo/``
of the source checkout; the recipes in ``recipes/`` read it from there.
"""

from __future__ import annotations

import hashlib
import time
from collections.abc import Callable
from pathlib import Path

import orjson

from reduce.errors import SourceError
from reduce.pipeline import RunResult, run
from reduce.recipe import load_recipe

ROOT = Path(__file__).resolve().parent.parent
FIXTURES = ROOT / "fixtures" / "demo"
RECIPES = ROOT / "recipes"
DEFAULT_ROWS = 2_000_000
SEED = 20261202
_STAMP = ".complete.json"


def ensure_scenario(
    *,
    rows: int | None = None,
    regenerate: bool = False,
    progress: Callable[[str], None] | None = None,
    dest: Path = FIXTURES,
) -> Path:
    """Generate the scenario into ``dest`` unless an identical one is already there."""
    from reduce import _scenario

    # The generator's own source text versions the data: editing it regenerates the scenario.
    version = hashlib.sha256(Path(_scenario.__file__).read_bytes()).hexdigest()[:16]
    want = {"rows": rows or DEFAULT_ROWS, "seed": SEED, "generator": version}
    stamp = dest / _STAMP
    if not regenerate and stamp.is_file():
        try:
            if orjson.loads(stamp.read_bytes()) == want:
                return dest
        except orjson.JSONDecodeError:
            pass
    if progress:
        progress(f"generating the demo scenario ({want['rows']:,} rows)")
    stamp.unlink(missing_ok=True)
    _scenario.generate(dest, rows=int(str(want["rows"])), seed=SEED, progress=progress)
    stamp.write_bytes(orjson.dumps(want))
    return dest


def recipe_files() -> list[Path]:
    if not RECIPES.is_dir():
        raise SourceError(
            f"{RECIPES}: the demo recipes are not here; run the demo from a "
            "source checkout (pip install -e .)"
        )
    return sorted(RECIPES.glob("*.toml"))


def run_demo(
    *,
    out_dir: Path,
    rows: int | None = None,
    regenerate: bool = False,
    progress: Callable[[str], None] | None = None,
    echo: Callable[[str], None] | None = None,
) -> tuple[list[RunResult], float]:
    """Generate (if needed) and run every recipe; returns results and elapsed seconds."""
    start = time.perf_counter()
    ensure_scenario(rows=rows, regenerate=regenerate, progress=progress)
    results = []
    for f in recipe_files():
        recipe = load_recipe(f)
        results.append(run(recipe, out_dir=out_dir, progress=progress))
    return results, time.perf_counter() - start
