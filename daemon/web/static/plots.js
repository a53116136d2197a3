// Small SVG line plots for the interface: axes with round ticks, several series, markers.
// No library: the scope has no internet, and these plots need little.
"use strict";

const SVG_NS = "http://www.w3.org/2000/svg";

function svgEl(name, attrs, parent) {
  const el = document.createElementNS(SVG_NS, name);
  for (const [k, v] of Object.entries(attrs || {})) el.setAttribute(k, String(v));
  if (parent) parent.appendChild(el);
  return el;
}

// Round tick values covering [lo, hi]: steps of 1, 2 or 5 times a power of ten.
function niceTicks(lo, hi, wanted) {
  if (!(isFinite(lo) && isFinite(hi))) return [];
  if (hi - lo < 1e-12) { hi = lo + 1; lo = lo - 1; }
  const raw = (hi - lo) / Math.max(1, wanted);
  const mag = Math.pow(10, Math.floor(Math.log10(raw)));
  const step = [1, 2, 5, 10].map((m) => m * mag).find((s) => s >= raw) || 10 * mag;
  const ticks = [];
  for (let t = Math.ceil(lo / step) * step; t <= hi + step * 1e-9; t += step) ticks.push(+t.toPrecision(12));
  return ticks;
}

function fmtTick(v) {
  const a = Math.abs(v);
  if (a !== 0 && (a >= 1e5 || a < 1e-3)) return v.toExponential(1);
  return String(+v.toPrecision(4));
}

// plot(svg, {series: [{name, points: [[x, y], ...], cls}], xLabel, yLabel, marks: [{x, label, cls}],
//            yMin, yMax, empty})
function linePlot(svg, opts) {
  while (svg.firstChild) svg.removeChild(svg.firstChild);
  const legendItems = opts.legendItems || opts.series.map((s, i) => ({ name: s.name, cls: s.cls || `series-${i % 6}` }));
  const legend = opts.legend !== false && legendItems.length > 1;
  const W = 560, H = 240, L = 58, R = 14, T = legend ? 30 : 14, B = 40;
  svg.setAttribute("role", "img");
  const all = [];
  for (const s of opts.series) for (const p of s.points) if (p[1] !== null && isFinite(p[1])) all.push(p);
  if (!all.length) {
    svg.setAttribute("viewBox", `0 0 ${W} 70`);
    svgEl("text", { x: W / 2, y: 40, class: "plot-empty", "text-anchor": "middle" }, svg).textContent =
      opts.empty || "nothing yet";
    return;
  }
  svg.setAttribute("viewBox", `0 0 ${W} ${H}`);
  let x0 = Math.min(...all.map((p) => p[0])), x1 = Math.max(...all.map((p) => p[0]));
  if (opts.xMin !== undefined) x0 = Math.min(x0, opts.xMin);
  let y0 = opts.yMin !== undefined ? opts.yMin : Math.min(...all.map((p) => p[1]));
  let y1 = opts.yMax !== undefined ? opts.yMax : Math.max(...all.map((p) => p[1]));
  for (const m of opts.marks || []) if (isFinite(m.x)) { x0 = Math.min(x0, m.x); x1 = Math.max(x1, m.x); }
  if (x1 - x0 < 1e-9) { x0 -= 1; x1 += 1; }
  if (y1 - y0 < 1e-12) { const pad = Math.abs(y0) * 0.1 || 1; y0 -= pad; y1 += pad; }
  const padY = (y1 - y0) * 0.06;
  if (opts.yMin === undefined) y0 -= padY;
  if (opts.yMax === undefined) y1 += padY;
  const sx = (x) => L + ((x - x0) / (x1 - x0)) * (W - L - R);
  const sy = (y) => H - B - ((y - y0) / (y1 - y0)) * (H - T - B);
  const axes = svgEl("g", { class: "plot-axes" }, svg);
  for (const t of niceTicks(y0, y1, 4)) {
    svgEl("line", { x1: L, x2: W - R, y1: sy(t), y2: sy(t), class: "plot-grid" }, axes);
    svgEl("text", { x: L - 6, y: sy(t) + 4, "text-anchor": "end" }, axes).textContent =
      opts.yFormat ? opts.yFormat(t) : fmtTick(t);
  }
  for (const t of niceTicks(x0, x1, 6)) {
    svgEl("line", { x1: sx(t), x2: sx(t), y1: H - B, y2: H - B + 4, class: "plot-tick" }, axes);
    svgEl("text", { x: sx(t), y: H - B + 16, "text-anchor": "middle" }, axes).textContent = fmtTick(t);
  }
  svgEl("line", { x1: L, x2: W - R, y1: H - B, y2: H - B, class: "plot-frame" }, axes);
  svgEl("line", { x1: L, x2: L, y1: T, y2: H - B, class: "plot-frame" }, axes);
  if (opts.xLabel) svgEl("text", { x: (L + W - R) / 2, y: H - 6, "text-anchor": "middle", class: "plot-label" }, axes).textContent = opts.xLabel;
  if (opts.yLabel) {
    svgEl("text", { x: 14, y: (T + H - B) / 2, "text-anchor": "middle", class: "plot-label",
      transform: `rotate(-90 14 ${(T + H - B) / 2})` }, axes).textContent = opts.yLabel;
  }
  for (const m of opts.marks || []) {
    if (!isFinite(m.x)) continue;
    svgEl("line", { x1: sx(m.x), x2: sx(m.x), y1: T, y2: H - B, class: `plot-mark ${m.cls || ""}` }, svg);
    if (m.label) {
      // Labels near the right edge go on the left of their line, so they stay inside the plot.
      const right = sx(m.x) > L + 0.8 * (W - L - R);
      svgEl("text", { x: sx(m.x) + (right ? -4 : 4), y: T + 10 + (m.row || 0) * 12, "text-anchor": right ? "end" : "start",
        class: `plot-mark-label ${m.cls || ""}` }, svg).textContent = m.label;
    }
  }
  opts.series.forEach((s, i) => {
    const pts = s.points.filter((p) => p[1] !== null && isFinite(p[1]));
    const cls = s.cls || `series-${i % 6}`;
    if (s.line !== false && pts.length > 1) {
      const sorted = s.sortX === false ? pts : [...pts].sort((a, b) => a[0] - b[0]);
      svgEl("polyline", { points: sorted.map((p) => `${sx(p[0]).toFixed(1)},${sy(p[1]).toFixed(1)}`).join(" "),
        class: `plot-line ${cls}` }, svg);
    }
    for (const p of pts) svgEl("circle", { cx: sx(p[0]), cy: sy(p[1]), r: s.dotRadius || 3, class: `plot-dot ${cls}` }, svg);
  });
  if (legend) {
    const g = svgEl("g", { class: "plot-legend" }, svg);
    let x = L + 4;
    legendItems.forEach((s) => {
      const cls = s.cls;
      svgEl("rect", { x, y: 6, width: 10, height: 10, class: `plot-swatch ${cls}` }, g);
      const t = svgEl("text", { x: x + 14, y: 15 }, g);
      t.textContent = s.name;
      x += 24 + 7 * s.name.length;
    });
  }
}

// A sparkline: a small filled line without axes, for well cards. The range is the data's
// own (a culture near 40 % that grows by 3 % still shows its rise); the last value is dotted.
function sparkline(svg, values) {
  while (svg.firstChild) svg.removeChild(svg.firstChild);
  const W = 160, H = 36;
  svg.setAttribute("viewBox", `0 0 ${W} ${H}`);
  svg.setAttribute("preserveAspectRatio", "none");
  const v = values.filter((x) => x !== null && isFinite(x));
  svgEl("line", { x1: 0, x2: W, y1: H - 1, y2: H - 1, class: "spark-base" }, svg);
  if (!v.length) return;
  let lo = Math.min(...v), hi = Math.max(...v);
  if (hi - lo < 0.02) { const mid = (hi + lo) / 2; lo = mid - 0.01; hi = mid + 0.01; }
  const x = (i) => (v.length === 1 ? W / 2 : 4 + (i / (v.length - 1)) * (W - 8));
  const y = (c) => H - 4 - ((c - lo) / (hi - lo)) * (H - 8);
  const pts = v.map((c, i) => `${x(i).toFixed(1)},${y(c).toFixed(1)}`);
  if (v.length > 1) {
    svgEl("polygon", { points: `${x(0)},${H - 1} ${pts.join(" ")} ${x(v.length - 1)},${H - 1}`, class: "spark-area" }, svg);
    svgEl("polyline", { points: pts.join(" "), class: "spark" }, svg);
  }
  svgEl("circle", { cx: x(v.length - 1), cy: y(v[v.length - 1]), r: 3, class: "spark-dot" }, svg);
}

window.phasewatchPlots = { linePlot, sparkline, niceTicks };
