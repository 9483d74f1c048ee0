// columns-reader.js: read a reduce "columns" payload in a page. No dependencies.
//
//   import { parse, toColumns, toRows } from "./columns-reader.js";
//   const payload = parse(await (await fetch("x.json")).text());
//   const cols = toColumns(payload);   // { time: [Date, ...], kind: ["hail", ...], reports: [...] }
//   const rows = toRows(payload);      // [{ time: Date, kind: "hail", reports: 12 }, ...]
//
// A column listed in payload.dictionaries holds indexes into its labels: they are resolved
// to the labels. The "time" column holds each bin's start as integer seconds since the Unix
// epoch (UTC): it becomes a Date (pass { dates: false } to keep the seconds).

export const FORMAT_PREFIX = "reduce.columns/";

export class PayloadError extends Error {}

export function parse(text) {
  return check(JSON.parse(text));
}

export function check(payload) {
  if (payload === null || typeof payload !== "object" ||
      typeof payload.format !== "string" || !payload.format.startsWith(FORMAT_PREFIX)) {
    throw new PayloadError("not a reduce columns payload (format " +
                           JSON.stringify(payload && payload.format) + ")");
  }
  const n = payload.rows;
  for (const [name, values] of Object.entries(payload.columns || {})) {
    if (!Array.isArray(values) || values.length !== n) {
      throw new PayloadError("column " + name + " does not have " + n + " entries");
    }
  }
  return payload;
}

export function toColumns(payload, { dates = true } = {}) {
  check(payload);
  const dicts = payload.dictionaries || {};
  const out = {};
  for (const [name, values] of Object.entries(payload.columns)) {
    const labels = dicts[name];
    if (labels) {
      const col = new Array(values.length);
      for (let i = 0; i < values.length; i++) {
        const k = values[i];
        if (k === null) { col[i] = null; continue; }
        if (!(k >= 0 && k < labels.length)) {
          throw new PayloadError("column " + name + " row " + i + ": index " + k +
                                 " outside its dictionary");
        }
        col[i] = labels[k];
      }
      out[name] = col;
    } else if (name === "time" && dates) {
      out[name] = values.map((s) => (s === null ? null : new Date(s * 1000)));
    } else {
      out[name] = values;
    }
  }
  return out;
}

export function toRows(payload, options = {}) {
  const cols = toColumns(payload, options);
  const names = Object.keys(cols);
  const rows = new Array(payload.rows);
  for (let i = 0; i < payload.rows; i++) {
    const row = {};
    for (const name of names) row[name] = cols[name][i];
    rows[i] = row;
  }
  return rows;
}
