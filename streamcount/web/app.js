// streamcount's page. Reads the JSON API of the service that served it and draws it.
//
// Rules kept here:
// - every value from the service is written as text (textContent, SVG text nodes), never as
//   HTML; item names come from the feed and display names from the catalogue file: both are
//   untrusted (the CSP also refuses inline script and Trusted Types make HTML sinks throw);
// - the token, when the service asks for one, lives in this tab's sessionStorage and is sent
//   only as an Authorization header; never a cookie, never in a URL;
// - answers are combined only when they carry the same as_of (pane close and last sequence
//   number); otherwise they are read again;
// - each refresh asks only for what changed: rules by version, alerts and history by since.

const TOKEN_KEY = "streamcount.token";
const MAX_ALERTS = 500;
const NAME_SHOWN = 60;
const NUM = new Intl.NumberFormat("en-US");

const state = {
  token: sessionStorage.getItem(TOKEN_KEY),
  paused: false,
  timer: null,
  refreshSeconds: 3,
  asOf: null,
  status: null,
  rules: [],
  rulesVersion: null,
  rulesWindow: null,
  ruleDetails: new Map(), // item_details of the rules answer: name -> {level, display_name}
  alerts: [], // oldest first, deduplicated by id
  alertSeq: null,
  selected: null, // {items: [...], rule: [ante, cons] | null}
  hist: null, // {key, points, alerts, followed, lastClose}
  sort: { key: "lift", dir: -1 },
  filter: "",
  hash: null,
  busy: false,
  gated: false, // waiting for a token: no reading until one is given
  epoch: 0, // grows when the token changes: a reading begun before is dropped
};

// ---------------------------------------------------------------------------------------------
// small DOM helpers: text only

const $ = (id) => document.getElementById(id);

function el(tag, attrs, ...children) {
  const node = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (v === null || v === undefined || v === false) continue;
    node.setAttribute(k, v === true ? "" : String(v));
  }
  for (const child of children.flat()) {
    if (child === null || child === undefined || child === false) continue;
    node.append(child instanceof Node ? child : document.createTextNode(String(child)));
  }
  return node;
}

const SVG_NS = "http://www.w3.org/2000/svg";

function svg(tag, attrs, ...children) {
  const node = document.createElementNS(SVG_NS, tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (v !== null && v !== undefined) node.setAttribute(k, String(v));
  }
  for (const child of children.flat()) {
    if (child === null || child === undefined) continue;
    node.append(child instanceof Node ? child : document.createTextNode(String(child)));
  }
  return node;
}

function clear(node) {
  while (node.firstChild) node.removeChild(node.firstChild);
  return node;
}

// ---------------------------------------------------------------------------------------------
// formatting

const int = (n) => (n === null || n === undefined ? "–" : NUM.format(n));
const pct = (v) => (v === null || v === undefined ? "∞" : (100 * v).toFixed(2) + " %");
const dec = (v) => (v === null || v === undefined ? "∞" : v.toFixed(2));
const FORMAT = { support: pct, confidence: pct, lift: dec, leverage: (v) => (v === null ? "∞" : v.toFixed(4)), conviction: dec };

const pad = (n) => String(n).padStart(2, "0");

function zoneLabel() {
  const name = Intl.DateTimeFormat().resolvedOptions().timeZone || "local time";
  const off = -new Date().getTimezoneOffset();
  const sign = off >= 0 ? "+" : "−";
  const a = Math.abs(off);
  return `${name}, UTC${sign}${pad(Math.floor(a / 60))}:${pad(a % 60)}`;
}
const ZONE = zoneLabel();

function fmtTime(ts, withDate = true) {
  if (ts === null || ts === undefined) return "–";
  const d = new Date(ts * 1000);
  const date = `${d.getFullYear()}-${pad(d.getMonth() + 1)}-${pad(d.getDate())}`;
  const time = `${pad(d.getHours())}:${pad(d.getMinutes())}:${pad(d.getSeconds())}`;
  return withDate ? `${date} ${time}` : time;
}

function fmtSeconds(s) {
  if (s === null || s === undefined) return "–";
  if (s < 1) return `${s.toFixed(2)} s`;
  if (s < 120) return `${s.toFixed(1)} s`;
  if (s < 7200) return `${(s / 60).toFixed(1)} min`;
  return `${(s / 3600).toFixed(1)} h`;
}

// control and direction-changing characters are shown as visible codes, so a name cannot
// reorder the text around it or hide part of itself
const INVISIBLE = /[\u0000-\u001f\u007f-\u009f\u061c\u200b-\u200f\u202a-\u202e\u2060-\u2069\ufeff]/g;

function visibleName(name) {
  return String(name).replace(
    INVISIBLE,
    (c) => `⟦U+${c.codePointAt(0).toString(16).toUpperCase().padStart(4, "0")}⟧`,
  );
}

function nameNode(name, cls = "item") {
  const shown = visibleName(name);
  const chars = [...shown];
  if (chars.length <= NAME_SHOWN) return el("bdi", { class: cls }, shown);
  return el(
    "span",
    {},
    el("bdi", { class: cls, title: shown.slice(0, 2000) }, chars.slice(0, NAME_SHOWN).join("") + "…"),
    el("span", { class: "item-more" }, ` (${int([...String(name)].length)} characters)`),
  );
}

// an answer's item_details (name -> {level, display_name}, only with a catalogue) as a Map: a
// name is any text, "__proto__" included, so never an object's own keys
function detailsMap(answer) {
  const out = new Map();
  const d = answer && answer.item_details;
  if (d && typeof d === "object") for (const [name, v] of Object.entries(d)) if (v && typeof v === "object") out.set(name, v);
  return out;
}

// an item: its id, then (with a catalogue) its display name and its level as a small tag;
// the display name is untrusted text like the id, shown the same way
function itemNode(name, details) {
  const d = details ? details.get(name) : undefined;
  const id = nameNode(name);
  if (!d || (!d.display_name && !d.level)) return id;
  return el(
    "span",
    { class: "item-entry" },
    id,
    d.display_name ? el("span", { class: "display-name" }, nameNode(d.display_name, "display")) : null,
    d.level ? el("span", { class: "level-tag", "data-level": String(d.level) }, visibleName(d.level)) : null,
  );
}

function namesNode(names, details) {
  const out = [];
  names.forEach((n, i) => {
    if (i) out.push(el("span", { class: "sep", "aria-label": "and" }, "+"));
    out.push(itemNode(n, details));
  });
  return out;
}

function ruleNode(ante, cons, details) {
  return el(
    "span",
    { class: "rule-text" },
    namesNode(ante, details),
    el("span", { class: "arrow", "aria-label": "then" }, "→"),
    namesNode(cons, details),
  );
}

const KIND = {
  emerged: { glyph: "▲", cls: "kind-rise", say: "emerged" },
  surged: { glyph: "◆", cls: "kind-rise", say: "surged" },
  faded: { glyph: "▽", cls: "kind-fall", say: "faded" },
};

function kindNode(kind) {
  const k = KIND[kind] || { glyph: "■", cls: "", say: String(kind) };
  return el("span", { class: `kind ${k.cls}` }, el("span", { "aria-hidden": "true" }, k.glyph + " "), k.say);
}

function evidenceLine(ev) {
  if (!ev) return "";
  const before = pct(ev.reference_rate && ev.reference_rate.value);
  const now = pct(ev.recent_rate && ev.recent_rate.value);
  const since = ev.change_seq === null || ev.change_seq === undefined ? "the change" : `order ${int(ev.change_seq)}`;
  return `bought together in ${before} of orders before, ${now} since ${since}`;
}

// ---------------------------------------------------------------------------------------------
// the API

class Refused extends Error {}

async function api(path) {
  const headers = { Accept: "application/json" };
  if (state.token) headers.Authorization = `Bearer ${state.token}`;
  const res = await fetch(path, {
    headers,
    cache: "no-store",
    credentials: "omit",
    redirect: "error",
    referrerPolicy: "no-referrer",
  });
  if (res.status === 401) throw new Refused("the service refused the token");
  if (!res.ok) {
    let message = `HTTP ${res.status}`;
    try {
      const body = await res.json();
      if (body && body.error && body.error.message) message += `: ${body.error.message}`;
    } catch (_) {
      /* not JSON */
    }
    throw new Error(message);
  }
  return res.json();
}

const q = encodeURIComponent;

function historyPath(items, since) {
  const parts = items.map((n) => `items=${q(n)}`);
  if (since !== null && since !== undefined) parts.push(`since=${since}`);
  return `/v1/history?${parts.join("&")}`;
}

const sameAsOf = (a, b) => a && b && a.pane_close === b.pane_close && a.last_seq === b.last_seq;
const itemsKey = (items) => JSON.stringify([...items].sort());

// one consistent reading: every answer of the same as_of, or null after three tries
async function readAll() {
  const sel = state.selected;
  const key = sel ? itemsKey(sel.items) : null;
  const hist = state.hist && state.hist.key === key ? state.hist : null;
  for (let attempt = 0; attempt < 3; attempt++) {
    const [status, rules, alerts, history] = await Promise.all([
      api("/v1/status"),
      api(`/v1/rules?limit=10000${state.rulesVersion ? `&since=${q(state.rulesVersion)}` : ""}`),
      api(`/v1/alerts?limit=${MAX_ALERTS}${state.alertSeq !== null ? `&since=${state.alertSeq}` : ""}`),
      sel ? api(historyPath(sel.items, hist ? hist.lastClose : null)) : Promise.resolve(null),
    ]);
    const asOf = status.as_of;
    if (sameAsOf(asOf, rules.as_of) && sameAsOf(asOf, alerts.as_of) && (!history || sameAsOf(asOf, history.as_of))) {
      return { status, rules, alerts, history, key, hist };
    }
  }
  return null;
}

// ---------------------------------------------------------------------------------------------
// refresh

function schedule() {
  clearTimeout(state.timer);
  if (!state.paused && !state.gated) state.timer = setTimeout(refresh, state.refreshSeconds * 1000);
}

function resetCursors() {
  state.rulesVersion = null;
  state.alertSeq = null;
  state.alerts = [];
  state.hist = null;
  clear($("alert-list"));
}

async function refresh() {
  if (state.busy || state.gated) return;
  state.busy = true;
  const epoch = state.epoch;
  try {
    let got = await readAll();
    if (epoch !== state.epoch) return; // the token changed meanwhile
    if (got && state.asOf && got.status.as_of.pane_close < state.asOf.pane_close) {
      // the service went back (restarted from an older state): read everything again
      resetCursors();
      got = await readAll();
      if (epoch !== state.epoch) return;
    }
    if (!got) {
      setStamp("The numbers moved while they were read; the previous reading stays until the next refresh.", true);
    } else {
      apply(got);
    }
    showBoard();
  } catch (err) {
    if (epoch !== state.epoch) return;
    if (err instanceof Refused) {
      askToken(state.token ? "The service refused this token." : "");
    } else {
      setStamp(`Cannot read the service (${err.message}); showing the last reading, trying again.`, true);
    }
  } finally {
    state.busy = false;
    if (state.gated) {
      clearTimeout(state.timer);
    } else if (state.selected && !state.hist && state.asOf && !state.paused) {
      // a new choice during this reading: read its history now rather than at the next refresh
      clearTimeout(state.timer);
      state.timer = setTimeout(refresh, 0);
    } else {
      schedule();
    }
  }
}

function apply({ status, rules, alerts, history, key, hist }) {
  state.asOf = status.as_of;
  state.status = status;
  if (status.page && status.page.refresh_seconds) state.refreshSeconds = status.page.refresh_seconds;
  // rules: a new list, or unchanged since the version we hold
  if (!rules.unchanged) {
    state.rules = rules.rules;
    state.rulesVersion = rules.version;
    state.rulesWindow = rules.window;
    state.ruleDetails = detailsMap(rules);
    renderRules();
  }
  // alerts: the new ones since the last sequence number we hold
  const known = new Set(state.alerts.map((a) => a.id));
  const fresh = alerts.alerts.filter((a) => !known.has(a.id));
  if (fresh.length) {
    state.alerts = state.alerts.concat(fresh).slice(-MAX_ALERTS);
    renderAlerts(fresh);
  }
  for (const a of alerts.alerts) state.alertSeq = Math.max(state.alertSeq ?? -1, a.seq);
  // history of the chosen itemset: points after the last pane close we hold
  if (history) {
    const base = hist ? hist : { key, points: [], alerts: [], lastClose: null };
    const first = history.first_close;
    const points = base.points.concat(history.points).filter((p) => first === null || p.pane_close >= first);
    const seen = new Set(base.alerts.map((a) => a.id));
    const marks = base.alerts.concat(history.alerts.filter((a) => !seen.has(a.id)));
    const last = points.length ? points[points.length - 1].pane_close : base.lastClose;
    state.hist = { key, points, alerts: marks, followed: history.followed, lastClose: last, details: detailsMap(history) };
  }
  if (!state.selected && state.rules.length) {
    const top = state.rules[0];
    select({ items: [...top.antecedent, ...top.consequent], rule: [top.antecedent, top.consequent] }, false);
  }
  renderStatus();
  renderTrace();
  followHash();
  setStamp(stampText());
}

function stampText() {
  const a = state.asOf;
  const st = state.status;
  let text = `as of pane close ${int(a.pane_close)} · order ${int(a.last_seq)} · read ${fmtTime(Date.now() / 1000, false)}`;
  if (st && st.overlay) text += " · includes the orders not yet in a counted batch (exact)";
  if (state.paused) text += " · paused";
  return text;
}

function setStamp(text, warn = false) {
  const stamp = clear($("stamp"));
  stamp.append(warn ? el("span", { class: "warn" }, "⚠ " + text) : text);
  stamp.dataset.paneClose = state.asOf ? state.asOf.pane_close : "";
  stamp.dataset.lastSeq = state.asOf ? state.asOf.last_seq : "";
}

// ---------------------------------------------------------------------------------------------
// the token gate

function askToken(message) {
  state.gated = true;
  state.epoch += 1;
  clearTimeout(state.timer);
  state.token = null;
  sessionStorage.removeItem(TOKEN_KEY);
  state.asOf = null;
  state.status = null;
  state.rules = [];
  resetCursors();
  clear($("rule-rows"));
  clear($("figures"));
  $("board").hidden = true;
  $("forget").hidden = true;
  $("gate").hidden = false;
  const note = $("gate-note");
  const old = note.querySelector(".gate-error");
  if (old) old.remove();
  if (message) note.prepend(el("span", { class: "gate-error" }, message + " "));
  setStamp("Waiting for the API token.");
  $("gate-token").focus();
}

function showBoard() {
  $("gate").hidden = true;
  $("board").hidden = false;
  $("forget").hidden = !state.token;
}

$("gate-form").addEventListener("submit", (ev) => {
  ev.preventDefault();
  const input = $("gate-token");
  const token = input.value.trim();
  input.value = "";
  if (!token) return;
  state.token = token;
  sessionStorage.setItem(TOKEN_KEY, token);
  state.gated = false;
  state.epoch += 1;
  refresh();
});

$("forget").addEventListener("click", () => askToken(""));

$("pause").addEventListener("click", (ev) => {
  state.paused = !state.paused;
  ev.currentTarget.setAttribute("aria-pressed", String(state.paused));
  ev.currentTarget.textContent = state.paused ? "Resume updates" : "Pause updates";
  if (state.asOf) setStamp(stampText());
  if (state.paused) clearTimeout(state.timer);
  else refresh();
});

// ---------------------------------------------------------------------------------------------
// the window

function figure(id, label, value, sub) {
  return el("div", {}, el("dt", {}, label), el("dd", { id: `fig-${id}` }, value, sub ? el("span", { class: "sub" }, sub) : null));
}

function renderStatus() {
  const st = state.status;
  const w = st.window;
  const checkpoint = !st.checkpoints ? "checkpoints off" : st.last_checkpoint_unix === null ? "none yet" : fmtTime(st.last_checkpoint_unix);
  const figs = [
    figure("transactions", "Orders in the window", int(w.transactions), `orders ${int(w.first_seq)} to ${int(w.last_seq)}`),
    figure("fill", "Window filled", `${Math.round(100 * st.fill)} %`),
    figure("rate", "Orders per second", st.orders_per_second.toFixed(1), "accepted, last 10 s"),
    figure("max-error", "Max undercount", int(w.max_error), "orders, for any count"),
    figure("lag", "Event lag", fmtSeconds(st.event_lag_seconds), st.event_lag_seconds === null ? "no event times" : "clock minus newest order"),
    figure("warm", "Warm-up", st.warm ? "done" : "filling", st.warm ? "alerts on" : "no alerts until the window is full"),
    figure("panes", "Panes", `${int(st.live_panes)} / ${int(st.window_panes)}`, "held / in a full window"),
    figure("checkpoint", "Last checkpoint", checkpoint, st.checkpoints ? ZONE : null),
    figure("seen", "Orders accepted", int(st.transactions_seen), `${int(st.buffered_transactions)} waiting for a batch`),
    figure("rules", "Active rules", int(st.active_rules)),
  ];
  clear($("figures")).append(...figs);

  const rejects = clear($("rejects"));
  const reasons = Object.entries(st.rejected || {}).filter(([, n]) => n > 0).sort();
  if (!reasons.length) rejects.append(el("li", { class: "state-ok" }, "none"));
  for (const [reason, n] of reasons) rejects.append(el("li", { "data-reason": reason }, `${reason}: ${int(n)}`));

  const sinks = clear($("sinks"));
  const entries = Object.entries(st.sinks || {});
  if (!entries.length) sinks.append(el("li", {}, "no sink configured"));
  for (const [name, s] of entries) {
    const bad = s.failed > 0 || s.dropped > 0;
    sinks.append(
      el("li", { class: bad ? "state-bad" : "state-ok", "data-sink": name }, `${name}: ${int(s.sent)} sent, ${int(s.failed)} failed, ${int(s.dropped)} dropped`),
    );
  }
  const b = st.alerts_budget;
  clear($("budget")).append(
    b
      ? `${b.false_alerts_per_million} expected false alert(s) per million orders, split over ${int(b.tests)} tests at the last pane close` +
          (b.threshold === null ? " (no test could alert)" : ` (threshold ${Number(b.threshold).toFixed(2)})`)
      : "no pane close evaluated yet",
  );
}

// ---------------------------------------------------------------------------------------------
// the rules table

const MEASURES = ["support", "confidence", "lift"];

function ruleLink(r) {
  const side = (names) => names.map(q).join(",");
  return `#rule=${side(r.antecedent)}/${side(r.consequent)}`;
}

function sortValue(r, key) {
  switch (key) {
    case "rule":
      return [...r.antecedent, "→", ...r.consequent].join(" ").toLowerCase();
    case "since":
      return r.since_seq ?? -1;
    case "change":
      return r.last_change ? r.last_change.seq : -1;
    default:
      return r.measures[key].value;
  }
}

function visibleRules() {
  const f = state.filter.trim().toLowerCase();
  // a name matches by its id or its display name
  const hit = (n) => {
    if (n.toLowerCase().includes(f)) return true;
    const d = state.ruleDetails.get(n);
    return Boolean(d && d.display_name && String(d.display_name).toLowerCase().includes(f));
  };
  const rows = state.rules.filter((r) => !f || r.antecedent.some(hit) || r.consequent.some(hit));
  const { key, dir } = state.sort;
  rows.sort((a, b) => {
    const x = sortValue(a, key);
    const y = sortValue(b, key);
    return x < y ? -dir : x > y ? dir : 0;
  });
  return rows;
}

function whisker(m, scale) {
  const w = 100;
  const x = (v) => (v === null || !(scale > 0) ? w : Math.max(0, Math.min(w, (v / scale) * w)));
  return svg(
    "svg",
    { class: "whisker", viewBox: `0 0 ${w} 10`, preserveAspectRatio: "none", "aria-hidden": "true", focusable: "false" },
    svg("line", { class: "track", x1: 0, x2: w, y1: 5, y2: 5 }),
    svg("rect", { class: "span", x: x(m.low), y: 2, width: Math.max(0.8, x(m.high) - x(m.low)), height: 6 }),
    svg("line", { class: "tick", x1: x(m.value), x2: x(m.value), y1: 0, y2: 10 }),
  );
}

function measureCell(r, name, scale) {
  const m = r.measures[name];
  const f = FORMAT[name];
  return el(
    "td",
    { "data-label": name, "data-measure": name },
    el("span", { class: "num" }, f(m.value)),
    el("span", { class: "iv" }, `[${f(m.low)} – ${f(m.high)}]`),
    whisker(m, scale),
  );
}

function changeCell(r) {
  const c = r.last_change;
  if (!c) return el("td", { "data-label": "last change", class: "change-cell" }, el("span", { class: "empty" }, "none since start"));
  return el(
    "td",
    { "data-label": "last change", class: "change-cell" },
    kindNode(c.kind),
    ` at order ${int(c.seq)}`,
    c.evidence ? el("span", { class: "evidence-line" }, evidenceLine(c.evidence)) : el("span", { class: "evidence-line" }, "record no longer held"),
    el("a", { href: `#alert=${q(c.id)}` }, "open the record"),
  );
}

function renderRules() {
  const rows = visibleRules();
  const scale = {};
  for (const name of MEASURES) {
    scale[name] = Math.max(0, ...rows.map((r) => r.measures[name].high ?? r.measures[name].value)) || 1;
  }
  const chosen = state.selected && state.selected.rule ? JSON.stringify(state.selected.rule) : null;
  const body = clear($("rule-rows"));
  for (const r of rows) {
    const isChosen = chosen === JSON.stringify([r.antecedent, r.consequent]);
    const tr = el(
      "tr",
      { class: isChosen ? "chosen" : null, "aria-current": isChosen ? "true" : null, "data-rule": JSON.stringify([r.antecedent, r.consequent]) },
      el("td", { "data-label": "rule", class: "rule-cell" }, ruleNode(r.antecedent, r.consequent, state.ruleDetails), isChosen ? el("span", { class: "chosen-tag" }, "◀ traced below") : null),
      MEASURES.map((m) => measureCell(r, m, scale[m])),
      el("td", { "data-label": "active since", class: "num" }, r.since_seq === null ? "–" : `order ${int(r.since_seq)}`),
      changeCell(r),
      el(
        "td",
        { class: "actions" },
        el("button", { type: "button", class: "trace-rule" }, "Trace"),
        el("a", { href: ruleLink(r) }, "Link"),
      ),
    );
    tr.querySelector(".trace-rule").addEventListener("click", () => {
      location.hash = ruleLink(r);
    });
    body.append(tr);
  }
  $("rule-count").textContent = `(${int(rows.length)} shown of ${int(state.rules.length)})`;
  $("rules-empty").hidden = rows.length > 0;
  const w = state.rulesWindow;
  $("rules-window").textContent = w
    ? `Measured on orders ${int(w.first_seq)} to ${int(w.last_seq)} (${int(w.transactions)} orders, undercount at most ${int(w.max_error)}); each figure with its interval.`
    : "";
  for (const th of document.querySelectorAll("#rules th[data-sort]")) {
    const on = th.dataset.sort === state.sort.key;
    th.setAttribute("aria-sort", on ? (state.sort.dir > 0 ? "ascending" : "descending") : "none");
  }
}

for (const th of document.querySelectorAll("#rules th[data-sort]")) {
  th.querySelector("button").addEventListener("click", () => {
    const key = th.dataset.sort;
    if (state.sort.key === key) state.sort.dir = -state.sort.dir;
    else state.sort = { key, dir: key === "rule" ? 1 : -1 };
    renderRules();
  });
}

$("filter").addEventListener("input", (ev) => {
  state.filter = ev.target.value;
  renderRules();
});

// CSV of the visible rows (RFC 4180 quoting; a cell that a spreadsheet would read as a formula
// is prefixed with an apostrophe)
function csvCell(v) {
  let s = v === null || v === undefined ? "" : String(v);
  if (typeof v === "string" && /^[=+\-@\t\r]/.test(s)) s = "'" + s;
  return /[",\r\n]/.test(s) ? `"${s.replace(/"/g, '""')}"` : s;
}

function exportCsv() {
  const head = ["antecedent", "consequent"];
  for (const m of MEASURES) head.push(m, `${m}_low`, `${m}_high`);
  head.push("active_since_seq", "last_change_kind", "last_change_seq", "last_change_id", "pane_close", "last_seq");
  const lines = [head.join(",")];
  for (const r of visibleRules()) {
    const row = [r.antecedent.join(" + "), r.consequent.join(" + ")];
    for (const m of MEASURES) row.push(r.measures[m].value, r.measures[m].low, r.measures[m].high);
    const c = r.last_change;
    row.push(r.since_seq, c ? c.kind : null, c ? c.seq : null, c ? c.id : null, state.asOf.pane_close, state.asOf.last_seq);
    lines.push(row.map(csvCell).join(","));
  }
  const blob = new Blob([lines.join("\r\n") + "\r\n"], { type: "text/csv;charset=utf-8" });
  const url = URL.createObjectURL(blob);
  const a = el("a", { href: url, download: `streamcount-rules-close-${state.asOf.pane_close}.csv` });
  document.body.append(a);
  a.click();
  a.remove();
  setTimeout(() => URL.revokeObjectURL(url), 10000);
}

$("export").addEventListener("click", exportCsv);

// ---------------------------------------------------------------------------------------------
// the alert stream

function pair(label, value) {
  return [el("dt", {}, label), el("dd", {}, value)];
}

function measureText(m, f) {
  return m ? `${f(m.value)} [${f(m.low)} – ${f(m.high)}]` : "–";
}

// the record's items with what the catalogue says of each (only with a catalogue)
function catalogueList(items, details) {
  const known = items.filter((n) => details.has(n));
  if (!known.length) return null;
  return el(
    "ul",
    { class: "item-details" },
    known.map((n) => {
      const d = details.get(n);
      return el(
        "li",
        { "data-item": n },
        nameNode(n),
        " — ",
        d.display_name ? nameNode(d.display_name, "display") : el("span", { class: "empty" }, "no display name"),
        " ",
        d.level ? el("span", { class: "level-tag", "data-level": String(d.level) }, visibleName(d.level)) : el("span", { class: "empty" }, "no level"),
      );
    }),
  );
}

function alertItem(a) {
  const ev = a.evidence || {};
  const described = detailsMap(a);
  const head = a.antecedent ? ruleNode(a.antecedent, a.consequent, described) : el("span", {}, namesNode(a.items, described));
  const fields = [
    ...pair("id", a.id),
    ...pair("kind", [kindNode(a.kind), a.also && a.also.length ? ` (also ${a.also.join(", ")})` : ""]),
    ...pair("raised at", `order ${int(a.seq)}, pane ${int(a.pane)}, ${fmtTime(a.event_time)} (${ZONE})`),
    ...pair("rate before", measureText(ev.reference_rate, pct)),
    ...pair("rate since", `${measureText(ev.recent_rate, pct)} over ${int(ev.recent_transactions)} orders`),
    ...pair("change began", `pane ${int(ev.change_pane)}, order ${int(ev.change_seq)}, ${fmtTime(ev.change_time)}`),
    ...pair("test", `CUSUM ${Number(ev.statistic).toFixed(2)} reached ${Number(ev.threshold).toFixed(2)} (alternative ×${ev.ratio}, direction ${ev.direction})`),
    ...pair("budget", `${ev.budget_per_million} per million orders over ${int(ev.tests)} tests (level ${Number(ev.level).toExponential(2)})`),
  ];
  const catalogue = catalogueList(a.items || [], described);
  if (catalogue) fields.push(...pair("catalogue", catalogue));
  for (const [name, m] of Object.entries(a.measures || {})) fields.push(...pair(name, measureText(m, FORMAT[name] || dec)));
  const p = a.p_value;
  fields.push(...pair("p-value", p === null ? "–" : p === 0 ? "below 1e-300" : Number(p).toExponential(2)));
  const w = a.window || {};
  fields.push(...pair("window", `orders ${int(w.first_seq)} to ${int(w.last_seq)} (${int(w.transactions)}), undercount ≤ ${int(w.max_error)}`));
  const t = a.thresholds || {};
  fields.push(
    ...pair(
      "thresholds",
      `support ≥ ${pct(t.min_support)}, confidence ≥ ${pct(t.min_confidence)}, lift ≥ ${t.min_lift}, count ≥ ${int(t.min_count)}`,
    ),
  );
  const details = el(
    "details",
    { id: `alert-${a.id}`, "data-kind": a.kind, "data-seq": a.seq },
    el(
      "summary",
      {},
      kindNode(a.kind),
      " ",
      head,
      el("span", { class: "when" }, `order ${int(a.seq)} · ${fmtTime(a.event_time)}`),
      el("span", { class: "evidence-line" }, evidenceLine(ev)),
    ),
    el(
      "div",
      { class: "record" },
      el("dl", {}, fields),
      el(
        "p",
        { class: "actions" },
        el("button", { type: "button", class: "trace-alert" }, "Trace this itemset"),
        el("a", { href: `#alert=${q(a.id)}` }, "Link to this change"),
      ),
      el("details", {}, el("summary", {}, "The full record (JSON)"), el("pre", {}, JSON.stringify(a, null, 2))),
    ),
  );
  details.querySelector(".trace-alert").addEventListener("click", () => {
    location.hash = a.antecedent ? ruleLink(a) : `#items=${a.items.map(q).join(",")}`;
  });
  return el("li", {}, details);
}

function renderAlerts(fresh) {
  const list = $("alert-list");
  // newest first: new records go on top, oldest ones beyond the cap go
  const ordered = [...fresh].sort((x, y) => x.seq - y.seq);
  for (const a of ordered) list.prepend(alertItem(a));
  while (list.children.length > MAX_ALERTS) list.lastElementChild.remove();
  $("alert-empty").hidden = list.children.length > 0;
  $("alert-count").textContent = `(${int(list.children.length)} held)`;
  if (!state.selected && state.alerts.length) {
    const last = state.alerts[state.alerts.length - 1];
    select({ items: last.items, rule: last.antecedent ? [last.antecedent, last.consequent] : null }, false);
  }
}

// ---------------------------------------------------------------------------------------------
// the trace (chart)

function select(sel, now = true) {
  const key = itemsKey(sel.items);
  const same = state.selected && itemsKey(state.selected.items) === key;
  state.selected = sel;
  if (!same) state.hist = null;
  renderRules();
  renderTrace();
  if (now && !same && !state.busy) refresh();
}

function renderTrace() {
  const box = clear($("chart"));
  const title = clear($("trace-title"));
  const caption = clear($("chart-caption"));
  const table = clear($("points-table"));
  const sel = state.selected;
  if (!sel) {
    title.append("Choose a rule or a change to trace its support over the pane closes in memory.");
    return;
  }
  const hist = state.hist && state.hist.key === itemsKey(sel.items) ? state.hist : null;
  const details = hist && hist.details ? hist.details : state.ruleDetails;
  title.append("Support of ", el("span", {}, namesNode([...sel.items].sort(), details)), " bought together, at each pane close");
  const points = hist ? hist.points : [];
  box.append(drawChart(points, hist ? hist.alerts : [], state.status ? state.status.min_support : null));
  const follow = hist && hist.followed ? "followed: a point is added at every pane close" : "not followed now (no active rule, no recent change): no new points";
  caption.append(
    `${int(points.length)} pane closes in memory · band: the support interval · `,
    el("span", { "aria-hidden": "true" }, "▲ ◆ ▽ "),
    `marks: changes · dashed: the rule floor (min_support) · axis: event time (${ZONE}) and order number · ${follow}`,
  );
  table.append(
    el("thead", {}, el("tr", {}, ["pane close", "order", "event time", "orders", "support", "low", "high"].map((h) => el("th", { scope: "col" }, h)))),
    el(
      "tbody",
      {},
      points.map((p) =>
        el("tr", {}, [int(p.pane_close), int(p.last_seq), fmtTime(p.event_time), int(p.transactions), pct(p.support.value), pct(p.support.low), pct(p.support.high)].map((v) => el("td", {}, v))),
      ),
    ),
  );
}

function drawChart(points, marks, floor) {
  // drawn at the width it is shown at, so its text stays legible on a phone
  const W = Math.max(300, Math.min(960, $("chart").clientWidth || 720));
  const H = W < 500 ? 240 : 280;
  const L = 58;
  const R = 14;
  const T = 34;
  const B = 56;
  const root = svg("svg", { viewBox: `0 0 ${W} ${H}`, role: "img", "aria-label": `support over ${points.length} pane closes`, id: "chart-svg" });
  if (!points.length) {
    root.append(svg("text", { x: W / 2, y: H / 2, "text-anchor": "middle", class: "empty-note" }, "No history for this itemset yet: it gets a point at each pane close while it is an active rule or recently changed."));
    return root;
  }
  const c0 = points[0].pane_close;
  const c1 = points[points.length - 1].pane_close;
  const x = (c) => L + (c1 === c0 ? (W - L - R) / 2 : ((c - c0) / (c1 - c0)) * (W - L - R));
  let top = Math.max(...points.map((p) => p.support.high));
  if (floor) top = Math.max(top, floor);
  top = top > 0 ? top * 1.12 : 0.01;
  const y = (v) => T + (1 - v / top) * (H - T - B);

  // grid and y labels
  for (let i = 0; i <= 4; i++) {
    const v = (top * i) / 4;
    root.append(svg("line", { class: "grid", x1: L, x2: W - R, y1: y(v), y2: y(v) }));
    root.append(svg("text", { x: L - 6, y: y(v) + 4, "text-anchor": "end" }, pct(v)));
  }
  root.append(svg("line", { class: "axis", x1: L, x2: L, y1: T, y2: H - B }));
  root.append(svg("line", { class: "axis", x1: L, x2: W - R, y1: H - B, y2: H - B }));
  if (floor) {
    root.append(svg("line", { class: "floor", x1: L, x2: W - R, y1: y(floor), y2: y(floor) }));
    root.append(svg("text", { x: L + 4, y: y(floor) - 4, class: "floor-label" }, `rule floor ${pct(floor)}`));
  }
  // band, line, one point per pane close
  const upper = points.map((p) => `${x(p.pane_close).toFixed(1)},${y(p.support.high).toFixed(1)}`);
  const lower = points.map((p) => `${x(p.pane_close).toFixed(1)},${y(p.support.low).toFixed(1)}`).reverse();
  root.append(svg("polygon", { class: "band", points: upper.concat(lower).join(" ") }));
  root.append(svg("polyline", { class: "line", points: points.map((p) => `${x(p.pane_close).toFixed(1)},${y(p.support.value).toFixed(1)}`).join(" ") }));
  const r = points.length > 120 ? 1.6 : 3;
  for (const p of points) {
    root.append(
      svg(
        "circle",
        { class: "pt", cx: x(p.pane_close).toFixed(1), cy: y(p.support.value).toFixed(1), r, "data-close": p.pane_close, "data-seq": p.last_seq },
        svg("title", {}, `pane close ${int(p.pane_close)} · order ${int(p.last_seq)} · ${fmtTime(p.event_time)} · support ${pct(p.support.value)} [${pct(p.support.low)} – ${pct(p.support.high)}]`),
      ),
    );
  }
  // x ticks: event time above the order number
  const ticks = Math.min(points.length, W < 500 ? 3 : 6);
  for (let i = 0; i < ticks; i++) {
    const p = points[Math.round((i * (points.length - 1)) / Math.max(1, ticks - 1))];
    const px = x(p.pane_close);
    const anchor = ticks > 1 && i === 0 ? "start" : ticks > 1 && i === ticks - 1 ? "end" : "middle";
    root.append(svg("line", { class: "axis", x1: px, x2: px, y1: H - B, y2: H - B + 4 }));
    root.append(svg("text", { x: px, y: H - B + 16, "text-anchor": anchor }, p.event_time === null ? "–" : fmtTime(p.event_time, false)));
    root.append(svg("text", { x: px, y: H - B + 29, "text-anchor": anchor, class: "tick-seq" }, `#${int(p.last_seq)}`));
  }
  root.append(svg("text", { x: (L + W - R) / 2, y: H - 6, "text-anchor": "middle" }, `event time (${ZONE}) · order number`));
  // change marks at the pane close that raised them
  const bySeq = new Map(points.map((p) => [p.last_seq, p]));
  for (const m of marks) {
    const p = bySeq.get(m.seq);
    if (!p) continue;
    const px = x(p.pane_close);
    const rise = m.kind !== "faded";
    root.append(svg("line", { class: rise ? "mark-line-rise" : "mark-line-fall", x1: px, x2: px, y1: T - 8, y2: H - B }));
    const shape =
      m.kind === "faded"
        ? `M${px - 6},${T - 20} L${px + 6},${T - 20} L${px},${T - 9} Z`
        : m.kind === "surged"
          ? `M${px},${T - 22} L${px + 6},${T - 15} L${px},${T - 8} L${px - 6},${T - 15} Z`
          : `M${px},${T - 21} L${px + 6},${T - 9} L${px - 6},${T - 9} Z`;
    root.append(svg("path", { d: shape, class: rise ? "mark-rise" : "mark-fall", "data-kind": m.kind }, svg("title", {}, `${m.kind} at order ${int(m.seq)}`)));
    root.append(svg("text", { x: px + 8, y: T - 11 }, m.kind));
  }
  return root;
}

// ---------------------------------------------------------------------------------------------
// deep links (the fragment: never a token)

function parseHash() {
  const h = location.hash.slice(1);
  const eq = h.indexOf("=");
  if (eq < 0) return null;
  const kind = h.slice(0, eq);
  const value = h.slice(eq + 1);
  const names = (s) => (s ? s.split(",").map(decodeURIComponent) : []);
  try {
    if (kind === "rule") {
      const [a, c] = value.split("/");
      return { kind, ante: names(a), cons: names(c) };
    }
    if (kind === "items") return { kind, items: names(value) };
    if (kind === "alert") return { kind, id: decodeURIComponent(value) };
  } catch (_) {
    return null;
  }
  return null;
}

function followHash(force = false) {
  if (!force && state.hash === location.hash) return;
  const link = parseHash();
  if (!link || !state.asOf) return;
  state.hash = location.hash;
  if (link.kind === "rule") {
    select({ items: [...link.ante, ...link.cons], rule: [link.ante, link.cons] });
    const row = document.querySelector("#rule-rows tr.chosen");
    if (row) row.scrollIntoView({ block: "nearest" });
    else $("trace").scrollIntoView({ block: "nearest" });
  } else if (link.kind === "items") {
    select({ items: link.items, rule: null });
    $("trace").scrollIntoView({ block: "nearest" });
  } else if (link.kind === "alert") {
    const node = document.getElementById(`alert-${link.id}`);
    if (!node) {
      state.hash = null; // not loaded yet (or no longer held): try again after the next reading
      return;
    }
    for (const d of document.querySelectorAll(".changes details.target")) d.classList.remove("target");
    node.open = true;
    node.classList.add("target");
    node.scrollIntoView({ block: "nearest" });
    node.querySelector("summary").focus();
  }
}

window.addEventListener("hashchange", () => followHash(true));

let resizing = null;
window.addEventListener("resize", () => {
  clearTimeout(resizing);
  resizing = setTimeout(() => {
    if (state.asOf) renderTrace();
  }, 200);
});

refresh();
