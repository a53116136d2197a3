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
  let well = p ? s.well || "between wells" : "—";
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
  $("tl-form").hidden = !!running;
  if (!d) return;
  $("tl-name").textContent = `#${d.id} ${d.name}`;
  const tp = d.time_points;
  const over = tp.done + tp.partial + tp.failed + tp.missed;
  $("tl-bar").style.width = `${Math.round(100 * (d.progress_ratio || 0))}%`;
  $("tl-points").textContent = `${over} of ${d.count} over (${tp.done} complete${tp.partial ? `, ${tp.partial} partial` : ""}${tp.failed ? `, ${tp.failed} failed` : ""})`;
  $("tl-missed").textContent = d.missed.length ? `${d.missed.length}: ${d.missed[d.missed.length - 1].reason}` : "none";
  const pr = d.progress;
  if (running && pr) {
    $("tl-now").textContent = d.state === "paused" ? "paused" :
      (pr.acquiring ? `imaging time point ${pr.time_point}, position ${(pr.position_index ?? 0) + 1} of ${pr.positions} (${pr.position})` : "waiting for the next time point");
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

function planFromForm() {
  const f = $("tl-form");
  const wells = f.wells.value.split(/[\s,;]+/).filter(Boolean);
  return {
    name: f.name.value.trim(),
    vessel: f.vessel.value.trim(),
    wells: wells.length === 1 ? wells[0] : wells,
    sites_per_well: Number(f.sites_per_well.value || 1),
    interval_s: Number(f.interval_s.value),
    count: Number(f.count.value),
    autofocus: f.autofocus.value,
    correction: f.correction.checked,
    save: f.correction.checked ? "corrected" : "raw",
  };
}

function fillForm(plan) {
  const f = $("tl-form");
  f.name.value = plan.name;
  f.vessel.value = plan.vessel;
  f.wells.value = Array.isArray(plan.wells) ? plan.wells.join(", ") : plan.wells;
  f.sites_per_well.value = plan.sites_per_well || 1;
  f.interval_s.value = plan.interval_s;
  f.count.value = plan.count;
  f.autofocus.value = plan.autofocus || "track";
  f.correction.checked = !!plan.correction;
}

function describeEstimate(check) {
  const e = check.estimate;
  const lines = [`${check.positions.length} positions; about ${e.time_point_s.toFixed(0)} s per time point (the first, with a cold focus search: ${e.first_time_point_s.toFixed(0)} s); ${(e.bytes_per_time_point / 1e6).toFixed(1)} MB per time point; runs ${ago(e.duration_s)}.`];
  for (const w of check.warnings) lines.push(`Note: ${w}`);
  return lines.join(" ");
}

async function checkPlan() {
  const out = await act("Plan", () => api("/plans/check", { method: "POST", body: planFromForm() }));
  if (out) $("tl-estimate").textContent = describeEstimate(out);
}

async function startTimelapse(ev) {
  ev.preventDefault();
  const out = await act("Start", () => api("/timelapses", { method: "POST", body: planFromForm() }));
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
  for (const pos of latest) {
    const card = el("figure", { class: "well-card", "data-health": wellHealth(pos) });
    const img = el("img", { alt: `latest frame of ${pos.key}`, loading: "lazy" });
    img.src = `${API}/timelapses/${ui.detail.id}/frames/${pos.id}/preview.jpg?width=320`;
    const cap = el("figcaption");
    cap.append(el("strong", {}, pos.key));
    cap.append(el("span", { class: "conf" }, pos.confluence === null ? "confluence —" : `${(100 * pos.confluence).toFixed(1)} % covered`));
    cap.append(el("span", { class: "hint" }, `time point ${pos.tp} · ${pos.focus_found === 0 ? "focus not found" : "in focus"}`));
    const spark = document.createElementNS("http://www.w3.org/2000/svg", "svg");
    spark.setAttribute("class", "spark-svg");
    const s = series[pos.key];
    if (s) plots().sparkline(spark, s.confluence);
    card.append(img, cap, spark);
    grid.append(card);
  }
}

function renderTrends() {
  const s = ui.series;
  const conf = [], focus = [], notes = [];
  // Short runs read better in minutes, long ones in hours.
  let span = 0;
  if (s) for (const p of Object.values(s.positions)) span = Math.max(span, ...p.t_h);
  const perHour = span < 2 ? 60 : 1;
  const unit = perHour === 60 ? "min" : "h";
  if (s) {
    for (const [well, w] of Object.entries(s.wells)) {
      conf.push({ name: well, points: w.t_h.map((t, i) => [t * perHour, w.confluence[i] === null ? null : 100 * w.confluence[i]]) });
      const g = w.growth;
      if (g && g.ok && g.doubling_time_h) notes.push(`${well}: doubling time ${g.doubling_time_h.toFixed(1)} h (${g.model})`);
      else if (g) notes.push(`${well}: ${g.note}`);
    }
    for (const [key, p] of Object.entries(s.positions)) focus.push({ name: key, points: p.t_h.map((t, i) => [t * perHour, p.focus_score[i]]) });
  }
  plots().linePlot($("conf-plot"), { series: conf, xLabel: `time since start (${unit})`, yLabel: "confluence (%)", yMin: 0,
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
      if (pos.focus_found === 0) issues.push({ level: "warn", text: `${pos.key}: focus not found at time point ${pos.tp}` });
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
  await Promise.all([refreshAlerts(), refreshTimelapse(), refreshCalibration()]);
  const demo = await api("/plans/demo").catch(() => null);
  if (demo && !$("tl-f-name").value) {
    fillForm(demo.plan);
    $("tl-estimate").textContent = `Demo plan. ${describeEstimate(demo)}`;
  }
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
