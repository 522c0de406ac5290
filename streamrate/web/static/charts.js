// Small SVG charts drawn by hand: a line over time, a sparkline, a binned reliability diagram.
"use strict";

const Charts = (() => {
  const NS = "http://www.w3.org/2000/svg";
  // A colour-blind-safe qualitative palette (Okabe and Ito's eight colours, minus black).
  const PALETTE = ["#2c7cc4", "#d98e00", "#009e73", "#cc79a7", "#56b4e9", "#d55e00", "#b8a200"];

  function el(name, attrs, parent) {
    const e = document.createElementNS(NS, name);
    for (const [k, v] of Object.entries(attrs || {})) e.setAttribute(k, v);
    if (parent) parent.appendChild(e);
    return e;
  }

  function clear(svg) {
    while (svg.firstChild) svg.removeChild(svg.firstChild);
  }

  function size(svg) {
    const vb = svg.viewBox.baseVal;
    if (vb && vb.width) return [vb.width, vb.height];
    const r = svg.getBoundingClientRect();
    svg.setAttribute("viewBox", `0 0 ${r.width || 300} ${r.height || 90}`);
    return [r.width || 300, r.height || 90];
  }

  function path(points) {
    return points.map((p, i) => (i ? "L" : "M") + p[0].toFixed(1) + "," + p[1].toFixed(1)).join("");
  }

  // points: [[t_ms, value]], a step line (a probability holds until the next change)
  function timeLine(svg, points, o) {
    clear(svg);
    const [w, h] = size(svg);
    const pad = { l: 38, r: 8, t: 6, b: 16 };
    const x = (t) => pad.l + ((t - o.t0) / Math.max(1, o.t1 - o.t0)) * (w - pad.l - pad.r);
    const y = (v) => pad.t + (1 - (v - o.y0) / (o.y1 - o.y0)) * (h - pad.t - pad.b);
    for (const g of o.grid || []) {
      el("line", { x1: pad.l, x2: w - pad.r, y1: y(g), y2: y(g), stroke: "#e3e6ea",
        "stroke-dasharray": g === 0.5 ? "4 3" : "" }, svg);
      el("text", { x: pad.l - 4, y: y(g) + 3.5, "text-anchor": "end" }, svg).textContent =
        o.fmt ? o.fmt(g) : String(g);
    }
    const minutes = Math.round((o.t1 - o.t0) / 60000);
    el("text", { x: pad.l, y: h - 3 }, svg).textContent = `${minutes} min ago`;
    el("text", { x: w - pad.r, y: h - 3, "text-anchor": "end" }, svg).textContent = "now";
    const shown = points.filter((p) => p[0] >= o.t0);
    const before = points.filter((p) => p[0] < o.t0).pop();
    if (before) shown.unshift([o.t0, before[1]]);
    if (!shown.length) return;
    const xy = [];
    for (let i = 0; i < shown.length; i++) {
      if (i) xy.push([x(shown[i][0]), y(shown[i - 1][1])]);
      xy.push([x(shown[i][0]), y(shown[i][1])]);
    }
    xy.push([x(o.t1), y(shown[shown.length - 1][1])]);
    el("path", { d: path(xy), fill: "none", stroke: o.colour, "stroke-width": 2,
      "stroke-linejoin": "round" }, svg);
    const last = xy[xy.length - 1];
    el("circle", { cx: last[0], cy: last[1], r: 3.5, fill: o.colour }, svg);
  }

  function spark(svg, values, colour) {
    clear(svg);
    const [w, h] = size(svg);
    const vs = values.filter((v) => v != null);
    if (vs.length < 2) return;
    const lo = Math.min(...vs);
    const hi = Math.max(...vs);
    const span = hi - lo || 1;
    const xy = [];
    values.forEach((v, i) => {
      if (v == null) return;
      xy.push([2 + (i / (values.length - 1)) * (w - 4), 3 + (1 - (v - lo) / span) * (h - 6)]);
    });
    el("path", { d: path(xy), fill: "none", stroke: colour, "stroke-width": 1.6 }, svg);
  }

  const sigmoid = (z) => 1 / (1 + Math.exp(-z));
  const logit = (p) => Math.log(p / (1 - p));

  // models: [{model, slope, intercept, bins: [{bin, forecast, observed, n}]}]; draws each
  // model's non-empty bins as points (area proportional to the events in the bin) joined by
  // a thin line, the fitted curve sigmoid(a + b logit p) dashed, and the diagonal
  function reliability(svg, models) {
    clear(svg);
    const [w, h] = size(svg);
    const pad = { l: 38, r: 10, t: 10, b: 34 };
    const x = (p) => pad.l + p * (w - pad.l - pad.r);
    const y = (p) => pad.t + (1 - p) * (h - pad.t - pad.b);
    for (const g of [0, 0.25, 0.5, 0.75, 1]) {
      el("line", { x1: x(0), x2: x(1), y1: y(g), y2: y(g), stroke: "#eceef1" }, svg);
      el("line", { x1: x(g), x2: x(g), y1: y(0), y2: y(1), stroke: "#eceef1" }, svg);
      el("text", { x: x(0) - 5, y: y(g) + 4, "text-anchor": "end" }, svg).textContent = g;
      el("text", { x: x(g), y: y(0) + 14, "text-anchor": "middle" }, svg).textContent = g;
    }
    el("text", { x: (x(0) + x(1)) / 2, y: h - 3, "text-anchor": "middle" }, svg).textContent =
      "forecast P(first wins)";
    el("text", { x: 10, y: (y(0) + y(1)) / 2, "text-anchor": "middle",
      transform: `rotate(-90 10 ${(y(0) + y(1)) / 2})` }, svg).textContent = "observed share";
    el("line", { x1: x(0), y1: y(0), x2: x(1), y2: y(1), stroke: "#9aa3ad",
      "stroke-dasharray": "5 4" }, svg);
    models.forEach((m, i) => {
      if (m.slope == null || m.intercept == null) return;
      const xy = [];
      for (let k = 1; k < 100; k++) {
        const p = k / 100;
        xy.push([x(p), y(sigmoid(m.intercept + m.slope * logit(p)))]);
      }
      el("path", { d: path(xy), fill: "none", stroke: PALETTE[i % PALETTE.length],
        "stroke-width": 1.4, "stroke-dasharray": "6 3", opacity: 0.7, "data-model": m.model }, svg);
    });
    const shown = (b) => b.n > 0 && b.forecast != null && b.observed != null;
    const most = Math.max(1, ...models.flatMap((m) => (m.bins || []).filter(shown).map((b) => b.n)));
    models.forEach((m, i) => {
      const colour = PALETTE[i % PALETTE.length];
      const bins = (m.bins || []).filter(shown);
      if (bins.length > 1) {
        el("path", { d: path(bins.map((b) => [x(b.forecast), y(b.observed)])), fill: "none",
          stroke: colour, "stroke-width": 1.2, class: "bins-line", "data-model": m.model }, svg);
      }
      for (const b of bins) {
        const c = el("circle", { cx: x(b.forecast), cy: y(b.observed), r: 2.5 + 7 * Math.sqrt(b.n / most),
          fill: colour, "fill-opacity": 0.55, stroke: colour, "stroke-width": 1.2, class: "bin",
          "data-model": m.model, "data-bin": b.bin, "data-n": b.n }, svg);
        el("title", {}, c).textContent = `${m.model}, forecasts ${b.bin / 10}\u2013${(b.bin + 1) / 10}: ` +
          `${b.n} events, mean forecast ${b.forecast.toFixed(3)}, observed ${b.observed.toFixed(3)}`;
      }
    });
  }

  // a bar of value v on [0, max] with marks at the watch / alert levels
  function levelBar(svg, v, marks, max) {
    clear(svg);
    const [w, h] = size(svg);
    const x = (u) => (Math.min(u, max) / max) * w;
    el("rect", { x: 0, y: 3, width: w, height: h - 6, rx: 3, fill: "#eef0f3" }, svg);
    const level = v >= marks[1] ? "#c4451c" : v >= marks[0] ? "#d98e00" : "#7d8894";
    if (v != null) el("rect", { x: 0, y: 3, width: Math.max(1, x(v)), height: h - 6, rx: 3, fill: level }, svg);
    for (const m of marks) el("line", { x1: x(m), x2: x(m), y1: 0, y2: h, stroke: "#1d2430",
      "stroke-width": 1, "stroke-dasharray": "2 2" }, svg);
  }

  return { PALETTE, el, clear, timeLine, spark, reliability, levelBar };
})();
