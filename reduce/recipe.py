"""Recipes: TOML documents read with ``tomllib`` into frozen dataclasses.

This module owns the recipe schema and every check that can be made without touching the
data: key names (unknown keys fail with a close-match hint), types, ranges, allowed values,
ladders ordered finest to coarsest, cross-references between sections (a measure named in
``prune.top.by`` must exist), and paths resolved relative to the recipe file. Nothing in a
recipe is ever evaluated as code: filters are structured data turned into polars expressions
by :mod:`reduce.source`.

Every error is a :class:`~reduce.errors.RecipeError` whose message starts with the recipe
file and the dotted key at fault, e.g. ``recipes/x.toml: group.hex.levels: ...``.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import re
import tomllib
import zoneinfo
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import orjson

from reduce.errors import RecipeError, did_you_mean, shown_path
from reduce.levels import AXES as AXES  # the ladder axes, declared once (re-exported)
from reduce.sizes import MEASURES, Measure, parse_size

# --------------------------------------------------------------------------------------------
# The dataclasses
# --------------------------------------------------------------------------------------------

FilterOp = Literal["in", "not_in", "range", "null", "not_null"]
MeasureKind = Literal["count", "sum", "min", "max", "mean", "distinct"]
Layout = Literal["columns", "rows", "csv", "geojson"]
FLOW_COLUMNS = ("origin", "destination")  # a flow's key columns
LAYOUTS: tuple[str, ...] = ("columns", "rows", "csv", "geojson")
SOURCE_FORMATS = ("parquet", "csv", "ndjson")
# The file extensions output.path may have for each layout (the first is the default name).
LAYOUT_EXTENSIONS: dict[str, tuple[str, ...]] = {
    "columns": (".json",),
    "rows": (".json",),
    "csv": (".csv",),
    "geojson": (".geojson", ".json"),
}


@dataclass(frozen=True, slots=True)
class Filter:
    """One structured filter: ``column`` compared with literal values, never code."""

    column: str
    op: FilterOp
    values: tuple[Any, ...] = ()
    lo: Any = None
    hi: Any = None
    key: str = ""  # dotted recipe key, for messages


@dataclass(frozen=True, slots=True)
class Source:
    path: str  # absolute path, glob or folder
    display: str  # as written in the recipe
    format: str | None  # parquet | csv | ndjson, or None to infer from file names
    time: str | None
    lat: str | None
    lon: str | None
    naive_zone: str  # zone in which naive timestamps are read
    filters: tuple[Filter, ...]
    null_values: tuple[str, ...] = ()  # CSV/NDJSON text read as missing (besides empty)


@dataclass(frozen=True, slots=True)
class HexKey:
    levels: tuple[int, ...]  # H3 resolutions, finest first


@dataclass(frozen=True, slots=True)
class TimeBin:
    """A time-bin width: ``n`` units of minutes, hours, days, weeks, months or years."""

    n: int
    unit: str  # m h d w mo y

    @property
    def text(self) -> str:
        return f"{self.n}{self.unit}"

    @property
    def minutes(self) -> int | None:
        """Fixed width in minutes, or None for calendar units (months, years)."""
        per = {"m": 1, "h": 60, "d": 1440, "w": 10080}
        return self.n * per[self.unit] if self.unit in per else None

    def nests(self, finer: TimeBin) -> bool:
        """True when every bin of this width is a union of whole bins of ``finer``."""
        if self.unit in ("mo", "y"):
            if finer.unit in ("mo",):
                months = self.n * (12 if self.unit == "y" else 1)
                return months % finer.n == 0 and (12 % months == 0)
            return finer.unit in ("m", "h", "d")  # weeks straddle months
        fm, sm = finer.minutes, self.minutes
        if fm is None or sm is None:  # a fixed width is never made of calendar months
            return False
        if self.unit == "w":
            return finer.unit in ("m", "h", "d", "w") and sm % fm == 0
        return sm % fm == 0


@dataclass(frozen=True, slots=True)
class TimeKey:
    levels: tuple[TimeBin, ...]  # finest first
    zone: str


@dataclass(frozen=True, slots=True)
class RegionKey:
    """A region key: a source column, or the polygon of a GeoJSON file containing the event."""

    column: str  # the key's name in partials and payloads
    source: str | None = None  # the source column (None when from boundaries)
    boundaries: Path | None = None
    boundaries_display: str = ""
    id_property: str | None = None
    outside: str | None = None  # label for events outside every polygon; None: unassigned
    label_property: str | None = None  # a polygon property carried into payloads

    @property
    def label_column(self) -> str | None:
        """The payload column (GeoJSON property) holding each region's label."""
        return f"{self.column}_label" if self.label_property else None


@dataclass(frozen=True, slots=True)
class FlowEnd:
    """One end of a flow: a source column, or a coordinate pair."""

    column: str | None = None
    lat: str | None = None
    lon: str | None = None


@dataclass(frozen=True, slots=True)
class FlowKey:
    """Origin -> destination keys, as the category pair ``origin``, ``destination``."""

    origin: FlowEnd
    destination: FlowEnd
    hex_res: int | None = None  # coordinate ends: H3 cells at this resolution
    boundaries: Path | None = None  # coordinate ends: regions of this GeoJSON file
    boundaries_display: str = ""
    id_property: str | None = None


@dataclass(frozen=True, slots=True)
class MeasureSpec:
    name: str
    kind: MeasureKind
    column: str | None  # None for count
    where: tuple[Filter, ...] = ()  # rows the measure counts (structured filters, all true)


@dataclass(frozen=True, slots=True)
class Denominators:
    path: Path
    display: str
    key: str
    value: str
    on: Literal["region", "hex"]


@dataclass(frozen=True, slots=True)
class Share:
    measures: tuple[str, ...]
    within: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class Normalize:
    denominators: Denominators | None
    per: int
    rate_measures: tuple[str, ...]
    share: Share | None
    location_quotient: str | None


@dataclass(frozen=True, slots=True)
class TopK:
    ks: tuple[int, ...]  # largest (finest) first
    by: str
    within: tuple[str, ...]
    rest: str


@dataclass(frozen=True, slots=True)
class MinCount:
    threshold: int
    by: str | None  # a count or distinct measure; None = events (rows)
    fold: bool  # fold suppressed cells into the group's remainder row


@dataclass(frozen=True, slots=True)
class Budget:
    max: int
    on: Measure
    order: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class Output:
    path: Path | None
    layout: Layout
    digits: tuple[int, ...]  # ladder of decimal digits for float columns, most first
    column_digits: tuple[tuple[str, int], ...]
    inline: bool
    simplify: tuple[float, ...] = (0.0,)  # outline tolerance ladder (degrees), finest first
    coordinate_digits: tuple[int, ...] = (6,)  # geometry decimals ladder, most first
    precompress: bool = False  # also write x.json.gz (gzip 9) and x.json.br (brotli 11)
    preview: bool = False  # also write x.png and x.html (reduce.preview) beside the payload


@dataclass(frozen=True, slots=True)
class Recipe:
    name: str
    file: Path
    content_hash: str  # sha256 of the validated document (after overrides)
    scan_hash: str  # sha256 of what the finest partial depends on
    description: str
    source: Source
    hex: HexKey | None
    time: TimeKey | None
    region: RegionKey | None
    categories: tuple[str, ...]  # category key names (for flows: origin, destination)
    flow: FlowKey | None
    measures: tuple[MeasureSpec, ...]
    normalize: Normalize | None
    top: TopK | None
    min_count: MinCount | None
    budget: Budget | None
    output: Output
    document: Mapping[str, Any] = field(repr=False, compare=False, default_factory=dict)
    overrides: tuple[tuple[str, str], ...] = ()  # --set key=value pairs applied on load

    @property
    def key_names(self) -> tuple[str, ...]:
        """Payload key columns in row-sort order."""
        names: list[str] = []
        if self.time:
            names.append("time")
        if self.hex:
            names.append("hex")
        if self.region:
            names.append(self.region.column)
        names.extend(self.categories)
        return tuple(names)

    @property
    def group_names(self) -> tuple[str, ...]:
        """Axis names usable in ``within`` lists: time, hex, region, and category columns."""
        names = []
        if self.time:
            names.append("time")
        if self.hex:
            names.append("hex")
        if self.region:
            names.append("region")
        return tuple(names)

    def ladder(self) -> dict[str, tuple[Any, ...]]:
        """Every axis with its levels, finest first."""
        axes: dict[str, tuple[Any, ...]] = {}
        if self.hex:
            axes["hex"] = self.hex.levels
        if self.time:
            axes["time"] = tuple(b.text for b in self.time.levels)
        if self.top:
            axes["top"] = self.top.ks
        if self.output.layout == "geojson":
            if self.region and self.region.boundaries and not self.hex:
                axes["simplify"] = self.output.simplify
            axes["coords"] = self.output.coordinate_digits
        axes["digits"] = self.output.digits
        return axes

    @property
    def needs_coordinates(self) -> bool:
        """Whether keys are computed from source.lat/source.lon."""
        return bool(self.hex or (self.region and self.region.boundaries))

    @property
    def category_sources(self) -> tuple[str, ...]:
        """Source columns read as categories (not a flow's ends, whose keys are computed)."""
        return (
            tuple(c for c in self.categories if c not in FLOW_COLUMNS)
            if self.flow
            else self.categories
        )

    def finest_level(self) -> dict[str, Any]:
        return {axis: levels[0] for axis, levels in self.ladder().items()}


# --------------------------------------------------------------------------------------------
# Loading
# --------------------------------------------------------------------------------------------

_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$")
_IDENT_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,63}$")
_BIN_RE = re.compile(r"^(\d+)(mo|m|h|d|w|y)$")
_ALLOWED_BINS = {
    "m": {1, 2, 3, 4, 5, 6, 10, 12, 15, 20, 30},
    "h": {1, 2, 3, 4, 6, 8, 12},
    "d": {1},
    "w": {1},
    "mo": {1, 3},
    "y": {1},
}


class _Ctx:
    """Carries the recipe file name so every message can say where it points."""

    def __init__(self, file: Path) -> None:
        self.file = file
        self.shown = shown_path(file)

    def fail(self, key: str, problem: str) -> RecipeError:
        where = f"{self.shown}: {key}: " if key else f"{self.shown}: "
        return RecipeError(where + problem)

    def table(self, doc: Any, key: str, allowed: Sequence[str]) -> dict[str, Any]:
        if not isinstance(doc, dict):
            raise self.fail(key, f"must be a table, got {_tname(doc)}")
        for k in doc:
            if k not in allowed:
                full = f"{key}.{k}" if key else k
                raise self.fail(
                    full,
                    f"unknown key{did_you_mean(k, allowed)}; allowed here: {', '.join(allowed)}",
                )
        return doc

    def string(
        self,
        doc: Mapping[str, Any],
        key: str,
        name: str,
        *,
        required: bool = False,
        default: str | None = None,
    ) -> str | None:
        full = f"{key}.{name}" if key else name
        if name not in doc:
            if required:
                raise self.fail(full, "is required")
            return default
        v = doc[name]
        if not isinstance(v, str) or not v.strip():
            raise self.fail(full, f"must be a non-empty string, got {_tname(v)} {_short(v)}")
        return v

    def integer(self, v: Any, key: str, *, lo: int | None = None, hi: int | None = None) -> int:
        if isinstance(v, bool) or not isinstance(v, int):
            raise self.fail(key, f"must be an integer, got {_tname(v)} {_short(v)}")
        if lo is not None and v < lo or hi is not None and v > hi:
            rng = f"{lo}..{hi}" if hi is not None else f">= {lo}"
            raise self.fail(key, f"{v} is out of range; use {rng}")
        return v

    def str_list(self, v: Any, key: str, *, allow_single: bool = True) -> tuple[str, ...]:
        if allow_single and isinstance(v, str):
            v = [v]
        if not isinstance(v, list) or not all(isinstance(x, str) and x for x in v):
            raise self.fail(key, f"must be a list of strings, got {_short(v)}")
        if len(set(v)) != len(v):
            raise self.fail(key, "lists a name twice")
        return tuple(v)


def _tname(v: Any) -> str:
    return {
        bool: "a boolean",
        int: "an integer",
        float: "a number",
        str: "a string",
        list: "a list",
        dict: "a table",
    }.get(type(v), type(v).__name__)


def _short(v: Any) -> str:
    s = repr(v)
    return s if len(s) <= 40 else s[:37] + "..."


def parse_time_bin(text: Any) -> TimeBin:
    """Parse ``15m``, ``1h``, ``1d``, ``1w``, ``1mo``, ``3mo``, ``1y`` (raises ValueError)."""
    m = _BIN_RE.match(text) if isinstance(text, str) else None
    if not m:
        raise ValueError(
            f"{_short(text)} is not a time bin; use minutes, hours, days, weeks, months or "
            "years such as 15m, 1h, 6h, 1d, 1w, 1mo, 1y"
        )
    n, unit = int(m.group(1)), m.group(2)
    if n not in _ALLOWED_BINS[unit]:
        allowed = ", ".join(f"{k}{unit}" for k in sorted(_ALLOWED_BINS[unit]))
        raise ValueError(f"{text!r} does not divide its parent unit evenly; use one of {allowed}")
    return TimeBin(n, unit)


def load_recipe(path: str | Path, *, overrides: Mapping[str, str] | None = None) -> Recipe:
    """Read and validate a recipe file; ``overrides`` maps dotted keys to TOML values."""
    file = Path(path)
    ctx = _Ctx(file)
    try:
        text = file.read_bytes()
    except FileNotFoundError:
        raise RecipeError(f"{ctx.shown}: recipe file not found; check the path") from None
    except IsADirectoryError:
        raise RecipeError(f"{ctx.shown}: is a folder, not a recipe file") from None
    except OSError as e:
        raise RecipeError(f"{ctx.shown}: cannot read the recipe ({e.strerror})") from None
    try:
        doc = tomllib.loads(text.decode("utf-8"))
    except UnicodeDecodeError:
        raise RecipeError(f"{ctx.shown}: is not UTF-8 text; save the recipe as UTF-8") from None
    except tomllib.TOMLDecodeError as e:
        raise RecipeError(f"{ctx.shown}: TOML syntax error: {e}") from None
    for dotted, value in (overrides or {}).items():
        _apply_override(ctx, doc, dotted, value)
    recipe = parse_recipe(doc, file=file)
    if overrides:
        recipe = dataclasses.replace(recipe, overrides=tuple(overrides.items()))
    return recipe


def with_budget(
    recipe: Recipe,
    *,
    max: int | None = None,
    on: str | None = None,
    order: Sequence[str] | None = None,
) -> Recipe:
    """The recipe with budget values replaced, as typed values validated like the file's
    ``[budget]`` table (no TOML text, no second read of the file)."""
    doc = dict(recipe.document)
    b = dict(doc.get("budget") or {})
    if max is not None:
        b["max"] = max
    if on is not None:
        b["on"] = on
    if order is not None:
        b["order"] = list(order)
    budget = _parse_budget(_Ctx(recipe.file), b, list(recipe.ladder()))
    doc["budget"] = b
    canonical = orjson.dumps(doc, option=orjson.OPT_SORT_KEYS, default=str)
    return dataclasses.replace(
        recipe, budget=budget, document=doc, content_hash=hashlib.sha256(canonical).hexdigest()
    )


def parse_override(text: str) -> tuple[str, str]:
    """Split ``key.path=value`` (as given to ``--set``)."""
    key, sep, value = text.partition("=")
    if not sep or not key.strip():
        raise RecipeError(f"--set {text!r}: use key.path=value, e.g. --set budget.max=200KB")
    return key.strip(), value.strip()


def _apply_override(ctx: _Ctx, doc: dict[str, Any], dotted: str, value: str) -> None:
    try:
        parsed: Any = tomllib.loads(f"v = {value}")["v"]
    except tomllib.TOMLDecodeError:
        parsed = value  # a bare word such as gzip or 300KB is taken as a string
    parts = dotted.split(".")
    if not all(_IDENT_RE.match(p) or re.match(r"^[A-Za-z0-9_-]+$", p) for p in parts):
        raise ctx.fail(dotted, "is not a dotted key path; use e.g. budget.max")
    node = doc
    for i, p in enumerate(parts[:-1]):
        nxt = node.setdefault(p, {})
        if not isinstance(nxt, dict):
            raise ctx.fail(".".join(parts[: i + 1]), "is not a table; cannot set a key inside it")
        node = nxt
    node[parts[-1]] = parsed


_INT64 = (-(2**63), 2**63 - 1)


def _check_int_range(ctx: _Ctx, v: Any, key: str) -> None:
    """TOML integers are 64-bit (tomllib reads longer ones): refuse them by key."""
    if isinstance(v, dict):
        for k, x in v.items():
            _check_int_range(ctx, x, f"{key}.{k}" if key else k)
    elif isinstance(v, list):
        for i, x in enumerate(v):
            _check_int_range(ctx, x, f"{key}[{i}]")
    elif isinstance(v, int) and not isinstance(v, bool) and not _INT64[0] <= v <= _INT64[1]:
        raise ctx.fail(
            key, f"{_short(v)} is beyond TOML's 64-bit integer range; use a smaller number"
        )


# The keys each recipe table allows. Parsing rejects any other key; the JSON Schema
# (reduce.schema) is generated from these same tuples.
TOP_KEYS = (
    "name",
    "description",
    "source",
    "group",
    "measures",
    "normalize",
    "prune",
    "budget",
    "output",
)
SOURCE_KEYS = ("path", "format", "time", "lat", "lon", "time_zone", "filter", "null_values")
FILTER_KEYS = ("column", "in", "not_in", "min", "max", "null")
GROUP_KEYS = ("hex", "time", "region", "category", "flow")
HEX_KEYS = ("levels", "resolution")
TIME_KEYS = ("levels", "bin", "zone")
REGION_KEYS = ("column", "boundaries", "id", "name", "outside", "label")
CATEGORY_KEYS = ("column", "columns")
FLOW_KEYS = ("origin", "destination", "hex", "boundaries", "id")
FLOW_END_KEYS = ("lat", "lon")
NORMALIZE_KEYS = ("denominators", "per", "measures", "share", "location_quotient")
DENOMINATOR_KEYS = ("path", "key", "value", "on")
SHARE_KEYS = ("measures", "within")
LQ_KEYS = ("measure",)
PRUNE_KEYS = ("top", "min_count")
TOP_K_KEYS = ("k", "by", "within", "rest")
MIN_COUNT_KEYS = ("min", "by", "fold")
BUDGET_KEYS = ("max", "on", "order")
OUTPUT_KEYS = (
    "path",
    "layout",
    "digits",
    "column_digits",
    "inline",
    "simplify",
    "coordinate_digits",
    "precompress",
    "preview",
)
_TOP_KEYS = TOP_KEYS


def parse_recipe(doc: dict[str, Any], *, file: Path) -> Recipe:
    """Validate a parsed TOML document (see :func:`load_recipe`)."""
    ctx = _Ctx(file)
    base = file.resolve().parent
    ctx.table(doc, "", _TOP_KEYS)
    _check_int_range(ctx, doc, "")
    name = ctx.string(doc, "", "name", required=True)
    assert name is not None
    if not _NAME_RE.match(name):
        raise ctx.fail(
            "name", f"{name!r} must be letters, digits, '.', '_' or '-' (it names the output file)"
        )
    description = ctx.string(doc, "", "description", default="") or ""

    if "source" not in doc:
        raise ctx.fail("source", "is required; add a [source] table with path = ...")
    src_doc = ctx.table(doc["source"], "source", SOURCE_KEYS)
    group_doc = ctx.table(doc.get("group", {}), "group", GROUP_KEYS)
    if not group_doc:
        raise ctx.fail("group", "is empty; group by at least one of hex, time, region, category")

    # --- group keys --------------------------------------------------------------------------
    hex_key = _parse_hex(ctx, group_doc["hex"]) if "hex" in group_doc else None
    time_key = _parse_time(ctx, group_doc["time"]) if "time" in group_doc else None
    region = _parse_region(ctx, group_doc["region"], base) if "region" in group_doc else None
    categories: tuple[str, ...] = ()
    flow = None
    if "flow" in group_doc:
        flow = _parse_flow(ctx, group_doc["flow"], base)
    if "category" in group_doc:
        c = ctx.table(group_doc["category"], "group.category", CATEGORY_KEYS)
        if ("column" in c) == ("columns" in c):
            raise ctx.fail(
                "group.category", 'give exactly one of column = "..." or columns = [...]'
            )
        categories = (
            ctx.str_list(c["column"], "group.category.column")
            if "column" in c
            else ctx.str_list(c["columns"], "group.category.columns", allow_single=False)
        )
        if not categories:
            raise ctx.fail("group.category.columns", "is empty; list at least one column")
        taken = ("time", "hex", *(FLOW_COLUMNS if flow else ()))
        for cname in categories:
            if cname in taken or (region and cname == region.column):
                raise ctx.fail(
                    "group.category",
                    f"column {cname!r} has the name of another "
                    "key; rename the column in the source",
                )
    if flow is not None:  # the flow's ends are categories too, ranked and folded together
        categories = (*FLOW_COLUMNS, *categories)
    if region and region.column in ("time", "hex"):
        raise ctx.fail(
            "group.region",
            f"the key name {region.column!r} is taken by another key; set group.region.name",
        )
    need_geo = hex_key is not None or bool(region and region.boundaries)
    source = _parse_source(ctx, src_doc, base, need_geo, time_key is not None)

    # --- measures ----------------------------------------------------------------------------
    measures = _parse_measures(ctx, doc.get("measures"), source.naive_zone)
    reserved = {
        "time",
        "hex",
        *(k for k in ([region.column] if region else [])),
        *categories,
        *([region.label_column] if region and region.label_column else []),
    }
    for m in measures:
        if m.name in reserved:
            raise ctx.fail(
                f"measures.{m.name}", "has the same name as a key column; rename the measure"
            )
    names = {m.name for m in measures}

    axis_names = [
        a for a, present in (("time", time_key), ("hex", hex_key), ("region", region)) if present
    ]

    normalize = (
        _parse_normalize(
            ctx, doc["normalize"], base, measures, region, hex_key, categories, axis_names
        )
        if "normalize" in doc
        else None
    )
    top, min_count = (
        _parse_prune(ctx, doc["prune"], measures, categories, axis_names)
        if "prune" in doc
        else (None, None)
    )
    output = _parse_output(ctx, doc.get("output", {}), base)
    derived = _derived_names(measures, normalize)
    for m in measures:
        if m.name in derived:
            raise ctx.fail(
                f"measures.{m.name}",
                "has the same name as a column that normalize derives; rename the measure",
            )
    for col, _ in output.column_digits:
        if col not in names and col not in derived:
            raise ctx.fail(
                f"output.column_digits.{col}",
                f"names no measure or derived column{did_you_mean(col, [*names, *derived])}",
            )

    geo = output.layout == "geojson"
    if geo and not (hex_key or (region and region.boundaries)):
        raise ctx.fail(
            "output.layout", "geojson needs a geometry: group by hex or by a region from boundaries"
        )
    ladder_axes = [
        a
        for a, present in (
            ("hex", hex_key),
            ("time", time_key),
            ("top", top),
            (
                "simplify",
                geo and region is not None and region.boundaries is not None and not hex_key,
            ),
            ("coords", geo),
            ("digits", True),
        )
        if present
    ]
    budget = _parse_budget(ctx, doc["budget"], ladder_axes) if "budget" in doc else None

    canonical = orjson.dumps(doc, option=orjson.OPT_SORT_KEYS, default=str)
    scan_doc = {
        "source": doc.get("source"),
        "group": doc.get("group"),
        "measures": doc.get("measures"),
        "base": str(base),
    }
    scan_hash = hashlib.sha256(
        orjson.dumps(scan_doc, option=orjson.OPT_SORT_KEYS, default=str)
    ).hexdigest()
    return Recipe(
        name=name,
        file=file,
        content_hash=hashlib.sha256(canonical).hexdigest(),
        scan_hash=scan_hash,
        description=description,
        source=source,
        hex=hex_key,
        time=time_key,
        region=region,
        categories=categories,
        flow=flow,
        measures=measures,
        normalize=normalize,
        top=top,
        min_count=min_count,
        budget=budget,
        output=output,
        document=doc,
    )


def _levels(ctx: _Ctx, d: Mapping[str, Any], key: str, single: str) -> list[Any]:
    if ("levels" in d) == (single in d):
        raise ctx.fail(key, f"give exactly one of levels = [...] (finest first) or {single} = ...")
    if single in d:
        return [d[single]]
    levels = d["levels"]
    if not isinstance(levels, list):
        raise ctx.fail(f"{key}.levels", f"must be a list, got {_tname(levels)}")
    if not levels:
        raise ctx.fail(f"{key}.levels", "is empty; list at least one level, finest first")
    return levels


def _rel(base: Path, p: str) -> Path:
    return Path(p) if Path(p).is_absolute() else base / p


def _parse_region(ctx: _Ctx, doc: Any, base: Path) -> RegionKey:
    r = ctx.table(doc, "group.region", REGION_KEYS)
    if ("column" in r) == ("boundaries" in r):
        raise ctx.fail(
            "group.region",
            'give exactly one of column = "..." (a source column) '
            'or boundaries = "file.geojson" with id = "property"',
        )
    if "column" in r:
        for k in ("id", "outside", "label"):
            if k in r:
                raise ctx.fail(f"group.region.{k}", "applies to boundaries only")
        col = ctx.string(r, "group.region", "column", required=True)
        name = ctx.string(r, "group.region", "name", default=col)
        assert col is not None and name is not None
        return RegionKey(column=name, source=col)
    path = ctx.string(r, "group.region", "boundaries", required=True)
    idp = ctx.string(r, "group.region", "id", required=True)
    name = ctx.string(r, "group.region", "name", default="region")
    outside = ctx.string(r, "group.region", "outside")
    label = ctx.string(r, "group.region", "label")
    assert path is not None and idp is not None and name is not None
    return RegionKey(
        column=name,
        boundaries=_rel(base, path),
        boundaries_display=path,
        id_property=idp,
        outside=outside,
        label_property=label,
    )


def _flow_end(ctx: _Ctx, v: Any, key: str) -> FlowEnd:
    if isinstance(v, str) and v:
        return FlowEnd(column=v)
    d = ctx.table(v, key, FLOW_END_KEYS)
    lat = ctx.string(d, key, "lat", required=True)
    lon = ctx.string(d, key, "lon", required=True)
    return FlowEnd(lat=lat, lon=lon)


def _parse_flow(ctx: _Ctx, doc: Any, base: Path) -> FlowKey:
    d = ctx.table(doc, "group.flow", FLOW_KEYS)
    for k in ("origin", "destination"):
        if k not in d:
            raise ctx.fail(
                f"group.flow.{k}", 'is required: a column name, or { lat = "...", lon = "..." }'
            )
    o = _flow_end(ctx, d["origin"], "group.flow.origin")
    t = _flow_end(ctx, d["destination"], "group.flow.destination")
    if (o.column is None) != (t.column is None):
        raise ctx.fail(
            "group.flow", "origin and destination must both be columns or both be coordinates"
        )
    if o.column is not None:
        for k in ("hex", "boundaries", "id"):
            if k in d:
                raise ctx.fail(f"group.flow.{k}", "applies to coordinate ends only")
        return FlowKey(o, t)
    if ("hex" in d) == ("boundaries" in d):
        raise ctx.fail(
            "group.flow",
            "coordinate ends need exactly one of hex = <resolution> "
            'or boundaries = "file.geojson" with id = "property"',
        )
    if "hex" in d:
        v = d["hex"]
        if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v <= 15:
            raise ctx.fail(
                "group.flow.hex", f"{_short(v)} is not an H3 resolution; use an integer 0..15"
            )
        return FlowKey(o, t, hex_res=v)
    path = ctx.string(d, "group.flow", "boundaries", required=True)
    idp = ctx.string(d, "group.flow", "id", required=True)
    assert path is not None
    return FlowKey(o, t, boundaries=_rel(base, path), boundaries_display=path, id_property=idp)


def _parse_hex(ctx: _Ctx, doc: Any) -> HexKey:
    d = ctx.table(doc, "group.hex", HEX_KEYS)
    levels = _levels(ctx, d, "group.hex", "resolution")
    out = []
    for i, v in enumerate(levels):
        key = f"group.hex.levels[{i}]" if "levels" in d else "group.hex.resolution"
        if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v <= 15:
            raise ctx.fail(key, f"{_short(v)} is not an H3 resolution; use an integer 0..15")
        out.append(v)
    for a, b in zip(out, out[1:]):
        if b >= a:
            raise ctx.fail(
                "group.hex.levels",
                f"must go from finest to coarsest (strictly "
                f"decreasing resolutions), but {a} is followed by {b}",
            )
    return HexKey(tuple(out))


def _parse_time(ctx: _Ctx, doc: Any) -> TimeKey:
    d = ctx.table(doc, "group.time", TIME_KEYS)
    raw = _levels(ctx, d, "group.time", "bin")
    bins = []
    for i, v in enumerate(raw):
        key = f"group.time.levels[{i}]" if "levels" in d else "group.time.bin"
        try:
            bins.append(parse_time_bin(v))
        except ValueError as e:
            raise ctx.fail(key, str(e)) from None
    for a, b in zip(bins, bins[1:]):
        finer_first = (a.minutes or 10**9) < (b.minutes or 10**9) or (
            a.minutes is None
            and b.minutes is None
            and (a.n * (12 if a.unit == "y" else 1)) < (b.n * (12 if b.unit == "y" else 1))
        )
        if not finer_first:
            raise ctx.fail(
                "group.time.levels",
                f"must go from finest to coarsest, but {a.text} is followed by {b.text}",
            )
        if not b.nests(a):
            raise ctx.fail(
                "group.time.levels",
                f"{b.text} bins are not made of whole "
                f"{a.text} bins, so they cannot be rolled up exactly; drop one",
            )
    zone = ctx.string(d, "group.time", "zone", default="UTC")
    assert zone is not None
    _check_zone(ctx, "group.time.zone", zone)
    return TimeKey(tuple(bins), zone)


def _check_zone(ctx: _Ctx, key: str, zone: str) -> None:
    try:
        zoneinfo.ZoneInfo(zone)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError, OSError):  # a folder name is an OSError
        raise ctx.fail(
            key,
            f"unknown time zone {zone!r}{zone_hint(zone)}; use an IANA name "
            "such as UTC or Europe/Paris",
        ) from None


_OFFSET_RE = re.compile(r"^(?:UTC|GMT|Z)?\s*([+-])(\d{1,2})(?::?(\d\d))?$", re.IGNORECASE)
_HINT_YEAR = 2025  # the year whose offsets define "the same clock" (fixed: same hint always)
_CONTINENTS = (
    "Africa/",
    "America/",
    "Antarctica/",
    "Asia/",
    "Atlantic/",
    "Australia/",
    "Europe/",
    "Indian/",
    "Pacific/",
)


def _clocks() -> dict[str, tuple[tuple[int, ...], frozenset[str]]]:
    """Every zone's UTC offset (seconds) at noon UTC of each day of ``_HINT_YEAR`` (its
    offset and DST rule, as far as one year shows them) and the abbreviations it uses."""
    days = [
        dt.datetime(_HINT_YEAR, 1, 1, 12, tzinfo=dt.UTC) + dt.timedelta(days=i) for i in range(365)
    ]
    out = {}
    for name in sorted(zoneinfo.available_timezones()):
        try:
            z = zoneinfo.ZoneInfo(name)
        except (zoneinfo.ZoneInfoNotFoundError, ValueError, OSError):
            continue
        local = [d.astimezone(z) for d in days]
        offsets = tuple(
            int(t.utcoffset().total_seconds())  # type: ignore[union-attr]
            for t in local
        )
        out[name] = (offsets, frozenset(t.tzname() or "" for t in local))
    return out


def _tz_table(name: str) -> str:
    """A text file of the time-zone database (the tzdata package's, else the system's)."""
    try:
        from importlib.resources import files

        return (files("tzdata.zoneinfo") / name).read_text(encoding="utf-8")
    except (ImportError, OSError, ValueError):
        for folder in zoneinfo.TZPATH:
            try:
                return (Path(folder) / name).read_text(encoding="utf-8")
            except OSError:
                continue
    return ""


def _pick(names: Sequence[str]) -> str:
    """One name for a clock: a main zone of the database (zone1970.tab) before the others,
    then the one most other names link to (tzdata.zi), then by name."""
    main = {
        ln.split("\t")[2]
        for ln in _tz_table("zone1970.tab").splitlines()
        if ln and not ln.startswith("#") and ln.count("\t") >= 2
    }
    links: dict[str, int] = {}
    for ln in _tz_table("tzdata.zi").splitlines():
        if ln.startswith("L "):
            target = ln.split()[1]
            links[target] = links.get(target, 0) + 1
    return min(
        names,
        key=lambda n: (
            n not in main,
            not n.startswith(_CONTINENTS),
            n.count("/"),
            -links.get(n, 0),
            n,
        ),
    )


def zone_hint(zone: str) -> str:
    """``" (did you mean 'x'?)"`` naming only zones on the clock ``zone`` stands for: the
    same UTC offset and DST rule over a year (compared with ``zoneinfo``). An offset such as
    ``UTC-8`` gets a zone fixed at that offset, an abbreviation such as ``PST`` one zone per
    distinct clock using it, and an IANA-style name with a typo its close match; anything
    else no hint rather than a different clock."""
    m = _OFFSET_RE.match(zone.strip())
    clocks = _clocks()
    if m:
        sign = -1 if m.group(1) == "-" else 1
        seconds = sign * (int(m.group(2)) * 3600 + int(m.group(3) or 0) * 60)
        same = [n for n, (offs, _) in clocks.items() if set(offs) == {seconds}]
        etc = [n for n in same if n.startswith("Etc/GMT") and n not in ("Etc/GMT", "Etc/GMT0")]
        pick = (min(etc, key=len) if etc else _pick(same)) if same else None
        return f" (did you mean {pick!r}?)" if pick else ""
    groups: dict[tuple[int, ...], list[str]] = {}
    for n, (offs, abbrs) in clocks.items():
        if zone.upper() in abbrs:
            groups.setdefault(offs, []).append(n)
    if groups:
        picks = sorted((_pick(g) for g in groups.values()), key=lambda n: min(clocks[n][0]))[:3]
        return " (did you mean " + " or ".join(repr(p) for p in picks) + "?)"
    if "/" in zone:
        return did_you_mean(zone, clocks)
    return ""


def _parse_source(
    ctx: _Ctx, d: dict[str, Any], base: Path, need_geo: bool, need_time: bool
) -> Source:
    display = ctx.string(d, "source", "path", required=True)
    assert display is not None
    fmt = ctx.string(d, "source", "format")
    if fmt is not None and fmt not in SOURCE_FORMATS:
        raise ctx.fail(
            "source.format",
            f"{fmt!r} is not a source format"
            f"{did_you_mean(fmt, SOURCE_FORMATS)}; use one of "
            f"{', '.join(SOURCE_FORMATS)}",
        )
    time = ctx.string(d, "source", "time")
    lat = ctx.string(d, "source", "lat")
    lon = ctx.string(d, "source", "lon")
    if need_time and time is None:
        raise ctx.fail(
            "source.time", "is required when grouping by time; name the timestamp column"
        )
    if need_geo and (lat is None or lon is None):
        missing = "source.lat" if lat is None else "source.lon"
        raise ctx.fail(missing, "is required when grouping by hex cell; name the coordinate column")
    zone = ctx.string(d, "source", "time_zone", default="UTC")
    assert zone is not None
    _check_zone(ctx, "source.time_zone", zone)
    filters = _parse_filters(ctx, d.get("filter", []), zone)
    nv = d.get("null_values", [])
    if not isinstance(nv, list) or not all(isinstance(x, str) for x in nv):
        raise ctx.fail(
            "source.null_values", f'must be a list of strings such as ["NA", "-"], got {_short(nv)}'
        )
    null_values = tuple(dict.fromkeys(nv))
    path = display if Path(display).is_absolute() else str(base / display)
    return Source(
        path=path,
        display=display,
        format=fmt,
        time=time,
        lat=lat,
        lon=lon,
        naive_zone=zone,
        filters=filters,
        null_values=null_values,
    )


def filter_instant(v: dt.datetime | dt.date, zone: str, *, end_of_day: bool = False) -> dt.datetime:
    """A time filter literal as a naive UTC datetime: an offset date-time is that instant; a
    local date-time is read on the clock of ``zone`` (source.time_zone; an ambiguous wall
    time is the earlier instant, a skipped one is read with the offset before the change);
    a date is its local midnight, or with ``end_of_day`` the next day's (an exclusive end)."""
    if not isinstance(v, dt.datetime):
        day = v + dt.timedelta(days=1) if end_of_day else v
        v = dt.datetime(day.year, day.month, day.day)
    if v.tzinfo is None:
        v = v.replace(tzinfo=zoneinfo.ZoneInfo(zone))
    return v.astimezone(dt.UTC).replace(tzinfo=None)


_FILTER_KEYS = FILTER_KEYS
_SCALARS = (str, int, float, bool, dt.datetime, dt.date)


def _parse_filters(
    ctx: _Ctx, doc: Any, zone: str, where: str = "source.filter"
) -> tuple[Filter, ...]:
    if isinstance(doc, dict):
        doc = [doc]
    if not isinstance(doc, list):
        raise ctx.fail(
            where, 'must be a list of tables such as [{ column = "kind", in = ["hail"] }]'
        )
    out: list[Filter] = []
    for i, f in enumerate(doc):
        key = f"{where}[{i}]"
        f = ctx.table(f, key, _FILTER_KEYS)
        col = ctx.string(f, key, "column", required=True)
        assert col is not None
        ops = [k for k in f if k != "column"]
        if not ops:
            raise ctx.fail(key, "has no condition; add one of in, not_in, min, max, null")
        if "in" in f or "not_in" in f:
            if len(ops) != 1:
                raise ctx.fail(
                    key, "combines in/not_in with another condition; write them as separate filters"
                )
            op = "in" if "in" in f else "not_in"
            vals = f[op]
            if not isinstance(vals, list) or not vals:
                raise ctx.fail(f"{key}.{op}", "must be a non-empty list of values")
            kinds = {type(v) for v in vals}
            if (
                not all(isinstance(v, _SCALARS) for v in vals)
                or len(
                    {k for k in kinds if k not in (int, float)}
                    | ({int} if kinds & {int, float} else set())
                )
                > 1
            ):
                raise ctx.fail(
                    f"{key}.{op}", "must list values of one type (strings, numbers or times)"
                )
            out.append(Filter(col, op, tuple(vals), key=key))  # type: ignore[arg-type]
        elif "null" in f:
            if len(ops) != 1:
                raise ctx.fail(
                    key, "combines null with another condition; write them as separate filters"
                )
            if not isinstance(f["null"], bool):
                raise ctx.fail(f"{key}.null", "must be true (keep nulls) or false (drop nulls)")
            out.append(Filter(col, "null" if f["null"] else "not_null", key=key))
        else:
            lo, hi = f.get("min"), f.get("max")
            for k, v in (("min", lo), ("max", hi)):
                if v is not None and (
                    isinstance(v, bool) or not isinstance(v, (int, float, dt.datetime, dt.date))
                ):
                    raise ctx.fail(
                        f"{key}.{k}",
                        f"must be a number or a TOML date-time, got {_tname(v)} {_short(v)}",
                    )
            if lo is not None and hi is not None:
                try:
                    if isinstance(lo, dt.date) and isinstance(hi, dt.date):  # as instants
                        bad = filter_instant(lo, zone) >= filter_instant(hi, zone, end_of_day=True)
                    else:
                        bad = lo > hi
                except TypeError:
                    raise ctx.fail(key, "min and max must be of the same kind") from None
                if bad:
                    raise ctx.fail(key, f"min {lo} is above max {hi}; swap them")
            out.append(Filter(col, "range", lo=lo, hi=hi, key=key))
    return tuple(out)


_MEASURE_KINDS: tuple[MeasureKind, ...] = ("count", "sum", "min", "max", "mean", "distinct")
MEASURE_KINDS = _MEASURE_KINDS


def _parse_measures(ctx: _Ctx, doc: Any, zone: str = "UTC") -> tuple[MeasureSpec, ...]:
    if doc is None:
        return (MeasureSpec("count", "count", None),)
    if not isinstance(doc, dict):
        raise ctx.fail("measures", f"must be a table, got {_tname(doc)}")
    if not doc:
        raise ctx.fail("measures", 'is empty; declare at least one, e.g. events = "count"')
    out = []
    for name, spec in doc.items():
        key = f"measures.{name}"
        if not _IDENT_RE.match(name) or name.startswith("__"):
            raise ctx.fail(
                key, "a measure name must be letters, digits and '_' and start with a letter"
            )
        if spec == "count":
            out.append(MeasureSpec(name, "count", None))
            continue
        if isinstance(spec, str):
            raise ctx.fail(
                key,
                f"{spec!r} is not a measure{did_you_mean(spec, _MEASURE_KINDS)};"
                ' use "count" or a table such as { sum = "column" }',
            )
        where: tuple[Filter, ...] = ()
        if isinstance(spec, dict) and "where" in spec:
            spec = dict(spec)
            where = _parse_filters(ctx, spec.pop("where"), zone, f"{key}.where")
            if not where:
                raise ctx.fail(f"{key}.where", "is empty; list at least one filter")
            if spec.get("count") is True:
                out.append(MeasureSpec(name, "count", None, where))
                if len(spec) != 1:
                    raise ctx.fail(key, "a count with where takes no other key")
                continue
        if not isinstance(spec, dict) or len(spec) != 1:
            raise ctx.fail(
                key,
                'must be "count" or a table with one key, e.g. '
                '{ sum = "column" } (plus where = [...])',
            )
        ((kind, col),) = spec.items()
        if kind == "count" and col is True and not where:
            out.append(MeasureSpec(name, "count", None))
            continue
        if where and kind == "distinct":
            raise ctx.fail(
                f"{key}.where", "applies to count, sum, mean, min and max measures, not distinct"
            )
        if kind not in _MEASURE_KINDS or kind == "count":
            raise ctx.fail(
                f"{key}.{kind}",
                f"unknown measure kind"
                f"{did_you_mean(kind, _MEASURE_KINDS)}; use one of sum, min, max, "
                'mean, distinct (or "count")',
            )
        if not isinstance(col, str) or not col:
            raise ctx.fail(f"{key}.{kind}", "must name a column")
        out.append(MeasureSpec(name, kind, col, where))
    return tuple(out)


def _derived_names(measures: Sequence[MeasureSpec], n: Normalize | None) -> list[str]:
    if n is None:
        return []
    names = [f"{m}_per_{n.per}" for m in n.rate_measures]
    if n.share:
        names += [f"{m}_share" for m in n.share.measures]
    if n.location_quotient:
        names.append(f"{n.location_quotient}_lq")
    return names


def _parse_normalize(
    ctx: _Ctx,
    doc: Any,
    base: Path,
    measures: Sequence[MeasureSpec],
    region: RegionKey | None,
    hex_key: HexKey | None,
    categories: Sequence[str],
    axis_names: Sequence[str],
) -> Normalize:
    d = ctx.table(doc, "normalize", NORMALIZE_KEYS)
    names = [m.name for m in measures]
    additive = {m.name for m in measures if m.kind in ("count", "sum")}

    def measure_ref(v: Any, key: str) -> str:
        if not isinstance(v, str) or v not in names:
            raise ctx.fail(
                key, f"{_short(v)} is not a declared measure{did_you_mean(str(v), names)}"
            )
        if v not in additive:
            raise ctx.fail(
                key,
                f"measure {v!r} is not a count or a sum; only additive measures can be normalised",
            )
        return v

    dens = None
    if "denominators" in d:
        dd = ctx.table(d["denominators"], "normalize.denominators", DENOMINATOR_KEYS)
        p = ctx.string(dd, "normalize.denominators", "path", required=True)
        k = ctx.string(dd, "normalize.denominators", "key", required=True)
        v = ctx.string(dd, "normalize.denominators", "value", required=True)
        on = ctx.string(dd, "normalize.denominators", "on", default="region" if region else "hex")
        assert p and k and v and on
        if on not in ("region", "hex"):
            raise ctx.fail("normalize.denominators.on", f"{on!r} must be region or hex")
        if on == "region" and region is None or on == "hex" and hex_key is None:
            raise ctx.fail(
                "normalize.denominators.on",
                f"joins on {on}, but the recipe does "
                f"not group by {on}; add group.{on} or change on",
            )
        dpath = Path(p) if Path(p).is_absolute() else base / p
        dens = Denominators(dpath, p, k, v, on)  # type: ignore[arg-type]
    rate_measures: tuple[str, ...] = ()
    if "measures" in d:
        rate_measures = tuple(
            measure_ref(v, f"normalize.measures[{i}]")
            for i, v in enumerate(ctx.str_list(d["measures"], "normalize.measures"))
        )
        if dens is None:
            raise ctx.fail(
                "normalize.measures",
                "rates need denominators; add "
                "normalize.denominators = { path = ..., key = ..., value = ... }",
            )
    per = ctx.integer(d.get("per", 100000), "normalize.per", lo=1)
    if "per" in d and not rate_measures:
        raise ctx.fail(
            "normalize.per",
            'is set but normalize.measures lists no measure to divide; add measures = ["..."]',
        )
    share = None
    if "share" in d:
        sd = ctx.table(d["share"], "normalize.share", SHARE_KEYS)
        if "measures" not in sd:
            raise ctx.fail("normalize.share.measures", "is required")
        sm = tuple(
            measure_ref(v, f"normalize.share.measures[{i}]")
            for i, v in enumerate(ctx.str_list(sd["measures"], "normalize.share.measures"))
        )
        default_within = (
            tuple(axis_names) if categories else tuple(a for a in axis_names if a == "time")
        )
        within = _within(
            ctx, sd.get("within", list(default_within)), "normalize.share.within", axis_names
        )
        share = Share(sm, within)
    lq = None
    if "location_quotient" in d:
        ld = ctx.table(d["location_quotient"], "normalize.location_quotient", LQ_KEYS)
        if "measure" not in ld:
            raise ctx.fail("normalize.location_quotient.measure", "is required")
        lq = measure_ref(ld["measure"], "normalize.location_quotient.measure")
        if not categories or not (region or hex_key):
            raise ctx.fail(
                "normalize.location_quotient",
                "needs a category and a region or "
                "hex key to compare; add group.category and group.region",
            )
    if dens is not None and not rate_measures:
        raise ctx.fail(
            "normalize.denominators",
            'is given but no measure uses it; add normalize.measures = ["..."]',
        )
    if not (rate_measures or share or lq):
        raise ctx.fail(
            "normalize",
            "declares nothing to compute; add measures (rates), share or location_quotient",
        )
    return Normalize(dens, per, rate_measures, share, lq)


def _within(ctx: _Ctx, v: Any, key: str, axis_names: Sequence[str]) -> tuple[str, ...]:
    items = ctx.str_list(v, key) if v != [] else ()
    for x in items:
        if x not in axis_names:
            raise ctx.fail(
                key,
                f"{x!r} is not a grouping axis of this recipe"
                f"{did_you_mean(x, axis_names)}; use some of "
                f"{', '.join(axis_names) or '(none)'}",
            )
    return items


def _parse_prune(
    ctx: _Ctx,
    doc: Any,
    measures: Sequence[MeasureSpec],
    categories: Sequence[str],
    axis_names: Sequence[str],
) -> tuple[TopK | None, MinCount | None]:
    d = ctx.table(doc, "prune", PRUNE_KEYS)
    names = [m.name for m in measures]
    top = None
    if "top" in d:
        t = ctx.table(d["top"], "prune.top", TOP_K_KEYS)
        if not categories:
            raise ctx.fail("prune.top", "needs a category to rank; add group.category")
        if "k" not in t:
            raise ctx.fail("prune.top.k", "is required; e.g. k = 10 or k = [20, 10, 5]")
        ks_raw = t["k"] if isinstance(t["k"], list) else [t["k"]]
        if not ks_raw:
            raise ctx.fail("prune.top.k", "is empty; list at least one k, largest first")
        ks = tuple(ctx.integer(v, "prune.top.k", lo=1) for v in ks_raw)
        for a, b in zip(ks, ks[1:]):
            if b >= a:
                raise ctx.fail(
                    "prune.top.k",
                    f"must go from most detail to least (strictly "
                    f"decreasing), but {a} is followed by {b}",
                )
        by = ctx.string(t, "prune.top", "by", default=names[0])
        assert by is not None
        if by not in names:
            raise ctx.fail(
                "prune.top.by", f"{by!r} is not a declared measure{did_you_mean(by, names)}"
            )
        within = _within(ctx, t.get("within", list(axis_names)), "prune.top.within", axis_names)
        rest = ctx.string(t, "prune.top", "rest", default="other")
        assert rest is not None
        top = TopK(ks, by, within, rest)
    mc = None
    if "min_count" in d:
        v = d["min_count"]
        if isinstance(v, dict):
            md = ctx.table(v, "prune.min_count", MIN_COUNT_KEYS)
            if "min" not in md:
                raise ctx.fail("prune.min_count.min", "is required")
            thr = ctx.integer(md["min"], "prune.min_count.min", lo=1)
            by_m = ctx.string(md, "prune.min_count", "by")
            if by_m is not None:
                if by_m not in names:
                    raise ctx.fail(
                        "prune.min_count.by",
                        f"{by_m!r} is not a declared measure{did_you_mean(by_m, names)}",
                    )
                kind = next(m.kind for m in measures if m.name == by_m)
                if kind not in ("count", "distinct"):
                    raise ctx.fail(
                        "prune.min_count.by",
                        f"measure {by_m!r} is a {kind}; use "
                        "a count or a distinct measure (e.g. distinct observers)",
                    )
            fold = md.get("fold", False)
            if not isinstance(fold, bool):
                raise ctx.fail("prune.min_count.fold", "must be true or false")
            if fold and top is None:
                raise ctx.fail(
                    "prune.min_count.fold",
                    "folds into the remainder row of prune.top; add prune.top or set fold = false",
                )
            mc = MinCount(thr, by_m, fold)
        else:
            mc = MinCount(ctx.integer(v, "prune.min_count", lo=1), None, False)
    return top, mc


def _parse_budget(ctx: _Ctx, doc: Any, axes: Sequence[str]) -> Budget:
    d = ctx.table(doc, "budget", BUDGET_KEYS)
    if "max" not in d:
        raise ctx.fail("budget.max", 'is required; e.g. max = "300KB"')
    try:
        mx = parse_size(d["max"])
    except ValueError as e:
        raise ctx.fail("budget.max", str(e)) from None
    on = ctx.string(d, "budget", "on", default="gzip")
    assert on is not None
    if on not in MEASURES:
        raise ctx.fail(
            "budget.on",
            f"{on!r} is not a measure{did_you_mean(on, MEASURES)}; use raw, gzip or brotli",
        )
    default_order = [a for a in ("simplify", "coords", "top", "time", "hex", "digits") if a in axes]
    order = ctx.str_list(d.get("order", default_order), "budget.order")
    for a in order:
        if a not in axes:
            raise ctx.fail(
                "budget.order",
                f"{a!r} is not a ladder axis of this recipe"
                f"{did_you_mean(a, axes)}; use some of {', '.join(axes)}",
            )
    # Axes left out of the order give up detail last, in the default sequence.
    order = tuple(order) + tuple(a for a in default_order if a not in order)
    return Budget(mx, on, order)


def _parse_output(ctx: _Ctx, doc: Any, base: Path) -> Output:
    d = ctx.table(doc, "output", OUTPUT_KEYS)
    p = ctx.string(d, "output", "path")
    path = None if p is None else (Path(p) if Path(p).is_absolute() else base / p)
    if path is not None and path.suffix == "":
        raise ctx.fail(
            "output.path", f"{p!r} has no file extension; name the payload file, e.g. out/name.json"
        )
    layout = ctx.string(d, "output", "layout", default="columns")
    assert layout is not None
    if layout not in LAYOUTS:
        raise ctx.fail(
            "output.layout",
            f"{layout!r} is not a layout"
            f"{did_you_mean(layout, LAYOUTS)}; use one of {', '.join(LAYOUTS)}",
        )
    digits_raw = d.get("digits", 4)
    dl = digits_raw if isinstance(digits_raw, list) else [digits_raw]
    if not dl:
        raise ctx.fail("output.digits", "is empty; give a number of decimals or a list, most first")
    digits = tuple(ctx.integer(v, "output.digits", lo=0, hi=15) for v in dl)
    for a, b in zip(digits, digits[1:]):
        if b >= a:
            raise ctx.fail(
                "output.digits", f"must go from most decimals to fewest, but {a} is followed by {b}"
            )
    cd = d.get("column_digits", {})
    if not isinstance(cd, dict):
        raise ctx.fail("output.column_digits", "must be a table of column = decimals")
    column_digits = tuple(
        sorted((k, ctx.integer(v, f"output.column_digits.{k}", lo=0, hi=15)) for k, v in cd.items())
    )
    inline = d.get("inline", False)
    if not isinstance(inline, bool):
        raise ctx.fail("output.inline", "must be true or false")
    if inline and layout == "csv":
        raise ctx.fail("output.inline", "applies to JSON layouts only")
    if path is not None and path.suffix.lower() not in LAYOUT_EXTENSIONS[layout]:
        want = LAYOUT_EXTENSIONS[layout]
        raise ctx.fail(
            "output.path",
            f"{p!r} ends in {path.suffix}, but output.layout "
            f"{layout!r} writes {' or '.join(want)} files; name the file "
            f"{path.stem}{want[0]} or change output.layout",
        )
    flags = {}
    for k in ("precompress", "preview"):
        flags[k] = d.get(k, False)
        if not isinstance(flags[k], bool):
            raise ctx.fail(f"output.{k}", "must be true or false")
    if flags["preview"] and layout == "csv":
        raise ctx.fail(
            "output.preview",
            "draws JSON layouts (columns, rows, geojson) only; "
            "set preview = false or change output.layout",
        )
    simplify: tuple[float, ...] = (0.0,)
    coords: tuple[int, ...] = (6,)
    if "simplify" in d or "coordinate_digits" in d:
        if layout != "geojson":
            k = "simplify" if "simplify" in d else "coordinate_digits"
            raise ctx.fail(f"output.{k}", 'applies to layout = "geojson" only')
    if "simplify" in d:
        raw = d["simplify"] if isinstance(d["simplify"], list) else [d["simplify"]]
        if not raw:
            raise ctx.fail(
                "output.simplify",
                "is empty; give a tolerance in degrees or a list, finest (smallest) first",
            )
        vals: list[float] = []
        for v in raw:
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 <= v <= 1:
                raise ctx.fail(
                    "output.simplify",
                    f"{_short(v)} is not a tolerance; use degrees between 0 and 1, e.g. 0.001",
                )
            vals.append(float(v))
        for finer, coarser in zip(vals, vals[1:]):
            if coarser <= finer:
                raise ctx.fail(
                    "output.simplify",
                    f"must go from finest to coarsest (increasing "
                    f"tolerance), but {finer} is followed by {coarser}",
                )
        simplify = tuple(vals)
    if "coordinate_digits" in d:
        raw = d["coordinate_digits"]
        raw = raw if isinstance(raw, list) else [raw]
        if not raw:
            raise ctx.fail("output.coordinate_digits", "is empty")
        coords = tuple(ctx.integer(v, "output.coordinate_digits", lo=0, hi=9) for v in raw)
        for a, b in zip(coords, coords[1:]):
            if b >= a:
                raise ctx.fail(
                    "output.coordinate_digits",
                    f"must go from most decimals to fewest, but {a} is followed by {b}",
                )
    return Output(
        path,
        layout,  # type: ignore[arg-type]
        digits,
        column_digits,
        inline,
        simplify,
        coords,
        precompress=flags["precompress"],
        preview=flags["preview"],
    )
