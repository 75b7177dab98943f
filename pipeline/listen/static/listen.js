// shotsmith listening page: cards of sounds, keyboard first, marks saved by the local server.
"use strict";

const TOKEN = new URLSearchParams(location.search).get("token") || "";
const withToken = (url) => url + (url.includes("?") ? "&" : "?") + "token=" + encodeURIComponent(TOKEN);
const $ = (id) => document.getElementById(id);

const state = { data: null, sounds: [], cards: new Map(), current: null, match: true, saving: Promise.resolve() };
const MARK_WORDS = { keep: "kept", reject: "rejected" };
const EAGER = 150; // cards whose players load at once; the rest load as they come near the view

function announce(text) {
  const box = $("announce");
  box.textContent = "";
  window.setTimeout(() => { box.textContent = text; }, 30);
}

function fmt(x, digits = 1) {
  return x === null || x === undefined ? "?" : Number(x).toFixed(digits);
}

function el(tag, attrs = {}, text = "") {
  const node = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs)) node.setAttribute(k, v);
  if (text) node.textContent = text;
  return node;
}

function whatLine(s) {
  const parts = [s.kind];
  if (s.seed !== null) parts.push("seed " + s.seed);
  if (s.kind === "interpolate" && s.step !== null) parts.push("step " + (s.step + 1) + (s.path ? " (" + s.path + ")" : ""));
  if (s.kind === "vary" && s.amount !== null) parts.push("amount " + s.amount);
  const srcs = s.sources.filter((x) => !x.startsWith("category:"));
  if (srcs.length) parts.push("from " + srcs.join(" → "));
  if (s.category) parts.push("category " + s.category + " (" + s.category_from + ")");
  return parts.join(" · ");
}

function nearLine(s) {
  const n = s.nearest;
  if (!n) return { text: s.from_model ? "No nearest training sound recorded." : "Not made from a model.", copy: false };
  let text = "Nearest training sound: " + n.name + (n.category ? " (" + n.category + ")" : "") +
    ", distance ratio " + fmt(n.distance_ratio, 2);
  if (n.near_copy) text += ". Near-copy: below " + state.data.near_copy_ratio + ", this is close to that training sound.";
  return { text, copy: n.near_copy };
}

function loudLine(s) {
  if (s.lufs === null) return "Loudness: silent (no block above the BS.1770 gate); played as written.";
  let text = "Loudness " + fmt(s.lufs) + " LUFS";
  if (s.padded) text += " (shorter than one 400 ms BS.1770 block: measured padded with silence to 400 ms)";
  text += s.gain_db < 0 ? "; matched playback " + fmt(-s.gain_db) + " dB quieter." : "; matched playback as written.";
  return text;
}

function volumeFor(gainDb) {
  return state.match ? Math.min(1, Math.pow(10, gainDb / 20)) : 1;
}

function makeCard(s, index) {
  const li = el("li", { class: "sound", tabindex: "-1", "data-id": s.id, "aria-labelledby": "t" + index, "aria-describedby": "m" + index });
  const many = state.data.folders.length > 1;
  const title = (many ? state.data.folders[s.folder].path.split("/").pop() + "/" : "") + s.file;
  const img = el("img", { src: withToken(s.thumb), alt: "Spectrogram of " + s.file, loading: "lazy", width: "320", height: "145" });
  const h = el("h2", { id: "t" + index }, title);
  const what = el("p", { class: "dim" }, whatLine(s));
  const near = nearLine(s);
  const nearP = el("p", { class: near.copy ? "copy" : "" }, near.text);
  const loud = el("p", { class: "dim loud" }, loudLine(s));
  const status = el("p", { class: "dim playing", "aria-live": "off" }, "");
  const audio = el("audio", { controls: "", preload: "metadata", "aria-label": "Player for " + s.file });
  if (index < EAGER) audio.src = withToken(s.audio);
  else audio.dataset.src = withToken(s.audio);
  audio.volume = volumeFor(s.gain_db);
  audio.addEventListener("play", () => pauseOthers(audio));
  const actions = el("div", { class: "actions", role: "group", "aria-label": "Actions for " + s.file });
  const buttons = [["play", "Play"], ["keep", "Keep"], ["reject", "Reject"], ["clear", "Clear mark"]];
  if (s.nearest && s.nearest.reference) buttons.splice(1, 0, ["nearest", "Play nearest"], ["compare", "This, then nearest"]);
  for (const [act, label] of buttons) {
    const b = el("button", { type: "button", "data-act": act }, label);
    if (act === "keep" || act === "reject") b.setAttribute("aria-pressed", "false");
    b.addEventListener("click", () => { setCurrent(li, false); run(act, s, null); });
    actions.append(b);
  }
  const mark = el("span", { class: "mark", id: "m" + index }, "");
  actions.append(mark);
  li.append(img, h, what, nearP, loud, status, audio, actions);
  li.addEventListener("focus", () => setCurrent(li, false));
  state.cards.set(s.id, { li, audio, mark, sound: s, status });
  showMark(s.id, s.mark);
  return li;
}

function showMark(id, mark) {
  const c = state.cards.get(id);
  c.sound.mark = mark;
  c.li.dataset.mark = mark || "";
  c.mark.textContent = mark ? "Mark: " + MARK_WORDS[mark] : "Mark: none";
  for (const b of c.li.querySelectorAll("button[aria-pressed]")) {
    b.setAttribute("aria-pressed", String(b.dataset.act === mark));
  }
}

function pauseOthers(playing) {
  for (const c of state.cards.values()) if (c.audio !== playing && !c.audio.paused) c.audio.pause();
  const ref = $("reference");
  if (ref !== playing && !ref.paused) ref.pause();
}

function ensureLoaded(audio) {
  if (audio.dataset.src) { audio.src = audio.dataset.src; delete audio.dataset.src; }
}

function play(audio, label) {
  ensureLoaded(audio);
  pauseOthers(audio);
  audio.currentTime = 0;
  const p = audio.play();
  if (p && p.catch) p.catch((e) => announce("Cannot play " + label + ": " + e.message));
}

async function reference(s) {
  const r = await fetch(withToken(s.nearest.reference));
  if (!r.ok) throw new Error("the nearest training sound is not available");
  const info = await r.json();
  const ref = $("reference");
  ref.src = withToken(info.audio);
  ref.volume = volumeFor(info.gain_db);
  return info;
}

async function run(act, s, li) {
  const c = state.cards.get(s.id);
  if (act === "play") {
    if (!c.audio.paused) { c.audio.pause(); announce("Stopped"); return; }
    play(c.audio, s.file);
  } else if (act === "keep" || act === "reject" || act === "clear") {
    // one request at a time, in key order, so the last key pressed is the mark saved
    state.saving = state.saving.then(() => mark(s, act === "clear" ? null : act));
    await state.saving;
  } else if ((act === "nearest" || act === "compare") && s.nearest && s.nearest.reference) {
    try {
      const info = await reference(s);
      const ref = $("reference");
      c.status.textContent = "Nearest: " + info.name + " (" + info.source + ")";
      if (act === "nearest") {
        play(ref, info.name);
        announce("Playing the nearest training sound, " + info.name);
      } else {
        c.audio.addEventListener("ended", () => play(ref, info.name), { once: true });
        play(c.audio, s.file);
        announce("Playing " + s.file + ", then " + info.name);
      }
    } catch (e) {
      announce(e.message);
      c.status.textContent = e.message;
    }
  }
  if (li) li.focus({ preventScroll: true });
}

async function mark(s, value) {
  try {
    const r = await fetch(withToken("/api/pick"), {
      method: "POST",
      headers: { "Content-Type": "application/json" },
      body: JSON.stringify({ folder: s.folder, file: s.file, state: value }),
    });
    const body = await r.json();
    if (!r.ok) throw new Error(body.error || "status " + r.status);
    showMark(s.id, value);
    announce((value ? MARK_WORDS[value] + ": " : "mark cleared: ") + s.file);
    updateSummary();
  } catch (e) {
    announce("Not saved: " + e.message);
  }
}

function visibleCards() {
  return [...$("sounds").children].filter((li) => !li.hidden);
}

function setCurrent(li, focus = true) {
  if (!li) return;
  if (state.current && state.current !== li) {
    state.current.classList.remove("current");
    state.current.tabIndex = -1;
  }
  state.current = li;
  li.classList.add("current");
  li.tabIndex = 0;
  if (focus) { li.focus({ preventScroll: true }); li.scrollIntoView({ block: "nearest" }); }
}

function move(step) {
  const list = visibleCards();
  if (!list.length) return;
  let i = list.indexOf(state.current);
  i = i < 0 ? 0 : Math.max(0, Math.min(list.length - 1, i + step));
  setCurrent(list[i]);
}

function onKey(e) {
  if (e.altKey || e.ctrlKey || e.metaKey) return;
  const t = e.target;
  const checkbox = t.tagName === "INPUT" && t.type === "checkbox";
  if (t.tagName === "SELECT" || t.tagName === "TEXTAREA" || (t.tagName === "INPUT" && !checkbox)) return;
  const onButton = t.tagName === "BUTTON" || checkbox; // Space keeps its own meaning there
  const c = state.current && state.cards.get(state.current.dataset.id);
  const key = e.key.length === 1 ? e.key.toLowerCase() : e.key;
  const actions = { k: "keep", x: "reject", u: "clear", n: "nearest", c: "compare" };
  if (key === "ArrowDown" || key === "ArrowRight") { e.preventDefault(); move(1); }
  else if (key === "ArrowUp" || key === "ArrowLeft") { e.preventDefault(); move(-1); }
  else if (key === "Home") { e.preventDefault(); move(-1e9); }
  else if (key === "End") { e.preventDefault(); move(1e9); }
  else if (key === " " && !onButton && t.tagName !== "AUDIO") {
    e.preventDefault();
    if (c) run("play", c.sound, null);
  } else if (actions[key] && c) {
    e.preventDefault();
    run(actions[key], c.sound, null);
  }
}

function fillSelect(id, values, label) {
  const sel = $(id);
  for (const v of values) sel.append(el("option", { value: v }, label(v)));
}

function applyFilters() {
  const kind = $("f-kind").value, cat = $("f-category").value, mk = $("f-mark").value, order = $("f-sort").value;
  const list = $("sounds");
  const cards = [...state.cards.values()];
  const ratio = (c) => (c.sound.nearest && c.sound.nearest.distance_ratio !== null ? c.sound.nearest.distance_ratio : null);
  if (order === "file") cards.sort((a, b) => a.index - b.index);
  else cards.sort((a, b) => {
    const ra = ratio(a), rb = ratio(b);
    if (ra === null || rb === null) return (ra === null) - (rb === null) || a.index - b.index;
    return order === "near" ? ra - rb : rb - ra;
  });
  for (const c of cards) {
    const s = c.sound;
    const show = (!kind || s.kind === kind) &&
      (!cat || (cat === "(none)" ? !s.category : s.category === cat)) &&
      (!mk || (mk === "none" ? !s.mark : s.mark === mk));
    c.li.hidden = !show;
    list.append(c.li);
  }
  const vis = visibleCards();
  if (!vis.includes(state.current)) setCurrent(vis[0] || null, false);
  updateSummary();
}

function updateSummary() {
  const all = [...state.cards.values()].map((c) => c.sound);
  const kept = all.filter((s) => s.mark === "keep").length;
  const rejected = all.filter((s) => s.mark === "reject").length;
  $("summary").textContent = "Showing " + visibleCards().length + " of " + all.length + " sounds · " +
    kept + " kept · " + rejected + " rejected";
}

function updateMatch() {
  state.match = $("match").checked;
  for (const c of state.cards.values()) c.audio.volume = volumeFor(c.sound.gain_db);
  const t = state.data.target_lufs;
  $("match-note").textContent = state.match && t !== null
    ? "Loudness matching is on: sounds louder than " + fmt(t) + " LUFS (the quietest " + state.data.match_percentile +
      " % of this set) are turned down to it in the page; quieter ones play as written. The files are not changed."
    : "Loudness matching is off: every sound plays as written.";
}

async function start() {
  const r = await fetch(withToken("/api/sounds"));
  if (!r.ok) { $("summary").textContent = "Could not load the sounds (status " + r.status + ")."; return; }
  state.data = await r.json();
  state.sounds = state.data.sounds;
  const list = $("sounds");
  state.sounds.forEach((s, i) => {
    list.append(makeCard(s, i));
    state.cards.get(s.id).index = i;
  });
  fillSelect("f-kind", [...new Set(state.sounds.map((s) => s.kind))].sort(), (v) => v);
  const cats = [...new Set(state.sounds.map((s) => s.category || "(none)"))].sort();
  fillSelect("f-category", cats, (v) => (v === "(none)" ? "no category" : v));
  $("saved-in").textContent = "Marks are saved at once in " +
    state.data.folders.map((f) => f.picks).join(", ") + ".";
  if (state.data.notes.length) {
    $("notes").hidden = false;
    $("notes").textContent = "Left out: " + state.data.notes.join("; ");
  }
  for (const id of ["f-kind", "f-category", "f-mark", "f-sort"]) $(id).addEventListener("change", applyFilters);
  $("match").addEventListener("change", updateMatch);
  document.addEventListener("keydown", onKey);
  if ("IntersectionObserver" in window) {
    const seen = new IntersectionObserver((entries) => {
      for (const e of entries) {
        if (!e.isIntersecting) continue;
        ensureLoaded(e.target.querySelector("audio"));
        seen.unobserve(e.target);
      }
    }, { rootMargin: "1500px 0px" });
    for (const c of state.cards.values()) if (c.audio.dataset.src) seen.observe(c.li);
  } else {
    for (const c of state.cards.values()) ensureLoaded(c.audio);
  }
  updateMatch();
  applyFilters();
  if (visibleCards().length) setCurrent(visibleCards()[0]);
  document.body.dataset.ready = "true";
}

document.addEventListener("DOMContentLoaded", start);
