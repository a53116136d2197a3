// The browser interface of phasewatch: answers "are my cultures all right?" first, then
// offers the live view, stage and focus control, time-lapse set-up and the trends.
"use strict";

const API = "/api/v1";
const TOKEN_KEY = "phasewatch.token";
const $ = (id) => document.getElementById(id);
const plots = () => window.phasewatchPlots;

const ui = {
  token: localStorage.getItem(TOKEN_KEY) || "",
  canView: false,
  status: null,
  detail: null,       // the shown time-lapse (active, else the latest)
  series: null,
  alerts: [],
  curve: [],          // autofocus points of the run being drawn
  curveResult: null,
  liveOn: true,
  ws: null,
  refreshTimer: null,
  vessel: null,       // the drawn vessel's geometry (mm)
  selected: new Set(),
  lastClicked: null,
  mapMode: "go",      // what a plain click on a well does: "go" there, or "select" it
  conditions: {},     // well -> {label, notes}, for the plan being built
  viewer: null,       // {key, frames, index, timer}
};

// -- talking to the daemon ------------------------------------------------------------

class ApiError extends Error {
  constructor(status, message) { super(message); this.status = status; }
}

async function api(path, { method = "GET", body } = {}) {
  const headers = {};
  if (ui.token) headers["Authorization"] = `Bearer ${ui.token}`;
  if (body !== undefined) headers["Content-Type"] = "application/json";
  let resp;
  try {
    resp = await fetch(API + path, { method, headers, body: body === undefined ? undefined : JSON.stringify(body),
      credentials: "same-origin", cache: "no-store" });
  } catch (e) {
    setConn(false);
    throw new ApiError(0, "the scope does not answer (network)");
  }
  setConn(true);
  const text = await resp.text();
  let data = null;
  try { data = text ? JSON.parse(text) : null; } catch (e) { data = null; }
  if (!resp.ok) {
    const msg = data && data.error ? data.error.message : `${resp.status} ${resp.statusText}`;
    if (resp.status === 401) onUnauthorized(msg);
    throw new ApiError(resp.status, msg);
  }
  return data;
}

function setConn(ok) {
  const el = $("conn");
  el.textContent = ok ? "connected" : "offline";
  el.dataset.ok = ok ? "yes" : "no";
}

function toast(message, level = "info") {
  const el = $("toast");
  el.textContent = message;
  el.dataset.level = level;
  el.hidden = false;
  clearTimeout(toast.timer);
  toast.timer = setTimeout(() => { el.hidden = true; }, level === "error" ? 9000 : 4500);
}

async function act(label, fn) {
  try {
    return await fn();
  } catch (e) {
    toast(`${label}: ${e.message}`, e.status === 409 || e.status === 422 ? "warn" : "error");
    return null;
  }
}

// -- signing in -----------------------------------------------------------------------

function onUnauthorized(message) {
  if (ui.token) {
    $("signin-error").textContent = message;
  }
  openSignin();
}

function openSignin() {
  const d = $("signin");
  if (!d.open) d.showModal();
  $("token-input").value = "";
  $("token-input").focus();
}

async function signIn(token) {
  ui.token = token.trim();
  try {
    await api("/session", { method: "POST", body: {} });
  } catch (e) {
    ui.token = "";
    localStorage.removeItem(TOKEN_KEY);
    $("signin-error").textContent = e.message;
    openSignin();
    return false;
  }
  localStorage.setItem(TOKEN_KEY, ui.token);
  $("signin-error").textContent = "";
  $("signin-btn").textContent = "Signed in";
  startAll();
  return true;
}

function tokenFromFragment() {
  const m = /(?:^#|&)token=([^&]+)/.exec(location.hash);
  if (!m) return null;
  history.replaceState(null, "", location.pathname + location.search);  // keep it out of history and bookmarks
  return decodeURIComponent(m[1]);
}

// -- formatting -----------------------------------------------------------------------

const um = (v, d = 1) => (v === null || v === undefined ? "—" : `${Number(v).toFixed(d)} µm`);
const pct = (v) => (v === null || v === undefined ? "—" : `${(100 * v).toFixed(1)} %`);

function clock(t_s) {
  if (!t_s) return "—";
  return new Date(t_s * 1000).toLocaleString([], { hour: "2-digit", minute: "2-digit", second: "2-digit", day: "numeric", month: "short" });
}

// Durations as a biologist types them: "15 min", "2 h", "3 d" (also "90 s", "1.5 h").
const UNIT_S = { s: 1, sec: 1, second: 1, seconds: 1, min: 60, mins: 60, minute: 60, minutes: 60,
  h: 3600, hr: 3600, hrs: 3600, hour: 3600, hours: 3600, d: 86400, day: 86400, days: 86400 };

function parseDuration(text) {
  const m = /^\s*(\d+(?:[.,]\d+)?)\s*([a-zA-Z]+)\s*$/.exec(text || "");
  if (!m) return null;
  const f = UNIT_S[m[2].toLowerCase()];
  return f ? Number(m[1].replace(",", ".")) * f : null;
}

function formatDuration(s) {
  const round = (v) => String(+v.toFixed(2));
  if (s >= 86400 && Math.abs(s / 86400 - Math.round(s / 86400)) < 1e-9) return `${round(s / 86400)} d`;
  if (s >= 3600 && Math.abs(s / 3600 - Math.round(s / 3600 * 4) / 4) < 1e-9) return `${round(s / 3600)} h`;
  if (s >= 60 && Math.abs(s / 60 - Math.round(s / 60)) < 1e-9) return `${round(s / 60)} min`;
  return `${round(s)} s`;
}

// Time points at 0, interval, 2 x interval ... up to and including the duration (as the daemon counts).
const timePointsOf = (interval_s, duration_s) => Math.floor(duration_s / interval_s + 1e-9) + 1;

const plural = (n, word, many) => `${n} ${n === 1 ? word : (many || `${word}s`)}`;

function ago(seconds) {
  if (seconds < 0) seconds = 0;
  if (seconds < 90) return `${Math.round(seconds)} s`;
  if (seconds < 5400) return `${Math.round(seconds / 60)} min`;
  if (seconds < 172800) return `${(seconds / 3600).toFixed(1)} h`;
  return `${(seconds / 86400).toFixed(1)} days`;
}

function el(tag, attrs = {}, text) {
  const e = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs)) {
    if (k === "class") e.className = v; else if (k.startsWith("data-")) e.setAttribute(k, v); else e[k] = v;
  }
  if (text !== undefined) e.textContent = text;
  return e;
}

// -- status ---------------------------------------------------------------------------

async function refreshStatus() {
  let s;
  try {
    s = await api("/status");
  } catch (e) {
    return;
  }
  ui.status = s;
  ui.canView = true;
  $("scope-name").textContent = `${s.profile.scope} · ${s.profile.objective}`;
  const p = s.position_um;
  $("pos-x").textContent = p ? um(p.x_um, 0) : "—";
  $("pos-y").textContent = p ? um(p.y_um, 0) : "—";
  $("pos-z").textContent = p ? um(p.z_um, 1) : "—";
  $("objective").textContent = `${s.profile.objective} · ${s.profile.pixel_size_um} µm/px`;
  // The well comes from the vessel-to-stage map; the simulator's truth is shown beside it when they differ.
  const here = s.vessel_position;
  let well = !p ? "—" : !here ? "no vessel map" : !here.on_vessel ? "off the vessel" : (here.well || "between wells");
  if (s.simulator) {
    $("truth-row").hidden = false;
    $("truth-z").textContent = um(s.simulator.focus_z_um, 1);
    if (p && (s.simulator.well || null) !== (s.well || null)) well += ` (simulator: ${s.simulator.well || "between wells"})`;
  }
  $("pos-well").textContent = well;
  const lim = s.limits_um;
  $("limits").textContent = `soft limits: x ${lim.x[0]}…${lim.x[1]} µm, y ${lim.y[0]}…${lim.y[1]} µm, focus ${lim.z[0]}…${lim.z[1]} µm`;
  for (const [id, axis] of [["abs-x", "x"], ["abs-y", "y"], ["abs-z", "z"]]) {
    $(id).min = lim[axis][0];
    $(id).max = lim[axis][1];
    if (p && document.activeElement !== $(id) && $(id).dataset.touched !== "yes") $(id).value = p[`${axis}_um`].toFixed(1);
  }
  const mc = s.manual_control;
  const canControl = !!ui.token && mc.allowed;
  for (const b of document.querySelectorAll("[data-control]")) {
    if (b.closest("#tl-active")) continue;
    if (b.closest("#tl-form")) { b.disabled = !ui.token; continue; }
    b.disabled = !canControl;
  }
  // The API's reason names the API call to make; here the Pause button is that call.
  const reason = mc.reason ? mc.reason.replace(/\s*\(POST [^)]*\)/, "") : "";
  $("control-state").textContent = !ui.token ? "sign in to control" : (mc.allowed ? "" : reason);
  const badge = $("live-badge");
  badge.textContent = s.state === "acquiring" ? "time-lapse imaging" : (ui.liveOn ? `live · ${s.live.fps.toFixed(0)} fps` : "paused");
  badge.dataset.state = s.state;
  renderTimelapseBadge(s.active_timelapse);
  renderVerdict();
  drawStageMarker();
}

// -- live view ------------------------------------------------------------------------

function startLive() {
  const img = $("live-img");
  const width = Math.min(1280, Math.max(320, Math.round(img.parentElement.clientWidth * (window.devicePixelRatio || 1))));
  img.src = `${API}/stream.mjpeg?fps=10&width=${width}&t=${Date.now()}`;
  ui.liveOn = true;
  $("live-toggle").textContent = "Pause live view";
  $("live-note").textContent = "The LED is lit only while the live view runs.";
}

function stopLive() {
  const img = $("live-img");
  img.removeAttribute("src");
  ui.liveOn = false;
  $("live-toggle").textContent = "Resume live view";
  $("live-note").textContent = "Live view paused: the LED stays off (kinder to the cells).";
}

// -- manual control -------------------------------------------------------------------

async function move(body) {
  const out = await act("Move", () => api("/stage/move", { method: "POST", body }));
  if (out) {
    for (const id of ["abs-x", "abs-y", "abs-z"]) $(id).dataset.touched = "no";
    await refreshStatus();
  }
  return out;
}

async function runAutofocus(wide = false) {
  $("af-btn").disabled = true;
  $("af-wide").hidden = true;
  $("af-result").textContent = wide ? "searching the whole focus range (this takes a while)…" : "focusing…";
  ui.curve = [];
  ui.curveResult = null;
  drawCurve();
  let body = {};
  if (wide && ui.status) {
    const [lo, hi] = ui.status.limits_um.z;
    body = { centre_z_um: (lo + hi) / 2, range_um: hi - lo };
  }
  const out = await act("Autofocus", () => api("/focus/auto", { method: "POST", body }));
  if (out) {
    ui.curve = out.curve.map((p) => [p.z_um, p.score]);
    ui.curveResult = out;
    drawCurve();
    const truth = out.true_z_um !== null && out.true_z_um !== undefined ? ` (simulator: ${um(out.true_z_um, 1)})` : "";
    $("af-result").textContent = out.found
      ? `in focus at ${um(out.z_um, 1)}${truth}, ${out.frames} frames, confidence ${(out.confidence * 100).toFixed(0)} %`
      : `no focus found: ${out.message}`;
    $("af-wide").hidden = out.found;
  } else {
    $("af-result").textContent = "autofocus did not run";
  }
  await refreshStatus();
}

function drawCurve() {
  const r = ui.curveResult;
  const marks = [];
  if (r && r.found) marks.push({ x: r.z_um, label: "chosen", cls: "mark-chosen" });
  if (r && r.true_z_um !== null && r.true_z_um !== undefined) marks.push({ x: r.true_z_um, label: "simulator", cls: "mark-truth", row: 1 });
  plots().linePlot($("af-plot"), {
    series: [{ name: "focus score", points: ui.curve, cls: "series-focus" }],
    xLabel: "focus z (µm)", yLabel: "focus score", marks, empty: "run an autofocus to see its focus curve",
  });
  $("af-plot").dataset.points = String(ui.curve.length);
}

// -- calibration ----------------------------------------------------------------------

async function refreshCalibration() {
  const out = await api("/calibration").catch(() => null);
  if (!out) return;
  const ul = $("cal-list");
  ul.replaceChildren();
  if (!out.frames.length) ul.append(el("li", { class: "empty" }, "none stored yet: frames are saved uncorrected"));
  for (const m of out.frames) {
    ul.append(el("li", {}, `${m.kind}: ${m.exposure_ms} ms, ${m.gain_db} dB, ${m.frames_averaged} frames averaged, ${m.acquired_utc || ""}`));
  }
}

async function calibrate(kind) {
  const body = kind === "flat" ? { frames: 16, defocus_um: 50 } : { frames: 16 };
  toast(`taking ${kind} frames…`);
  const out = await act(`${kind} calibration`, () => api(`/calibration/${kind}`, { method: "POST", body }));
  if (out) toast(`${kind} frames stored (${out.file})`);
  await refreshCalibration();
}

// -- time-lapse -----------------------------------------------------------------------

function renderTimelapseBadge(active) {
  const b = $("tl-badge");
  b.textContent = active ? active.state : (ui.detail ? ui.detail.state : "none");
  b.dataset.state = b.textContent;
}

async function refreshTimelapse() {
  const list = await api("/timelapses").catch(() => null);
  if (!list) return;
  const chosen = list.active ? list.active.id : (list.timelapses.length ? list.timelapses[list.timelapses.length - 1].id : null);
  if (chosen === null) {
    ui.detail = null;
    ui.series = null;
    renderTimelapse();
    renderWells([]);
    renderTrends();
    return;
  }
  const [detail, series] = await Promise.all([
    api(`/timelapses/${chosen}`).catch(() => null),
    api(`/timelapses/${chosen}/series`).catch(() => null),
  ]);
  ui.detail = detail;
  ui.series = series;
  renderTimelapse();
  renderWells(detail ? detail.latest : []);
  renderTrends();
  renderVerdict();
}

function scheduleTimelapseRefresh(delayMs = 600) {
  if (ui.refreshTimer) return;
  ui.refreshTimer = setTimeout(async () => {
    ui.refreshTimer = null;
    await refreshTimelapse();
  }, delayMs);
}

function renderTimelapse() {
  const d = ui.detail;
  const running = d && (d.state === "running" || d.state === "paused") && d.running_here;
  $("tl-active").hidden = !d;
  $("tl-none").hidden = !!d;
  $("plan-card").hidden = !!running;
  drawMap();
  if (!d) return;
  $("tl-name").textContent = `#${d.id} ${d.name}`;
  const tp = d.time_points;
  const over = tp.done + tp.partial + tp.failed + tp.missed;
  $("tl-bar").style.width = `${Math.round(100 * (d.progress_ratio || 0))}%`;
  $("tl-points").textContent = `${over} of ${d.count} over (${tp.done} complete${tp.partial ? `, ${tp.partial} partial` : ""}${tp.failed ? `, ${tp.failed} failed` : ""})`;
  const lastMissed = d.missed.length ? `: ${d.missed[d.missed.length - 1].reason}` : "";
  $("tl-missed").textContent = tp.missed ? `${tp.missed}${lastMissed}` : "none";
  const pr = d.progress;
  if (running && pr) {
    $("tl-now").textContent = d.state === "paused" ? "paused" :
      (pr.acquiring ? `imaging time point ${(pr.time_point ?? 0) + 1}, position ${(pr.position_index ?? 0) + 1} of ${pr.positions} (${pr.position})` : "waiting for the next time point");
    $("tl-next").textContent = pr.next_time_point_s ? `${clock(pr.next_time_point_s)} (in ${ago(pr.next_time_point_s - d.clock_s)})` : "last one";
  } else {
    $("tl-now").textContent = d.state + (d.stop_reason ? ` (${d.stop_reason})` : "");
    $("tl-next").textContent = "—";
  }
  const signed = !!ui.token;
  $("tl-pause").disabled = !(signed && running && d.state === "running");
  $("tl-resume").disabled = !(signed && running && d.state === "paused");
  $("tl-abort").disabled = !(signed && running);
  $("tl-export").disabled = !(signed && d.frames > 0);
}

function wellsOfField() {
  return $("tl-form").wells.value.split(/[\s,;]+/).filter(Boolean);
}

function planTiming() {
  const f = $("tl-form");
  const interval_s = parseDuration(f.interval.value);
  const duration_s = parseDuration(f.duration.value);
  if (interval_s === null) return { error: `"Every": write a number and a unit, e.g. 15 min, 2 h or 1 d` };
  if (duration_s === null) return { error: `"For": write a number and a unit, e.g. 12 h or 3 d` };
  if (interval_s < 1) return { error: `"Every": at least 1 s` };
  return { interval_s, duration_s, count: timePointsOf(interval_s, duration_s) };
}

function conditionGroups(wells) {
  const groups = new Map();
  for (const w of wells) {
    const c = ui.conditions[w];
    if (!c || !c.label) continue;
    const k = JSON.stringify([c.label, c.notes || ""]);
    if (!groups.has(k)) groups.set(k, { wells: [], label: c.label, notes: c.notes || "" });
    groups.get(k).wells.push(w);
  }
  return [...groups.values()];
}

function planFromForm() {
  const f = $("tl-form");
  const wells = wellsOfField();
  const t = planTiming();
  if (t.error) throw new ApiError(422, t.error);
  const plan = {
    name: f.name.value.trim(),
    vessel: f.vessel.value.trim(),
    wells: wells.length === 1 ? wells[0] : wells,
    sites_per_well: Number(f.sites_per_well.value || 1),
    interval_s: t.interval_s,
    duration_s: t.duration_s,
    autofocus: f.autofocus.value,
    correction: f.correction.checked,
    save: f.correction.checked ? "corrected" : "raw",
  };
  const named = expandWells(wells);
  const groups = conditionGroups(named);
  if (groups.length) plan.conditions = groups;
  return plan;
}

function fillForm(plan) {
  const f = $("tl-form");
  f.name.value = plan.name;
  f.vessel.value = plan.vessel;
  f.wells.value = Array.isArray(plan.wells) ? plan.wells.join(", ") : plan.wells;
  f.sites_per_well.value = plan.sites_per_well || 1;
  f.interval.value = formatDuration(plan.interval_s);
  const duration = plan.duration_s !== undefined ? plan.duration_s : (plan.count - 1) * plan.interval_s;
  f.duration.value = formatDuration(duration);
  f.autofocus.value = plan.autofocus || "track";
  f.correction.checked = !!plan.correction;
  ui.conditions = {};
  for (const g of plan.conditions || []) for (const w of g.wells) ui.conditions[w] = { label: g.label, notes: g.notes || "" };
  selectionFromField();
  renderTiming();
  renderConditions();
}

function renderTiming() {
  const t = planTiming();
  const out = $("tl-f-points");
  if (t.error) { out.textContent = t.error; out.dataset.count = ""; return; }
  out.dataset.count = String(t.count);
  const est = ui.lastEstimate;
  let text = `${plural(t.count, "time point")}, one every ${formatDuration(t.interval_s)} for ${formatDuration(t.duration_s)}`;
  if (est) {
    text += `; about ${ago(est.time_point_s)} per time point, ` +
      `${ago(est.time_point_s * t.count)} of imaging in all`;
  }
  out.textContent = text;
}

function describeEstimate(check) {
  const e = check.estimate;
  ui.lastEstimate = e;
  renderTiming();
  const n = check.positions.length;
  const lines = [`${plural(n, "position")}; about ${e.time_point_s.toFixed(0)} s per time point (the first, with a cold focus search: ${e.first_time_point_s.toFixed(0)} s); ${(e.bytes_per_time_point / 1e6).toFixed(1)} MB per time point; runs ${ago(e.duration_s)}.`];
  for (const w of check.warnings) lines.push(`Note: ${w}`);
  return lines.join(" ");
}

let checkTimer = null;
function scheduleCheck() {
  clearTimeout(checkTimer);
  checkTimer = setTimeout(async () => {
    let body;
    try { body = planFromForm(); } catch (e) { return; }
    if (!body.name || !body.vessel || !wellsOfField().length) return;
    const out = await api("/plans/check", { method: "POST", body }).catch((e) => { $("tl-estimate").textContent = e.message; return null; });
    if (out) $("tl-estimate").textContent = describeEstimate(out);
  }, 500);
}

// -- conditions -----------------------------------------------------------------------

function renderConditions() {
  const ul = $("cond-list");
  ul.replaceChildren();
  const groups = conditionGroups(Object.keys(ui.conditions).sort(wellOrder));
  if (!groups.length) { ul.append(el("li", { class: "empty" }, "no conditions yet")); }
  groups.forEach((g) => {
    const li = el("li", { "data-condition": g.label });
    const sw = el("span", { class: `cond-swatch cond-${conditionIndex(g.label) % 6}` });
    li.append(sw, el("strong", {}, g.label), el("span", {}, ` — ${g.wells.join(", ")}`));
    if (g.notes) li.append(el("span", { class: "hint" }, ` (${g.notes})`));
    ul.append(li);
  });
  drawMap();
}

function conditionLabels() {
  const labels = [];
  for (const w of Object.keys(ui.conditions).sort(wellOrder)) {
    const l = ui.conditions[w].label;
    if (l && !labels.includes(l)) labels.push(l);
  }
  return labels;
}

function conditionIndex(label) {
  const i = conditionLabels().indexOf(label);
  return i < 0 ? 0 : i;
}

function applyCondition(clear) {
  const wells = expandWells($("cond-wells").value.split(/[\s,;]+/).filter(Boolean));
  if (!wells.length) { toast("select wells on the map first (shift-click or drag), or type them", "warn"); return; }
  const label = $("cond-label").value.trim();
  if (!clear && !label) { toast("name the condition first", "warn"); return; }
  for (const w of wells) {
    if (clear) delete ui.conditions[w];
    else ui.conditions[w] = { label, notes: $("cond-notes").value.trim() };
  }
  renderConditions();
  scheduleCheck();
}

async function checkPlan() {
  const out = await act("Plan", async () => api("/plans/check", { method: "POST", body: planFromForm() }));
  if (out) $("tl-estimate").textContent = describeEstimate(out);
}

async function startTimelapse(ev) {
  ev.preventDefault();
  const out = await act("Start", async () => api("/timelapses", { method: "POST", body: planFromForm() }));
  if (out) {
    toast(`time-lapse #${out.id} started`);
    $("tl-estimate").textContent = "";
    await refreshTimelapse();
    await refreshStatus();
  }
}

async function control(action) {
  const d = ui.detail;
  if (!d) return;
  if (action === "abort" && !confirm(`End time-lapse #${d.id} "${d.name}" for good? Frames taken so far are kept.`)) return;
  const out = await act(action, () => api(`/timelapses/${d.id}/${action}`, { method: "POST", body: {} }));
  if (out) toast(out.message);
  await refreshTimelapse();
  await refreshStatus();
}

async function exportTimelapse() {
  const d = ui.detail;
  if (!d) return;
  $("tl-export").disabled = true;
  const out = await act("Export", () => api(`/timelapses/${d.id}/exports`, { method: "POST", body: {} }));
  $("tl-export").disabled = false;
  if (!out) return;
  const ul = $("tl-files");
  ul.replaceChildren();
  for (const f of out.files) {
    const li = el("li");
    const a = el("a", { href: f.download }, f.name);
    li.append(a, el("span", { class: "hint" }, ` ${(f.bytes / 1024).toFixed(0)} KiB`));
    ul.append(li);
  }
}


// -- the vessel map -------------------------------------------------------------------

const SVG = "http://www.w3.org/2000/svg";
function sv(name, attrs, parent) {
  const e = document.createElementNS(SVG, name);
  for (const [k, v] of Object.entries(attrs || {})) e.setAttribute(k, String(v));
  if (parent) parent.appendChild(e);
  return e;
}

function wellOrder(a, b) {
  const w = ui.vessel ? ui.vessel.wellsByName : null;
  if (w && w[a] && w[b]) return w[a].row - w[b].row || w[a].column - w[b].column;
  return a.localeCompare(b, undefined, { numeric: true });
}

// Wells named in the field: names and rectangular ranges ("B2:C4"), as the daemon reads them.
function expandWells(items) {
  const v = ui.vessel;
  const out = new Set();
  for (const raw of items) {
    const t = raw.trim().toUpperCase();
    if (!t) continue;
    if (!v) { out.add(t); continue; }
    if (t === "ALL") { for (const w of v.wells) out.add(w.name); continue; }
    const [a, b] = t.split(":");
    const wa = v.wellsByName[normWell(a)], wb = b ? v.wellsByName[normWell(b)] : wa;
    if (!wa || !wb) continue;
    const [r0, r1] = [Math.min(wa.row, wb.row), Math.max(wa.row, wb.row)];
    const [c0, c1] = [Math.min(wa.column, wb.column), Math.max(wa.column, wb.column)];
    for (const w of v.wells) if (w.row >= r0 && w.row <= r1 && w.column >= c0 && w.column <= c1) out.add(w.name);
  }
  return [...out].sort(wellOrder);
}

function normWell(t) {
  const m = /^([A-Z]{1,2})0*(\d{1,3})$/.exec((t || "").trim().toUpperCase());
  return m ? `${m[1]}${m[2]}` : t;
}

function selectionFromField() {
  ui.selected = new Set(expandWells(wellsOfField()));
  drawMap();
}

function selectionToField(gesture) {
  if (gesture && gesture.length) $("cond-wells").value = gesture.sort(wellOrder).join(", ");
  $("tl-form").wells.value = [...ui.selected].sort(wellOrder).join(", ");
  $("map-help").textContent = ui.selected.size
    ? `${plural(ui.selected.size, "well")} selected for the plan.`
    : "Click a well to move there. Shift-click or drag across wells to select them for a plan.";
  scheduleCheck();
}

async function loadVessel(name) {
  const v = await api(name ? `/vessels/${encodeURIComponent(name)}` : "/vessel").catch(() => null);
  if (!v) return;
  v.wellsByName = Object.fromEntries(v.wells.map((w) => [w.name, w]));
  ui.vessel = v;
  $("vessel-name").textContent = `${v.name}${v.mapped ? "" : " (not the mapped vessel: clicks do not move)"}`;
  selectionFromField();
}

// What the latest frames and alerts say about each well.
function wellStates() {
  const out = {};
  const d = ui.detail;
  if (!d) return out;
  const planned = new Set((d.positions || []).map((k) => k.replace(/-\d+$/, "")));
  for (const w of planned) out[w] = { inPlan: true, confluence: null, focusTrouble: false, alert: false };
  for (const p of d.latest || []) {
    const o = out[p.well] || (out[p.well] = { inPlan: true, confluence: null, focusTrouble: false, alert: false });
    if (p.confluence !== null && p.confluence !== undefined) o.confluence = Math.max(o.confluence || 0, p.confluence);
    if (p.focus_found === 0 || p.focus_found === false) o.focusTrouble = true;
  }
  for (const a of ui.alerts) {
    if (a.timelapse_id !== d.id || a.level === "info") continue;
    for (const m of (a.message || "").matchAll(/\b([A-P]\d{1,2})(?:-\d+)?\b/g)) if (out[m[1]]) out[m[1]].alert = true;
  }
  return out;
}

function planConditions() {
  const d = ui.detail;
  const out = {};
  if (d && d.plan && d.plan.conditions) for (const g of d.plan.conditions) for (const w of g.wells) out[w] = g.label;
  return out;
}

function drawMap() {
  const svg = $("vessel-map");
  const v = ui.vessel;
  if (!svg || !v) return;
  svg.replaceChildren();
  const pad = 7;
  svg.setAttribute("viewBox", `${-pad} ${-pad} ${v.length_mm + pad + 2} ${v.width_mm + pad + 2}`);
  const body = v.kind === "dish"
    ? sv("ellipse", { cx: v.length_mm / 2, cy: v.width_mm / 2, rx: v.length_mm / 2, ry: v.width_mm / 2, class: "map-body" }, svg)
    : sv("rect", { x: 0, y: 0, width: v.length_mm, height: v.width_mm, rx: Math.min(4, v.width_mm / 10), class: "map-body" }, svg);
  void body;
  const grid = v.rows * v.columns > 1;
  if (grid) {
    const cols = new Map(), rows = new Map();
    for (const w of v.wells) { cols.set(w.column, w.x_mm); rows.set(w.row, w.y_mm); }
    const size = Math.min(3.2, Math.max(1.6, (v.pitch_x_mm || 9) * 0.4));
    for (const [c, x] of cols) sv("text", { x, y: -2, class: "map-label", "text-anchor": "middle", "font-size": size }, svg).textContent = String(c + 1);
    for (const [r, y] of rows) sv("text", { x: -2.5, y: y + size / 3, class: "map-label", "text-anchor": "middle", "font-size": size }, svg).textContent = String.fromCharCode(65 + r);
  }
  const states = wellStates();
  const running = planConditions();
  const labels = conditionLabels();
  for (const l of Object.values(running)) if (!labels.includes(l)) labels.push(l);
  for (const w of v.wells) {
    const st = states[w.name] || {};
    const cls = ["map-well"];
    if (st.inPlan) cls.push("in-plan");
    if (ui.selected.has(w.name)) cls.push("selected");
    if (st.focusTrouble) cls.push("focus-trouble");
    if (st.alert) cls.push("alerted");
    const g = sv("g", { class: cls.join(" "), "data-well": w.name, tabindex: 0, role: "button" }, svg);
    const title = [`${w.name}`];
    const attrs = w.shape === "circle"
      ? ["circle", { cx: w.x_mm, cy: w.y_mm, r: w.diameter_mm / 2 }]
      : ["rect", { x: w.x_mm - (w.size_x_mm || w.diameter_mm) / 2, y: w.y_mm - (w.size_y_mm || w.diameter_mm) / 2,
        width: w.size_x_mm || w.diameter_mm, height: w.size_y_mm || w.diameter_mm, rx: 0.6 }];
    const shape = sv(attrs[0], { ...attrs[1], class: "well-shape" }, g);
    if (st.confluence !== null && st.confluence !== undefined) {
      // Teal deepens with cover: read at a glance, exact value on hover.
      shape.style.fillOpacity = String(0.15 + 0.8 * st.confluence);
      shape.classList.add("has-conf");
      title.push(`${Math.round(100 * st.confluence)} % covered`);
    }
    const cond = (ui.conditions[w.name] && ui.conditions[w.name].label) || running[w.name];
    if (cond) {
      const r = Math.max(0.9, Math.min(w.diameter_mm, w.size_y_mm || w.diameter_mm) * 0.17);
      sv("circle", { cx: w.x_mm, cy: w.y_mm, r, class: `cond-dot cond-${labels.indexOf(cond) % 6}` }, g);
      title.push(`condition: ${cond}`);
    }
    if (st.focusTrouble) title.push("focus not found");
    if (st.alert) title.push("alert");
    if (st.inPlan) title.push("in the time-lapse");
    sv("title", {}, g).textContent = title.join(" · ");
  }
  sv("g", { id: "map-stage", class: "map-stage" }, svg);
  drawStageMarker();
  drawLegend(labels);
}

function drawLegend(labels) {
  const box = $("map-legend");
  box.replaceChildren();
  const items = [["lg-plan", "in the time-lapse"], ["lg-selected", "selected for a new plan"], ["lg-conf", "deeper teal: more covered"],
    ["lg-focus", "focus not found"], ["lg-alert", "alert"], ["lg-stage", "objective is here"]];
  for (const [cls, text] of items) {
    const s = el("span", { class: "lg" });
    s.append(el("span", { class: `lg-mark ${cls}` }), document.createTextNode(text));
    box.append(s);
  }
  labels.forEach((l, i) => {
    const s = el("span", { class: "lg" });
    s.append(el("span", { class: `lg-mark lg-cond cond-${i % 6}` }), document.createTextNode(l));
    box.append(s);
  });
}

function drawStageMarker() {
  const g = $("map-stage");
  const s = ui.status;
  if (!g) return;
  g.replaceChildren();
  const here = s && s.vessel_position;
  if (!here || !ui.vessel || here.vessel !== ui.vessel.name) { g.dataset.at = ""; return; }
  const v = ui.vessel;
  // Off the vessel the mark waits at the nearest edge, as an arrow-less ring, so the map says where the stage went.
  const x = Math.min(Math.max(here.x_mm, -3), v.length_mm + 3), y = Math.min(Math.max(here.y_mm, -3), v.width_mm + 3);
  const r = Math.max(1.5, (v.pitch_x_mm || 9) * 0.28);
  sv("circle", { cx: x, cy: y, r, class: "stage-ring" }, g);
  sv("line", { x1: x - 2 * r, x2: x + 2 * r, y1: y, y2: y, class: "stage-cross" }, g);
  sv("line", { x1: x, x2: x, y1: y - 2 * r, y2: y + 2 * r, class: "stage-cross" }, g);
  g.dataset.at = `${here.x_mm.toFixed(2)},${here.y_mm.toFixed(2)}`;
  g.dataset.onVessel = here.on_vessel ? "yes" : "no";
}

function wellAtEvent(ev) {
  const t = document.elementFromPoint(ev.clientX, ev.clientY);
  const g = t && t.closest ? t.closest("[data-well]") : null;
  return g ? g.getAttribute("data-well") : null;
}

function rectWells(a, b) {
  const v = ui.vessel, wa = v.wellsByName[a], wb = v.wellsByName[b];
  const [r0, r1] = [Math.min(wa.row, wb.row), Math.max(wa.row, wb.row)];
  const [c0, c1] = [Math.min(wa.column, wb.column), Math.max(wa.column, wb.column)];
  return v.wells.filter((w) => w.row >= r0 && w.row <= r1 && w.column >= c0 && w.column <= c1).map((w) => w.name);
}

function wireMap() {
  const svg = $("vessel-map");
  let drag = null;
  svg.addEventListener("pointerdown", (ev) => {
    const w = wellAtEvent(ev);
    if (!w) return;
    ev.preventDefault();
    drag = { start: w, now: w, moved: false, shift: ev.shiftKey, before: new Set(ui.selected) };
  });
  svg.addEventListener("pointermove", (ev) => {
    if (!drag) return;
    const w = wellAtEvent(ev);
    if (!w || w === drag.now) return;
    drag.now = w;
    drag.moved = true;
    ui.selected = new Set([...(drag.shift ? drag.before : []), ...rectWells(drag.start, w)]);
    drawMap();
  });
  const finish = (ev) => {
    if (!drag) return;
    const d = drag;
    drag = null;
    if (d.moved) { ui.lastClicked = d.now; selectionToField(rectWells(d.start, d.now)); return; }
    const w = d.start;
    let gesture = [w];
    if (ev.shiftKey && ui.lastClicked && ui.vessel.wellsByName[ui.lastClicked]) {
      gesture = rectWells(ui.lastClicked, w);
      for (const n of gesture) ui.selected.add(n);
    } else if (ev.shiftKey || ev.ctrlKey || ev.metaKey || ui.mapMode === "select") {
      if (ui.selected.has(w)) { ui.selected.delete(w); gesture = []; } else ui.selected.add(w);
    } else {
      goToWell(w);
      return;
    }
    ui.lastClicked = w;
    drawMap();
    selectionToField(gesture);
  };
  svg.addEventListener("pointerup", finish);
  svg.addEventListener("pointerleave", () => { if (drag && drag.moved) finish({ shiftKey: false }); else drag = null; });
  svg.addEventListener("keydown", (ev) => {
    const g = ev.target.closest && ev.target.closest("[data-well]");
    if (g && (ev.key === "Enter" || ev.key === " ")) { ev.preventDefault(); goToWell(g.getAttribute("data-well")); }
  });
  for (const [id, mode] of [["map-mode-go", "go"], ["map-mode-select", "select"]]) {
    $(id).addEventListener("click", () => {
      ui.mapMode = mode;
      $("map-mode-go").setAttribute("aria-pressed", String(mode === "go"));
      $("map-mode-select").setAttribute("aria-pressed", String(mode === "select"));
    });
  }
}

async function goToWell(w) {
  if (!ui.vessel.mapped) { toast(`the stage is mapped to another vessel; ${w} of ${ui.vessel.name} has no stage position`, "warn"); return; }
  if (!ui.token) { toast("sign in to move the stage", "warn"); return; }
  $("well-input").value = w;
  toast(`moving to ${w}…`);
  await move({ well: w });
}

// -- the position viewer --------------------------------------------------------------

async function openViewer(key) {
  const d = ui.detail;
  if (!d) return;
  closeViewer();
  const page = await api(`/timelapses/${d.id}/frames?position=${encodeURIComponent(key)}&limit=1000`).catch(() => null);
  if (!page) return;
  const zs = d.plan && d.plan.z_stack ? d.plan.z_stack.count : 1;
  const plane = zs > 1 ? Math.floor(zs / 2) : 0;
  let rows = page.frames.filter((f) => f.z_index === plane && f.status === "ok");
  const kind = rows.some((f) => f.kind === "corrected") ? "corrected" : "raw";
  rows = rows.filter((f) => f.kind === kind).sort((a, b) => a.tp - b.tp);
  if (!rows.length) { toast(`no frames of ${key} yet`, "warn"); return; }
  ui.viewer = { key, frames: rows, index: rows.length - 1, timer: null };
  const well = key.replace(/-\d+$/, "");
  const cond = planConditions()[well];
  $("viewer-h").textContent = `${key} · ${plural(rows.length, "time point")}`;
  $("viewer-cond").textContent = cond ? `condition: ${cond}` : "";
  $("viewer-scrub").max = String(rows.length - 1);
  $("viewer-movie").href = `${API}/timelapses/${d.id}/positions/${encodeURIComponent(key)}/movie.mp4`;
  $("viewer-movie").setAttribute("download", `${d.name.replace(/[^A-Za-z0-9._-]+/g, "_")}-${key}.mp4`);
  $("viewer").dataset.position = key;
  showFrame(rows.length - 1);
  $("viewer").showModal();
}

function showFrame(i) {
  const vw = ui.viewer;
  if (!vw) return;
  vw.index = Math.max(0, Math.min(vw.frames.length - 1, i));
  const f = vw.frames[vw.index];
  const d = ui.detail;
  const img = $("viewer-img");
  img.src = `${API}/timelapses/${d.id}/frames/${f.id}/preview.jpg?width=${Math.min(f.width_px, 1280)}`;
  img.dataset.frame = String(f.id);
  img.dataset.tp = String(f.tp);
  $("viewer-scrub").value = String(vw.index);
  $("viewer-pos").textContent = `time point ${f.tp + 1} · ${vw.index + 1} of ${vw.frames.length}`;
  $("viewer-time").textContent = `${ago(f.t_s - d.t0_s)} after the start · ${clock(f.t_s)}`;
  $("viewer-tiff").href = `${API}/timelapses/${d.id}/frames/${f.id}`;
  drawScaleBar();
}

// Scale bar: a 1-2-5 length near a fifth of the shown width, from the pixel size and the shown scale.
function drawScaleBar() {
  const vw = ui.viewer;
  const img = $("viewer-img");
  if (!vw || !img.clientWidth) return;
  const f = vw.frames[vw.index];
  const umPerCssPx = f.pixel_size_um * f.width_px / img.clientWidth;
  const target = img.clientWidth * 0.2 * umPerCssPx;
  const nice = [1, 2, 5, 10, 20, 50, 100, 200, 500, 1000, 2000, 5000].filter((v) => v <= target);
  const um = nice.length ? nice[nice.length - 1] : 1;
  $("viewer-bar-line").style.width = `${(um / umPerCssPx).toFixed(1)}px`;
  $("viewer-bar-label").textContent = um >= 1000 ? `${um / 1000} mm` : `${um} µm`;
  $("viewer-bar").dataset.um = String(um);
}

function playViewer() {
  const vw = ui.viewer;
  if (!vw) return;
  if (vw.timer) { clearInterval(vw.timer); vw.timer = null; $("viewer-play").textContent = "Play"; return; }
  if (vw.index >= vw.frames.length - 1) showFrame(0);
  $("viewer-play").textContent = "Stop";
  vw.timer = setInterval(() => {
    if (vw.index >= vw.frames.length - 1) { clearInterval(vw.timer); vw.timer = null; $("viewer-play").textContent = "Play"; return; }
    showFrame(vw.index + 1);
  }, 400);
}

function closeViewer() {
  const vw = ui.viewer;
  if (vw && vw.timer) clearInterval(vw.timer);
  ui.viewer = null;
  if ($("viewer").open) $("viewer").close();
  $("viewer").classList.remove("full");
}

function wireViewer() {
  $("viewer-close").addEventListener("click", closeViewer);
  $("viewer").addEventListener("close", () => { const vw = ui.viewer; if (vw && vw.timer) clearInterval(vw.timer); ui.viewer = null; });
  $("viewer-scrub").addEventListener("input", () => showFrame(Number($("viewer-scrub").value)));
  $("viewer-play").addEventListener("click", playViewer);
  $("viewer-img").addEventListener("load", drawScaleBar);
  $("viewer-large").addEventListener("click", () => {
    const full = $("viewer").classList.toggle("full");
    $("viewer-large").textContent = full ? "Smaller" : "Full size";
    requestAnimationFrame(drawScaleBar);
  });
  $("viewer").addEventListener("keydown", (ev) => {
    if (ev.key === "ArrowRight") showFrame(ui.viewer.index + 1);
    if (ev.key === "ArrowLeft") showFrame(ui.viewer.index - 1);
  });
  window.addEventListener("resize", drawScaleBar);
}

// -- wells and trends -----------------------------------------------------------------

function wellHealth(pos) {
  if (pos.focus_found === 0 || pos.focus_found === false) return "warn";
  return "ok";
}

function renderWells(latest) {
  const grid = $("well-grid");
  grid.replaceChildren();
  if (!latest || !latest.length) {
    grid.append(el("p", { class: "empty" }, "No time-lapse frames yet. Start one to see every position here."));
    return;
  }
  const series = ui.series ? ui.series.positions : {};
  const conds = planConditions();
  for (const pos of latest) {
    const card = el("figure", { class: "well-card", "data-health": wellHealth(pos), "data-position": pos.key });
    const open = el("button", { type: "button", class: "card-open", title: `look through the frames of ${pos.key}` });
    const img = el("img", { alt: `latest frame of ${pos.key}`, loading: "lazy" });
    img.src = `${API}/timelapses/${ui.detail.id}/frames/${pos.id}/preview.jpg?width=320`;
    open.append(img);
    open.addEventListener("click", () => openViewer(pos.key));
    const cap = el("figcaption");
    cap.append(el("strong", {}, pos.key));
    if (conds[pos.well]) cap.append(el("span", { class: "cond-tag" }, conds[pos.well]));
    cap.append(el("span", { class: "conf" }, pos.confluence === null ? "confluence —" : `${(100 * pos.confluence).toFixed(0)} % covered`));
    cap.append(el("span", { class: "hint" }, `time point ${pos.tp + 1} · ${pos.focus_found === 0 ? "focus not found" : "in focus"}`));
    const spark = document.createElementNS("http://www.w3.org/2000/svg", "svg");
    spark.setAttribute("class", "spark-svg");
    spark.setAttribute("aria-label", `confluence of ${pos.key} over time`);
    const s = series[pos.key];
    if (s) plots().sparkline(spark, s.confluence);
    card.append(open, cap, spark);
    grid.append(card);
  }
}

// A doubling time needs data over a good part of one doubling: confluence read off a frame
// varies by a few per cent, so growth over much less than half a doubling, or under two
// hours, is within that scatter (a judgement of this program, not a published rule).
const MIN_FIT_SPAN_H = 2;
const MIN_FIT_SPAN_DOUBLINGS = 0.5;

function growthNote(label, w) {
  const g = w.growth;
  const span = w.t_h.length ? w.t_h[w.t_h.length - 1] - w.t_h[0] : 0;
  const need = Math.max(MIN_FIT_SPAN_H, g && g.ok && g.doubling_time_h ? MIN_FIT_SPAN_DOUBLINGS * g.doubling_time_h : 0);
  if (span < need) return `${label}: not enough time yet for a doubling time (${ago(span * 3600)} of data, needs ${ago(need * 3600)})`;
  if (g && g.ok && g.doubling_time_h) {
    const err = g.doubling_time_err_h ? ` ± ${g.doubling_time_err_h.toFixed(1)}` : "";
    return `${label}: doubling time ${g.doubling_time_h.toFixed(1)}${err} h (${g.model})`;
  }
  return `${label}: ${g ? g.note : "no growth fit yet"}`;
}

function renderTrends() {
  const s = ui.series;
  const conf = [], focus = [], notes = [];
  // Short runs read better in minutes, long ones in hours.
  let span = 0;
  if (s) for (const p of Object.values(s.positions)) span = Math.max(span, ...p.t_h);
  const perHour = span < 2 ? 60 : 1;
  const unit = perHour === 60 ? "min" : "h";
  let legendItems;
  if (s) {
    const labels = [];
    for (const w of Object.values(s.wells)) if (w.condition && !labels.includes(w.condition)) labels.push(w.condition);
    const grouped = labels.length > 0;
    const entries = Object.entries(s.wells).sort((a, b) => (a[1].condition || "").localeCompare(b[1].condition || "") || wellOrder(a[0], b[0]));
    entries.forEach(([well, w], i) => {
      // Grouped by condition: every well of a condition in that condition's colour.
      const cls = grouped ? `series-${(w.condition ? labels.indexOf(w.condition) : labels.length) % 6}` : `series-${i % 6}`;
      conf.push({ name: grouped ? `${well} · ${w.condition || "no condition"}` : well, cls,
        points: w.t_h.map((t, k) => [t * perHour, w.confluence[k] === null ? null : 100 * w.confluence[k]]) });
      notes.push(growthNote(w.condition ? `${well} (${w.condition})` : well, w));
    });
    if (grouped) {
      legendItems = labels.map((l, i) => ({ name: l, cls: `series-${i % 6}` }));
      if (entries.some(([, w]) => !w.condition)) legendItems.push({ name: "no condition", cls: `series-${labels.length % 6}` });
    }
    for (const [key, p] of Object.entries(s.positions)) focus.push({ name: key, points: p.t_h.map((t, i) => [t * perHour, p.focus_score[i]]) });
  }
  plots().linePlot($("conf-plot"), { series: conf, legendItems, xLabel: `time since start (${unit})`, yLabel: "confluence (%)", yMin: 0,
    xMin: 0, empty: "confluence appears here as time points come in" });
  plots().linePlot($("focus-plot"), { series: focus, xLabel: `time since start (${unit})`, yLabel: "focus score",
    xMin: 0, empty: "focus score of every frame appears here" });
  $("growth-notes").textContent = notes.join(" · ");
}

// -- alerts and the verdict -----------------------------------------------------------

async function refreshAlerts() {
  const out = await api("/alerts?limit=50").catch(() => null);
  if (!out) return;
  ui.alerts = out.alerts;
  renderAlerts();
}

function renderAlerts() {
  const ul = $("alert-list");
  ul.replaceChildren();
  const shown = [...ui.alerts].reverse().slice(0, 30);
  $("alert-count").textContent = String(ui.alerts.filter((a) => a.level !== "info").length);
  if (!shown.length) {
    ul.append(el("li", { class: "empty" }, "No alerts."));
    return;
  }
  for (const a of shown) {
    const li = el("li", { "data-level": a.level });
    li.append(el("span", { class: "when" }, clock(a.t_s)), el("span", { class: "what" }, a.message));
    ul.append(li);
  }
}

function renderVerdict() {
  const box = $("verdict");
  const list = $("verdict-list");
  list.replaceChildren();
  const s = ui.status;
  if (!s) {
    box.dataset.level = "neutral";
    $("verdict-answer").textContent = ui.canView ? "Looking…" : "Sign in to see the cultures.";
    return;
  }
  const d = ui.detail;
  const active = s.active_timelapse;
  const issues = [];
  if (d) {
    const t0 = d.t0_s;
    const recent = ui.alerts.filter((a) => a.timelapse_id === d.id && a.level !== "info");
    for (const a of recent.slice(-4)) issues.push({ level: a.level === "error" ? "bad" : "warn", text: a.message });
    for (const pos of d.latest || []) {
      if (pos.focus_found === 0) issues.push({ level: "warn", text: `${pos.key}: focus not found at time point ${pos.tp + 1}` });
    }
    const passage = ui.alerts.filter((a) => a.timelapse_id === d.id && a.kind === "confluence_reached");
    for (const a of passage.slice(-3)) issues.push({ level: "info", text: a.message });
    void t0;
  }
  const worst = issues.some((i) => i.level === "bad") ? "bad" : (issues.some((i) => i.level === "warn") ? "warn" : "good");
  if (!active) {
    box.dataset.level = d && worst !== "good" ? worst : "neutral";
    $("verdict-answer").textContent = d
      ? `No time-lapse is watching them now. The last one, #${d.id} "${d.name}", is ${d.state}.`
      : "Nothing is watching them yet. Start a time-lapse below and this page keeps an eye on every well.";
  } else {
    const wells = d ? new Set((d.latest || []).map((p) => p.well)).size : 0;
    const last = d && d.latest && d.latest.length ? Math.max(...d.latest.map((p) => p.t_s)) : null;
    const lastText = last ? `, last looked ${ago(s.clock_s - last)} ago` : ", first look under way";
    box.dataset.level = worst;
    if (worst === "good") {
      $("verdict-answer").textContent = wells
        ? `Yes — all ${wells} well${wells === 1 ? "" : "s"} look fine${lastText}.`
        : `Watching: time-lapse "${active.name}" has started${lastText}.`;
    } else {
      const n = issues.filter((i) => i.level !== "info").length;
      $("verdict-answer").textContent = `${n} thing${n === 1 ? " needs" : "s need"} a look${lastText}:`;
    }
    if (active.state === "paused") issues.unshift({ level: "warn", text: "the time-lapse is paused: no time points are being taken" });
  }
  for (const i of issues.slice(0, 6)) list.append(el("li", { "data-level": i.level }, i.text));
}

// -- events ---------------------------------------------------------------------------

function connectEvents() {
  if (ui.ws && ui.ws.readyState <= 1) return;
  const proto = location.protocol === "https:" ? "wss" : "ws";
  const ws = new WebSocket(`${proto}://${location.host}${API}/events`);
  ui.ws = ws;
  ws.onmessage = (m) => {
    let ev;
    try { ev = JSON.parse(m.data); } catch (e) { return; }
    switch (ev.type) {
      case "focus_start":
        if (!(ui.curveResult && ui.curveResult.run === ev.run)) { ui.curve = []; ui.curveResult = null; drawCurve(); }
        break;
      case "focus_point":
        // Points of a run whose result is drawn already (the reply can overtake its last events) are skipped.
        if (ev.source === "manual" && !(ui.curveResult && ui.curveResult.run === ev.run)) {
          ui.curve.push([ev.z_um, ev.score]); drawCurve();
        }
        break;
      case "alert":
        ui.alerts.push(ev); renderAlerts(); renderVerdict();
        if (ev.level !== "info") toast(ev.message, ev.level === "error" ? "error" : "warn");
        break;
      case "frame": case "time_point": case "state":
        scheduleTimelapseRefresh(); break;
      case "progress":
        scheduleTimelapseRefresh(1500); break;
      case "stage":
        refreshStatus(); break;
      default: break;
    }
  };
  ws.onclose = () => { setTimeout(() => { if (ui.canView) connectEvents(); }, 3000); };
}

// -- start ----------------------------------------------------------------------------

let started = false;
async function startAll() {
  await refreshStatus();
  if (!ui.canView) return;
  if (started) { startLive(); return; }
  started = true;
  startLive();
  connectEvents();
  drawCurve();
  await Promise.all([refreshAlerts(), refreshTimelapse(), refreshCalibration(), loadVessel(null)]);
  const demo = await api("/plans/demo").catch(() => null);
  if (demo && !$("tl-f-name").value) {
    fillForm(demo.plan);
    $("tl-estimate").textContent = `Demo plan. ${describeEstimate(demo)}`;
  }
  renderConditions();
  setInterval(refreshStatus, 2000);
  setInterval(refreshTimelapse, 15000);
  setInterval(refreshAlerts, 30000);
}

function wire() {
  $("signin-btn").addEventListener("click", openSignin);
  $("signin-form").addEventListener("submit", (ev) => {
    const d = $("signin");
    if (d.returnValue === "cancel" || ev.submitter && ev.submitter.value === "cancel") return;
    ev.preventDefault();
    d.close();
    signIn($("token-input").value);
  });
  $("live-toggle").addEventListener("click", () => (ui.liveOn ? stopLive() : startLive()));
  $("live-img").addEventListener("error", () => {
    if (ui.liveOn) setTimeout(() => { if (ui.liveOn) startLive(); }, 3000);
  });
  $("well-form").addEventListener("submit", (ev) => {
    ev.preventDefault();
    const w = $("well-input").value.trim();
    if (w) move({ well: w });
  });
  for (const b of document.querySelectorAll("[data-jog]")) {
    b.addEventListener("click", () => {
      const [dx, dy] = b.dataset.jog.split(",").map(Number);
      const step = Number($("xy-step").value);
      const body = { mode: "relative" };
      if (dx) body.x_um = dx * step;
      if (dy) body.y_um = dy * step;
      move(body);
    });
  }
  for (const b of document.querySelectorAll("[data-zjog]")) {
    b.addEventListener("click", () => move({ mode: "relative", z_um: Number(b.dataset.zjog) * Number($("z-step").value) }));
  }
  for (const id of ["abs-x", "abs-y", "abs-z"]) $(id).addEventListener("input", () => { $(id).dataset.touched = "yes"; });
  $("abs-form").addEventListener("submit", (ev) => {
    ev.preventDefault();
    const body = {};
    for (const [id, key] of [["abs-x", "x_um"], ["abs-y", "y_um"], ["abs-z", "z_um"]]) {
      const v = $(id).value;
      if (v !== "") body[key] = Number(v);
    }
    move(body);
  });
  $("af-btn").addEventListener("click", () => runAutofocus(false));
  $("af-wide").addEventListener("click", () => runAutofocus(true));
  $("tl-form").addEventListener("submit", startTimelapse);
  $("cal-dark").addEventListener("click", () => calibrate("dark"));
  $("cal-flat").addEventListener("click", () => calibrate("flat"));
  $("tl-check").addEventListener("click", checkPlan);
  $("tl-pause").addEventListener("click", () => control("pause"));
  $("tl-resume").addEventListener("click", () => control("resume"));
  $("tl-abort").addEventListener("click", () => control("abort"));
  $("tl-export").addEventListener("click", exportTimelapse);
  for (const id of ["tl-f-interval", "tl-f-duration"]) {
    $(id).addEventListener("input", () => { ui.lastEstimate = null; renderTiming(); scheduleCheck(); });
  }
  $("tl-f-wells").addEventListener("change", () => { selectionFromField(); scheduleCheck(); });
  $("tl-f-vessel").addEventListener("change", () => loadVessel($("tl-f-vessel").value.trim()));
  $("tl-f-sites").addEventListener("change", scheduleCheck);
  $("cond-apply").addEventListener("click", () => applyCondition(false));
  $("cond-clear").addEventListener("click", () => applyCondition(true));
  wireMap();
  wireViewer();
}

document.addEventListener("DOMContentLoaded", async () => {
  wire();
  const fromUrl = tokenFromFragment();
  if (fromUrl) {
    await signIn(fromUrl);
    return;
  }
  if (ui.token) {
    if (await signIn(ui.token)) return;
  }
  await startAll();
  if (!ui.token) {
    if (!ui.canView) openSignin();
    else $("signin-btn").textContent = "Sign in to control";
  }
});
