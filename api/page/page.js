// The operators' page: draws itself from GET /v1/overview every two
// seconds and acts through the service's own endpoints. Everything shown
// that comes from the stream (keys, reasons) goes in as text, never as
// markup.
"use strict";

const SVG = "http://www.w3.org/2000/svg";
// Okabe & Ito's palette (2008), told apart by readers with any common
// colour-vision deficiency; each series also has its own dash pattern.
const COLOURS = ["#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#000000", "#F0E442"];
const DASHES = ["", "7 3", "2 3", "9 3 2 3", "1 3", "12 4", "4 4", "14 2"];
const HOUR = 3600e3, DAY = 24 * HOUR;

let overview = null;
let versions = "";

const $ = (id) => document.getElementById(id);

function el(tag, attrs, ...children) {
  const e = tag.startsWith("svg:") ? document.createElementNS(SVG, tag.slice(4)) : document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (v !== undefined && v !== null) e.setAttribute(k, v);
  }
  for (const c of children) e.append(c);
  return e;
}

function num(v, digits = 4) {
  return v === null || v === undefined ? "–" : Number(v).toPrecision(digits).replace(/\.?0+$/, "");
}

function when(t) {
  return t ? t.replace(/:00Z$/, "Z").replace("T", " ") : "–";
}

function token() {
  return $("r-token").value.trim();
}

function headers(json) {
  const h = {};
  if (json) h["Content-Type"] = "application/json";
  if (token()) h["Authorization"] = "Bearer " + token();
  return h;
}

// refresh reads the overview every two seconds.
async function refresh() {
  await refresh1();
  setTimeout(refresh, 2000);
}

async function message(r) {
  try {
    const b = await r.json();
    return b.message || JSON.stringify(b);
  } catch {
    return r.statusText;
  }
}

function streamLine(text, bad) {
  const p = $("stream");
  p.replaceChildren(el("span", { class: bad ? "bad" : "ok" }, text));
}

function render() {
  const o = overview;
  const s = o.status;
  const p = $("stream");
  const state = s.ready ? el("span", { class: "ok" }, "ready") : el("span", { class: "bad" }, s.message || "not ready");
  const pos = (s.positions || []).map((q) => `${q.partition}:${q.offset}`).join(" ");
  p.replaceChildren(state, ` · ${s.source} · at ${pos || "–"} · lag ${s.lag} · ${s.events} applied · ${s.rejected} refused · ` +
    `${s.skipped} skipped · ${s.keys} keys · events up to ${s.event_times ? when(s.event_times.last) : "–"}` + (s.instance ? ` · instance ${s.instance}` : ""));
  $("caution").textContent = o.caution;
  const empty = s.events === 0 && s.rejected === 0;
  $("empty").hidden = !empty;
  $("race").hidden = empty;
  $("r-token-label").hidden = !o.settings.token_required;
  $("r-partition-label").hidden = !o.settings.group;
  renderChart(o);
  renderLearners(o.learners, o.served);
  renderServed(o.served);
  $("leader").hidden = !o.leader;
  if (o.leader) {
    $("leader").textContent = `Per-key leader (the learner of lowest recent error on each key, switched when another is ${Math.round(100 * o.leader.margin)} % better): ` +
      `recent rmse ${num(o.leader.recent.rmse)}, rmse ${num(o.leader.rmse)}, ${o.leader.switches} switches. Ask predict for "learner":"leader".`;
  }
  if (o.learners.length) {
    $("interval-hint").textContent = `How often each method's interval held the target (nominal ${pct(o.learners[0].conformal.level)}), ` +
      `and how wide it was on average${o.settings.units ? " (" + o.settings.units + ")" : ""}; predict quotes the ${o.settings.interval} one. ` +
      "The conformal interval adapts to the misses it sees; the normal one assumes steady, normal errors.";
  }
  renderNotes(o);
  renderCheckpoints(o.checkpoints);
  renderVersions(o.checkpoints);
}

// colourOf keeps a learner's colour and dash by its place in the
// configuration, not in the (changing) ranking.
function styleOf(o, name) {
  const names = o.learners.map((l) => l.name).slice().sort();
  const i = names.indexOf(name);
  return { colour: COLOURS[i % COLOURS.length], dash: DASHES[i % DASHES.length] };
}

function timeTicks(lo, hi) {
  const steps = [HOUR, 2 * HOUR, 3 * HOUR, 6 * HOUR, 12 * HOUR, DAY, 2 * DAY, 7 * DAY, 14 * DAY, 28 * DAY];
  const step = steps.find((s) => (hi - lo) / s <= 8) || steps[steps.length - 1];
  const out = [];
  for (let t = Math.ceil(lo / step) * step; t <= hi; t += step) out.push(t);
  return { ticks: out, step };
}

function tickLabel(t, step) {
  const d = new Date(t);
  const month = d.toLocaleString("en", { month: "short", timeZone: "UTC" });
  const day = `${month} ${d.getUTCDate()}`;
  const hm = d.toISOString().slice(11, 16);
  if (step >= DAY) return day;
  return hm === "00:00" ? day : hm;
}

function niceMax(v) {
  if (!(v > 0)) return 1;
  const p = Math.pow(10, Math.floor(Math.log10(v)));
  for (const m of [1, 2, 2.5, 5, 10]) if (m * p >= v) return m * p;
  return 10 * p;
}

function renderChart(o) {
  const W = 1000, H = 300, L = 84, R = 16, T = 22, B = 34;
  const series = o.learners.map((l) => ({ name: l.name, pts: (l.curve || []).filter((p) => p.time && p.rmse !== null).map((p) => [Date.parse(p.time), p.rmse]) }));
  const all = series.flatMap((s) => s.pts);
  const chart = $("chart"), strip = $("timeline"), legend = $("legend");
  legend.replaceChildren(...o.learners.map((l) => {
    const st = styleOf(o, l.name);
    return el("li", {}, el("svg:svg", { width: 34, height: 10, "aria-hidden": "true" },
      el("svg:line", { x1: 0, y1: 5, x2: 34, y2: 5, stroke: st.colour, "stroke-width": 3, "stroke-dasharray": st.dash })), l.name);
  }));
  if (all.length < 2) {
    chart.replaceChildren(el("p", { class: "hint" }, "The curves start once learners have scored events with times."));
    strip.replaceChildren();
    return;
  }
  let lo = Math.min(...all.map((p) => p[0])), hi = Math.max(...all.map((p) => p[0]));
  if (hi === lo) hi = lo + HOUR;
  const ymax = niceMax(Math.max(...all.map((p) => p[1])) * 1.05);
  const x = (t) => L + (t - lo) / (hi - lo) * (W - L - R);
  const y = (v) => T + (1 - v / ymax) * (H - T - B);
  const svg = el("svg:svg", { viewBox: `0 0 ${W} ${H}`, role: "img", "aria-label": "recent RMSE of each learner by event time" });
  const { ticks, step } = timeTicks(lo, hi);
  const axis = el("svg:g", { class: "axis" });
  for (const t of ticks) {
    axis.append(el("svg:line", { class: "grid", x1: x(t), x2: x(t), y1: T, y2: H - B }));
    axis.append(el("svg:text", { x: x(t), y: H - B + 16, "text-anchor": "middle" }, tickLabel(t, step)));
  }
  for (let i = 0; i <= 4; i++) {
    const v = ymax * i / 4;
    axis.append(el("svg:line", { class: "grid", x1: L, x2: W - R, y1: y(v), y2: y(v) }));
    axis.append(el("svg:text", { x: L - 6, y: y(v) + 4, "text-anchor": "end" }, num(v, 3)));
  }
  axis.append(el("svg:text", { x: L, y: 12 }, "recent rmse" + (o.settings.units ? ` (${o.settings.units})` : "")));
  svg.append(axis);
  // Refused events: the increase of the refused count between curve points.
  const first = (o.learners[0] && o.learners[0].curve) || [];
  const bars = el("svg:g", { class: "rejections" });
  for (let i = 1; i < first.length; i++) {
    const d = first[i].rejected - first[i - 1].rejected;
    if (d > 0 && first[i].time) {
      const h = Math.min(40, 6 + 4 * Math.log2(d));
      bars.append(el("svg:rect", { x: x(Date.parse(first[i].time)) - 2, y: H - B - h, width: 4, height: h },
        el("svg:title", {}, `${d} event${d > 1 ? "s" : ""} refused as bad input up to ${when(first[i].time)}`)));
    }
  }
  svg.append(bars);
  for (const s of series) {
    if (s.pts.length === 0) continue;
    const st = styleOf(o, s.name);
    const d = s.pts.map((p, i) => `${i ? "L" : "M"}${x(p[0]).toFixed(1)},${y(p[1]).toFixed(1)}`).join("");
    svg.append(el("svg:path", { class: "series", d, stroke: st.colour, "stroke-dasharray": st.dash, "data-learner": s.name },
      el("svg:title", {}, s.name)));
  }
  const marks = el("svg:g", { class: "alarms" });
  for (const a of o.alarms) {
    if (!a.time) continue;
    const t = Date.parse(a.time);
    if (t < lo || t > hi) continue;
    const cx = x(t), st = styleOf(o, a.learner);
    marks.append(el("svg:path", { class: "alarm", d: `M${cx - 6},${T - 2}L${cx + 6},${T - 2}L${cx},${T + 9}Z`, fill: st.colour, "data-key": a.key },
      el("svg:title", {}, `drift alarm: ${a.learner} on key ${a.key} at ${when(a.time)} (position ${a.position.partition}:${a.position.offset})`)));
  }
  svg.append(marks);
  chart.replaceChildren(svg);
  // The checkpoints by the latest event each holds, on the same axis.
  const sh = 46;
  const ts = el("svg:svg", { viewBox: `0 0 ${W} ${sh}`, role: "img", "aria-label": "checkpoints by the latest event time they hold" });
  ts.append(el("svg:line", { class: "grid", x1: L, x2: W - R, y1: sh / 2, y2: sh / 2 }));
  ts.append(el("svg:text", { class: "tick", x: L - 6, y: sh / 2 + 4, "text-anchor": "end" }, "checkpoints"));
  for (const c of o.checkpoints) {
    if (!c.event_times || c.error) continue;
    const t = Date.parse(c.event_times.last);
    if (t < lo || t > hi) continue;
    const cx = x(t), cy = sh / 2;
    // A restore is a square, another pinned checkpoint a diamond, the rest
    // circles; a pinned one has a heavy outline whatever its shape.
    const edge = { stroke: "#1d2326", "stroke-width": c.pinned ? 3 : 1.5 };
    let shape;
    if (c.reason === "restore") shape = el("svg:rect", { x: cx - 6, y: cy - 6, width: 12, height: 12, fill: "#D55E00", ...edge });
    else if (c.pinned) shape = el("svg:path", { d: `M${cx},${cy - 8}L${cx + 8},${cy}L${cx},${cy + 8}L${cx - 8},${cy}Z`, fill: "#E69F00", ...edge });
    else shape = el("svg:circle", { cx, cy, r: 5, fill: "#fff", ...edge });
    shape.setAttribute("class", "ckpt");
    shape.setAttribute("data-version", c.version);
    shape.setAttribute("data-reason", c.reason);
    shape.append(el("svg:title", {}, `checkpoint ${c.version} (${c.reason}${c.pinned ? ", pinned" : ""}): events up to ${when(c.event_times.last)}`));
    ts.append(shape);
  }
  strip.replaceChildren(ts);
}

function renderLearners(ls, served) {
  const body = $("learners").tBodies[0];
  const servedOf = (name) => ((served && served.learners) || []).find((m) => m.name === name);
  body.replaceChildren(...ls.map((l, i) => {
    const cell = (v, digits) => el("td", { "data-value": v === null || v === undefined ? "" : String(v) }, num(v, digits));
    const sv = servedOf(l.name);
    const tr = el("tr", { class: i === 0 && l.recent.rmse !== null ? "leader" : "", "data-learner": l.name },
      el("th", { scope: "row" }, l.name), cell(l.recent.rmse), cell(l.recent.mae), cell(l.rmse),
      el("td", { class: "served", "data-value": sv && sv.rmse !== null ? String(sv.rmse) : "" }, sv ? `${num(sv.rmse)} · ${sv.labelled}` : "–"),
      cell(l.skill, 3),
      el("td", { "data-value": l.conformal.coverage ?? "" }, `${pct(l.conformal.coverage)} · ${pct(l.interval_coverage)}`),
      el("td", {}, `${num(l.conformal.mean_width, 3)} · ${num(l.interval_width, 3)}`),
      el("td", {}, String(l.scored)), el("td", { class: l.drift.state }, l.drift.state), el("td", {}, String(l.drift.alarms)));
    return tr;
  }));
}

// renderServed says what became of the answers served: the figure to watch
// once predictions steer decisions.
function renderServed(s) {
  const p = $("served");
  p.hidden = !s;
  if (!s) return;
  const labelled = s.learners.concat(s.leader ? [s.leader] : []).reduce((n, m) => n + m.labelled, 0);
  const delays = s.learners.concat(s.leader ? [s.leader] : []).filter((m) => m.label_delay.n > 0);
  const n = delays.reduce((k, m) => k + m.label_delay.n, 0);
  const mean = n ? delays.reduce((t, m) => t + m.label_delay.mean_seconds * m.label_delay.n, 0) / n : null;
  const lead = s.leader && s.leader.labelled ? ` The leader's answers: served rmse ${num(s.leader.rmse)} over ${s.leader.labelled}.` : "";
  p.textContent = `Served rmse scores the answers predict gave, as given, once an event naming their answer_id brings the truth ` +
    `(the prequential rmse scores each event just before training on it). ${labelled} answers labelled` +
    (mean === null ? "" : `, ${duration(mean)} after they were given on average (event time)`) +
    `; ${s.pending} waiting, ${s.expired} expired, ${s.evicted} dropped for room, ${s.unmatched_labels} labels named no waiting answer.` + lead;
}

function duration(seconds) {
  if (seconds < 120) return `${Math.round(seconds)} s`;
  if (seconds < 7200) return `${Math.round(seconds / 60)} min`;
  return `${(seconds / 3600).toFixed(1)} h`;
}

function pct(v) {
  return v === null || v === undefined ? "–" : (100 * v).toFixed(1) + " %";
}

function renderNotes(o) {
  const alarms = o.alarms.slice(-8).reverse();
  $("alarms").replaceChildren(...(alarms.length ? alarms.map((a) => el("li", {},
    `${when(a.time)} · ${a.learner} on key ${a.key} (position ${a.position.partition}:${a.position.offset})`)) : [el("li", {}, "none")]));
  const rej = o.rejections.slice(-5).reverse();
  $("rejections").replaceChildren(...(rej.length ? rej.map((r) => el("li", {},
    `position ${r.position.partition}:${r.position.offset}: ${r.reason}`)) : [el("li", {}, "none")]));
}

function bytes(n) {
  if (n >= 1 << 30) return (n / (1 << 30)).toFixed(1) + " GiB";
  if (n >= 1 << 20) return (n / (1 << 20)).toFixed(1) + " MiB";
  if (n >= 1 << 10) return (n / (1 << 10)).toFixed(1) + " KiB";
  return n + " B";
}

function renderCheckpoints(cs) {
  const body = $("checkpoints").tBodies[0];
  if (cs.length === 0) {
    body.replaceChildren(el("tr", {}, el("td", { colspan: 8 }, "No checkpoint yet: one is taken every so many events, on shutdown, or with POST /v1/checkpoints.")));
    return;
  }
  body.replaceChildren(...cs.map((c) => {
    if (c.error) return el("tr", { "data-version": c.version }, el("td", {}, String(c.version)), el("td", { colspan: 7, class: "drift" }, "fails its checks: " + c.error));
    const range = c.event_times ? `${when(c.event_times.first)} … ${when(c.event_times.last)}` : "–";
    const pin = el("button", { type: "button" }, c.pinned ? "Unpin" : "Pin");
    pin.addEventListener("click", () => setPin(c, !c.pinned));
    const pick = el("button", { type: "button" }, "Restore…");
    pick.addEventListener("click", () => {
      $("r-version").value = keyOf(c);
      if (c.partition !== undefined) $("r-partition").value = c.partition;
      $("r-version").focus();
    });
    const part = c.partition !== undefined ? ` (partition ${c.partition})` : "";
    return el("tr", { "data-version": c.version },
      el("td", {}, String(c.version) + part), el("td", {}, range), el("td", {}, c.reason), el("td", {}, String(c.events)),
      el("td", {}, bytes(c.bytes)), el("td", {}, when(c.created.slice(0, 19) + "Z")), el("td", {}, c.pinned ? "pinned" : ""),
      el("td", {}, pin, " ", pick));
  }));
}

function keyOf(c) {
  return c.partition !== undefined ? `${c.partition}/${c.version}` : String(c.version);
}

function renderVersions(cs) {
  const good = cs.filter((c) => !c.error);
  const sig = good.map(keyOf).join(",");
  if (sig === versions) return; // keep what the operator chose
  versions = sig;
  const sel = $("r-version"), chosen = sel.value;
  sel.replaceChildren(...good.map((c) => el("option", { value: keyOf(c) },
    `${c.version}${c.partition !== undefined ? " (partition " + c.partition + ")" : ""} · events up to ${c.event_times ? when(c.event_times.last) : "–"} · ${c.reason}${c.pinned ? " · pinned" : ""}`)));
  if (good.some((c) => keyOf(c) === chosen)) sel.value = chosen;
}

function answer(text, ok) {
  const out = $("answer");
  out.className = "answer " + (ok ? "ok" : "bad");
  out.textContent = text;
}

async function setPin(c, pinned) {
  const body = { pinned };
  if (c.partition !== undefined) body.partition = c.partition;
  try {
    const r = await fetch(`/v1/checkpoints/${c.version}/pin`, { method: "POST", headers: headers(true), body: JSON.stringify(body) });
    if (r.ok) answer(`Checkpoint ${c.version} is ${pinned ? "pinned: retention keeps it" : "unpinned"}.`, true);
    else answer(`Not ${pinned ? "pinned" : "unpinned"} (${r.status}): ${await message(r)}`, false);
  } catch (e) {
    answer("The service did not answer: " + e.message, false);
  }
  refresh1();
}

async function restore(ev, dry) {
  ev.preventDefault();
  const [a, b] = $("r-version").value.split("/");
  const version = b === undefined ? a : b;
  const mode = document.querySelector("input[name=mode]:checked").value;
  const body = { resume: mode };
  if (b !== undefined) body.partition = Number(a);
  else if (!$("r-partition-label").hidden && $("r-partition").value !== "") body.partition = Number($("r-partition").value);
  if (mode === "skip") {
    body.skip_from_time = $("r-from").value.trim();
    body.skip_to_time = $("r-to").value.trim();
  }
  if (dry) body.dry_run = true;
  answer(dry ? `Counting what restoring checkpoint ${version} would do…` : `Restoring checkpoint ${version}…`, true);
  try {
    const r = await fetch(`/v1/checkpoints/${version}/restore`, { method: "POST", headers: headers(true), body: JSON.stringify(body) });
    if (r.ok && dry) {
      const p = await r.json();
      answer(`Restoring checkpoint ${p.restore} would replay ${p.replay} events` + (p.skip ? `, leave out ${p.skip}` : "") +
        (p.forget ? `, forget ${p.forget}` : "") + ". Nothing has changed yet.", true);
    } else if (r.ok) {
      const res = await r.json();
      answer(`Restored checkpoint ${res.restored} (${res.resume}); the restore is recorded as checkpoint ${res.checkpoint.version}, and the service is catching up.`, true);
    } else {
      answer(`Not restored (${r.status}): ${await message(r)}`, false);
    }
  } catch (e) {
    answer("The service did not answer: " + e.message, false);
  }
  refresh1();
}

// refresh1 reads the overview once and draws it, or says what went wrong.
async function refresh1() {
  try {
    const r = await fetch("/v1/overview", { headers: headers(false), cache: "no-store" });
    if (r.ok) {
      overview = await r.json();
      render();
    } else {
      streamLine(`the service answered ${r.status}: ${await message(r)}`, true);
    }
  } catch (e) {
    streamLine("the service does not answer (" + e.message + "); retrying", true);
  }
}

document.addEventListener("DOMContentLoaded", () => {
  $("restore").addEventListener("submit", (ev) => restore(ev, false));
  $("r-dry").addEventListener("click", (ev) => restore(ev, true));
  refresh();
});
