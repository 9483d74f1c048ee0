"""Fixtures only; the helper functions live in ``tests/_builders.py``.

- ``_isolated_cache`` (autouse): every test gets a partial cache folder of its own.
- ``case``: ``case(events, group=..., ...)`` writes a case into ``tmp_path``
  (:func:`tests._builders.write_case`) and returns the recipe path.
- ``demo_payloads`` (session): every demo recipe run over a 20,000-row demo scenario.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

import reduce
from tests._builders import write_case

# --------------------------------------------------------------------------------------------
# Cache isolation: no test reads or writes the user's partial cache.
# --------------------------------------------------------------------------------------------


@pytest.fixture(autouse=True)
def _isolated_cache(
    monkeypatch: pytest.MonkeyPatch, tmp_path_factory: pytest.TempPathFactory
) -> None:
    """Every test gets a cache folder of its own (outside its tmp_path, so listings of
    tmp_path do not see it); a test that needs the folder reads ``$REDUCE_CACHE_DIR``."""
    monkeypatch.setenv("REDUCE_CACHE_DIR", str(tmp_path_factory.mktemp("reduce-cache")))


@pytest.fixture
def case(tmp_path: Path):  # type: ignore[no-untyped-def]
    """``case(events, group=..., measures=..., ...)`` -> recipe path inside ``tmp_path``."""

    def make(events: Any, **kw: Any) -> Path:
        return write_case(tmp_path, events, **kw)

    return make


# --------------------------------------------------------------------------------------------
# Demo payloads (small): every demo recipe run over a 20,000-row demo scenario
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="session")
def demo_payloads(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Payload path per demo recipe, written once per test session.

    The demo recipes are pointed at a 20,000-row scenario. At that size sightings-hex
    suppresses every cell (fewer than 3 observers each), so it is run twice: as written
    (``sightings-hex``, an empty payload) and with ``prune.min_count.min = 1``
    (``sightings-hex-all``).
    """
    from reduce._scenario import generate
    from reduce.demo import RECIPES, SEED

    root = tmp_path_factory.mktemp("demo-payloads")
    data = generate(root / "data", rows=20_000, seed=SEED).root
    out: dict[str, Path] = {}
    for f in sorted(RECIPES.glob("*.toml")):
        text = f.read_text(encoding="utf-8").replace("../fixtures/demo/", f"{data.as_posix()}/")
        recipe = root / f.name
        recipe.write_text(text.replace("../out/", "out/"), encoding="utf-8")
        out[f.stem] = reduce.run(recipe, use_cache=False).path  # type: ignore[assignment]
        if f.stem == "sightings-hex":
            res = reduce.run(
                recipe,
                out_dir=root / "out-all",
                use_cache=False,
                overrides={"prune.min_count.min": "1"},
            )
            out["sightings-hex-all"] = res.path  # type: ignore[assignment]
    return out
