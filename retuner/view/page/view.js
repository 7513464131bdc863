// The classroom view: follows /events (server-sent events) and draws each frame into elements
// it keeps, so nothing is rebuilt and nothing flickers. Read-only: the page sends nothing back.
"use strict";

const MAX_ROWS = 6;          // interval rows that fit the screen in large type
const FAST = 20;             // Hz: faster beats are shown as "fast" (a screen cannot show them)
const PURE = 0.05;           // Hz: slower is shown as pure (no pulse)
const STALE_MS = 3000;       // no frame for this long: the view server is not answering

const $ = (id) => document.getElementById(id);
const state = { lastFrame: 0, keyboard: "", rows: new Map(), cards: new Map(), beats: new Map() };

function signed(v, digits) {
  if (v === null || v === undefined) return "--";
  if (Math.abs(v) < 0.5 * Math.pow(10, -digits)) v = 0;
  return (v >= 0 ? "+" : "") + v.toFixed(digits);
}

function setText(el, text) {
  if (el.textContent !== text) el.textContent = text;
}

function el(tag, cls, text) {
  const e = document.createElement(tag);
  if (cls) e.className = cls;
  if (text !== undefined) e.textContent = text;
  return e;
}

// ---- header and banners
function drawHeader(f) {
  const body = document.body;
  const daemon = f.daemon;
  if (body.dataset.daemon !== daemon) body.dataset.daemon = daemon;
  setText($("status"), {live: "LIVE", stopped: "DAEMON STOPPED", waiting: "WAITING FOR THE DAEMON"}[daemon]);
  setText($("tuning-name"), f.profile || "?");
  setText($("adaptive-value"), f.adaptive ? "ON" : "OFF");
  setText($("drift-value"), f.drift_cents === null ? "--" : signed(f.drift_cents, 1) + " c");
  let ref = f.concert_pitch_hz ? "A4 = " + f.concert_pitch_hz + " Hz" : "A4 as profile";
  if (f.transpose_semitones || f.transpose_cents) ref += "   transpose " + signed(f.transpose_semitones, 0) + " st " + signed(f.transpose_cents, 1) + " c";
  setText($("reference-value"), ref);
  let banner = "";
  if (daemon === "stopped") banner = "The daemon has stopped. This page follows it again as soon as it starts.";
  else if (daemon === "waiting") banner = "Waiting for the daemon: start it with 'retuner run'.";
  else if (f.message) banner = f.message;
  const b = $("banner");
  setText(b, banner);
  b.hidden = banner === "";
}

// ---- sounding notes as cards
function drawNotes(f) {
  const box = $("notes");
  const seen = new Set();
  f.notes.forEach((n, i) => {
    seen.add(n.key);
    let card = state.cards.get(n.key);
    if (!card) {
      card = el("div", "note");
      card.dataset.key = n.key;
      card.append(el("div", "name"), el("div", "cents"), el("div", "hz"));
      state.cards.set(n.key, card);
    }
    setText(card.children[0], n.name);
    setText(card.children[1], signed(n.offset_cents, 2) + " c");
    setText(card.children[2], n.hz ? n.hz.toFixed(2) + " Hz" : "");
    if (box.children[i] !== card) box.insertBefore(card, box.children[i] || null);
  });
  for (const [key, card] of state.cards) {
    if (!seen.has(key)) { card.remove(); state.cards.delete(key); }
  }
  $("no-notes").hidden = f.notes.length > 0;
  if (f.notes.length === 0 && $("no-notes").parentNode !== box) box.append($("no-notes"));
}

// ---- keyboard
const BLACK = new Set([1, 3, 6, 8, 10]);

function buildKeyboard(lo, hi) {
  const kb = $("keyboard");
  kb.textContent = "";
  const whites = [];
  for (let k = lo; k <= hi; k++) if (!BLACK.has(k % 12)) whites.push(k);
  const w = 100 / whites.length;
  let wi = 0;
  for (let k = lo; k <= hi; k++) {
    const key = el("div", "key");
    key.dataset.key = k;
    if (BLACK.has(k % 12)) {
      key.classList.add("black");
      key.style.left = (wi * w - w * 0.32) + "%";
      key.style.width = (w * 0.64) + "%";
    } else {
      key.classList.add("white");
      key.style.left = (wi * w) + "%";
      key.style.width = w + "%";
      if (k % 12 === 0) key.append(el("span", "c-label", "C" + (Math.floor(k / 12) - 1)));
      wi++;
    }
    kb.append(key);
  }
}

function drawKeyboard(f) {
  let lo = 36, hi = 96;                       // C2..C7, widened for notes outside it
  for (const n of f.notes) { lo = Math.min(lo, n.key - (n.key % 12)); hi = Math.max(hi, n.key + 12 - (n.key % 12)); }
  lo = Math.max(0, lo); hi = Math.min(127, hi);
  const range = lo + "-" + hi;
  if (state.keyboard !== range) { buildKeyboard(lo, hi); state.keyboard = range; }
  const on = new Set(f.notes.map((n) => n.key));
  for (const key of $("keyboard").children) {
    key.classList.toggle("on", on.has(Number(key.dataset.key)));
  }
}

// ---- intervals with their beat pulses
function drawIntervals(f) {
  const body = $("interval-rows");
  let rows = f.intervals.slice();
  if (rows.length > MAX_ROWS) rows = rows.filter((r) => r.consonant).concat(rows.filter((r) => !r.consonant));
  const shown = rows.slice(0, MAX_ROWS);
  const seen = new Set();
  shown.forEach((r, i) => {
    const id = r.low + "-" + r.high;
    seen.add(id);
    let tr = state.rows.get(id);
    if (!tr) {
      tr = el("tr");
      tr.dataset.pair = id;
      const dot = el("span", "dot");
      const pulse = el("td", "pulse");
      pulse.append(dot);
      tr.append(pulse, el("td", "pair"), el("td", "name"), el("td", "ratio"), el("td", "dev"), el("td", "beats"));
      state.rows.set(id, tr);
    }
    tr.classList.toggle("dissonant", !r.consonant);
    const c = tr.children;
    setText(c[1], r.pair);
    setText(c[2], r.interval);
    setText(c[3], r.ratio);
    setText(c[4], signed(r.deviation_cents, 2) + " c");
    setText(c[5], r.beat_rate_hz.toFixed(2) + " Hz");
    const dot = c[0].firstChild;
    dot.classList.toggle("pure", r.beat_rate_hz < PURE);
    dot.classList.toggle("fast", r.beat_rate_hz > FAST);
    state.beats.set(id, r.beat_rate_hz);
    dot.dataset.hz = r.beat_rate_hz.toFixed(2);
    if (body.children[i] !== tr) body.insertBefore(tr, body.children[i] || null);
  });
  for (const [id, tr] of state.rows) {
    if (!seen.has(id)) { tr.remove(); state.rows.delete(id); state.beats.delete(id); }
  }
  const more = f.intervals.length - shown.length;
  setText($("more"), more > 0 ? "+ " + more + " more intervals" : (f.intervals.length ? "" : "no intervals"));
}

function pulse(now) {
  const t = now / 1000;
  for (const [id, tr] of state.rows) {
    const f = state.beats.get(id);
    const dot = tr.firstChild.firstChild;
    if (f >= PURE && f <= FAST) {
      // one bright moment per beat: the loudness of two beating tones peaks f times a second
      const level = 0.5 + 0.5 * Math.cos(2 * Math.PI * f * t);
      dot.style.background = "rgba(255,255,255," + level.toFixed(3) + ")";
    } else if (dot.style.background) {
      dot.style.background = "";
    }
  }
  requestAnimationFrame(pulse);
}

// ---- the stream
function draw(f) {
  state.lastFrame = Date.now();
  drawHeader(f);
  drawNotes(f);
  drawKeyboard(f);
  drawIntervals(f);
}

function watchServer() {
  if (Date.now() - state.lastFrame > STALE_MS) {
    document.body.dataset.daemon = "unknown";
    setText($("status"), "VIEW SERVER NOT ANSWERING");
    const b = $("banner");
    setText(b, "The view server does not answer: is 'retuner watch --web' still running?");
    b.hidden = false;
  }
}

const source = new EventSource("events");
source.onmessage = (ev) => draw(JSON.parse(ev.data));
state.lastFrame = Date.now();
setInterval(watchServer, 500);
requestAnimationFrame(pulse);
