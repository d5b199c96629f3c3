# ruff: noqa: E501 - the page's markup, style and script read best with their own line lengths
"""The review page: HTML, CSS and JavaScript served by ``review_server``.

Kept as string constants so the page ships inside the Python package with no data-file
configuration. It loads nothing from elsewhere (the server's Content-Security-Policy
forbids it) and speaks only to the JSON API of docs/review-serve.md. All text from the
store is put into the page with ``textContent``, never parsed as HTML.
"""

from __future__ import annotations

__all__ = ["PAGE_HTML", "PAGE_CSS", "PAGE_JS"]

PAGE_HTML = """<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>callsieve review</title>
<link rel="stylesheet" href="/static/review.css">
<script src="/static/review.js" defer></script>
</head>
<body>
<header class="top">
  <div class="brand">callsieve <span>review</span></div>
  <div id="sample-line" class="sample-line">loading the sample…</div>
  <div class="who">reviewer <strong id="reviewer-name">–</strong>
    <button type="button" id="change-reviewer" class="link">change</button></div>
</header>
<div id="notice" class="notice" role="alert" hidden></div>
<main id="layout" class="layout" hidden>
  <section class="stage">
    <div class="item-head">
      <h1 id="item-title">Item</h1>
      <span id="item-status" class="chip"></span>
      <span id="item-double" class="chip chip-double" hidden>double review</span>
      <span id="item-others" class="chip chip-muted" hidden></span>
    </div>
    <figure class="spectrogram">
      <img id="spectrogram" alt="Spectrogram of the detection, with context on each side">
      <figcaption id="no-image" hidden>No image was rendered for this item.</figcaption>
    </figure>
    <div class="player" role="group" aria-label="Audio">
      <button type="button" id="play" class="tool" aria-keyshortcuts="Space"><span id="play-label">&#9654; Play</span> <kbd>Space</kbd></button>
      <button type="button" id="loop" class="tool toggle" aria-pressed="false" aria-keyshortcuts="L">&#8635; Loop <kbd>L</kbd></button>
      <div class="seg" id="rates" role="group" aria-label="Playback speed">
        <span class="seg-label">Speed <kbd>S</kbd></span>
      </div>
      <div class="seg" id="clip-choice" role="group" aria-label="Clip">
        <span class="seg-label">Clip <kbd>C</kbd></span>
      </div>
      <span id="heard" class="heard"></span>
      <audio id="audio" controls preload="auto"></audio>
    </div>
    <dl id="facts" class="facts"></dl>
    <div class="strip-wrap">
      <div class="strip-head"><span>Your order</span>
        <span class="legend"><i class="sq open"></i>to judge <i class="sq done-yes"></i>yes
        <i class="sq done-no"></i>no <i class="sq done-unsure"></i>unsure
        <i class="sq others"></i>with others</span></div>
      <div id="strip" class="strip" role="list"></div>
    </div>
  </section>
  <aside class="panel">
    <div class="card decide">
      <p class="question" id="question">Is this the call?</p>
      <div class="verdicts">
        <button type="button" class="verdict v-yes" data-verdict="yes" aria-pressed="false" aria-keyshortcuts="Y"><span class="mark">&#10003;</span>Yes<kbd>Y</kbd></button>
        <button type="button" class="verdict v-no" data-verdict="no" aria-pressed="false" aria-keyshortcuts="N"><span class="mark">&#10007;</span>No<kbd>N</kbd></button>
        <button type="button" class="verdict v-unsure" data-verdict="unsure" aria-pressed="false" aria-keyshortcuts="U"><span class="mark">?</span>Unsure<kbd>U</kbd></button>
      </div>
      <label class="field" for="call-type">Heard another call type instead? <kbd>T</kbd></label>
      <select id="call-type"><option value="">(none)</option></select>
      <label class="field" for="note">Note <kbd>E</kbd></label>
      <textarea id="note" rows="2" maxlength="2000" placeholder="optional, saved with your verdict; Enter saves"></textarea>
      <div id="saved" class="saved" aria-live="polite">no verdict yet</div>
      <div class="nav">
        <button type="button" id="prev" class="tool" aria-keyshortcuts="ArrowLeft">&#9664; Previous <kbd>&larr;</kbd></button>
        <button type="button" id="next" class="tool" aria-keyshortcuts="ArrowRight">Next <kbd>&rarr;</kbd> &#9654;</button>
      </div>
      <label class="check"><input type="checkbox" id="auto" checked> go to the next item after a verdict <kbd>A</kbd></label>
    </div>
    <div class="card">
      <h2>Progress</h2>
      <div class="bar-row"><span>Sample</span><div class="bar"><i id="bar-all"></i></div><span id="txt-all" class="num"></span></div>
      <div class="bar-row"><span>You</span><div class="bar mine"><i id="bar-mine"></i></div><span id="txt-mine" class="num"></span></div>
      <p id="mine-line" class="small"></p>
      <table class="strata">
        <thead><tr><th>Stratum</th><th id="edges-head">Confidence</th><th>Complete</th><th title="yes / no / unsure">&#10003; / &#10007; / ?</th></tr></thead>
        <tbody id="strata-body"></tbody>
      </table>
    </div>
    <div class="card">
      <h2>Agreement</h2>
      <p id="kappa" class="small">no item judged by two reviewers yet</p>
    </div>
    <details class="card keys">
      <summary>Keys</summary>
      <table>
        <tr><td><kbd>Y</kbd> <kbd>N</kbd> <kbd>U</kbd></td><td>yes, no, unsure (saved at once)</td></tr>
        <tr><td><kbd>&larr;</kbd> <kbd>&rarr;</kbd></td><td>previous, next item</td></tr>
        <tr><td><kbd>Space</kbd></td><td>play or pause</td></tr>
        <tr><td><kbd>L</kbd> <kbd>S</kbd> <kbd>C</kbd></td><td>loop, speed, normal or compressed clip</td></tr>
        <tr><td><kbd>T</kbd> <kbd>E</kbd></td><td>another call type, note (<kbd>Esc</kbd> leaves the field)</td></tr>
        <tr><td><kbd>A</kbd></td><td>auto-advance on or off</td></tr>
      </table>
    </details>
  </aside>
</main>
<div id="signin" class="overlay" hidden>
  <form id="signin-form" class="dialog">
    <h2>Who is reviewing?</h2>
    <p>Your name is saved with each of your verdicts. Use letters, digits, _ . - or @ (up to 64).</p>
    <input id="signin-name" autocomplete="off" spellcheck="false" aria-label="Reviewer name">
    <button type="submit" class="tool primary">Start</button>
    <p id="signin-error" class="error" role="alert"></p>
  </form>
</div>
</body>
</html>
"""

PAGE_CSS = """
:root {
  --ink: #1b2631; --muted: #5a6875; --line: #d5dce3; --bg: #eef1f4; --card: #ffffff;
  --head: #1f2d3a; --accent: #2d6a8a; --accent-soft: #e2eef5;
  --yes: #1d7348; --no: #a3303b; --unsure: #7d6412;
}
* { box-sizing: border-box; }
html, body { margin: 0; background: var(--bg); color: var(--ink);
  font: 15px/1.4 system-ui, -apple-system, "Segoe UI", Roboto, "Noto Sans", "DejaVu Sans", sans-serif; }
kbd { font: 11px/1 ui-monospace, "DejaVu Sans Mono", monospace; border: 1px solid currentColor;
  border-radius: 3px; padding: 1px 4px; margin-left: 6px; opacity: .7; }
button { font: inherit; cursor: pointer; }
button:disabled { cursor: default; opacity: .45; }
.top { display: flex; align-items: center; gap: 24px; padding: 10px 20px; background: var(--head); color: #e8eef3; }
.brand { font-weight: 700; letter-spacing: .02em; font-size: 17px; }
.brand span { font-weight: 400; opacity: .75; }
.sample-line { flex: 1; color: #c3d0db; font-size: 14px; }
.who { font-size: 14px; color: #c3d0db; }
.who strong { color: #fff; }
.link { background: none; border: none; color: #9fcbe3; text-decoration: underline; padding: 0 4px; }
.notice { margin: 12px 20px 0; padding: 10px 14px; border-radius: 6px; background: #fff4d6;
  border: 1px solid #e2c56f; }
.notice.bad { background: #fbe3e5; border-color: #d88a92; }
.notice.good { background: #e1f2e8; border-color: #8cc4a2; }
.layout { display: grid; grid-template-columns: minmax(0, 1fr) 360px; gap: 16px; padding: 16px 20px 24px; align-items: start; }
.stage, .card { background: var(--card); border: 1px solid var(--line); border-radius: 8px; }
.stage { padding: 14px 16px; min-width: 0; }
.item-head { display: flex; align-items: baseline; gap: 10px; flex-wrap: wrap; }
.item-head h1 { font-size: 18px; margin: 0 6px 8px 0; }
.chip { font-size: 12px; padding: 2px 8px; border-radius: 10px; background: var(--accent-soft); color: var(--accent);
  border: 1px solid #b9d4e3; }
.chip:empty { display: none; }
.chip.st-done { background: #e3f1e9; color: var(--yes); border-color: #a8d0b8; }
.chip-double { background: #efe8f7; color: #5b3f86; border-color: #cdbbe3; }
.chip-muted { background: #f0f2f4; color: var(--muted); border-color: var(--line); }
.spectrogram { margin: 0; background: #fff; border: 1px solid var(--line); border-radius: 6px; overflow: hidden; min-height: 120px;
  display: flex; align-items: center; justify-content: center; }
.spectrogram img { display: block; width: 100%; height: auto; max-height: 56vh; object-fit: contain; }
.spectrogram figcaption { color: var(--muted); padding: 40px; }
.player { display: flex; align-items: center; gap: 10px; flex-wrap: wrap; margin: 12px 0 6px; }
.player audio { flex: 1 1 260px; height: 36px; min-width: 220px; }
.tool { background: #f6f8fa; border: 1px solid #c4cdd6; border-radius: 6px; padding: 6px 12px; color: var(--ink); }
.tool:hover:not(:disabled) { background: #e9eef3; }
.tool.primary { background: var(--accent); color: #fff; border-color: var(--accent); }
.toggle[aria-pressed="true"] { background: var(--accent); color: #fff; border-color: var(--accent); }
.seg { display: inline-flex; align-items: center; border: 1px solid #c4cdd6; border-radius: 6px; overflow: hidden; }
.seg-label { font-size: 13px; color: var(--muted); padding: 0 8px; }
.seg button { border: none; border-left: 1px solid #c4cdd6; background: #f6f8fa; padding: 6px 10px; }
.seg button[aria-pressed="true"] { background: var(--accent); color: #fff; }
.heard { font-size: 13px; color: var(--muted); }
.facts { display: grid; grid-template-columns: repeat(auto-fill, minmax(180px, 1fr)); gap: 8px 18px; margin: 12px 0 4px; }
.facts div { border-left: 3px solid var(--accent-soft); padding-left: 8px; }
.facts dt { font-size: 12px; color: var(--muted); text-transform: uppercase; letter-spacing: .04em; }
.facts dd { margin: 0; font-variant-numeric: tabular-nums; overflow-wrap: anywhere; }
.facts .wide { grid-column: span 2; }
.facts .warn dd { color: var(--no); font-weight: 600; }
.strip-wrap { margin-top: 14px; border-top: 1px solid var(--line); padding-top: 10px; }
.strip-head { display: flex; justify-content: space-between; font-size: 13px; color: var(--muted); margin-bottom: 6px; flex-wrap: wrap; gap: 8px; }
.legend { display: inline-flex; align-items: center; gap: 4px; }
.legend .sq { margin-left: 8px; }
.strip { display: flex; flex-wrap: wrap; gap: 3px; }
.sq { display: inline-block; width: 14px; height: 14px; border-radius: 3px; border: 1px solid #8a98a5; padding: 0; }
.sq.open { background: #fff; }
.sq.done-yes { background: var(--yes); border-color: var(--yes); }
.sq.done-no { background: var(--no); border-color: var(--no); }
.sq.done-unsure { background: #d9b64a; border-color: var(--unsure); }
.sq.others { background: repeating-linear-gradient(45deg, #dde3e8 0 3px, #fff 3px 6px); border-color: #b5c0ca; }
.strip .sq.current { outline: 2px solid var(--ink); outline-offset: 1px; }
.panel { display: flex; flex-direction: column; gap: 12px; min-width: 0; }
.card { padding: 14px 16px; }
.card h2 { font-size: 14px; margin: 0 0 8px; text-transform: uppercase; letter-spacing: .05em; color: var(--muted); }
.question { font-size: 16px; font-weight: 600; margin: 0 0 10px; }
.verdicts { display: grid; grid-template-columns: repeat(3, 1fr); gap: 8px; margin-bottom: 12px; }
.verdict { display: flex; flex-direction: column; align-items: center; gap: 2px; padding: 10px 4px;
  border-radius: 8px; border: 2px solid; background: #fff; font-weight: 600; }
.verdict .mark { font-size: 22px; line-height: 1; }
.verdict kbd { margin: 2px 0 0; }
.v-yes { color: var(--yes); border-color: var(--yes); }
.v-no { color: var(--no); border-color: var(--no); }
.v-unsure { color: var(--unsure); border-color: var(--unsure); border-style: dashed; }
.verdict:hover { background: #f5f7f9; }
.verdict[aria-pressed="true"] { color: #fff; }
.v-yes[aria-pressed="true"] { background: var(--yes); }
.v-no[aria-pressed="true"] { background: var(--no); }
.v-unsure[aria-pressed="true"] { background: var(--unsure); }
.field { display: block; font-size: 13px; color: var(--muted); margin: 8px 0 4px; }
select, textarea, .dialog input { width: 100%; font: inherit; padding: 6px 8px; border: 1px solid #c4cdd6;
  border-radius: 6px; background: #fff; color: var(--ink); }
textarea { resize: vertical; }
.saved { font-size: 13px; color: var(--muted); margin: 8px 0; min-height: 1.4em; }
.saved.ok { color: var(--yes); }
.saved.bad { color: var(--no); }
.nav { display: flex; gap: 8px; }
.nav .tool { flex: 1; }
.check { display: flex; align-items: center; gap: 6px; font-size: 13px; margin-top: 10px; color: var(--muted); }
.bar-row { display: grid; grid-template-columns: 60px 1fr 92px; align-items: center; gap: 8px; margin: 6px 0; font-size: 13px; }
.bar { height: 10px; background: #e6eaee; border-radius: 5px; overflow: hidden; }
.bar i { display: block; height: 100%; width: 0; background: var(--accent); }
.bar.mine i { background: #5b3f86; }
.num { text-align: right; font-variant-numeric: tabular-nums; color: var(--muted); }
.small { font-size: 13px; color: var(--muted); margin: 6px 0; }
.strata { width: 100%; border-collapse: collapse; font-size: 13px; font-variant-numeric: tabular-nums; margin-top: 6px; }
.strata th { text-align: left; font-weight: 600; color: var(--muted); border-bottom: 1px solid var(--line); padding: 4px 2px; }
.strata td { padding: 4px 2px; border-bottom: 1px solid #eef1f4; }
.strata .minibar { display: inline-block; width: 48px; height: 6px; background: #e6eaee; border-radius: 3px;
  vertical-align: middle; margin-right: 4px; overflow: hidden; }
.strata .minibar i { display: block; height: 100%; background: var(--accent); }
.keys summary { cursor: pointer; font-size: 14px; color: var(--muted); text-transform: uppercase; letter-spacing: .05em; font-weight: 600; }
.keys table { font-size: 13px; margin-top: 8px; }
.keys td { padding: 3px 6px 3px 0; vertical-align: top; }
.keys kbd { margin-left: 0; }
.overlay { position: fixed; inset: 0; background: rgba(20, 30, 40, .55); display: flex; align-items: center; justify-content: center; }
.overlay[hidden], [hidden] { display: none !important; }
.dialog { background: #fff; border-radius: 10px; padding: 22px 24px; width: min(420px, 92vw); }
.dialog h2 { margin: 0 0 6px; font-size: 18px; }
.dialog p { color: var(--muted); font-size: 14px; }
.dialog .tool { margin-top: 12px; }
.error { color: var(--no); font-size: 13px; min-height: 1em; }
@media (max-width: 980px) { .layout { grid-template-columns: 1fr; } }
"""

PAGE_JS = r"""
"use strict";
(() => {
  const $ = (id) => document.getElementById(id);
  const RATES = [0.5, 1, 2, 4];
  const S = {
    reviewer: null, session: null, order: [], status: new Map(), index: 0, item: null,
    rate: 1, clipIndex: 0, saving: false, loading: 0, timer: null,
  };

  // -- talking to the server ------------------------------------------------------------
  async function api(path, options) {
    const r = await fetch(path, Object.assign({ cache: "no-store" }, options || {}));
    let body = null;
    try { body = await r.json(); } catch (e) { body = null; }
    if (!r.ok) throw new Error((body && body.error) || ("HTTP " + r.status));
    return body;
  }
  const withReviewer = (path) => path + (path.includes("?") ? "&" : "?") + "reviewer=" + encodeURIComponent(S.reviewer);

  function notice(text, kind) {
    const n = $("notice");
    n.textContent = text || "";
    n.className = "notice" + (kind ? " " + kind : "");
    n.hidden = !text;
  }

  // -- formatting -----------------------------------------------------------------------
  const num = (x, digits) => (x === null || x === undefined ? "–" : Number(x).toFixed(digits));
  // Probabilities crowd near 1: up to 4 decimals, as few as tell them apart (at least 2).
  const prob = (x) => (x === null || x === undefined ? "–" : Number(x).toFixed(4).replace(/(\.\d\d\d*?)0+$/, "$1"));
  function utc(iso) {
    if (!iso) return "–";
    return iso.replace("T", " ").replace("Z", " UTC");
  }
  function el(tag, attrs, text) {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) e.setAttribute(k, v);
    if (text !== undefined) e.textContent = text;
    return e;
  }

  // -- signing in -----------------------------------------------------------------------
  function askName(message) {
    $("signin").hidden = false;
    $("signin-error").textContent = message || "";
    const input = $("signin-name");
    input.value = S.reviewer || "";
    input.focus();
  }
  async function useName(name) {
    name = (name || "").trim();
    try {
      await api("/api/session?reviewer=" + encodeURIComponent(name));
    } catch (e) {
      askName(e.message);
      return;
    }
    S.reviewer = name;
    try { localStorage.setItem("callsieve.reviewer", name); } catch (e) { /* private mode */ }
    const url = new URL(location.href);
    url.searchParams.set("reviewer", name);
    history.replaceState(null, "", url);
    $("signin").hidden = true;
    await start();
  }

  // -- the session ----------------------------------------------------------------------
  async function start() {
    $("reviewer-name").textContent = S.reviewer;
    const s = await api(withReviewer("/api/session"));
    S.session = s;
    const parts = ["sample " + s.sample_id, "run " + s.run_id, s.items + " items"];
    if (s.blind) parts.push("blind: confidence and class hidden");
    if (s.double_review_items) parts.push(s.double_review_items + " for double review");
    $("sample-line").textContent = parts.join(" · ");
    $("question").textContent = "Is this call " + s.label + "?";
    const sel = $("call-type");
    sel.replaceChildren(el("option", { value: "" }, "(none)"));
    // "background" is no call type: a reviewer who hears none says No.
    for (const c of s.classes) if (c !== s.label && c !== "background") sel.append(el("option", { value: c }, c));
    $("edges-head").textContent = s.blind ? "" : "Confidence";
    const q = await api(withReviewer("/api/queue"));
    S.order = q.items.map((i) => i.detection_id);
    applyQueue(q);
    $("layout").hidden = false;
    if (!S.order.length) { notice("This sample has no items."); return; }
    if (q.open === 0) notice("Every item open to you is judged; you can still change any of your verdicts.", "good");
    else notice("");
    await show(0);
    refreshProgress();
    if (!S.timer) {
      // Others work at the same time: their progress shows up without a reload.
      S.timer = setInterval(() => { if (!document.hidden) refreshProgress(); }, 20000);
    }
  }

  function applyQueue(q) {
    for (const i of q.items) S.status.set(i.detection_id, i);
    drawStrip();
  }

  function drawStrip() {
    const strip = $("strip");
    strip.replaceChildren();
    S.order.forEach((id, k) => {
      const st = S.status.get(id) || { status: "open" };
      const cls = st.status === "done" ? "done-" + st.verdict : st.status;
      const b = el("button", { type: "button", class: "sq " + cls + (k === S.index ? " current" : ""),
        role: "listitem", title: "item " + (k + 1) + ": " + (st.status === "done" ? "your verdict " + st.verdict : st.status === "open" ? "to judge" : "covered by others"),
        "aria-label": "item " + (k + 1) });
      b.addEventListener("click", () => { b.blur(); show(k); });
      strip.append(b);
    });
  }

  // -- one item -------------------------------------------------------------------------
  async function show(k) {
    if (k < 0 || k >= S.order.length) return;
    S.index = k;
    const id = S.order[k];
    const token = ++S.loading;  // keys pressed quickly: only the last item asked for is shown
    let item;
    try {
      item = await api(withReviewer("/api/items/" + id));
    } catch (e) {
      notice("Could not load item " + id + ": " + e.message, "bad");
      return;
    }
    if (token !== S.loading) return;
    S.item = item;
    $("item-title").textContent = "Item " + (k + 1) + " of " + S.order.length;
    const st = S.status.get(id);
    const chip = $("item-status");
    chip.className = "chip" + (item.mine ? " st-done" : "");
    chip.textContent = item.mine ? "judged by you" : (st && st.status === "others" ? "covered by others" : "to judge");
    $("item-double").hidden = !item.double_review;
    const others = item.reviewers - (item.mine ? 1 : 0);
    $("item-others").hidden = others <= 0;
    $("item-others").textContent = others + " other verdict" + (others === 1 ? "" : "s");
    const img = $("spectrogram");
    if (item.image) { img.src = item.image; img.hidden = false; $("no-image").hidden = true; }
    else { img.removeAttribute("src"); img.hidden = true; $("no-image").hidden = false; }
    drawFacts(item);
    drawClips(item);
    drawMine(item.mine);
    $("prev").disabled = k === 0;
    $("next").disabled = k === S.order.length - 1;
    drawStrip();
  }

  function drawFacts(item) {
    const f = item.facts;
    const rows = [
      ["File", f.file, f.deployment],
      ["Start", utc(f.start_utc), "ISO 8601: " + f.start_utc],
      ["Duration", num(f.duration_s, 2) + " s", "from " + num(f.start_s, 2) + " s into the file"],
      ["Band", num(f.low_hz, 0) + "–" + num(f.high_hz, 0) + " Hz"],
      ["Received level", num(f.received_level_db, 1) + " dB re 1 µPa", "in-band rms SPL"],
      ["SNR", num(f.snr_db, 1) + " dB", "against the local noise floor"],
    ];
    if (f.label !== undefined) rows.push(["Class", f.label]);
    if (f.confidence !== undefined) rows.push(["Confidence", prob(f.confidence)]);
    if (f.stratum !== undefined) rows.push(["Stratum", String(f.stratum)]);
    rows.push(["Detection", "#" + item.detection_id]);
    if (item.clip_gain_db !== null && item.clip_gain_db !== undefined)
      rows.push(["Clip gain", (item.clip_gain_db >= 0 ? "+" : "") + num(item.clip_gain_db, 1) + " dB", "normalised for listening"]);
    if (f.clipped) rows.push(["Clipped", "yes: the recording reached full scale", null, true]);
    if (f.superseded) rows.push(["Superseded", "the file was scored again since", null, true]);
    const dl = $("facts");
    dl.replaceChildren();
    for (const [k, v, title, warn] of rows) {
      const d = el("div", warn ? { class: "warn" } : k === "File" ? { class: "wide" } : {});
      d.append(el("dt", {}, k));
      const dd = el("dd", title ? { title: title } : {}, v === null || v === undefined ? "–" : String(v));
      d.append(dd);
      dl.append(d);
    }
  }

  // -- audio ----------------------------------------------------------------------------
  function drawRates() {
    const box = $("rates");
    box.querySelectorAll("button").forEach((b) => b.remove());
    for (const r of RATES) {
      const b = el("button", { type: "button", "aria-pressed": String(r === S.rate) }, r + "×");
      b.addEventListener("click", () => { b.blur(); setRate(r); });
      box.append(b);
    }
  }
  function setRate(r) {
    S.rate = r;
    const a = $("audio");
    a.preservesPitch = false;  // faster playback raises the pitch, like time compression
    a.playbackRate = r;
    drawRates();
    drawHeard();
  }
  function drawClips(item) {
    const box = $("clip-choice");
    box.querySelectorAll("button").forEach((b) => b.remove());
    box.hidden = item.clips.length < 2;
    if (S.clipIndex >= item.clips.length) S.clipIndex = 0;
    item.clips.forEach((c, k) => {
      const b = el("button", { type: "button", "aria-pressed": String(k === S.clipIndex) }, c.label);
      b.title = k === 0 ? "the recording at its own speed" : "time-compressed: every frequency raised " + c.label;
      b.addEventListener("click", () => { b.blur(); setClip(k); });
      box.append(b);
    });
    setClip(S.clipIndex, false);
  }
  function setClip(k, keepPlaying) {
    const item = S.item;
    const a = $("audio");
    if (!item || !item.clips.length) { a.removeAttribute("src"); a.load(); drawHeard(); return; }
    const playing = !a.paused;
    S.clipIndex = k;
    a.src = item.clips[k].url;
    a.preservesPitch = false;
    a.playbackRate = S.rate;
    a.defaultPlaybackRate = S.rate;
    a.loop = $("loop").getAttribute("aria-pressed") === "true";
    $("clip-choice").querySelectorAll("button").forEach((b, i) => b.setAttribute("aria-pressed", String(i === k)));
    if (playing && keepPlaying !== false) a.play().catch(() => {});
    drawHeard();
  }
  function drawHeard() {
    const item = S.item;
    if (!item || !item.clips.length) { $("heard").textContent = "no clip"; return; }
    const speed = (item.clips[S.clipIndex].speed || 1) * S.rate;
    $("heard").textContent = speed === 1 ? "heard at its own pitch" : "heard ×" + Number(speed.toFixed(2)) + " faster, pitch ×" + Number(speed.toFixed(2));
  }
  function togglePlay() {
    const a = $("audio");
    if (!a.src) return;
    if (a.paused) a.play().catch(() => {}); else a.pause();
  }
  function toggleLoop() {
    const b = $("loop");
    const on = b.getAttribute("aria-pressed") !== "true";
    b.setAttribute("aria-pressed", String(on));
    $("audio").loop = on;
  }

  // -- verdicts -------------------------------------------------------------------------
  function drawMine(mine) {
    document.querySelectorAll(".verdict").forEach((b) =>
      b.setAttribute("aria-pressed", String(!!mine && b.dataset.verdict === mine.verdict)));
    $("note").value = mine ? mine.note : "";
    $("call-type").value = mine && mine.call_type ? mine.call_type : "";
    const saved = $("saved");
    saved.className = "saved" + (mine ? " ok" : "");
    saved.textContent = mine ? "saved: " + mine.verdict + (mine.call_type ? " (" + mine.call_type + ")" : "") + " at " + utc(mine.recorded_utc) : "no verdict yet";
  }

  async function give(verdict, advance) {
    if (!S.item || S.saving) return;
    S.saving = true;
    const id = S.item.detection_id;
    const body = { reviewer: S.reviewer, detection_id: id, verdict: verdict,
      note: $("note").value, call_type: $("call-type").value || null };
    try {
      const saved = await api("/api/verdicts", { method: "POST", headers: { "Content-Type": "application/json" }, body: JSON.stringify(body) });
      if (S.item && S.item.detection_id === id) {
        S.item.mine = { verdict: saved.verdict, note: saved.note, call_type: saved.call_type, recorded_utc: saved.recorded_utc };
        drawMine(S.item.mine);
        const chip = $("item-status");
        chip.className = "chip st-done";
        chip.textContent = "judged by you";
      }
      S.status.set(id, Object.assign({}, S.status.get(id) || {}, { status: "done", verdict: saved.verdict }));
      drawStrip();
      refreshProgress();
      if (advance && $("auto").checked) await nextOpen();
    } catch (e) {
      const s = $("saved");
      s.className = "saved bad";
      s.textContent = "NOT saved: " + e.message;
    } finally {
      S.saving = false;
    }
  }

  async function nextOpen() {
    let q;
    try { q = await api(withReviewer("/api/queue")); } catch (e) { return; }
    applyQueue(q);
    const n = S.order.length;
    for (let step = 1; step <= n; step++) {
      const k = (S.index + step) % n;
      const st = S.status.get(S.order[k]);
      if (st && st.status === "open") { await show(k); return; }
    }
    notice("Every item open to you is judged. Thank you! You can still change any verdict with ← and →.", "good");
  }

  // -- progress and agreement -----------------------------------------------------------
  async function refreshProgress() {
    let p, a;
    try {
      [p, a] = await Promise.all([api(withReviewer("/api/progress")), api("/api/agreement")]);
    } catch (e) { return; }
    const o = p.overall;
    $("bar-all").style.width = (o.items ? 100 * o.complete / o.items : 0) + "%";
    $("txt-all").textContent = o.complete + " / " + o.items + " done";
    const m = p.mine;
    const mineTotal = m.judged + m.open;
    $("bar-mine").style.width = (mineTotal ? 100 * m.judged / mineTotal : 0) + "%";
    $("txt-mine").textContent = m.judged + " judged";
    $("mine-line").textContent = "You: " + m.verdicts.yes + " yes, " + m.verdicts.no + " no, " + m.verdicts.unsure + " unsure; " +
      m.open + " still open to you. Team: " + p.reviewers.length + " reviewer" + (p.reviewers.length === 1 ? "" : "s") + ".";
    const body = $("strata-body");
    body.replaceChildren();
    for (const s of p.strata) {
      const tr = el("tr");
      tr.append(el("td", {}, String(s.stratum)));
      tr.append(el("td", {}, S.session && S.session.blind ? "" : prob(s.low) + "–" + prob(s.high)));
      const td = el("td");
      const bar = el("span", { class: "minibar" });
      const fill = el("i");
      fill.style.width = (s.items ? 100 * s.complete / s.items : 0) + "%";
      bar.append(fill);
      td.append(bar, document.createTextNode(s.complete + "/" + s.items));
      tr.append(td);
      tr.append(el("td", {}, s.verdicts.yes + " / " + s.verdicts.no + " / " + s.verdicts.unsure));
      body.append(tr);
    }
    const k = a.overall;
    $("kappa").textContent = k.kappa === null
      ? (k.n ? k.n + " items judged twice; kappa undefined (one category throughout)" : "no item judged by two reviewers yet")
      : "Cohen's κ = " + num(k.kappa, 2) + " (95 % interval " + num(k.low, 2) + " to " + num(k.high, 2) + "), " +
        "agreement " + num(100 * k.observed, 0) + " % over " + k.n + " items judged by two reviewers";
  }

  // -- wiring ---------------------------------------------------------------------------
  function bind() {
    document.querySelectorAll(".verdict").forEach((b) =>
      b.addEventListener("click", () => { b.blur(); give(b.dataset.verdict, true); }));
    $("prev").addEventListener("click", (e) => { e.currentTarget.blur(); show(S.index - 1); });
    $("next").addEventListener("click", (e) => { e.currentTarget.blur(); show(S.index + 1); });
    $("play").addEventListener("click", (e) => { e.currentTarget.blur(); togglePlay(); });
    $("loop").addEventListener("click", (e) => { e.currentTarget.blur(); toggleLoop(); });
    const a = $("audio");
    a.addEventListener("play", () => { $("play-label").textContent = "❚❚ Pause"; });
    a.addEventListener("pause", () => { $("play-label").textContent = "▶ Play"; });
    // A note or another call type given after the verdict is saved with that verdict at once.
    const resave = () => { if (S.item && S.item.mine) give(S.item.mine.verdict, false); };
    $("note").addEventListener("change", resave);
    $("call-type").addEventListener("change", resave);
    $("change-reviewer").addEventListener("click", () => askName(""));
    $("signin-form").addEventListener("submit", (e) => { e.preventDefault(); useName($("signin-name").value); });
    document.addEventListener("keydown", onKey);
    drawRates();
  }

  function onKey(e) {
    if (e.ctrlKey || e.metaKey || e.altKey) return;
    const t = e.target;
    const typing = t && (t.tagName === "TEXTAREA" || t.tagName === "INPUT" || t.tagName === "SELECT");
    if (typing) {
      if (e.key === "Escape" || (e.key === "Enter" && t.id === "note" && !e.shiftKey)) { e.preventDefault(); t.blur(); }
      return;
    }
    if (!$("signin").hidden || !S.item) return;
    const key = e.key.length === 1 ? e.key.toLowerCase() : e.key;
    const actions = {
      y: () => give("yes", true), n: () => give("no", true), u: () => give("unsure", true),
      ArrowRight: () => show(S.index + 1), ArrowLeft: () => show(S.index - 1),
      " ": togglePlay, l: toggleLoop,
      s: () => setRate(RATES[(RATES.indexOf(S.rate) + 1) % RATES.length]),
      c: () => { if (S.item.clips.length > 1) setClip((S.clipIndex + 1) % S.item.clips.length); },
      a: () => { $("auto").checked = !$("auto").checked; },
      t: () => $("call-type").focus(), e: () => $("note").focus(),
    };
    if (actions[key]) { e.preventDefault(); actions[key](); }
  }

  async function boot() {
    bind();
    const fromUrl = new URL(location.href).searchParams.get("reviewer");
    let stored = null;
    try { stored = localStorage.getItem("callsieve.reviewer"); } catch (e) { /* private mode */ }
    let first;
    try { first = await api("/api/session"); } catch (e) { notice("The server cannot be reached: " + e.message, "bad"); return; }
    const name = fromUrl || stored || first.default_reviewer;
    if (name) await useName(name); else askName("");
  }
  boot();
})();
"""
