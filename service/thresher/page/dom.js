// Small DOM and number-format helpers. Data reaches the document only as text nodes and
// attribute values, never as markup.

export function el(tag, attrs, ...children) {
  const n = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (v !== null && v !== undefined && v !== false) n.setAttribute(k, String(v));
  }
  for (const c of children) {
    if (c === null || c === undefined) continue;
    n.append(typeof c === "string" ? document.createTextNode(c) : c);
  }
  return n;
}

export const num = (v) => (typeof v === "number" && Number.isFinite(v) ? v : null);
export const count = (v) => (num(v) === null ? "—" : Math.round(v).toLocaleString("en"));

export function pct(v) {
  if (num(v) === null) return "—";
  const p = v * 100;
  if (p === 0) return "0 %";
  return `${p.toFixed(p < 1 ? 2 : 1)} %`;
}

export function duration(s) {
  if (num(s) === null) return "—";
  s = Math.max(0, s);
  if (s < 90) return `${Math.round(s)} s`;
  if (s < 5400) return `${Math.round(s / 60)} min`;
  if (s < 172800) return `${(s / 3600).toFixed(1)} h`;
  return `${Math.round(s / 86400)} d`;
}

export const ago = (t) => (num(t) === null ? "—" : `${duration(Date.now() / 1000 - t)} ago`);
