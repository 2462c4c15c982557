// The built-in dashboard: one card per model, fed by the server-sent `quality` stream, or by
// polling the JSON API when the stream is unavailable or a bearer token is needed (EventSource
// cannot send headers). Data only ever reaches the document through textContent/attributes.

import { drawRateChart } from "./chart.js";
import { count, duration, el, num, pct } from "./dom.js";
import { paintErrors, paintMistakes, paintSources } from "./panels.js";

const TOKEN_KEY = "thresher.token";
const POLL_MS = 2000;
const LIST_MS = 15000; // in stream mode, refresh the model list now and then to drop deleted ones
const STREAM_RETRY_MS = 60000;
const STALE_S = 4;
const RATE_WINDOW_S = 10;
const SERIES = [
  { key: "last_1000", label: "last 1,000" },
  { key: "decayed", label: "decayed" },
];

const state = {
  token: sessionStorage.getItem(TOKEN_KEY),
  mode: "starting",
  cards: new Map(),
  lastData: 0,
  detail: "",
  stream: null,
  timers: [],
  generation: 0,
};

class NeedsToken extends Error {}

// -- fetching --------------------------------------------------------------------------------

async function api(path) {
  const headers = { Accept: "application/json" };
  if (state.token) headers.Authorization = `Bearer ${state.token}`;
  const resp = await fetch(path, { headers, cache: "no-store" });
  if (resp.status === 401) throw new NeedsToken("the server needs a bearer token");
  if (!resp.ok) {
    let detail = `${resp.status}`;
    try {
      detail = (await resp.json()).detail || detail;
    } catch (_) { /* not problem details */ }
    throw new Error(detail);
  }
  return resp.json();
}

function later(fn, ms) {
  const gen = state.generation;
  state.timers.push(setTimeout(() => { if (gen === state.generation) fn(); }, ms));
}

function stopAll() {
  state.generation += 1;
  for (const t of state.timers) clearTimeout(t);
  state.timers = [];
  if (state.stream) state.stream.close();
  state.stream = null;
}

async function start() {
  stopAll();
  setMode("connecting");
  let list;
  try {
    list = await api("api/models");
  } catch (err) {
    if (err instanceof NeedsToken) return askForToken(state.token ? "that token was refused" : "");
    setMode("offline", String(err.message || err));
    later(start, POLL_MS);
    return;
  }
  hideTokenForm();
  syncModels(list.models || []);
  if (!state.token && "EventSource" in window) openStream();
  else startPolling();
}

function openStream() {
  const gen = state.generation;
  const es = new EventSource("api/events");
  state.stream = es;
  es.addEventListener("open", () => setMode("stream"));
  es.addEventListener("quality", (ev) => {
    let data;
    try {
      data = JSON.parse(ev.data);
    } catch (_) {
      return;
    }
    const summary = data.summary || {};
    const name = data.model || summary.name;
    if (typeof name === "string") apply(name, data, summary, data.snapshot ?? null);
  });
  es.addEventListener("error", () => {
    if (gen !== state.generation) return;
    es.close();
    state.stream = null;
    startPolling();
    later(() => { stopAll(); start(); }, STREAM_RETRY_MS);
  });
  const refresh = async () => {
    try {
      syncModels((await api("api/models")).models || []);
    } catch (_) { /* the stream's own error handler takes over */ }
    later(refresh, LIST_MS);
  };
  later(refresh, LIST_MS);
}

function startPolling() {
  setMode("polling");
  const poll = async () => {
    try {
      const list = (await api("api/models")).models || [];
      syncModels(list);
      await Promise.all(list.map(async (summary) => {
        const m = encodeURIComponent(summary.name);
        const [quality, model] = await Promise.all([
          api(`api/models/${m}/quality`), api(`api/models/${m}`),
        ]);
        apply(summary.name, quality, model, model.snapshot ?? null);
      }));
      if (state.mode !== "polling") setMode("polling");
    } catch (err) {
      if (err instanceof NeedsToken) {
        stopAll();
        askForToken("the token was refused");
        return;
      }
      setMode("offline", String(err.message || err));
    }
    later(poll, POLL_MS);
  };
  poll();
}

// -- status and token ------------------------------------------------------------------------

function setMode(mode, detail) {
  state.mode = mode;
  state.detail = detail || "";
  paintStatus();
}

function paintStatus() {
  let detail = state.detail;
  const box = document.getElementById("status");
  const age = state.lastData ? Date.now() / 1000 - state.lastData : null;
  let look = "wait";
  let words = state.mode;
  if (state.mode === "stream" || state.mode === "polling") {
    const fresh = age !== null && age < STALE_S;
    look = fresh ? "live" : "stale";
    words = fresh ? "live" : "stale";
    detail = `${state.mode === "stream" ? "stream" : "polling every 2 s"}`
      + (age === null ? "" : ` · updated ${duration(age)} ago`);
  } else if (state.mode === "offline") {
    look = "down";
    words = "unreachable";
  } else if (state.mode === "token") {
    look = "down";
    words = "token needed";
  }
  box.dataset.look = look;
  document.getElementById("status-text").textContent = words;
  document.getElementById("status-detail").textContent = detail;
}

function askForToken(message) {
  setMode("token");
  const form = document.getElementById("token-form");
  form.hidden = false;
  document.getElementById("token-error").textContent = message || "";
  document.getElementById("token-input").focus();
}

function hideTokenForm() {
  document.getElementById("token-form").hidden = true;
  document.getElementById("forget-token").hidden = !state.token;
}

function setupToken() {
  document.getElementById("token-form").addEventListener("submit", (ev) => {
    ev.preventDefault();
    const input = document.getElementById("token-input");
    const value = input.value.trim();
    if (!value) return;
    state.token = value;
    sessionStorage.setItem(TOKEN_KEY, value);
    input.value = "";
    start();
  });
  document.getElementById("forget-token").addEventListener("click", () => {
    sessionStorage.removeItem(TOKEN_KEY);
    state.token = null;
    start();
  });
}

// -- cards -----------------------------------------------------------------------------------

const FIGURE_GROUPS = [
  ["Mistake rate", [
    ["last_1000", "last 1,000"],
    ["last_10000", "last 10,000"],
    ["decayed", "decayed"],
    ["all", "all labels"],
    ["served", "as served"],
  ]],
  ["Volume and state", [
    ["labelled", "labelled"],
    ["rate", "labels / s"],
    ["snapshot", "snapshot age"],
    ["hash_load", "hash load"],
  ]],
];

function syncModels(summaries) {
  const names = new Set();
  for (const s of summaries) {
    if (!s || typeof s.name !== "string") continue;
    names.add(s.name);
    card(s.name).summary = s;
    paintHead(card(s.name));
  }
  for (const [name, c] of state.cards) {
    if (!names.has(name)) {
      c.root.remove();
      state.cards.delete(name);
    }
  }
  document.getElementById("empty").hidden = state.cards.size > 0;
}

function card(name) {
  let c = state.cards.get(name);
  if (c) return c;
  const part = (key, tag = "div", cls = key) => el(tag, { class: cls, "data-part": key });
  const slug = `m-${state.cards.size}-${name.replace(/[^A-Za-z0-9_-]/g, "_")}`;
  c = {
    name, summary: {}, report: null, snapshot: null, samples: [], chartData: null, chartWidth: 0,
    title: el("h2", { id: `${slug}-title` }, name),
    meta: part("meta", "p"),
    figures: part("figures", "div"),
    legend: part("legend", "ul"),
    chartBox: part("chart", "div", "chart-box"),
    svg: document.createElementNS("http://www.w3.org/2000/svg", "svg"),
    drift: part("drift", "p"),
    errors: part("errors", "section", "panel"),
    sources: part("sources", "section", "panel"),
    mistakes: part("mistakes", "section", "panel wide"),
  };
  c.svg.setAttribute("role", "img");
  c.svg.setAttribute("class", "rate-chart");
  c.chartBox.append(c.svg);
  c.legend.append(...SERIES.map((s) => el("li", { class: `key key-${s.key}` }, s.label)),
    el("li", { class: "key key-alarm" }, "drift alarm"));
  c.root = el("article", { class: "card", "data-model": name, "aria-labelledby": `${slug}-title` },
    el("header", { class: "card-head" }, c.title, c.meta),
    c.figures,
    el("section", { class: "chart-section", "aria-label": "Mistake-rate history" },
      el("div", { class: "chart-top" }, el("h3", {}, "Mistake rate by labels seen"), c.legend),
      c.chartBox, c.drift),
    el("div", { class: "panels" }, c.errors, c.sources, c.mistakes));
  c.figureCells = new Map();
  for (const [group, items] of FIGURE_GROUPS) {
    const list = el("dl", { class: "figure-list" });
    for (const [key, label] of items) {
      const dd = el("dd", { "data-figure": key }, "—");
      const sub = el("span", { class: "sub" });
      list.append(el("div", { class: `figure fig-${key}` }, el("dt", {}, label), dd, sub));
      c.figureCells.set(key, { dd, sub });
    }
    c.figures.append(el("section", { class: "figure-group", "aria-label": group },
      el("h3", {}, group), list));
  }
  // Only a change of width redraws: the chart's own height must not feed back into it.
  new ResizeObserver(() => {
    if (Math.round(c.chartBox.clientWidth) !== c.chartWidth) paintChart(c);
  }).observe(c.chartBox);
  const holder = document.getElementById("models");
  const after = [...state.cards.keys()].sort().find((n) => n > name);
  holder.insertBefore(c.root, after ? state.cards.get(after).root : null);
  state.cards.set(name, c);
  document.getElementById("empty").hidden = true;
  return c;
}

function figure(c, key, value, sub) {
  const cell = c.figureCells.get(key);
  cell.dd.textContent = value;
  cell.sub.textContent = sub || "";
}

function paintHead(c) {
  const s = c.summary || {};
  const classes = Array.isArray(s.classes) ? s.classes : [];
  const chips = classes.map((k) => el("span", { class: "chip" }, String(k)));
  const bits = num(s.bits);
  c.meta.replaceChildren(
    el("span", { class: "meta-item" }, el("span", { class: "meta-label" }, "classes "), ...chips),
    el("span", { class: "meta-item" }, el("span", { class: "meta-label" }, "rule "),
      String(s.rule ?? "—")),
    el("span", { class: "meta-item" }, el("span", { class: "meta-label" }, "bits "),
      bits === null ? "—" : String(bits)));
  const load = num(s.hash_load);
  figure(c, "hash_load", load === null ? "—" : pct(load),
    bits === null ? "" : `of 2^${bits} slots, ${count(s.nonzero)} used`);
}

function apply(name, report, summary, snapshot) {
  const c = card(name);
  if (summary && Object.keys(summary).length) {
    c.summary = summary;
    paintHead(c);
  }
  c.report = report || {};
  c.snapshot = snapshot;
  state.lastData = Date.now() / 1000;
  paintStatus();
  paintFigures(c);
  c.chartData = chartData(c.report);
  paintChart(c);
  paintDrift(c);
  paintErrors(c);
  paintSources(c);
  paintMistakes(c);
}

function labelRate(c, labelled) {
  const now = Date.now() / 1000;
  const s = c.samples;
  if (s.length && labelled < s[s.length - 1].labelled) s.length = 0; // rebuilt or restored
  s.push({ labelled, t: now });
  while (s.length > 2 && now - s[1].t > RATE_WINDOW_S) s.shift();
  const first = s[0];
  const span = now - first.t;
  return span >= 0.9 ? (labelled - first.labelled) / span : null;
}

function servedRate(served) {
  if (!served || typeof served !== "object") return [null, null];
  const n = num(served.labelled);
  let r = served.mistake_rate;
  if (r && typeof r === "object") r = r.all;
  if (num(r) === null && n && num(served.mistakes) !== null) r = served.mistakes / n;
  return [num(r), n];
}

function paintFigures(c) {
  const q = c.report;
  const rates = q.mistake_rate || {};
  const labelled = num(q.labelled) ?? num(c.summary.labelled) ?? 0;
  figure(c, "labelled", count(labelled), `${count(q.mistakes ?? c.summary.mistakes)} mistakes`);
  const r = labelRate(c, labelled);
  figure(c, "rate", r === null ? "—" : r.toFixed(r < 10 ? 1 : 0), "10 s window");
  figure(c, "last_1000", pct(rates.last_1000));
  figure(c, "last_10000", pct(rates.last_10000));
  figure(c, "decayed", pct(rates.decayed));
  figure(c, "all", pct(rates.all));
  const [sr, sn] = servedRate(q.served);
  figure(c, "served", pct(sr), sn === null ? "" : `of ${count(sn)} served`);
  paintSnapshotAge(c);
}

function paintSnapshotAge(c) {
  const snap = c.snapshot;
  if (!snap || num(snap.time) === null) {
    figure(c, "snapshot", "none", "not written yet");
    return;
  }
  figure(c, "snapshot", duration(Date.now() / 1000 - snap.time),
    `gen ${count(snap.generation)} · offset ${count(snap.offset)}`);
}

function chartData(q) {
  const history = Array.isArray(q.history) ? q.history : [];
  const points = [];
  for (const h of history) {
    if (!h || num(h.labelled) === null) continue;
    points.push({ x: h.labelled, last_1000: num(h.last_1000), decayed: num(h.decayed) });
  }
  const rates = q.mistake_rate || {};
  const labelled = num(q.labelled);
  // The history is sampled; end the line at the counts as they are now.
  if (labelled !== null && labelled > 0
      && (!points.length || points[points.length - 1].x < labelled)) {
    points.push({ x: labelled, last_1000: num(rates.last_1000), decayed: num(rates.decayed) });
  }
  const drift = q.drift || {};
  const alarms = (Array.isArray(drift.alarm_at) ? drift.alarm_at : []).filter((a) => num(a) !== null);
  return { points, alarms };
}

function paintChart(c) {
  if (!c.chartData) return;
  const width = Math.round(c.chartBox.clientWidth);
  if (width <= 0) return;
  c.chartWidth = width;
  const height = width < 480 ? 170 : 210;
  const label = drawRateChart(c.svg, { ...c.chartData, series: SERIES, width, height });
  c.svg.setAttribute("aria-label", label);
}

function paintDrift(c) {
  const d = c.report.drift || {};
  const alarms = num(d.alarms) ?? 0;
  const stat = num(d.statistic);
  const limit = num(d.threshold);
  c.drift.replaceChildren(
    el("span", { class: "drift-stat" }, "drift statistic ",
      el("b", {}, stat === null ? "—" : stat.toFixed(2)), " of threshold ",
      el("b", {}, limit === null ? "—" : limit.toFixed(2))),
    el("span", { class: alarms ? "drift-alarms raised" : "drift-alarms" },
      `${count(alarms)} alarm${alarms === 1 ? "" : "s"}`));
}

// -- start -----------------------------------------------------------------------------------

function tick() {
  paintStatus();
  for (const c of state.cards.values()) paintSnapshotAge(c);
}

setupToken();
setInterval(tick, 1000);
start();
