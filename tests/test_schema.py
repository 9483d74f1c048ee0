"""JSON Schemas (``reduce schema``) against the recipes, payloads and manifests we write.

External reference: the ``jsonschema`` package (draft 2020-12 validator and meta-schema).
The bad-recipe cases check that the schema fails at the same key as ``reduce check``.
"""

from __future__ import annotations

import copy
import json
import tomllib
from pathlib import Path
from typing import Any

import jsonschema
import pytest
from click.testing import CliRunner

from reduce import recipe as R
from reduce.cli import main
from reduce.demo import RECIPES
from reduce.publish import manifest_path
from reduce.schema import SCHEMAS, recipe_schema
from tests._builders import to_toml

Validator = jsonschema.Draft202012Validator


def _printed(kind: str) -> dict[str, Any]:
    res = CliRunner().invoke(main, ["schema", kind])
    assert res.exit_code == 0, res.output
    return json.loads(res.output)


@pytest.mark.parametrize("kind", ["recipe", "payload", "manifest"])
def test_printed_schema_is_a_valid_draft_2020_12_schema(kind: str) -> None:
    schema = _printed(kind)
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    Validator.check_schema(schema)  # the meta-schema, as the jsonschema package ships it


def test_recipe_schema_tables_are_the_parsers_key_tables() -> None:
    s = recipe_schema()
    props = s["properties"]
    assert tuple(s["properties"]) == R.TOP_KEYS
    assert tuple(props["source"]["properties"]) == R.SOURCE_KEYS
    assert tuple(props["group"]["properties"]) == R.GROUP_KEYS
    assert tuple(props["output"]["properties"]) == R.OUTPUT_KEYS
    assert tuple(props["budget"]["properties"]) == R.BUDGET_KEYS
    assert tuple(props["prune"]["properties"]["top"]["properties"]) == R.TOP_K_KEYS
    assert props["output"]["properties"]["layout"]["enum"] == list(R.LAYOUTS)


def _jsonable(doc: Any) -> Any:
    return json.loads(json.dumps(doc, default=str))  # TOML times become strings


@pytest.mark.parametrize("path", sorted(RECIPES.glob("*.toml")), ids=lambda p: p.stem)
def test_every_demo_recipe_validates(path: Path) -> None:
    doc = _jsonable(tomllib.loads(path.read_text(encoding="utf-8")))
    assert [e.message for e in Validator(_printed("recipe")).iter_errors(doc)] == []


def test_every_demo_payload_and_manifest_validates(demo_payloads: dict[str, Path]) -> None:
    payload = Validator(SCHEMAS["payload"]())
    manifest = Validator(SCHEMAS["manifest"]())
    for name, p in demo_payloads.items():
        assert [e.message for e in payload.iter_errors(json.loads(p.read_bytes()))] == [], name
        man = manifest_path(p)
        assert [e.message for e in manifest.iter_errors(json.loads(man.read_bytes()))] == [], name


def test_a_manifest_with_a_wrong_checksum_form_fails(demo_payloads: dict[str, Path]) -> None:
    p = demo_payloads["province-rates"]
    man = json.loads(manifest_path(p).read_bytes())
    man["sha256"] = "not-a-digest"
    assert not Validator(SCHEMAS["manifest"]()).is_valid(man)


BASE: dict[str, Any] = {
    "name": "case",
    "source": {"path": "events.parquet"},
    "group": {"region": {"column": "region"}, "category": {"column": "kind"}},
    "measures": {"reports": "count"},
    "prune": {"top": {"k": [3, 2], "by": "reports"}},
    "budget": {"max": "300KB", "on": "gzip"},
    "output": {"path": "out/case.json"},
}


def _set(doc: dict[str, Any], dotted: str, value: Any) -> None:
    *parents, last = dotted.split(".")
    for p in parents:
        doc = doc[p]
    doc[last] = value


def _drop(doc: dict[str, Any], dotted: str) -> None:
    *parents, last = dotted.split(".")
    for p in parents:
        doc = doc[p]
    del doc[last]


def _schema_locations(doc: dict[str, Any]) -> set[str]:
    """Dotted keys where the recipe schema fails ``doc``."""
    out = set()
    for e in Validator(recipe_schema()).iter_errors(doc):
        path = [str(p) for p in e.absolute_path]
        if e.validator == "additionalProperties":
            extra = [k for k in e.instance if k not in e.schema.get("properties", {})]
            out.update(".".join([*path, k]) for k in extra)
        elif e.validator == "required":
            out.update(".".join([*path, k]) for k in e.validator_value if k not in e.instance)
        else:
            out.add(".".join(path))
    return out


CASES = [
    # unknown keys
    ("set", "budgets", {"max": "1KB"}),
    ("set", "group.category.colum", "kind"),
    ("set", "output.precompres", True),
    ("set", "prune.top.limit", 3),
    # wrong types
    ("set", "name", 5),
    ("set", "output.inline", "yes"),
    ("set", "output.precompress", "yes"),
    ("set", "output.preview", 1),
    ("set", "budget.max", True),
    ("set", "budget.on", "zip"),
    ("set", "prune.top.k", "5"),
    ("set", "output.layout", "table"),
    # missing required keys
    ("drop", "name", None),
    ("drop", "source", None),
    ("drop", "source.path", None),
    ("drop", "budget.max", None),
    ("drop", "prune.top.k", None),
]


@pytest.mark.parametrize("op, key, value", CASES, ids=[f"{c[0]}-{c[1]}" for c in CASES])
def test_a_bad_recipe_fails_the_schema_at_the_key_reduce_check_names(
    op: str, key: str, value: Any, tmp_path: Path
) -> None:
    doc = copy.deepcopy(BASE)
    if op == "set":
        _set(doc, key, value)
    else:
        _drop(doc, key)
    path = tmp_path / "recipe.toml"
    path.write_text(to_toml(doc), encoding="utf-8")
    res = CliRunner().invoke(main, ["check", str(path)])
    assert res.exit_code == 2
    assert f": {key}: " in res.output, res.output
    assert key in _schema_locations(_jsonable(doc))


def test_the_base_recipe_of_the_bad_cases_is_valid_for_both(tmp_path: Path) -> None:
    assert _schema_locations(copy.deepcopy(BASE)) == set()
    R.parse_recipe(copy.deepcopy(BASE), file=tmp_path / "recipe.toml")
