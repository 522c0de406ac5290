// Overlay: one pairing, configured entirely by the page's address.
"use strict";

(() => {
  const q = SR.params;
  const root = document.getElementById("overlay");
  const pairing = q.get("p") || "";
  const ctx = q.getAll("ctx");
  const [firstText, secondText] = pairing.split(":");
  const digits = Math.max(0, Math.min(2, Number(q.get("digits") || 0)));
  const hex = (v, dflt) => (/^[0-9a-fA-F]{6}$/.test(v || "") ? "#" + v : dflt);
  const css = document.documentElement.style;

  css.setProperty("--first", hex(q.get("ca"), "#3d8bd9"));
  css.setProperty("--second", hex(q.get("cb"), "#e69f00"));
  const scale = Number(q.get("scale"));
  if (scale > 0.2 && scale < 4) css.setProperty("--scale", String(scale));
  const width = Number(q.get("width"));
  if (width >= 400 && width <= 1900) css.setProperty("--width", width + "px");
  const pos = q.get("pos") || "bottom";
  if (/^(top|bottom)(-(left|right))?$/.test(pos)) root.className = "overlay pos-" + pos;
  if (q.get("panel") === "0") root.classList.add("no-panel");

  const nice = (ids) => (ids || "").split(",").filter(Boolean).join(" + ");
  document.getElementById("name1").textContent = q.get("a") || nice(firstText);
  document.getElementById("name2").textContent = q.get("b") || nice(secondText);
  document.getElementById("title").textContent = q.get("title") || "";
  const ctxLine = q.get("line") || ctx.map((c) => c.replace(":=", " ").replace("=", " ")).join("  \u00b7  ");
  document.getElementById("ctx").textContent = ctxLine;

  const num1 = document.getElementById("num1");
  const num2 = document.getElementById("num2");
  const fill1 = document.getElementById("fill1");
  const fill0 = document.getElementById("fill0");
  const fill2 = document.getElementById("fill2");
  const status = document.getElementById("status");
  const reduced = window.matchMedia("(prefers-reduced-motion: reduce)").matches;
  const pct = (x) => (100 * x).toFixed(digits) + "%";
  let shown = null;  // [first, second] as displayed
  let anim = 0;

  function draw(a, b) {
    num1.textContent = pct(a);
    num2.textContent = pct(b);
  }

  function tween(to) {
    cancelAnimationFrame(anim);
    const from = shown || to;
    const t0 = performance.now();
    const ms = reduced || !shown ? 0 : 900;
    const step = (now) => {
      const t = ms ? Math.min(1, (now - t0) / ms) : 1;
      const e = t < 0.5 ? 4 * t * t * t : 1 - Math.pow(-2 * t + 2, 3) / 2;
      const a = from[0] + (to[0] - from[0]) * e;
      const b = from[1] + (to[1] - from[1]) * e;
      draw(a, b);
      shown = [a, b];
      if (t < 1) anim = requestAnimationFrame(step);
      else root.dataset.shown = pct(to[0]);
    };
    anim = requestAnimationFrame(step);
    if (!ms) step(t0 + 1);
  }

  function onUpdate(m) {
    const p1 = m.p_first_wins;
    const pd = m.p_draw == null ? 0 : m.p_draw;
    const p2 = Math.max(0, 1 - p1 - pd);
    root.dataset.p = String(p1);
    root.dataset.version = m.model_version;
    root.dataset.match = m.match_id || "";
    fill1.style.width = 100 * p1 + "%";
    fill0.style.left = 100 * p1 + "%";
    fill0.style.width = 100 * pd + "%";
    fill2.style.left = 100 * (p1 + pd) + "%";
    fill2.style.width = 100 * p2 + "%";
    if (root.dataset.state === "waiting") root.dataset.state = "live";
    tween([p1, p2]);
  }

  function onState(state, detail) {
    if (state === "live" && root.dataset.p === undefined) {
      root.dataset.state = "waiting";
      status.textContent = "waiting for data";
      return;
    }
    root.dataset.state = state;
    status.textContent = state === "stale" ? "paused \u00b7 " + detail : "";
  }

  if (!pairing) {
    status.textContent = "add ?p=first:second to this address";
    return;
  }
  SR.openFeed({ pairs: [pairing], ctx, history: false, onUpdate, onState });
})();
