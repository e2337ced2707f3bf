// scenemon stage view: draws the session's windows as they arrive on the event stream.
// Served by scenemon itself; it fetches nothing else. The token comes from the page's link.
"use strict";

(function () {
  const token = new URLSearchParams(location.search).get("k") || "";
  const UNKNOWN = "#7d8591";
  const listeners = {};
  const state = {
    session: null, history: [], lanes: [], told: null, ended: false, last: null,
  };

  function on(kind, fn) { (listeners[kind] = listeners[kind] || []).push(fn); }
  function emit(kind, data) { (listeners[kind] || []).forEach((fn) => fn(data)); }
  const $ = (id) => document.getElementById(id);

  function colourOf(label) {
    const s = state.session;
    if (!s || label == null) return UNKNOWN;
    const i = s.classes.indexOf(label);
    return i < 0 ? UNKNOWN : s.colours[i];
  }
  function keyOf(label) {
    const s = state.session;
    if (!s || label == null) return "·";
    const i = s.classes.indexOf(label);
    return i < 0 ? "?" : s.keys[i];
  }
  function words(label) { return label == null ? "" : String(label).replace(/_/g, " "); }

  function clock(t) {
    t = Math.max(0, Math.floor(t || 0));
    const h = Math.floor(t / 3600), m = Math.floor((t % 3600) / 60), s = t % 60;
    return `${h}:${String(m).padStart(2, "0")}:${String(s).padStart(2, "0")}`;
  }
  function held(seconds) {
    const s = Math.max(0, Math.round(seconds));
    if (s < 60) return `for ${s} s`;
    if (s < 3600) return `for ${Math.floor(s / 60)} min ${String(s % 60).padStart(2, "0")} s`;
    return `for ${Math.floor(s / 3600)} h ${String(Math.floor((s % 3600) / 60)).padStart(2, "0")} min`;
  }

  // --- link state ---------------------------------------------------------------------
  function link(kind, text) {
    const el = $("link");
    el.dataset.state = kind;
    $("link-text").textContent = text;
  }

  // --- lanes (one per model) ------------------------------------------------------------
  function buildLanes() {
    const s = state.session;
    const host = $("lanes");
    host.textContent = "";
    state.lanes = [];
    const n = s.names.length;
    host.classList.toggle("two", n > 1);
    for (let k = 0; k < n; k++) {
      const node = $("lane-template").content.firstElementChild.cloneNode(true);
      node.querySelector(".lane-name").textContent = n > 1 ? `model ${"AB"[k]} · ${s.names[k]}` : "";
      const probs = node.querySelector(".probs");
      const rows = s.classes.map((c, i) => {
        const row = document.createElement("div");
        row.className = "prob";
        row.style.setProperty("--c", s.colours[i]);
        const key = document.createElement("span");
        key.className = "pkey";
        key.textContent = s.keys[i];
        const name = document.createElement("span");
        name.className = "pname";
        name.textContent = words(c);
        const track = document.createElement("span");
        track.className = "ptrack";
        const fill = document.createElement("span");
        fill.className = "pfill";
        track.appendChild(fill);
        const val = document.createElement("span");
        val.className = "pval";
        row.append(key, name, track, val);
        probs.appendChild(row);
        return { fill, val };
      });
      host.appendChild(node);
      state.lanes.push({ node, rows, d: undefined, since: 0, p: null, unf: false });
    }
    $("waiting").hidden = true;
  }

  // the largest size the stylesheet allows at which the key and the decided word fit the lane
  // (text width is proportional to the font size, so one measurement gives the size)
  function fit(lane, word) {
    word.style.removeProperty("--fit");
    const row = lane.querySelector(".decided"), key = lane.querySelector(".key");
    const gap = parseFloat(getComputedStyle(row).columnGap) || 0;
    const room = lane.clientWidth - (key.hidden ? 0 : key.offsetWidth + gap) - 8;
    const natural = word.offsetWidth;  // a flex item of unbreakable text is never narrower
    if (natural > room && room > 0) {
      const size = parseFloat(getComputedStyle(word).fontSize) * room / natural;
      word.style.setProperty("--fit", `${Math.floor(size)}px`);
    }
  }

  function laneUpdate(lane, fig, t) {
    if (!fig) return;
    if (fig.d !== lane.d) { lane.d = fig.d; lane.since = t; }
    if (fig.p) lane.p = fig.p;
    lane.unf = !!fig.unf;
  }

  function drawLane(lane, t) {
    const n = lane.node, s = state.session;
    const d = lane.d === undefined ? null : lane.d;
    const col = d == null ? UNKNOWN : colourOf(d);
    n.style.setProperty("--c", col);
    n.dataset.decision = d == null ? "" : d;
    n.querySelector(".key").textContent = d == null ? "" : keyOf(d);
    n.querySelector(".key").hidden = d == null;
    const word = n.querySelector(".word");
    const text = d == null ? "listening" : words(d);
    if (word.textContent !== text || lane.fitWidth !== n.clientWidth) {
      word.textContent = text;
      fit(n, word);
      lane.fitWidth = n.clientWidth;
    }
    const p = lane.p && d != null ? lane.p[s.classes.indexOf(d)] : (lane.p ? Math.max(...lane.p) : null);
    n.querySelector(".held").textContent = d == null ? "" : held(t - lane.since);
    n.querySelector(".bar-fill").style.width = `${Math.round((p || 0) * 100)}%`;
    n.querySelector(".pct").textContent = p == null ? "–" : `${Math.round(p * 100)}%`;
    n.querySelector(".unfamiliar").hidden = !lane.unf;
    lane.rows.forEach((r, i) => {
      const v = lane.p ? lane.p[i] : 0;
      r.fill.style.width = `${Math.round((v || 0) * 100)}%`;
      r.val.textContent = lane.p ? (v || 0).toFixed(2) : "";
    });
  }

  // --- the recent strip ---------------------------------------------------------------
  function drawStrip() {
    const s = state.session, host = $("strip");
    if (!s) return;
    const two = s.names.length > 1;
    const cell = host.clientWidth < 500 ? 10 : host.clientWidth > 1000 ? 18 : 14;
    const fit = Math.max(8, Math.floor((host.clientWidth - 84) / cell));  // less the row's label
    const hist = state.history.slice(-fit);
    const rows = two ? [["A", (w) => w.a.d], ["B", (w) => (w.b ? w.b.d : null)]] : [["decision", (w) => w.a.d]];
    rows.push(["truth", (w) => w.truth]);
    host.textContent = "";
    host.style.setProperty("--cell", `${cell}px`);
    for (const [name, pick] of rows) {
      const row = document.createElement("div");
      row.className = "srow";
      const lab = document.createElement("span");
      lab.className = "slabel";
      lab.textContent = name;
      const cells = document.createElement("span");
      cells.className = "scells";
      for (const w of hist) {
        const c = document.createElement("span");
        const v = pick(w);
        c.className = v == null ? "scell none" : "scell";
        if (v != null) {
          c.style.background = colourOf(v);
          if (cell >= 14) c.textContent = keyOf(v);
        }
        cells.appendChild(c);
      }
      row.append(lab, cells);
      host.appendChild(row);
    }
    const secs = hist.length * (s.hop_s || 0.5);
    $("span").textContent = hist.length ? `the last ${Math.round(secs)} s` : "";
  }

  // --- drawing everything ---------------------------------------------------------------
  let pending = false;
  function draw() {
    if (pending) return;
    pending = true;
    requestAnimationFrame(() => {
      pending = false;
      const s = state.session;
      if (!s) return;
      const w = state.last;
      const t = w ? w.t : 0;
      state.lanes.forEach((lane) => drawLane(lane, t));
      const differ = state.lanes.length > 1 && state.lanes[0].d != null && state.lanes[1].d != null &&
        state.lanes[0].d !== state.lanes[1].d;
      $("differ").hidden = !differ;
      drawStrip();
      $("clock").textContent = clock(t);
      if (w && w.lvl != null) {
        const frac = Math.min(1, Math.max(0, (w.lvl + 60) / 60));
        $("meter-fill").style.width = `${Math.round(frac * 100)}%`;
        $("meter-fill").classList.toggle("hot", w.lvl > -3 || w.clip);
        $("level-text").textContent = w.clip ? "CLIPPING" : `${Math.round(w.lvl)} dBFS`;
      }
      emit("draw", state);
    });
  }

  function take(w) {
    state.history.push(w);
    if (state.history.length > 240) state.history.splice(0, state.history.length - 240);
    state.last = w;
    if (state.lanes.length) {
      laneUpdate(state.lanes[0], w.a, w.t);
      if (state.lanes[1]) laneUpdate(state.lanes[1], w.b, w.t);
    }
  }

  function setSession(info) {
    if (!info) return;
    state.session = info;
    if (info.heading) $("heading").textContent = info.heading;
    buildLanes();
    const hist = state.history;
    state.history = [];
    hist.forEach(take);
    emit("session", info);
    draw();
  }

  // --- the event stream -------------------------------------------------------------------
  let source = null, retry = null;
  function connect() {
    if (retry) { clearTimeout(retry); retry = null; }
    source = new EventSource(`events?k=${encodeURIComponent(token)}`);
    source.addEventListener("open", () => link("live", "live"));
    source.addEventListener("hello", (e) => {
      const h = JSON.parse(e.data);
      if (h.heading) $("heading").textContent = h.heading;
      state.told = h.told;
      state.history = [];
      state.last = null;
      if (h.session) {
        state.session = null;
        h.history.forEach((w) => state.history.push(w));
        setSession(h.session);
      } else {
        h.history.forEach(take);
      }
      emit("told", state.told);
      if (h.ended) ended();
      draw();
    });
    source.addEventListener("session", (e) => setSession(JSON.parse(e.data)));
    source.addEventListener("window", (e) => { take(JSON.parse(e.data)); draw(); });
    source.addEventListener("told", (e) => { state.told = JSON.parse(e.data).told; emit("told", state.told); });
    source.addEventListener("end", ended);
    source.addEventListener("error", () => {
      if (state.ended) return;
      link("lost", "reconnecting …");
      // the browser retries by itself; a stream it gave up on (a refusal) is opened again here
      if (source.readyState === EventSource.CLOSED && !retry) retry = setTimeout(connect, 3000);
    });
  }
  function ended() {
    state.ended = true;
    if (source) source.close();
    link("ended", "the session has ended");
    emit("end", state);
  }

  window.stage = { state, on, colourOf, keyOf, words, token };
  window.addEventListener("resize", draw);
  if (document.readyState === "loading") document.addEventListener("DOMContentLoaded", connect);
  else connect();
})();
