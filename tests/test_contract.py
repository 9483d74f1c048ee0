"""Each contract value lives in one module (reduce.contract) and nowhere else in the package.

Outside source: ECMAScript's Number.MAX_SAFE_INTEGER is 2^53 - 1 (from memory).
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

import reduce
from reduce import contract
from reduce.contract import INVALID_REASONS, Invalid

PACKAGE = Path(reduce.__file__).parent


def test_invalid_reasons_are_the_names_manifests_report() -> None:
    assert INVALID_REASONS == {1: "coordinates", 2: "time", 3: "key", 4: "unassigned"}
    assert Invalid.VALID == 0 and Invalid(3).reason == "key"


def test_the_safe_integer_limit_is_ecmascripts() -> None:
    assert contract.MAX_SAFE_INTEGER == 9_007_199_254_740_991  # 2**53 - 1


@pytest.mark.parametrize(
    "literal",
    [
        contract.COLUMNS_FORMAT,
        contract.GEOJSON_FORMAT,
        contract.MANIFEST_FORMAT,
        contract.LEVELS_FORMAT,
        "2**53",
        "9007199254740991",
    ],
)
def test_no_module_restates_a_contract_value(literal: str) -> None:
    # Quoted format strings or the limit written out, in code (docstrings may name them).
    pattern = re.compile(
        rf"[\"']{re.escape(literal)}[\"']" if "/" in literal else re.escape(literal)
    )
    found = []
    for f in sorted(PACKAGE.rglob("*.py")):
        if f.name == "contract.py":
            continue
        for i, line in enumerate(f.read_text(encoding="utf-8").splitlines(), 1):
            code = line.split("#", 1)[0]
            if pattern.search(code) and "``" not in code:
                found.append(f"{f.relative_to(PACKAGE)}:{i}")
    assert found == []
