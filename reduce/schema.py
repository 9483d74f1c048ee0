"""JSON Schemas (draft 2020-12) of recipes, payloads and manifests, for editors and CI.

The recipe schema is generated from the key tables that :mod:`reduce.recipe` validates
with (``TOP_KEYS``, ``SOURCE_KEYS``, ... and the allowed layouts, formats, measures and
axes): every table's ``properties`` are exactly its allowed keys and
``additionalProperties`` is false, so a key the parser rejects is rejected here too. What
this module adds is each key's JSON type (and the few required keys); building the schema
fails if a key table gains a key without a type here, so the two cannot drift apart
silently. Checks that need the data or cross-references (a measure named in
``prune.top.by`` must exist) stay with ``reduce check``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from reduce import recipe as R
from reduce.contract import MANIFEST_FORMAT
from reduce.sizes import MEASURES

DRAFT = "https://json-schema.org/draft/2020-12/schema"

_STR: dict[str, Any] = {"type": "string", "minLength": 1}
_STRS: dict[str, Any] = {"type": "array", "items": _STR, "uniqueItems": True}
_STR_OR_STRS: dict[str, Any] = {"anyOf": [_STR, _STRS]}
_BOOL: dict[str, Any] = {"type": "boolean"}
_RES: dict[str, Any] = {"type": "integer", "minimum": 0, "maximum": 15}
_POS: dict[str, Any] = {"type": "integer", "minimum": 1}
_BIN: dict[str, Any] = {"type": "string", "pattern": r"^\d+(mo|m|h|d|w|y)$"}
_SIZE: dict[str, Any] = {
    "anyOf": [
        {"type": "integer", "minimum": 1},
        # As reduce.sizes.parse_size reads them: 300KB, 1.5MB, 200KiB, 250000 (any letter case).
        {"type": "string", "pattern": r"^\s*\d+(\.\d+)?\s*(([kKmMgG][iI]?)?[bB])?\s*$"},
    ]
}
_SCALAR: dict[str, Any] = {"type": ["string", "number", "boolean"]}


def _one_or_many(item: Mapping[str, Any]) -> dict[str, Any]:
    return {"anyOf": [dict(item), {"type": "array", "items": dict(item), "minItems": 1}]}


def _table(
    keys: Sequence[str],
    types: Mapping[str, Any],
    *,
    required: Sequence[str] = (),
    where: str = "",
    **extra: Any,
) -> dict[str, Any]:
    """An object schema whose properties are exactly ``keys`` (the parser's allowed keys)."""
    missing = [k for k in keys if k not in types]
    unknown = [k for k in types if k not in keys]
    if missing or unknown:  # a bug in this module, not bad input
        raise RuntimeError(
            f"schema for {where or 'the recipe'}: keys without a type {missing}, "
            f"types for keys the parser rejects {unknown}"
        )
    return {
        "type": "object",
        "properties": {k: types[k] for k in keys},
        "additionalProperties": False,
        **({"required": list(required)} if required else {}),
        **extra,
    }


def recipe_schema() -> dict[str, Any]:
    """The JSON Schema of a recipe (the TOML document as JSON)."""
    filter_ = _table(
        R.FILTER_KEYS,
        {
            "column": _STR,
            "in": {"type": "array", "items": _SCALAR, "minItems": 1},
            "not_in": {"type": "array", "items": _SCALAR, "minItems": 1},
            "min": _SCALAR,
            "max": _SCALAR,
            "null": _BOOL,
        },
        required=["column"],
        where="filter",
        minProperties=2,
    )
    source = _table(
        R.SOURCE_KEYS,
        {
            "path": _STR,
            "format": {"enum": list(R.SOURCE_FORMATS)},
            "time": _STR,
            "lat": _STR,
            "lon": _STR,
            "time_zone": _STR,
            "filter": {"anyOf": [filter_, {"type": "array", "items": filter_}]},
            "null_values": _STRS,
        },
        required=["path"],
        where="source",
    )
    hex_ = _table(
        R.HEX_KEYS,
        {"levels": {"type": "array", "items": _RES, "minItems": 1}, "resolution": _RES},
        where="group.hex",
        minProperties=1,
        maxProperties=1,
    )
    time = _table(
        R.TIME_KEYS,
        {"levels": {"type": "array", "items": _BIN, "minItems": 1}, "bin": _BIN, "zone": _STR},
        where="group.time",
        oneOf=[{"required": ["levels"]}, {"required": ["bin"]}],
    )
    region = _table(
        R.REGION_KEYS,
        {k: _STR for k in R.REGION_KEYS},
        where="group.region",
        oneOf=[{"required": ["column"]}, {"required": ["boundaries", "id"]}],
    )
    category = _table(
        R.CATEGORY_KEYS,
        {"column": _STR_OR_STRS, "columns": _STRS},
        where="group.category",
        minProperties=1,
        maxProperties=1,
    )
    end = {
        "anyOf": [
            _STR,
            _table(
                R.FLOW_END_KEYS,
                {"lat": _STR, "lon": _STR},
                required=list(R.FLOW_END_KEYS),
                where="group.flow end",
            ),
        ]
    }
    flow = _table(
        R.FLOW_KEYS,
        {"origin": end, "destination": end, "hex": _RES, "boundaries": _STR, "id": _STR},
        required=["origin", "destination"],
        where="group.flow",
    )
    group = _table(
        R.GROUP_KEYS,
        {"hex": hex_, "time": time, "region": region, "category": category, "flow": flow},
        where="group",
        minProperties=1,
    )
    kinds = [k for k in R.MEASURE_KINDS if k != "count"]
    # A measure: "count", or one kind naming its column (or count = true), with an optional
    # where (the same filters as source.filter).
    measure: dict[str, Any] = {
        "anyOf": [
            {"const": "count"},
            {
                "type": "object",
                "minProperties": 1,
                "maxProperties": 2,
                "properties": {
                    **{k: _STR for k in kinds},
                    "count": {"const": True},
                    "where": {"type": "array", "items": filter_, "minItems": 1},
                },
                "additionalProperties": False,
            },
        ]
    }
    measures = {
        "type": "object",
        "minProperties": 1,
        "propertyNames": {"pattern": r"^[A-Za-z_][A-Za-z0-9_]{0,63}$"},
        "additionalProperties": measure,
    }
    normalize = _table(
        R.NORMALIZE_KEYS,
        {
            "denominators": _table(
                R.DENOMINATOR_KEYS,
                {"path": _STR, "key": _STR, "value": _STR, "on": {"enum": ["region", "hex"]}},
                required=["path", "key", "value"],
                where="normalize.denominators",
            ),
            "per": _POS,
            "measures": _STR_OR_STRS,
            "share": _table(
                R.SHARE_KEYS,
                {"measures": _STR_OR_STRS, "within": _STR_OR_STRS},
                required=["measures"],
                where="normalize.share",
            ),
            "location_quotient": _table(
                R.LQ_KEYS,
                {"measure": _STR},
                required=["measure"],
                where="normalize.location_quotient",
            ),
        },
        where="normalize",
        minProperties=1,
    )
    prune = _table(
        R.PRUNE_KEYS,
        {
            "top": _table(
                R.TOP_K_KEYS,
                {"k": _one_or_many(_POS), "by": _STR, "within": _STR_OR_STRS, "rest": _STR},
                required=["k"],
                where="prune.top",
            ),
            "min_count": {
                "anyOf": [
                    _POS,
                    _table(
                        R.MIN_COUNT_KEYS,
                        {"min": _POS, "by": _STR, "fold": _BOOL},
                        required=["min"],
                        where="prune.min_count",
                    ),
                ]
            },
        },
        where="prune",
    )
    budget = _table(
        R.BUDGET_KEYS,
        {
            "max": _SIZE,
            "on": {"enum": list(MEASURES)},
            "order": {"type": "array", "items": {"enum": list(R.AXES)}, "uniqueItems": True},
        },
        required=["max"],
        where="budget",
    )
    digits = {"type": "integer", "minimum": 0, "maximum": 15}
    output = _table(
        R.OUTPUT_KEYS,
        {
            "path": _STR,
            "layout": {"enum": list(R.LAYOUTS)},
            "digits": _one_or_many(digits),
            "column_digits": {"type": "object", "additionalProperties": digits},
            "inline": _BOOL,
            "simplify": _one_or_many({"type": "number", "minimum": 0, "maximum": 1}),
            "coordinate_digits": _one_or_many({"type": "integer", "minimum": 0, "maximum": 9}),
            "precompress": _BOOL,
            "preview": _BOOL,
        },
        where="output",
    )
    top = _table(
        R.TOP_KEYS,
        {
            "name": {"type": "string", "pattern": r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$"},
            "description": {"type": "string"},
            "source": source,
            "group": group,
            "measures": measures,
            "normalize": normalize,
            "prune": prune,
            "budget": budget,
            "output": output,
        },
        required=["name", "source", "group"],
        where="the recipe",
    )
    return {
        "$schema": DRAFT,
        "$id": "reduce.recipe/1",
        "title": "reduce recipe",
        "description": "A reduce recipe (TOML). Generated from reduce.recipe's key tables; "
        "`reduce check` also checks cross-references and the data.",
        **top,
    }


def payload_schema() -> dict[str, Any]:
    """The JSON Schema of the JSON payload layouts: columns, rows, and GeoJSON."""
    count = {"type": "integer", "minimum": 0}
    accounting = {
        "type": "object",
        "required": [
            "input_rows",
            "filtered_rows",
            "invalid_rows",
            "suppressed_rows",
            "represented_rows",
        ],
        "additionalProperties": count,
        "properties": {},
    }
    columns = {
        "type": "object",
        "required": ["format", "recipe", "level", "rows", "columns", "accounting"],
        "properties": {
            "format": {"type": "string", "pattern": r"^reduce\.columns/\d+$"},
            "recipe": {"type": "string"},
            "level": {"type": "object"},
            "rows": count,
            "columns": {"type": "object", "additionalProperties": {"type": "array"}},
            "dictionaries": {
                "type": "object",
                "additionalProperties": {"type": "array", "items": {"type": ["string", "null"]}},
            },
            "accounting": accounting,
            "meta": {"type": "object"},
        },
    }
    geojson = {
        "type": "object",
        "required": ["type", "features"],
        "properties": {
            "type": {"const": "FeatureCollection"},
            "features": {
                "type": "array",
                "items": {
                    "type": "object",
                    "required": ["type", "geometry", "properties"],
                    "properties": {
                        "type": {"const": "Feature"},
                        "geometry": {"type": ["object", "null"]},
                        "properties": {"type": ["object", "null"]},
                    },
                },
            },
            "reduce": {
                "type": "object",
                "required": ["format", "recipe", "level", "accounting"],
                "properties": {
                    "format": {"type": "string", "pattern": r"^reduce\.geojson/\d+$"},
                    "accounting": accounting,
                },
            },
        },
    }
    rows = {"type": "array", "items": {"type": "object"}}
    return {
        "$schema": DRAFT,
        "$id": "reduce.payload/1",
        "title": "reduce payload",
        "description": "A JSON payload written by reduce: the columns layout, the rows "
        "layout, or a GeoJSON FeatureCollection (RFC 7946).",
        "anyOf": [columns, geojson, rows],
    }


def manifest_schema() -> dict[str, Any]:
    """The JSON Schema of ``x.manifest.json``."""
    count = {"type": "integer", "minimum": 0}
    maybe = {"type": ["integer", "null"], "minimum": 0}
    return {
        "$schema": DRAFT,
        "$id": MANIFEST_FORMAT,
        "title": "reduce manifest",
        "type": "object",
        "required": [
            "format",
            "payload",
            "layout",
            "sha256",
            "bytes",
            "rows",
            "elements",
            "recipe",
            "level",
            "frontier",
            "accounting",
        ],
        "properties": {
            "format": {"const": MANIFEST_FORMAT},
            "payload": {"type": "string", "minLength": 1},
            "layout": {"enum": list(R.LAYOUTS)},
            "sha256": {"type": "string", "pattern": "^[0-9a-f]{64}$"},
            "bytes": {
                "type": "object",
                "required": ["raw", "gzip", "brotli"],
                "properties": {"raw": count, "gzip": count, "brotli": maybe},
            },
            "rows": count,
            "elements": count,
            "recipe": {
                "type": "object",
                "required": ["name", "sha256"],
                "properties": {
                    "name": {"type": "string"},
                    "file": {"type": "string"},
                    "sha256": {"type": "string", "pattern": "^[0-9a-f]{64}$"},
                },
            },
            "level": {"type": "object"},
            "budget": {
                "anyOf": [
                    {"type": "null"},
                    {
                        "type": "object",
                        "required": ["max", "on"],
                        "properties": {
                            "max": {"type": "integer", "minimum": 1},
                            "on": {"enum": list(MEASURES)},
                            "order": {"type": "array", "items": {"enum": list(R.AXES)}},
                            "fits": {"type": "boolean"},
                        },
                    },
                ]
            },
            "notes": {"type": "array", "items": {"type": "string"}},
            "frontier": {
                "type": "array",
                "items": {
                    "type": "object",
                    "required": ["level", "rows", "fits"],
                    "properties": {
                        "level": {"type": "object"},
                        "rows": maybe,
                        "raw": maybe,
                        "gzip": maybe,
                        "brotli": maybe,
                        "fits": {"type": ["boolean", "null"]},
                        "chosen": {"type": "boolean"},
                        "estimated": {"type": "boolean"},
                    },
                },
            },
            "accounting": {"type": "object", "required": ["input_rows", "represented_rows"]},
            "source": {"type": "object"},
            "files": {
                "type": ["object", "null"],
                "required": ["total", "scanned", "reused"],
                "properties": {"total": count, "scanned": count, "reused": count},
                "additionalProperties": False,
            },
            "denominators": {"type": "object"},
            "precompressed": {
                "type": "object",
                "properties": {"gzip": {"type": "string"}, "brotli": {"type": "string"}},
                "additionalProperties": False,
            },
        },
    }


SCHEMAS = {"recipe": recipe_schema, "payload": payload_schema, "manifest": manifest_schema}
