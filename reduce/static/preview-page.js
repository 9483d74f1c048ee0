// preview-page.js: the drawing part of a reduce preview page (inlined after the reader).
// It decodes the inline payload with the reader above, builds the same view as the PNG
// (reduce/preview.py), picks the drawing surface by element count and draws. After
// drawing, <body> carries data-drawn, data-shapes, data-surface, data-parse-ms, data-draw-ms.

const W = 960, H = 520;
const BOX = [10, 10, W - 10, H - 10];

function project(points) {
  let lonMin = Infinity, lonMax = -Infinity, latMin = Infinity, latMax = -Infinity;
  for (const [lon, lat] of points) {
    if (lon < lonMin) lonMin = lon; if (lon > lonMax) lonMax = lon;
    if (lat < latMin) latMin = lat; if (lat > latMax) latMax = lat;
  }
  const k = Math.max(Math.cos(((latMin + latMax) / 2) * Math.PI / 180), 0.05);
  const w = Math.max((lonMax - lonMin) * k, 1e-9), h = Math.max(latMax - latMin, 1e-9);
  const bw = BOX[2] - BOX[0], bh = BOX[3] - BOX[1];
  const s = Math.min(bw / w, bh / h);
  const ox = BOX[0] + (bw - w * s) / 2, oy = BOX[1] + (bh - h * s) / 2;
  return ([lon, lat]) => [ox + (lon - lonMin) * k * s, oy + (latMax - lat) * s];
}

function num(v) { return typeof v === "number" && Number.isFinite(v) ? v : null; }

const NUMBER = new Intl.NumberFormat("en-US");  // one formatter: toLocaleString builds one per call

function fmt(x) {
  if (x === null || x === undefined) return "-";
  if (typeof x !== "number") return String(x);
  if (Number.isInteger(x)) return NUMBER.format(x);
  return Math.abs(x) < 1000 ? x.toPrecision(3) : NUMBER.format(Math.round(x));
}

function colourAt(spec, t) {
  const s = spec.scale;
  const i = Math.round(Math.min(Math.max(t, 0), 1) * (s.length - 1));
  return s[i];
}

function rgb(c) { return "rgb(" + c[0] + "," + c[1] + "," + c[2] + ")"; }
function hexRgb(h) { return [1, 3, 5].map((i) => parseInt(h.slice(i, i + 2), 16)); }

// --- views: the same rules as reduce/preview.py --------------------------------------------

function mapShapes(spec, data) {
  const shapes = [];
  if (spec.layout === "geojson") {
    data.features.forEach((f, i) => {
      const g = f.geometry || {}, props = f.properties || {};
      const rings = g.type === "Polygon" ? g.coordinates
        : g.type === "MultiPolygon" ? g.coordinates.flat() : [];
      shapes.push({ rings, value: spec.value ? num(props[spec.value]) : null,
                    info: () => Object.entries(props).map(([k, v]) => k + ": " + fmt(v)).join("\n") });
    });
    return shapes;
  }
  const cols = data.columns, cells = new Map();
  const hex = cols[spec.key], vals = spec.value ? cols[spec.value] : null;
  const names = Object.keys(cols);
  for (let i = 0; i < data.rows; i++) {
    const c = hex[i];
    if (typeof c !== "string") continue;
    let e = cells.get(c);
    if (!e) { e = { value: null, rows: 0, first: i }; cells.set(c, e); }
    const x = vals ? num(vals[i]) : null;
    e.value = e.value === null ? x : x === null ? e.value : e.value + x;
    e.rows += 1;
  }
  for (const [c, e] of cells) {
    const ring = spec.cells[c];
    if (!ring) continue;
    // Hover text is built when hovered: formatting every shape's text up front is slow.
    const info = () => (e.rows === 1
      ? names.map((n) => n + ": " + fmt(cols[n][e.first] instanceof Date
          ? cols[n][e.first].toISOString() : cols[n][e.first])).join("\n")
      : "hex: " + c + "\nrows: " + e.rows + "\n" + spec.value + " (sum): " + fmt(e.value));
    shapes.push({ rings: [ring], value: e.value, info });
  }
  return shapes;
}

function barValues(spec, data) {
  const cols = data.columns, vals = spec.value ? cols[spec.value] : null;
  const sep = spec.labels.length === 2 && spec.labels[0] === "origin" ? " \u2192 " : " \u00b7 ";
  const sums = new Map();
  for (let i = 0; i < data.rows; i++) {
    const label = spec.labels.map((k) => String(cols[k][i])).join(sep) || "row " + i;
    const x = vals ? (num(vals[i]) || 0) : 1;
    sums.set(label, (sums.get(label) || 0) + x);
  }
  return [...sums].sort((a, b) => b[1] - a[1] || (a[0] < b[0] ? -1 : a[0] > b[0] ? 1 : 0))
    .slice(0, spec.top_bars);
}

function lineSeries(spec, data) {
  const cols = data.columns, vals = spec.value ? cols[spec.value] : null;
  const times = cols.time, cats = spec.key ? cols[spec.key] : null;
  const per = new Map(), total = new Map(), bins = new Set();
  for (let i = 0; i < data.rows; i++) {
    if (!(times[i] instanceof Date)) continue;
    const s = times[i].getTime() / 1000, c = cats ? String(cats[i]) : "all";
    const x = vals ? (num(vals[i]) || 0) : 1;
    if (!per.has(c)) per.set(c, new Map());
    per.get(c).set(s, (per.get(c).get(s) || 0) + x);
    total.set(c, (total.get(c) || 0) + x);
    bins.add(s);
  }
  const sorted = [...bins].sort((a, b) => a - b);
  const top = [...total.keys()].sort((a, b) => total.get(b) - total.get(a) ||
    (a < b ? -1 : a > b ? 1 : 0)).slice(0, spec.top_lines);
  return { bins: sorted, series: top.map((c) => [c, sorted.map((b) => per.get(c).get(b) || 0)]) };
}

// --- marks: polygons, rectangles and polylines in page pixels --------------------------------

function buildMarks(spec, data) {
  const marks = [];  // { type: "poly"|"rect"|"line", pts: [[x,y]...] | rect, fill, info }
  let legend = "";
  if (spec.kind === "map") {
    const shapes = mapShapes(spec, data);
    const all = shapes.flatMap((s) => s.rings.flat());
    if (!all.length) return { marks, legend };
    const proj = project(all);
    const xs = shapes.map((s) => s.value).filter((v) => v !== null);
    const lo = Math.min(...xs), hi = Math.max(...xs);
    for (const s of shapes) {
      const fill = s.value === null || !xs.length ? [200, 200, 200]
        : colourAt(spec, hi === lo ? 1 : (s.value - lo) / (hi - lo));
      marks.push({ type: "poly", rings: s.rings.map((r) => r.map(proj)), fill, info: s.info });
    }
    legend = spec.value + ": " + spec.scale_name + " scale from " + fmt(lo) + " to " + fmt(hi);
  } else if (spec.kind === "bars") {
    const bars = barValues(spec, data);
    const hi = Math.max(0, ...bars.map((b) => b[1])) || 1;
    const step = Math.min(20, (H - 20) / Math.max(bars.length, 1));
    bars.forEach(([label, x], i) => {
      const w = Math.max(0, x) / hi * (W - 320);
      marks.push({ type: "rect", rect: [240, 10 + i * step + 2, w, step - 4], fill: [33, 145, 140],
                   info: label + "\n" + (spec.value || "rows") + ": " + fmt(x), label });
    });
    legend = (spec.value || "rows") + ", top " + bars.length + " by value";
  } else {
    const { bins, series } = lineSeries(spec, data);
    const hi = Math.max(1e-9, ...series.flatMap((s) => s[1]));
    const t0 = bins[0], span = (bins[bins.length - 1] - t0) || 1;
    series.forEach(([cat, ys], j) => {
      const pts = bins.map((b, i) => [50 + (b - t0) / span * (W - 70), H - 20 - ys[i] / hi * (H - 40)]);
      marks.push({ type: "line", pts, fill: hexRgb(spec.categories[j % spec.categories.length]),
                   info: cat, bins, ys });
    });
    legend = series.map(([c], j) => c + " (" + spec.categories[j % spec.categories.length] + ")")
      .join(", ");
  }
  return { marks, legend };
}

// --- surfaces ------------------------------------------------------------------------------

function drawSvg(plot, marks) {
  const ns = "http://www.w3.org/2000/svg";
  const svg = document.createElementNS(ns, "svg");
  svg.setAttribute("width", W); svg.setAttribute("height", H);
  for (const m of marks) {
    let el;
    if (m.type === "poly") {
      el = document.createElementNS(ns, "path");
      el.setAttribute("d", m.rings.map((r) => "M" + r.map((p) => p[0].toFixed(2) + "," +
        p[1].toFixed(2)).join("L") + "Z").join(""));
      el.setAttribute("fill-rule", "evenodd");
      el.setAttribute("fill", rgb(m.fill));
    } else if (m.type === "rect") {
      el = document.createElementNS(ns, "rect");
      const [x, y, w, h] = m.rect;
      el.setAttribute("x", x); el.setAttribute("y", y);
      el.setAttribute("width", w); el.setAttribute("height", h);
      el.setAttribute("fill", rgb(m.fill));
      const t = document.createElementNS(ns, "text");
      t.setAttribute("x", 4); t.setAttribute("y", y + h - 2); t.setAttribute("font-size", 11);
      t.textContent = m.label.length > 36 ? m.label.slice(0, 35) + "\u2026" : m.label;
      svg.appendChild(t);
    } else {
      el = document.createElementNS(ns, "polyline");
      el.setAttribute("points", m.pts.map((p) => p[0].toFixed(2) + "," + p[1].toFixed(2)).join(" "));
      el.setAttribute("fill", "none"); el.setAttribute("stroke", rgb(m.fill));
      el.setAttribute("stroke-width", 2);
    }
    svg.appendChild(el);
  }
  plot.appendChild(svg);
  svg.getBoundingClientRect();  // force layout inside the timed section
}

function drawCanvas(plot, marks) {
  const c = document.createElement("canvas");
  c.width = W; c.height = H;
  plot.appendChild(c);
  const ctx = c.getContext("2d");
  ctx.font = "11px sans-serif";
  for (const m of marks) {
    if (m.type === "poly") {
      ctx.fillStyle = rgb(m.fill);
      ctx.fill(m.path, "evenodd");
    } else if (m.type === "rect") {
      ctx.fillStyle = rgb(m.fill);
      ctx.fillRect(...m.rect);
      ctx.fillStyle = "#222";
      ctx.fillText(m.label.length > 36 ? m.label.slice(0, 35) + "\u2026" : m.label, 4,
                   m.rect[1] + m.rect[3] - 2);
    } else {
      ctx.strokeStyle = rgb(m.fill); ctx.lineWidth = 2;
      ctx.stroke(m.path);
    }
  }
  ctx.getImageData(0, 0, 1, 1);  // wait for the drawing inside the timed section
}

function drawWebgl(plot, marks) {
  const c = document.createElement("canvas");
  c.width = W; c.height = H;
  plot.appendChild(c);
  const gl = c.getContext("webgl", { preserveDrawingBuffer: true, antialias: false });
  if (!gl) return false;
  const tri = [], triCol = [], lin = [], linCol = [];
  const push = (arr, col, p, f) => { arr.push(p[0], p[1]); col.push(f[0] / 255, f[1] / 255, f[2] / 255); };
  for (const m of marks) {
    if (m.type === "poly") {
      // Triangle fans: exact for convex shapes (hex cells); concave outlines are drawn
      // approximately on this surface.
      for (const r of m.rings) for (let i = 1; i + 1 < r.length; i++) {
        push(tri, triCol, r[0], m.fill); push(tri, triCol, r[i], m.fill); push(tri, triCol, r[i + 1], m.fill);
      }
    } else if (m.type === "rect") {
      const [x, y, w, h] = m.rect;
      for (const p of [[x, y], [x + w, y], [x + w, y + h], [x, y], [x + w, y + h], [x, y + h]]) push(tri, triCol, p, m.fill);
    } else {
      for (let i = 0; i + 1 < m.pts.length; i++) { push(lin, linCol, m.pts[i], m.fill); push(lin, linCol, m.pts[i + 1], m.fill); }
    }
  }
  const vs = "attribute vec2 p; attribute vec3 c; varying vec3 v; uniform vec2 s;" +
    "void main() { v = c; gl_Position = vec4(p.x / s.x * 2.0 - 1.0, 1.0 - p.y / s.y * 2.0, 0, 1); }";
  const fs = "precision mediump float; varying vec3 v; void main() { gl_FragColor = vec4(v, 1); }";
  const prog = gl.createProgram();
  for (const [type, src] of [[gl.VERTEX_SHADER, vs], [gl.FRAGMENT_SHADER, fs]]) {
    const sh = gl.createShader(type); gl.shaderSource(sh, src); gl.compileShader(sh);
    gl.attachShader(prog, sh);
  }
  gl.linkProgram(prog); gl.useProgram(prog);
  gl.uniform2f(gl.getUniformLocation(prog, "s"), W, H);
  gl.clearColor(1, 1, 1, 1); gl.clear(gl.COLOR_BUFFER_BIT);
  const draw = (pts, cols, mode) => {
    if (!pts.length) return;
    for (const [name, data, size] of [["p", pts, 2], ["c", cols, 3]]) {
      const b = gl.createBuffer(); gl.bindBuffer(gl.ARRAY_BUFFER, b);
      gl.bufferData(gl.ARRAY_BUFFER, new Float32Array(data), gl.STATIC_DRAW);
      const loc = gl.getAttribLocation(prog, name);
      gl.enableVertexAttribArray(loc); gl.vertexAttribPointer(loc, size, gl.FLOAT, false, 0, 0);
    }
    gl.drawArrays(mode, 0, pts.length / 2);
  };
  draw(tri, triCol, gl.TRIANGLES);
  draw(lin, linCol, gl.LINES);
  gl.readPixels(0, 0, 1, 1, gl.RGBA, gl.UNSIGNED_BYTE, new Uint8Array(4));  // wait for the GPU
  return true;
}

// --- hover -----------------------------------------------------------------------------------

function paths(marks) {
  for (const m of marks) {
    const p = new Path2D();
    if (m.type === "poly") {
      for (const r of m.rings) { r.forEach((q, i) => (i ? p.lineTo(q[0], q[1]) : p.moveTo(q[0], q[1]))); p.closePath(); }
      const xs = m.rings.flat().map((q) => q[0]), ys = m.rings.flat().map((q) => q[1]);
      m.bbox = [Math.min(...xs), Math.min(...ys), Math.max(...xs), Math.max(...ys)];
    } else if (m.type === "rect") {
      p.rect(...m.rect);
      m.bbox = [m.rect[0], m.rect[1], m.rect[0] + Math.max(m.rect[2], 60), m.rect[1] + m.rect[3]];
    } else {
      m.pts.forEach((q, i) => (i ? p.lineTo(q[0], q[1]) : p.moveTo(q[0], q[1])));
    }
    m.path = p;
  }
}

function hover(plot, marks) {
  const tip = document.getElementById("tip");
  const probe = document.createElement("canvas").getContext("2d");
  plot.addEventListener("mousemove", (ev) => {
    const r = plot.getBoundingClientRect(), x = ev.clientX - r.left, y = ev.clientY - r.top;
    let text = null;
    for (let i = marks.length - 1; i >= 0 && text === null; i--) {
      const m = marks[i];
      if (m.type === "line") continue;
      const b = m.bbox;
      if (x < b[0] || x > b[2] || y < b[1] || y > b[3]) continue;
      if (m.type === "rect" || probe.isPointInPath(m.path, x, y, "evenodd")) {
        text = typeof m.info === "function" ? m.info() : m.info;
      }
    }
    const lines = marks.filter((m) => m.type === "line");
    if (text === null && lines.length && lines[0].pts.length) {
      const pts = lines[0].pts;
      let best = 0;
      for (let i = 1; i < pts.length; i++) if (Math.abs(pts[i][0] - x) < Math.abs(pts[best][0] - x)) best = i;
      text = new Date(lines[0].bins[best] * 1000).toISOString() + "\n" +
        lines.map((m) => m.info + ": " + fmt(m.ys[best])).join("\n");
    }
    tip.style.display = text === null ? "none" : "block";
    if (text !== null) { tip.textContent = text; tip.style.left = ev.clientX + 12 + "px"; tip.style.top = ev.clientY + 12 + "px"; }
  });
  plot.addEventListener("mouseleave", () => { tip.style.display = "none"; });
}

// --- the page --------------------------------------------------------------------------------

function main() {
  window.reduceReader = { parse, check, toColumns, toRows };  // for scripts and tests
  const spec = JSON.parse(document.getElementById("view").textContent);
  const text = document.getElementById("payload").textContent;
  const t0 = performance.now();
  const doc = JSON.parse(text);
  window.reducePayload = doc;
  let data, elements;
  if (spec.layout === "geojson") {
    data = doc; elements = doc.features.length;
  } else if (spec.layout === "rows") {
    const columns = {};
    for (const row of doc) for (const k of Object.keys(row)) columns[k] = columns[k] || [];
    for (const row of doc) for (const k of Object.keys(columns)) columns[k].push(row[k] === undefined ? null : row[k]);
    if (columns.time) columns.time = columns.time.map((s) => (s === null ? null : new Date(s * 1000)));
    data = { rows: doc.length, columns }; elements = doc.length;
  } else {
    data = { rows: doc.rows, columns: toColumns(doc) }; elements = doc.rows;
  }
  const t1 = performance.now();
  const surface = elements <= spec.svg_max ? "svg" : elements <= spec.canvas_max ? "canvas" : "webgl";
  const plot = document.getElementById("plot");
  const { marks, legend } = buildMarks(spec, data);
  paths(marks);
  let used = surface;
  if (surface === "svg") drawSvg(plot, marks);
  else if (surface === "canvas") drawCanvas(plot, marks);
  else if (!drawWebgl(plot, marks)) { plot.textContent = ""; drawCanvas(plot, marks); used = "canvas"; }
  const t2 = performance.now();
  document.getElementById("legend").textContent = legend + (used !== surface
    ? " (WebGL is not available here: drawn on a 2D canvas)" : "");
  hover(plot, marks);
  const b = document.body.dataset;
  b.surface = used;
  b.shapes = String(marks.length);
  b.parseMs = (t1 - t0).toFixed(3);
  b.drawMs = (t2 - t1).toFixed(3);
  b.drawn = String(elements);
}

try { main(); } catch (e) { document.body.dataset.error = String(e && e.message || e); throw e; }
