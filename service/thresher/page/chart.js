// The mistake-rate line chart: plain SVG, drawn at the container's pixel width so text stays
// crisp and unstretched; redrawn when the container resizes.

const SVG = "http://www.w3.org/2000/svg";

function node(tag, attrs) {
  const n = document.createElementNS(SVG, tag);
  for (const [k, v] of Object.entries(attrs || {})) n.setAttribute(k, String(v));
  return n;
}

function text(x, y, value, attrs) {
  const t = node("text", { x, y, ...attrs });
  t.textContent = value;
  return t;
}

// Round up to 1, 2, 2.5 or 5 times a power of ten, so the axis ends on a readable value.
export function niceCeil(v) {
  if (!(v > 0)) return 1;
  const p = Math.pow(10, Math.floor(Math.log10(v)));
  for (const m of [1, 2, 2.5, 5, 10]) if (v <= m * p + 1e-12) return m * p;
  return 10 * p;
}

function ticks(lo, hi, count) {
  const span = hi - lo;
  if (!(span > 0)) return [lo];
  const step = niceCeil(span / count);
  const out = [];
  for (let v = Math.ceil(lo / step) * step; v <= hi + step * 1e-9; v += step) out.push(v);
  return out;
}

function shortCount(v) {
  if (v >= 1e6) return `${+(v / 1e6).toFixed(1)}M`;
  if (v >= 1e4) return `${+(v / 1e3).toFixed(0)}k`;
  if (v >= 1e3) return `${+(v / 1e3).toFixed(1)}k`;
  return String(Math.round(v));
}

function pctLabel(v, top) {
  const digits = top < 0.05 ? 1 : 0;
  return `${(v * 100).toFixed(digits)}%`;
}

// One path per series; a null value lifts the pen so gaps show as gaps.
function pathFor(points, key, sx, sy) {
  let d = "";
  let pen = false;
  for (const p of points) {
    const v = p[key];
    if (v === null || v === undefined || !Number.isFinite(v)) {
      pen = false;
      continue;
    }
    d += `${pen ? "L" : "M"}${sx(p.x).toFixed(1)} ${sy(v).toFixed(1)}`;
    pen = true;
  }
  return d;
}

/**
 * Draw into `svg`: points [{x, last_1000, decayed}], alarms [x], series [{key, label}].
 * Returns a one-sentence description for the chart's accessible label.
 */
export function drawRateChart(svg, { points, alarms, series, width, height }) {
  svg.replaceChildren();
  svg.setAttribute("viewBox", `0 0 ${width} ${height}`);
  svg.setAttribute("width", String(width));
  svg.setAttribute("height", String(height));
  const pad = { left: 44, right: 12, top: 16, bottom: 26 };
  const w = Math.max(10, width - pad.left - pad.right);
  const h = Math.max(10, height - pad.top - pad.bottom);

  const xs = points.map((p) => p.x);
  const x0 = 0;
  const x1 = Math.max(1, ...xs, ...alarms);
  let top = 0;
  for (const p of points) {
    for (const s of series) {
      const v = p[s.key];
      if (Number.isFinite(v) && v > top) top = v;
    }
  }
  const y1 = Math.min(1, niceCeil(Math.max(top * 1.1, 0.01)));
  const sx = (v) => pad.left + ((v - x0) / (x1 - x0)) * w;
  const sy = (v) => pad.top + h - (Math.min(Math.max(v, 0), y1) / y1) * h;

  const grid = node("g", { class: "grid" });
  for (const v of ticks(0, y1, 4)) {
    const y = sy(v).toFixed(1);
    grid.append(node("line", { x1: pad.left, x2: pad.left + w, y1: y, y2: y }));
    grid.append(text(pad.left - 6, +y + 4, pctLabel(v, y1), { class: "tick", "text-anchor": "end" }));
  }
  const xticks = ticks(x0, x1, Math.max(2, Math.floor(w / 90)));
  for (const v of xticks) {
    const x = sx(v).toFixed(1);
    grid.append(node("line", { class: "xtick", x1: x, x2: x, y1: pad.top + h, y2: pad.top + h + 4 }));
    grid.append(text(x, pad.top + h + 17, shortCount(v), { class: "tick", "text-anchor": "middle" }));
  }
  grid.append(node("line", { class: "axis", x1: pad.left, x2: pad.left + w,
                              y1: pad.top + h, y2: pad.top + h }));
  svg.append(grid);

  const marks = node("g", { class: "alarms" });
  for (const a of alarms) {
    if (!(a >= x0 && a <= x1)) continue;
    const x = sx(a).toFixed(1);
    const line = node("line", { class: "alarm", x1: x, x2: x, y1: pad.top, y2: pad.top + h });
    const tip = node("title");
    tip.textContent = `drift alarm after ${a.toLocaleString("en")} labels`;
    line.append(tip);
    marks.append(line);
    marks.append(node("path", { class: "alarm-flag", d: `M${x} ${pad.top - 1}l-4 -6h8z` }));
  }
  svg.append(marks);

  for (const s of series) {
    const d = pathFor(points, s.key, sx, sy);
    svg.append(node("path", { class: `line line-${s.key}`, "data-series": s.key, d }));
  }

  if (points.length < 2) {
    svg.append(text(pad.left + w / 2, pad.top + h / 2, "the line starts after a few labels",
                    { class: "chart-note", "text-anchor": "middle" }));
  }

  const last = points[points.length - 1] || {};
  const parts = series.map((s) => `${s.label} ${Number.isFinite(last[s.key])
    ? (last[s.key] * 100).toFixed(1) + " percent" : "not yet counted"}`);
  const n = alarms.length;
  return `Mistake rate by labels seen, up to ${shortCount(x1)} labels: ${parts.join(", ")}; `
    + `${n} drift alarm${n === 1 ? "" : "s"}.`;
}
