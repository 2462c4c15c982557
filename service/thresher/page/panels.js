// The lower panels of a model card: error directions or the confusion matrix, labels by
// source, and the recent mistakes with their top tokens.

import { ago, count, el, num } from "./dom.js";

const MISTAKE_ROWS = 10;

function matrixOf(confusion, classes) {
  if (Array.isArray(confusion)) return confusion;
  if (!confusion || typeof confusion !== "object") return null;
  for (const k of ["truth_by_predicted", "matrix", "counts"]) {
    if (Array.isArray(confusion[k])) return confusion[k];
  }
  // {truth: {predicted: n}} keyed by class name
  return classes.map((t) => classes.map((p) => num(confusion[t]?.[p]) ?? 0));
}

function bars(rows, labelText) {
  const max = Math.max(1, ...rows.map((r) => r.value));
  return el("ul", { class: "bars", "aria-label": labelText }, ...rows.map((r) =>
    el("li", { class: `bar-row ${r.cls || ""}` },
      el("span", { class: "bar-label", title: r.title || null }, r.label),
      el("span", { class: "bar-track", "aria-hidden": "true" },
        el("span", { class: "bar-fill", style: `width:${((r.value / max) * 100).toFixed(1)}%` })),
      el("span", { class: "bar-value", "data-count": r.key || null }, count(r.value)))));
}

export function paintErrors(c) {
  const q = c.report;
  const classes = (Array.isArray(c.summary.classes) ? c.summary.classes : []).map(String);
  const matrix = matrixOf(q.confusion, classes);
  if (classes.length === 2) {
    let fp = num(q.false_positives);
    let fn = num(q.false_negatives);
    if (fp === null && matrix) fp = num(matrix[0]?.[1]);
    if (fn === null && matrix) fn = num(matrix[1]?.[0]);
    const [neg, pos] = classes;
    c.errors.classList.remove("wide");
    c.errors.replaceChildren(el("h3", {}, "Wrong in which direction"), bars([
      { key: "false_positives", label: "false positives", value: fp ?? 0, cls: "fp",
        title: `predicted ${pos}, truly ${neg}` },
      { key: "false_negatives", label: "false negatives", value: fn ?? 0, cls: "fn",
        title: `predicted ${neg}, truly ${pos}` },
    ], "False positives and false negatives"),
    el("p", { class: "note" }, `positive class: ${pos ?? "—"}`));
    return;
  }
  const table = el("table", { class: "confusion" },
    el("caption", {}, "rows: true class · columns: predicted class"));
  const head = el("tr", {}, el("th", { scope: "col" }, ""),
    ...classes.map((k) => el("th", { scope: "col" }, k)));
  table.append(el("thead", {}, head));
  const body = el("tbody");
  classes.forEach((t, i) => {
    const row = el("tr", {}, el("th", { scope: "row" }, t));
    classes.forEach((_, j) => {
      const v = num(matrix?.[i]?.[j]) ?? 0;
      const cls = i === j ? "hit" : v > 0 ? "miss" : "";
      row.append(el("td", { class: cls, "data-cell": `${i},${j}` }, count(v)));
    });
    body.append(row);
  });
  table.append(body);
  c.errors.classList.toggle("wide", classes.length > 3);
  c.errors.replaceChildren(el("h3", {}, "Confusion"), el("div", { class: "scroll" }, table));
}

export function paintSources(c) {
  const src = c.report.by_source && typeof c.report.by_source === "object" ? c.report.by_source : {};
  const rows = Object.entries(src)
    .map(([k, v]) => ({ key: k, label: k, value: num(v) ?? 0 }))
    .sort((a, b) => b.value - a.value || (a.label < b.label ? -1 : 1));
  c.sources.replaceChildren(el("h3", {}, "Labels by source"),
    rows.length ? bars(rows, "Labels by source") : el("p", { class: "note" }, "no labels yet"));
}

function tokenChip(t) {
  const contribution = num(t?.contribution) ?? 0;
  const sign = contribution > 0 ? "+" : contribution < 0 ? "−" : "±";
  const title = `weight ${num(t?.weight)?.toFixed(3) ?? "—"} × value `
    + `${num(t?.value)?.toFixed(3) ?? "—"}`;
  return el("span", { class: `token ${contribution > 0 ? "up" : contribution < 0 ? "down" : ""}`,
    title },
  el("span", { class: "token-text" }, String(t?.token ?? "?")),
  el("span", { class: "token-num" }, `${sign}${Math.abs(contribution).toFixed(2)}`));
}

export function paintMistakes(c) {
  const list = Array.isArray(c.report.recent_mistakes) ? c.report.recent_mistakes : [];
  const title = el("h3", {}, "Recent mistakes");
  if (!list.length) {
    c.mistakes.replaceChildren(title, el("p", { class: "note" }, "no mistakes yet"));
    return;
  }
  const columns = ["when", "id", "true", "predicted", "margin", "source"];
  const head = el("tr", {}, ...columns.map((h) => el("th", { scope: "col" }, h)));
  const table = el("table", { class: "mistakes" }, el("thead", {}, head));
  for (const m of list.slice(0, MISTAKE_ROWS)) {
    const top = Array.isArray(m?.top) ? m.top : [];
    const cells = [
      ["when", ago(num(m?.time))],
      ["id", m?.id == null ? "—" : String(m.id)],
      ["true", String(m?.label ?? "—")],
      ["predicted", String(m?.predicted ?? "—")],
      ["margin", num(m?.margin) === null ? "—" : m.margin.toFixed(2)],
      ["source", String(m?.source ?? "—")],
    ];
    table.append(el("tbody", { class: "mistake" },
      el("tr", { class: "main" }, ...cells.map(([k, v]) =>
        el("td", { class: `col-${k}`, "data-label": k }, v))),
      el("tr", { class: "why" }, el("td", { colspan: columns.length },
        el("span", { class: "why-label" }, top.length ? "top tokens" : "no tokens recorded"),
        ...top.map(tokenChip)))));
  }
  c.mistakes.replaceChildren(title, el("div", { class: "scroll" }, table));
}
