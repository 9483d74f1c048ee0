"""Previews: a static picture (PNG) and a self-contained page (HTML) of a written payload.

This module owns what a payload looks like. :func:`load_table` reads a payload file (our
columns JSON, rows JSON, or GeoJSON) into plain decoded columns; :func:`choose_view` picks
one picture for it by a fixed rule, the same for the PNG and the page:

- hex cells (a ``hex`` column) or GeoJSON features: filled polygons on a plain
  equirectangular projection (longitude scaled by the cosine of the mid latitude), coloured
  on the viridis scale by one measure (a rate such as ``reports_per_100000`` when the
  payload has one, else its first measure), summed per cell over the other keys;
- flows (``origin`` and ``destination``): ranked bars of the busiest pairs, since the
  payload holds their names, not coordinates;
- time series (a ``time`` column): one line per top category (five, by total);
- anything else: ranked bars of the first measure.

:func:`render_png` draws the picture with Pillow and its built-in font (no browser; same
payload, same bytes). :func:`render_html` writes a page with no network access that
carries the payload bytes inline, decodes them with the page-side reader
(``reduce/static/columns-reader.js``) and draws the view on SVG, a 2D canvas or WebGL by
element count; :mod:`reduce.browser` opens such pages in headless Chromium.
"""

from __future__ import annotations

import datetime as dt
import io
import math
import zoneinfo
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any, Literal

import orjson

from reduce.errors import ReduceError
from reduce.sizes import format_size

# The viridis colour scale (van der Walt and Smith, 2015; designed to be perceptually
# uniform and readable with the common forms of colour blindness), sampled every 32 entries
# of its published 256-entry table as shipped in matplotlib (lib/matplotlib/_cm_listed.py,
# `_viridis_data`, entries 0, 32, ..., 224 and 255). Values between stops are interpolated
# linearly.
VIRIDIS: tuple[tuple[float, float, float], ...] = (
    (0.267004, 0.004874, 0.329415),
    (0.278826, 0.175490, 0.483397),
    (0.229739, 0.322361, 0.545706),
    (0.172719, 0.448791, 0.557885),
    (0.127568, 0.566949, 0.550556),
    (0.157851, 0.683765, 0.501686),
    (0.369214, 0.788888, 0.382914),
    (0.678489, 0.863742, 0.189503),
    (0.993248, 0.906157, 0.143936),
)
SCALE_NAME = "viridis"
# Line colours for categories: the Okabe-Ito palette for colour-blind readers (Okabe and
# Ito, "Color Universal Design", 2008; hex values from memory), black left out.
CATEGORY_COLOURS = ("#E69F00", "#56B4E9", "#009E73", "#0072B2", "#D55E00", "#CC79A7")
NO_DATA = (200, 200, 200)
BAR_COLOUR = (33, 145, 140)  # viridis at 0.5
TOP_LINES = 5
TOP_BARS = 25
WIDTH, HEIGHT = 960, 600

Kind = Literal["map", "lines", "bars"]
_KEY_NAMES = ("time", "hex", "origin", "destination")


class PreviewError(ReduceError, ValueError):
    """A payload cannot be previewed (unreadable, not JSON, not a layout we draw)."""


def scale_colour(t: float) -> tuple[int, int, int]:
    """The viridis colour at ``t`` in [0, 1] (clamped) as 8-bit RGB."""
    t = 0.0 if not t > 0 else 1.0 if t >= 1 else t
    pos = t * (len(VIRIDIS) - 1)
    i = min(int(pos), len(VIRIDIS) - 2)
    f = pos - i
    a, b = VIRIDIS[i], VIRIDIS[i + 1]
    return tuple(round(255 * (a[c] + (b[c] - a[c]) * f)) for c in range(3))  # type: ignore[return-value]


# --------------------------------------------------------------------------------------------
# Reading a payload
# --------------------------------------------------------------------------------------------


@dataclass
class Table:
    """A payload decoded into plain columns (dictionary indexes turned into labels)."""

    path: Path
    layout: Literal["columns", "rows", "geojson"]
    recipe: str
    level: dict[str, Any]
    rows: int
    columns: dict[str, list[Any]]
    keys: list[str]
    measures: list[str]
    geometry: list[list[list[list[float]]]] | None = None  # per feature: polygons (rings)
    meta: dict[str, Any] = field(default_factory=dict)
    data: bytes = b""


def load_table(path: Path) -> Table:
    """Read a payload file; raises :class:`PreviewError` naming the file and the problem."""
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise PreviewError(f"{path}: payload file not found; check the path") from None
    except IsADirectoryError:
        raise PreviewError(f"{path}: is a folder; give payload files (x.json, x.geojson)") from None
    except OSError as e:
        raise PreviewError(f"{path}: cannot read ({e.strerror})") from None
    return table_from_bytes(path, data)


def table_from_bytes(path: Path, data: bytes) -> Table:
    """Decode payload bytes; ``path`` names them in messages (and locates the manifest)."""
    try:
        doc = orjson.loads(data)
    except orjson.JSONDecodeError:
        raise PreviewError(
            f"{path}: is not valid JSON; preview draws JSON payloads (columns, rows) and GeoJSON"
        ) from None
    if isinstance(doc, dict) and doc.get("type") == "FeatureCollection":
        return _geojson_table(path, doc, data)
    if isinstance(doc, dict) and str(doc.get("format", "")).startswith("reduce.columns/"):
        return _columns_table(path, doc, data)
    if isinstance(doc, list) and all(isinstance(r, dict) for r in doc):
        cols: dict[str, list[Any]] = {}
        for r in doc:
            for k in r:
                cols.setdefault(k, [])
        for r in doc:
            for k, v in cols.items():
                v.append(r.get(k))
        keys, measures = _split(cols, ())
        return Table(path, "rows", path.stem, {}, len(doc), cols, keys, measures, data=data)
    raise PreviewError(
        f"{path}: is not a payload preview can draw; give a reduce columns "
        "payload, a rows payload (a list of objects) or a GeoJSON "
        "FeatureCollection"
    )


def _split(cols: Mapping[str, list[Any]], dict_names: Iterable[str]) -> tuple[list[str], list[str]]:
    dn = set(dict_names)
    keys, measures = [], []
    for name, values in cols.items():
        numeric = all(
            v is None or (isinstance(v, (int, float)) and not isinstance(v, bool)) for v in values
        )
        if name in _KEY_NAMES or name in dn or not numeric:
            keys.append(name)
        else:
            measures.append(name)
    return keys, measures


def _columns_table(path: Path, doc: dict[str, Any], data: bytes) -> Table:
    columns = doc.get("columns")
    rows = doc.get("rows")
    dicts = doc.get("dictionaries") or {}
    if not isinstance(columns, dict) or not isinstance(rows, int) or not isinstance(dicts, dict):
        raise PreviewError(
            f"{path}: columns payload without columns or rows; write it again with reduce run"
        )
    cols: dict[str, list[Any]] = {}
    for name, values in columns.items():
        if not isinstance(values, list) or len(values) != rows:
            raise PreviewError(
                f"{path}: column {name!r} does not have {rows} entries; write "
                "the payload again with reduce run"
            )
        if name in dicts:
            labels = dicts[name]
            try:
                values = [None if i is None else labels[i] for i in values]
            except (IndexError, TypeError):
                raise PreviewError(
                    f"{path}: column {name!r} holds an index outside its "
                    "dictionary; write the payload again with reduce run"
                ) from None
        cols[name] = values
    keys, measures = _split(cols, dicts)
    return Table(
        path,
        "columns",
        str(doc.get("recipe", path.stem)),
        dict(doc.get("level") or {}),
        rows,
        cols,
        keys,
        measures,
        meta=dict(doc.get("meta") or {}),
        data=data,
    )


def _geojson_table(path: Path, doc: dict[str, Any], data: bytes) -> Table:
    feats = doc.get("features")
    if not isinstance(feats, list):
        raise PreviewError(f"{path}: FeatureCollection without a features list")
    ours = doc.get("reduce") if isinstance(doc.get("reduce"), dict) else {}
    cols: dict[str, list[Any]] = {}
    geoms: list[list[list[list[float]]]] = []
    for f in feats:
        props = (f or {}).get("properties") or {}
        for k in props:
            cols.setdefault(k, [])
    for f in feats:
        props = (f or {}).get("properties") or {}
        for k, v in cols.items():
            v.append(props.get(k))
        geoms.append(_polygons((f or {}).get("geometry")))
    keys, measures = _split(cols, ())
    assert isinstance(ours, dict)
    return Table(
        path,
        "geojson",
        str(ours.get("recipe", path.stem)),
        dict(ours.get("level") or {}),
        len(feats),
        cols,
        keys,
        measures,
        geoms,
        meta=dict(ours.get("meta") or {}),
        data=data,
    )


def _polygons(geom: Any) -> list[list[list[float]]]:
    """Rings of a (Multi)Polygon as ``[[lon, lat], ...]`` lists; other geometry gives none."""
    if not isinstance(geom, dict):
        return []
    t, c = geom.get("type"), geom.get("coordinates")
    if t == "Polygon" and isinstance(c, list):
        return [ring for ring in c if isinstance(ring, list)]
    if t == "MultiPolygon" and isinstance(c, list):
        return [
            ring for poly in c if isinstance(poly, list) for ring in poly if isinstance(ring, list)
        ]
    return []


# --------------------------------------------------------------------------------------------
# The view: one rule for the PNG and the page
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class View:
    kind: Kind
    value: str | None  # the measure drawn
    key: str | None  # map: the hex column ("hex") or None for features; lines: category
    labels: tuple[str, ...] = ()  # bars: the key columns joined into a bar's label


def choose_view(t: Table) -> View:
    value = next((m for m in t.measures if "_per_" in m), t.measures[0] if t.measures else None)
    if t.layout == "geojson":
        return View("map", value, None)
    if "hex" in t.columns:
        return View("map", value, "hex")
    if "origin" in t.columns and "destination" in t.columns:
        return View("bars", value, None, ("origin", "destination"))
    if "time" in t.columns:
        cat = next((k for k in t.keys if k != "time"), None)
        return View("lines", value, cat)
    return View("bars", value, None, tuple(t.keys))


def _num(v: Any) -> float | None:
    return (
        float(v)
        if isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)
        else None
    )


@dataclass
class Shape:
    rings: list[list[tuple[float, float]]]  # lon/lat rings
    value: float | None
    label: str


def map_shapes(t: Table, v: View) -> list[Shape]:
    """One shape per feature, or per hex cell with the measure summed over the other keys."""
    vals = t.columns.get(v.value, []) if v.value else []
    if t.geometry is not None:
        out = []
        for i, rings in enumerate(t.geometry):
            label = " ".join(str(t.columns[k][i]) for k in t.keys) or f"feature {i}"
            out.append(
                Shape(
                    [[(float(p[0]), float(p[1])) for p in r] for r in rings],
                    _num(vals[i]) if vals else None,
                    label,
                )
            )
        return out
    import h3

    cells: dict[str, float | None] = {}
    for i, cell in enumerate(t.columns["hex"]):
        if not isinstance(cell, str):
            continue
        x = _num(vals[i]) if vals else None
        prev = cells.get(cell)
        cells[cell] = x if prev is None else (prev if x is None else prev + x)
    out = []
    for cell, x in cells.items():
        try:
            ring = [(lng, lat) for lat, lng in h3.cell_to_boundary(cell)]
        except (ValueError, TypeError, h3.H3BaseException):
            continue
        out.append(Shape([_unwrap(ring)], x, cell))
    return out


def _unwrap(ring: list[tuple[float, float]]) -> list[tuple[float, float]]:
    """Longitudes made continuous across ±180 (a plain projection has no wrap-around)."""
    out = [ring[0]]
    for lon, lat in ring[1:]:
        prev = out[-1][0]
        while lon - prev > 180:
            lon -= 360
        while prev - lon > 180:
            lon += 360
        out.append((lon, lat))
    return out


def bar_values(t: Table, v: View) -> list[tuple[str, float]]:
    """Bars: the measure summed per label, largest first (ties by label), at most TOP_BARS."""
    vals = t.columns.get(v.value, []) if v.value else []
    sums: dict[str, float] = {}
    sep = " \u2192 " if v.labels == ("origin", "destination") else " \u00b7 "
    for i in range(t.rows):
        label = sep.join(str(t.columns[k][i]) for k in v.labels) or f"row {i}"
        x = _num(vals[i]) if vals else 1.0
        sums[label] = sums.get(label, 0.0) + (x or 0.0)
    return sorted(sums.items(), key=lambda kv: (-kv[1], kv[0]))[:TOP_BARS]


def line_series(t: Table, v: View) -> tuple[list[int], list[tuple[str, list[float]]]]:
    """Lines: bin starts, and per top category its measure summed per bin (0 where absent)."""
    times = t.columns["time"]
    vals = t.columns.get(v.value, []) if v.value else []
    cats = t.columns[v.key] if v.key else ["all"] * t.rows
    per: dict[str, dict[int, float]] = {}
    total: dict[str, float] = {}
    for i in range(t.rows):
        if not isinstance(times[i], int):
            continue
        x = (_num(vals[i]) if vals else 1.0) or 0.0
        c = str(cats[i])
        per.setdefault(c, {})
        per[c][times[i]] = per[c].get(times[i], 0.0) + x
        total[c] = total.get(c, 0.0) + x
    bins = sorted({s for d in per.values() for s in d})
    top = sorted(total, key=lambda c: (-total[c], c))[:TOP_LINES]
    return bins, [(c, [per[c].get(b, 0.0) for b in bins]) for c in top]


# --------------------------------------------------------------------------------------------
# Sizes for the title
# --------------------------------------------------------------------------------------------


def payload_sizes(t: Table) -> dict[str, int | None]:
    """raw/gzip/brotli bytes: from the manifest beside the payload when it describes these
    bytes (same sha256), else measured (brotli only up to 4 MB: quality 11 is slow)."""
    from reduce.publish import manifest_path, sha256
    from reduce.sizes import brotli_bytes, gzip_bytes

    man = manifest_path(t.path)
    try:
        doc = orjson.loads(man.read_bytes())
        if doc.get("sha256") == sha256(t.data) and isinstance(doc.get("bytes"), dict):
            b = doc["bytes"]
            return {"raw": b.get("raw"), "gzip": b.get("gzip"), "brotli": b.get("brotli")}
    except (OSError, orjson.JSONDecodeError, AttributeError):
        pass
    return {
        "raw": len(t.data),
        "gzip": len(gzip_bytes(t.data)),
        "brotli": len(brotli_bytes(t.data)) if len(t.data) <= 4_000_000 else None,
    }


def title_lines(t: Table, sizes: Mapping[str, int | None]) -> tuple[str, str]:
    level = ", ".join(f"{k}={v}" for k, v in t.level.items()) or "no ladder"
    parts = [f"{t.rows:,} {'features' if t.layout == 'geojson' else 'rows'}"]
    for k in ("raw", "gzip", "brotli"):
        n = sizes.get(k)
        parts.append(f"{k} {format_size(n)}" if n is not None else f"{k} not measured")
    return f"{t.recipe}  \u00b7  level {level}", "  \u00b7  ".join(parts)


# --------------------------------------------------------------------------------------------
# The PNG
# --------------------------------------------------------------------------------------------

_BG = (255, 255, 255)
_INK = (34, 34, 34)
_MUTED = (110, 110, 110)
_PLOT = (20, 70, WIDTH - 170, HEIGHT - 40)  # left, top, right, bottom of the drawing area


def _font(size: int) -> Any:
    from PIL import ImageFont

    return ImageFont.load_default(size=size)


def _fmt(x: float | None) -> str:
    if x is None:
        return "-"
    if x == int(x) and abs(x) < 1e15:
        return f"{int(x):,}"
    return f"{x:,.3g}" if abs(x) < 1000 else f"{x:,.0f}"


def render_png(t: Table, *, sizes: Mapping[str, int | None] | None = None) -> bytes:
    """The picture of a payload as PNG bytes (deterministic: same payload, same bytes)."""
    from PIL import Image, ImageDraw

    v = choose_view(t)
    img = Image.new("RGB", (WIDTH, HEIGHT), _BG)
    d = ImageDraw.Draw(img)
    head, sub = title_lines(t, sizes if sizes is not None else payload_sizes(t))
    d.text((20, 14), head, fill=_INK, font=_font(18))
    d.text((20, 40), sub, fill=_MUTED, font=_font(13))
    if t.rows == 0:
        d.text((_PLOT[0], _PLOT[1] + 20), "no rows to draw", fill=_MUTED, font=_font(16))
    elif v.kind == "map":
        _draw_map(d, map_shapes(t, v), v)
    elif v.kind == "lines":
        _draw_lines(d, t, v)
    else:
        _draw_bars(d, bar_values(t, v), v)
    buf = io.BytesIO()
    # No timestamps or text chunks: the bytes depend on the pixels only.
    img.save(buf, format="PNG", optimize=False, compress_level=9)
    return buf.getvalue()


def value_range(values: Sequence[float | None]) -> tuple[float, float] | None:
    xs = [x for x in values if x is not None]
    return (min(xs), max(xs)) if xs else None


def _draw_map(d: Any, shapes: list[Shape], v: View) -> None:
    pts = [p for s in shapes for r in s.rings for p in r]
    rng = value_range([s.value for s in shapes])
    if pts:
        proj = projection(pts, _PLOT)
        for s in shapes:
            colour = (
                NO_DATA
                if s.value is None or rng is None
                else scale_colour(
                    1.0 if rng[1] == rng[0] else (s.value - rng[0]) / (rng[1] - rng[0])
                )
            )
            for i, r in enumerate(s.rings):
                xy = [proj(lon, lat) for lon, lat in r]
                if len(xy) >= 3:
                    # Outer ring filled; later rings of a Polygon are holes (RFC 7946 3.1.6),
                    # drawn in the background. A MultiPolygon's rings are all filled here.
                    d.polygon(
                        xy,
                        fill=colour if i == 0 or len(s.rings) == 1 or _is_outer(r) else _BG,
                        outline=None,
                    )
    _legend(d, rng, v.value or "")


def _is_outer(ring: list[tuple[float, float]]) -> bool:
    area = sum(x0 * y1 - x1 * y0 for (x0, y0), (x1, y1) in zip(ring, ring[1:]))
    return area >= 0  # exterior rings are counter-clockwise (RFC 7946 3.1.6)


def projection(pts: Sequence[tuple[float, float]], box: tuple[int, int, int, int]) -> Any:
    """Equirectangular, longitude scaled by cos(mid latitude), fitted into ``box``."""
    lons = [p[0] for p in pts]
    lats = [p[1] for p in pts]
    lat0 = (min(lats) + max(lats)) / 2
    k = max(math.cos(math.radians(lat0)), 0.05)
    w = max((max(lons) - min(lons)) * k, 1e-9)
    h = max(max(lats) - min(lats), 1e-9)
    bw, bh = box[2] - box[0], box[3] - box[1]
    s = min(bw / w, bh / h)
    ox = box[0] + (bw - w * s) / 2
    oy = box[1] + (bh - h * s) / 2
    lon_min, lat_max = min(lons), max(lats)

    def proj(lon: float, lat: float) -> tuple[float, float]:
        return (round(ox + (lon - lon_min) * k * s, 2), round(oy + (lat_max - lat) * s, 2))

    return proj


def _legend(d: Any, rng: tuple[float, float] | None, name: str) -> None:
    x0, y0, bar_h = WIDTH - 140, 90, 220
    d.text((x0, y0 - 22), name, fill=_INK, font=_font(13))
    for i in range(bar_h):
        d.line([(x0, y0 + i), (x0 + 18, y0 + i)], fill=scale_colour(1 - i / (bar_h - 1)))
    if rng is not None:
        d.text((x0 + 26, y0 - 6), _fmt(rng[1]), fill=_INK, font=_font(12))
        d.text(
            (x0 + 26, y0 + bar_h // 2 - 6), _fmt((rng[0] + rng[1]) / 2), fill=_INK, font=_font(12)
        )
        d.text((x0 + 26, y0 + bar_h - 8), _fmt(rng[0]), fill=_INK, font=_font(12))
    d.text((x0, y0 + bar_h + 10), f"scale: {SCALE_NAME}", fill=_MUTED, font=_font(11))
    d.rectangle([x0, y0 + bar_h + 30, x0 + 18, y0 + bar_h + 42], fill=NO_DATA)
    d.text((x0 + 26, y0 + bar_h + 30), "no value", fill=_MUTED, font=_font(11))


def _draw_bars(d: Any, bars: list[tuple[str, float]], v: View) -> None:
    left, top, right, bottom = _PLOT[0] + 220, _PLOT[1] + 4, WIDTH - 90, _PLOT[3]
    if not bars:
        return
    hi = max(max(x for _, x in bars), 0.0) or 1.0
    step = min(22.0, (bottom - top) / len(bars))
    f = _font(12)
    for i, (label, x) in enumerate(bars):
        y = top + i * step
        text = label if len(label) <= 34 else label[:33] + "\u2026"
        d.text((_PLOT[0], y + step / 2 - 7), text, fill=_INK, font=f)
        w = max(0.0, x) / hi * (right - left)
        d.rectangle([left, y + 2, left + w, y + step - 3], fill=BAR_COLOUR)
        d.text((left + w + 6, y + step / 2 - 7), _fmt(x), fill=_MUTED, font=f)
    d.text(
        (_PLOT[0], bottom + 8),
        f"{v.value or 'rows'}, top {len(bars)} by value",
        fill=_MUTED,
        font=_font(12),
    )


def _hex_rgb(h: str) -> tuple[int, int, int]:
    return int(h[1:3], 16), int(h[3:5], 16), int(h[5:7], 16)


def _draw_lines(d: Any, t: Table, v: View) -> None:
    bins, series = line_series(t, v)
    left, top, right, bottom = _PLOT[0] + 50, _PLOT[1] + 10, _PLOT[2], _PLOT[3] - 20
    if not bins:
        return
    hi = max((max(ys) for _, ys in series), default=1.0) or 1.0
    t0, t1 = bins[0], bins[-1]
    span = (t1 - t0) or 1
    f = _font(12)
    d.line([(left, bottom), (right, bottom)], fill=_MUTED)
    d.line([(left, top), (left, bottom)], fill=_MUTED)
    for frac in (0.0, 0.5, 1.0):
        y = bottom - frac * (bottom - top)
        d.text((_PLOT[0], y - 7), _fmt(hi * frac), fill=_MUTED, font=f)
    zone = _zone(t.meta.get("time_zone"))
    for s in (t0, t1):
        x = left + (s - t0) / span * (right - left)
        d.text((x - 30, bottom + 6), _date(s, zone), fill=_MUTED, font=f)
    for j, (cat, ys) in enumerate(series):
        colour = _hex_rgb(CATEGORY_COLOURS[j % len(CATEGORY_COLOURS)])
        xy = [
            (
                round(left + (b - t0) / span * (right - left), 2),
                round(bottom - y / hi * (bottom - top), 2),
            )
            for b, y in zip(bins, ys)
        ]
        if len(xy) == 1:
            d.ellipse([xy[0][0] - 2, xy[0][1] - 2, xy[0][0] + 2, xy[0][1] + 2], fill=colour)
        else:
            d.line(xy, fill=colour, width=2)
        ly = _PLOT[1] + 20 + j * 20
        d.line([(WIDTH - 150, ly + 7), (WIDTH - 130, ly + 7)], fill=colour, width=3)
        d.text((WIDTH - 124, ly), str(cat)[:18], fill=_INK, font=f)
    d.text(
        (WIDTH - 150, _PLOT[1]), f"{v.value or 'rows'} by {v.key or 'time'}", fill=_MUTED, font=f
    )


def _zone(name: Any) -> dt.tzinfo:
    try:
        return zoneinfo.ZoneInfo(name) if isinstance(name, str) else dt.UTC
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        return dt.UTC


def _date(s: int, zone: dt.tzinfo) -> str:
    return dt.datetime.fromtimestamp(s, dt.UTC).astimezone(zone).strftime("%Y-%m-%d %H:%M")


# --------------------------------------------------------------------------------------------
# The page
# --------------------------------------------------------------------------------------------


def static_text(name: str) -> str:
    """A file shipped in ``reduce/static`` (package data)."""
    return resources.files("reduce").joinpath("static", name).read_text(encoding="utf-8")


def _script_json(data: bytes) -> str:
    """JSON text safe inside a <script> element: '<' occurs only inside JSON strings, where
    the escape \\u003c means the same character, so '</script>' cannot close the element."""
    return data.decode("utf-8").replace("<", "\\u003c")


def view_spec(t: Table, v: View) -> dict[str, Any]:
    """What the page needs beyond the payload: the view, the scale, and hex cell outlines
    (computed here with the h3 bindings, as the page has no H3 library)."""
    from reduce.audit import CANVAS_MAX_ELEMENTS, SVG_MAX_ELEMENTS

    spec: dict[str, Any] = {
        "kind": v.kind,
        "value": v.value,
        "key": v.key,
        "labels": list(v.labels),
        "layout": t.layout,
        "scale": [scale_colour(i / 32) for i in range(33)],
        "scale_name": SCALE_NAME,
        "categories": list(CATEGORY_COLOURS),
        "top_lines": TOP_LINES,
        "top_bars": TOP_BARS,
        "svg_max": SVG_MAX_ELEMENTS,
        "canvas_max": CANVAS_MAX_ELEMENTS,
    }
    if v.kind == "map" and v.key == "hex":
        spec["cells"] = {
            s.label: [[round(x, 6), round(y, 6)] for x, y in s.rings[0]] for s in map_shapes(t, v)
        }
    return spec


def render_html(t: Table, *, sizes: Mapping[str, int | None] | None = None) -> bytes:
    """A self-contained page (no network) drawing the payload; see the module docstring."""
    import html

    v = choose_view(t)
    head, sub = title_lines(t, sizes if sizes is not None else payload_sizes(t))
    spec = orjson.dumps(view_spec(t, v), option=orjson.OPT_SORT_KEYS)
    reader = static_text("columns-reader.js")
    page = static_text("preview-page.js")
    text = _PAGE.format(
        title=html.escape(head),
        sub=html.escape(sub),
        payload=_script_json(t.data),
        spec=_script_json(spec),
        reader=reader,
        page=page,
        svg=f"{view_spec_limits()[0]:,}",
        canvas=f"{view_spec_limits()[1]:,}",
    )
    return text.encode("utf-8")


def view_spec_limits() -> tuple[int, int]:
    from reduce.audit import CANVAS_MAX_ELEMENTS, SVG_MAX_ELEMENTS

    return SVG_MAX_ELEMENTS, CANVAS_MAX_ELEMENTS


_PAGE = """<!doctype html>
<html lang="en"><head><meta charset="utf-8">
<meta http-equiv="Content-Security-Policy" content="default-src 'none'; script-src 'unsafe-inline'; style-src 'unsafe-inline'; img-src data:">
<title>{title}</title>
<style>
body {{ font: 14px/1.4 system-ui, sans-serif; margin: 16px; color: #222; }}
h1 {{ font-size: 18px; margin: 0; }} p {{ margin: 4px 0; color: #666; }}
#plot {{ position: relative; width: 960px; height: 520px; border: 1px solid #ddd; }}
#plot svg, #plot canvas {{ position: absolute; left: 0; top: 0; }}
#tip {{ position: fixed; pointer-events: none; background: #fff; border: 1px solid #999;
        padding: 4px 6px; font-size: 12px; white-space: pre; display: none; }}
#legend {{ font-size: 12px; color: #444; margin-top: 6px; }}
</style></head>
<body>
<h1>{title}</h1>
<p>{sub}</p>
<p>Drawing surface by element count: SVG up to about {svg} elements, a 2D canvas up to about
{canvas}, WebGL beyond (a rule of thumb, common practice). Hover a shape for its keys and
measures.</p>
<div id="plot"></div>
<div id="legend"></div>
<div id="tip"></div>
<script type="application/json" id="payload">{payload}</script>
<script type="application/json" id="view">{spec}</script>
<script type="module">
{reader}
{page}
</script>
</body></html>
"""


# --------------------------------------------------------------------------------------------
# Writing previews
# --------------------------------------------------------------------------------------------


@dataclass
class Preview:
    payload: Path
    png: Path
    html: Path
    rows: int
    kind: Kind
    timings: dict[str, Any] | None = None  # filled by --measure


def preview_paths(payload: Path, out_dir: Path | None) -> tuple[Path, Path]:
    folder = out_dir if out_dir is not None else payload.parent
    return folder / f"{payload.stem}.png", folder / f"{payload.stem}.html"


def write_previews(payload: Path, *, out_dir: Path | None = None, reader: bool = False) -> Preview:
    """Write ``STEM.png`` and ``STEM.html`` (and ``columns-reader.js`` with ``reader``)."""
    t = load_table(payload)
    sizes = payload_sizes(t)
    png, page = preview_paths(payload, out_dir)
    folder = png.parent
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise PreviewError(
            f"{folder}: cannot create the preview folder ({e.strerror}); choose another --out"
        ) from None
    files = {png: render_png(t, sizes=sizes), page: render_html(t, sizes=sizes)}
    if reader:
        files[folder / "columns-reader.js"] = static_text("columns-reader.js").encode("utf-8")
    for path, data in files.items():
        write_atomic(path, data)
    return Preview(payload, png, page, t.rows, choose_view(t).kind)


def write_atomic(path: Path, data: bytes) -> None:
    """Write to a temporary file in the same folder, then rename over ``path``."""
    from reduce._util import atomic

    try:
        atomic.write_atomic(path, data)
    except OSError as e:
        raise PreviewError(
            f"{path}: cannot write the preview ({e.strerror}); check the "
            "folder's permissions and free space"
        ) from None


def expand_payloads(paths: Sequence[Path]) -> list[Path]:
    """Payload files named, and in named folders the ``*.json``/``*.geojson`` payloads that
    ``reduce run`` wrote (a manifest beside them), sorted; a missing path is a
    :class:`PreviewError`."""
    from reduce.publish import manifest_path

    out: list[Path] = []
    for p in paths:
        if p.is_dir():
            found = sorted(
                q
                for q in p.iterdir()
                if q.is_file()
                and q.suffix in (".json", ".geojson")
                and not q.name.endswith(".manifest.json")
                and manifest_path(q).is_file()
            )
            if not found:
                raise PreviewError(
                    f"{p}: no payloads (*.json, *.geojson with a manifest "
                    "beside them) in this folder; name payload files instead"
                )
            out.extend(found)
        elif not p.exists():
            raise PreviewError(f"{p}: payload file not found; check the path")
        else:
            out.append(p)
    return out
