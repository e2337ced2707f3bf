// scenemon presenter page: the truth keys and the capture key, as buttons.
// Each press is one request; the session records it exactly as the terminal's key would.
"use strict";

(function () {
  const stage = window.stage;
  const $ = (id) => document.getElementById(id);
  let buttons = [];

  function say(text, bad) {
    const el = $("said");
    el.textContent = text;
    el.classList.toggle("bad", !!bad);
  }

  async function send(path, body) {
    const r = await fetch(`${path}?k=${encodeURIComponent(stage.token)}`, {
      method: "POST", headers: { "Content-Type": "application/json" },
      body: JSON.stringify(body), cache: "no-store", credentials: "omit",
    });
    let data = {};
    try { data = await r.json(); } catch (e) { data = {}; }
    return { ok: r.ok, status: r.status, data };
  }

  function classButton(c, i, onPress) {
    const s = stage.state.session;
    const b = document.createElement("button");
    b.type = "button";
    b.className = "key-btn";
    b.dataset.label = c;
    b.style.setProperty("--c", s.colours[i]);
    const k = document.createElement("span");
    k.className = "bkey";
    k.textContent = s.keys[i];
    const n = document.createElement("span");
    n.textContent = stage.words(c);
    b.append(k, n);
    b.addEventListener("click", () => onPress(c));
    return b;
  }

  async function tell(label) {
    try {
      const r = await send("truth", { label });
      if (!r.ok) { say(r.data.error || `refused (${r.status})`, true); return; }
      stage.state.told = r.data.told;
      showTold();
      say(`truth: ${r.data.told == null ? "unknown" : stage.words(r.data.told)} from ${r.data.at.toFixed(1)} s`);
    } catch (e) { say("not sent: the connection is down", true); }
  }

  async function capture(label) {
    $("ask").hidden = true;
    try {
      const r = await send("capture", label == null ? {} : { label });
      if (r.status === 409 && r.data.ask) { $("ask").hidden = false; return; }
      if (!r.ok) { say(r.data.error || `refused (${r.status})`, true); return; }
      if (!r.data.captured) { say(r.data.note || "nothing to capture yet"); return; }
      say(`captured ${r.data.captured.seconds.toFixed(1)} s as ${stage.words(r.data.captured.label)}`);
    } catch (e) { say("not sent: the connection is down", true); }
  }

  function showTold() {
    const t = stage.state.told;
    const s = stage.state.session;
    const el = $("told");
    el.textContent = t == null ? "not told" : stage.words(t);
    el.style.setProperty("--c", t == null ? "transparent" : stage.colourOf(t));
    el.classList.toggle("set", t != null);
    buttons.forEach((b) => b.classList.toggle("on", b.dataset.label === t));
    $("no-truth").classList.toggle("on", t == null && !!s && s.truth === "keys");
  }

  function build(s) {
    const keys = $("truth-keys"), ask = $("ask-keys");
    keys.textContent = "";
    ask.textContent = "";
    const live = s.truth === "keys";
    buttons = s.classes.map((c, i) => {
      const b = classButton(c, i, tell);
      b.disabled = !live;
      keys.appendChild(b);
      return b;
    });
    s.classes.forEach((c, i) => ask.appendChild(classButton(c, i, capture)));
    $("no-truth").disabled = !live;
    $("truth-file").hidden = live;
    $("capture").disabled = !s.capture;
    if (!s.capture) say("capture is off in this session");
    showTold();
  }

  stage.on("session", build);
  stage.on("told", showTold);
  stage.on("end", () => {
    document.querySelectorAll("button").forEach((b) => { b.disabled = true; });
    say("the session has ended");
  });
  $("no-truth").addEventListener("click", () => tell(null));
  $("capture").addEventListener("click", () => capture(null));
  $("ask-cancel").addEventListener("click", () => { $("ask").hidden = true; });
})();
