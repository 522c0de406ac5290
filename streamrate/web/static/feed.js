// The live feed for a page: one EventSource, repeats dropped, a stale state.
"use strict";

const SR = (() => {
  const params = new URLSearchParams(location.search);
  const token = params.get("token");

  function versionCmp(a, b) {
    const [am, as] = String(a).split("-").map(Number);
    const [bm, bs] = String(b).split("-").map(Number);
    return am !== bm ? am - bm : as - bs;
  }

  function keyOf(first, second, context) {
    const ctx = Object.keys(context || {}).sort().map((k) => [k, context[k]]);
    return JSON.stringify([first, second, ctx]);
  }

  function pairingKeyFromText(text, ctxItems) {
    const [a, b] = text.split(":");
    const context = {};
    for (const item of ctxItems) {
      const i = item.indexOf("=");
      if (i < 1) continue;
      let k = item.slice(0, i);
      let v = item.slice(i + 1);
      if (k.endsWith(":")) { k = k.slice(0, -1); v = Number(v); }
      context[k] = v;
    }
    return keyOf(a.split(",").filter(Boolean), (b || "").split(",").filter(Boolean), context);
  }

  function api(path, query) {
    const q = new URLSearchParams(query || []);
    if (token) q.set("token", token);
    const s = q.toString();
    return path + (s ? "?" + s : "");
  }

  async function getJSON(path, query) {
    const r = await fetch(api(path, query), { cache: "no-store" });
    if (!r.ok) throw new Error(path + ": HTTP " + r.status);
    return r.json();
  }

  // Applied-to-DOM times, read by the benchmark: [match_id, epoch ms].
  const log = [];
  function mark(matchId) {
    if (matchId == null) return;
    log.push([matchId, performance.timeOrigin + performance.now()]);
    if (log.length > 5000) log.splice(0, 1000);
  }

  // opts: pairs (texts), ctx (texts), history (bool), onUpdate(msg), onState(state, detail)
  function openFeed(opts) {
    let es = null;
    let lastId = null;
    let heartbeatS = 10;
    let lastSeen = 0;
    let feed = "starting";
    let feedDetail = "connecting";
    let state = "";
    const seen = new Map();

    function url() {
      const q = [];
      for (const p of opts.pairs) q.push(["p", p]);
      for (const c of opts.ctx || []) q.push(["ctx", c]);
      if (opts.history) q.push(["history", "1"]);
      if (lastId) q.push(["last_id", lastId]);
      return api("/api/watch", q);
    }

    function check() {
      let next = "live";
      let detail = "live";
      if (!es || es.readyState !== EventSource.OPEN) {
        next = "stale"; detail = "reconnecting to the web server";
      } else if (Date.now() - lastSeen > 2.5 * heartbeatS * 1000) {
        next = "stale"; detail = "no word from the web server";
      } else if (feed !== "ok") {
        next = "stale"; detail = feedDetail || feed;
      }
      if (next !== state || detail !== check.detail) {
        state = next; check.detail = detail;
        opts.onState(next, detail);
      }
    }

    function connect() {
      es = new EventSource(url());
      es.addEventListener("hello", (e) => {
        heartbeatS = JSON.parse(e.data).heartbeat_s;
        lastSeen = Date.now();
        check();
      });
      es.addEventListener("p", (e) => {
        lastSeen = Date.now();
        if (e.lastEventId) lastId = e.lastEventId;
        const m = JSON.parse(e.data);
        const k = keyOf(m.first, m.second, m.context);
        const have = seen.get(k);
        if (have) {
          const c = versionCmp(m.model_version, have.v);
          if (c < 0 || (c === 0 && have.p === m.p_first_wins)) return;
        }
        seen.set(k, { v: m.model_version, p: m.p_first_wins });
        opts.onUpdate(m, k);
        mark(m.match_id);
      });
      es.addEventListener("beat", (e) => {
        const b = JSON.parse(e.data);
        lastSeen = Date.now();
        feed = b.feed;
        feedDetail = b.detail;
        check();
      });
      es.onopen = check;
      es.onerror = () => {
        if (es.readyState === EventSource.CLOSED) {  // refused for good: try again later
          es.close();
          setTimeout(connect, 3000);
        }
        check();
      };
    }

    connect();
    setInterval(check, 500);
  }

  return { params, keyOf, pairingKeyFromText, api, getJSON, openFeed, log, versionCmp };
})();
