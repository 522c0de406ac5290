// Live board: watched pairings over time, and the service's forecast quality.
"use strict";

(() => {
  const q = SR.params;
  const minutes = Math.max(1, Math.min(24 * 60, Number(q.get("minutes") || 30)));
  const cards = new Map();  // pairing key -> {el, points}
  const fmtPct = (p) => (100 * p).toFixed(1) + "%";
  const fmt3 = (v) => (v == null ? "\u2013" : v.toFixed(3));
  document.getElementById("window").textContent = `last ${minutes} min`;

  function setState(state, detail) {
    document.body.dataset.state = state;
    const pill = document.getElementById("state");
    pill.dataset.state = state;
    pill.textContent = state === "live" ? "live" : "stale \u00b7 " + detail;
  }

  function card(text, ctx) {
    const key = SR.pairingKeyFromText(text, ctx);
    if (cards.has(key)) return;
    const [a, b] = text.split(":");
    const el = document.createElement("div");
    el.className = "card";
    el.dataset.key = key;
    el.innerHTML = '<div class="who"><span class="a"></span><span class="b"></span></div>' +
      '<div class="ctx"></div><div class="numrow"><span class="num">\u2013</span>' +
      '<span class="delta"></span></div><svg class="chart" viewBox="0 0 340 92"></svg>';
    el.querySelector(".a").textContent = a.split(",").join(" + ");
    el.querySelector(".b").textContent = "vs " + (b || "").split(",").join(" + ");
    el.querySelector(".ctx").textContent = ctx.map((c) => c.replace(":=", " ").replace("=", " ")).join(" \u00b7 ");
    document.getElementById("cards").appendChild(el);
    cards.set(key, { el, points: [] });
  }

  function redraw(c) {
    const now = Date.now();
    Charts.timeLine(c.el.querySelector("svg"), c.points, {
      t0: now - minutes * 60000, t1: now, y0: 0, y1: 1, grid: [0, 0.5, 1],
      fmt: (g) => 100 * g + "%", colour: "#2c7cc4",
    });
    const inWindow = c.points.filter((p) => p[0] >= now - minutes * 60000);
    if (inWindow.length > 1) {
      const d = 100 * (inWindow[inWindow.length - 1][1] - inWindow[0][1]);
      c.el.querySelector(".delta").textContent =
        `${d >= 0 ? "+" : "\u2212"}${Math.abs(d).toFixed(1)} pts in view`;
    }
  }

  function onUpdate(m, key) {
    const c = cards.get(key);
    if (!c) return;
    c.points.push([m.at_ms, m.p_first_wins]);
    if (c.points.length > 5000) c.points.splice(0, 1000);
    c.el.dataset.p = String(m.p_first_wins);
    c.el.dataset.version = m.model_version;
    c.el.querySelector(".num").textContent = fmtPct(m.p_first_wins);
    document.getElementById("version").textContent = "model version " + m.model_version;
    redraw(c);
  }

  function drawQuality(data) {
    const err = document.getElementById("qerror");
    if (!data.ok) {
      err.hidden = false;
      err.textContent = "Quality figures unavailable: " + data.error;
      return;
    }
    err.hidden = true;
    document.getElementById("qwhen").textContent =
      "read " + new Date(data.at_ms).toLocaleTimeString() + " from the service's metrics";
    const models = data.models;
    Charts.reliability(document.getElementById("reliability"), models);
    const legend = document.getElementById("legend");
    legend.innerHTML = "";
    models.forEach((m, i) => {
      const s = document.createElement("span");
      const swatch = s.appendChild(document.createElement("i"));
      swatch.style.background = Charts.PALETTE[i % Charts.PALETTE.length];
      s.append(m.model);
      legend.appendChild(s);
    });
    const body = document.querySelector("#models tbody");
    body.innerHTML = "";
    models.forEach((m, i) => {
      const tr = document.createElement("tr");
      tr.dataset.model = m.model;
      const cells = [m.model, m.n == null ? "\u2013" : String(Math.round(m.n)), fmt3(m.log_loss),
        fmt3(m.reference_log_loss), fmt3(m.ece), m.slope == null ? "\u2013" : m.slope.toFixed(2)];
      for (const c of cells) tr.appendChild(document.createElement("td")).textContent = c;
      const td = tr.appendChild(document.createElement("td"));
      td.className = "spark";
      const svg = Charts.el("svg", { viewBox: "0 0 180 28" }, td);
      Charts.spark(svg, data.history.map((h) => h.log_loss[m.model]), Charts.PALETTE[i % Charts.PALETTE.length]);
      body.appendChild(tr);
    });
    const psi = document.getElementById("psi");
    psi.innerHTML = data.psi.length ? "" : '<p class="empty">No drift fields reported.</p>';
    for (const r of data.psi) {
      const row = document.createElement("div");
      row.className = "row-psi";
      const verdict = r.psi == null ? "n/a" : r.psi >= 0.25 ? "major" : r.psi >= 0.1 ? "watch" : "stable";
      row.innerHTML = '<span class="what"></span><svg viewBox="0 0 300 16"></svg><span class="v"></span><span class="verdict"></span>';
      row.querySelector(".what").textContent = `${r.model} \u00b7 ${r.feature}`;
      row.querySelector(".v").textContent = fmt3(r.psi);
      const vd = row.querySelector(".verdict");
      vd.textContent = verdict;
      vd.classList.add(verdict === "major" ? "bad" : verdict === "watch" ? "watch" : "ok");
      Charts.levelBar(row.querySelector("svg"), r.psi, [0.1, 0.25], 0.4);
      psi.appendChild(row);
    }
    const change = document.getElementById("change");
    change.innerHTML = "";
    const byModel = new Map();
    for (const r of data.change) {
      if (!byModel.has(r.model)) byModel.set(r.model, []);
      byModel.get(r.model).push(r);
    }
    for (const [model, rows] of byModel) {
      const div = document.createElement("div");
      div.className = "row-change";
      const fired = rows.reduce((s, r) => s + (r.detected || 0), 0);
      const parts = rows.map((r) => `${r.direction} ${fmt3(r.statistic)}`).join(", ");
      div.innerHTML = '<span class="what"></span><span class="verdict"></span>';
      div.querySelector(".what").textContent = model;
      const vd = div.querySelector(".verdict");
      vd.textContent = (fired ? `fired ${fired} time${fired > 1 ? "s" : ""}` : "quiet") + ` \u00b7 statistic ${parts} nats`;
      if (fired) vd.classList.add("watch");
      change.appendChild(div);
    }
    if (!byModel.size) change.innerHTML = '<p class="empty">No detector reported.</p>';
  }

  async function pollQuality() {
    try {
      drawQuality(await SR.getJSON("/api/quality"));
    } catch (e) {
      drawQuality({ ok: false, error: String(e.message || e) });
    }
  }

  async function start() {
    const cfg = await SR.getJSON("/api/config");
    document.getElementById("space").textContent = "space " + cfg.space;
    let pairs = q.getAll("p");
    let ctx = q.getAll("ctx");
    if (!pairs.length && cfg.pinned.length) {
      // pinned pairings may differ in context: one feed each
      for (const p of cfg.pinned) {
        const text = p.first.join(",") + ":" + p.second.join(",");
        const c = Object.entries(p.context).map(([k, v]) => (typeof v === "number" ? `${k}:=${v}` : `${k}=${v}`));
        card(text, c);
        SR.openFeed({ pairs: [text], ctx: c, history: true, onUpdate, onState: setState });
      }
    } else if (pairs.length) {
      pairs = pairs.slice(0, cfg.max_pairings_per_client);
      for (const p of pairs) card(p, ctx);
      SR.openFeed({ pairs, ctx, history: true, onUpdate, onState: setState });
    } else {
      document.getElementById("empty").hidden = false;
      setState("stale", "nothing to watch");
    }
    setInterval(() => cards.forEach(redraw), 5000);
    if (cfg.quality) {
      pollQuality();
      setInterval(pollQuality, 5000);
    } else {
      drawQuality({ ok: false, error: "the web server was started without a metrics URL (--metrics-url)" });
    }
  }

  start().catch((e) => setState("stale", String(e.message || e)));
})();
