// trawl check: listen to each hit and mark it. Talks only to the server that served it.
"use strict";

const $ = (id) => document.getElementById(id);
const state = { hits: [], shown: [], current: 0, clipStart: 0, clipSeconds: 0, stale: false, audioUrl: null };

async function api(path, body) {
  const opts = body === undefined ? {} : {
    method: "POST", headers: { "content-type": "application/json" }, body: JSON.stringify(body),
  };
  const r = await fetch("api/" + path, opts);
  let data = {};
  try { data = await r.json(); } catch (e) { /* not JSON */ }
  if (!r.ok) { const e = new Error(data.error || ("HTTP " + r.status)); e.status = r.status; throw e; }
  return data;
}

function say(text) { $("status").textContent = text; }

function progress(p) {
  $("progress").textContent = `checked ${p.checked} of ${p.total} · yes ${p.yes} · no ${p.no}`;
}

function countProgress() {
  const v = state.hits.map((h) => h.verdict);
  progress({ checked: v.filter((x) => x).length, total: v.length,
             yes: v.filter((x) => x === "yes").length, no: v.filter((x) => x === "no").length });
}

function mark(v) { return v === "yes" ? "✓" : v === "no" ? "✗" : "·"; }

function renderList() {
  const list = $("list");
  list.replaceChildren();
  for (const n of state.shown) {
    const h = state.hits[n];
    const li = document.createElement("li");
    li.dataset.n = n;
    li.className = "v-" + (h.verdict || "none") + (n === state.current ? " current" : "");
    const m = document.createElement("span");
    m.className = "mark";
    m.textContent = mark(h.verdict);
    const t = document.createElement("span");
    t.className = "t";
    t.textContent = `${h.term} #${h.rank}`;
    const b = document.createElement("span");
    b.className = "b";
    b.textContent = `${h.broadcast.split("/").pop()} ${h.start_hms || h.start.toFixed(2)}`;
    li.append(m, t, b);
    li.addEventListener("click", () => show(n, true));
    list.append(li);
  }
}

function applyFilter() {
  const term = $("filter").value;
  state.shown = state.hits.filter((h) => !term || h.term === term).map((h) => h.n);
  renderList();
}

async function load() {
  const s = await api("state");
  state.hits = s.hits;
  $("file").textContent = s.file;
  const filter = $("filter");
  const keep = filter.value;
  filter.replaceChildren(new Option("all terms", ""));
  for (const t of [...new Set(s.hits.map((h) => h.term))]) filter.append(new Option(t, t));
  filter.value = [...filter.options].some((o) => o.value === keep) ? keep : "";
  setStale(s.changed);
  progress(s.progress);
  applyFilter();
  await show(s.resume, false);
}

function fill(id, text) { $(id).textContent = text; }

async function show(n, play) {
  if (n < 0 || n >= state.hits.length) return;
  state.current = n;
  document.body.dataset.current = n;
  const h = state.hits[n];
  const pos = state.shown.indexOf(n);
  fill("position", `hit ${n + 1} of ${state.hits.length}` + (pos >= 0 && state.shown.length !== state.hits.length
    ? ` (${pos + 1} of ${state.shown.length} for this term)` : ""));
  fill("term", h.term);
  fill("searched", h.searched);
  $("searched-wrap").hidden = h.searched === h.term;
  fill("broadcast", h.broadcast);
  fill("times", `${h.start_hms || h.start} – ${h.end_hms || h.end} (${(h.end - h.start).toFixed(2)} s)`);
  fill("rank", h.rank || "–");
  fill("score", h.score || "–");
  fill("confidence", h.confidence || "–");
  showVerdict(h);
  $("note").value = h.note || "";
  for (const li of $("list").children) li.classList.toggle("current", Number(li.dataset.n) === n);
  const cur = $("list").querySelector(".current");
  if (cur) cur.scrollIntoView({ block: "nearest" });
  say("");
  await loadMedia(n, play);
}

function showVerdict(h) {
  fill("verdict", h.verdict === "yes" ? "yes" : h.verdict === "no" ? "no" : "not checked yet");
  $("verdict").className = "v-" + (h.verdict || "none");
}

async function loadMedia(n, play) {
  const player = $("player");
  player.pause();
  $("playhead").style.left = "0%";
  try {
    const pr = await fetch(`api/hits/${n}/picture`);
    if (!pr.ok) throw new Error((await pr.json()).error);
    state.clipStart = Number(pr.headers.get("x-clip-start"));
    state.clipSeconds = Number(pr.headers.get("x-clip-seconds"));
    const pic = URL.createObjectURL(await pr.blob());
    const old = $("picture").src;
    $("picture").src = pic;
    if (old.startsWith("blob:")) URL.revokeObjectURL(old);
    const ar = await fetch(`api/hits/${n}/audio`);
    if (!ar.ok) throw new Error((await ar.json()).error);
    const url = URL.createObjectURL(await ar.blob());
    if (n !== state.current) { URL.revokeObjectURL(url); return; }
    if (state.audioUrl) URL.revokeObjectURL(state.audioUrl);
    state.audioUrl = url;
    player.src = url;
    document.body.dataset.loaded = n;
    if (play) replay(1);
  } catch (e) {
    say("cannot play this hit: " + e.message);
  }
}

function replay(rate) {
  const player = $("player");
  if (!player.src) return;
  player.pause();
  player.currentTime = 0;
  player.preservesPitch = true;
  player.playbackRate = rate;
  player.play().catch((e) => say("press R to play (" + e.message + ")"));
}

function tick() {
  const player = $("player");
  const d = player.duration || state.clipSeconds;
  if (d) $("playhead").style.left = `${Math.min(100, 100 * player.currentTime / d)}%`;
  requestAnimationFrame(tick);
}

function step(delta) {
  const i = state.shown.indexOf(state.current);
  const j = i < 0 ? 0 : i + delta;
  if (j >= 0 && j < state.shown.length) show(state.shown[j], true);
  else say(delta > 0 ? "that was the last hit in the list" : "this is the first hit in the list");
}

function nextUnchecked() {
  const i = state.shown.indexOf(state.current);
  const later = state.shown.slice(i + 1).concat(state.shown.slice(0, Math.max(i, 0)));
  const n = later.find((k) => !state.hits[k].verdict);
  if (n === undefined) { say("every hit in the list is checked"); return; }
  show(n, true);
}

async function post(body) {
  if (state.stale) { say("the file changed outside this page: load it again first"); return null; }
  const n = state.current;
  try {
    const r = await api(`hits/${n}`, body);
    progress(r.progress);
    return r;
  } catch (e) {
    if (e.status === 409) setStale(true);
    say("not saved: " + e.message);
    return null;
  }
}

async function setVerdict(v) {
  const n = state.current;
  const body = { verdict: v };
  const note = $("note").value.trim();
  if (note !== (state.hits[n].note || "")) body.note = note;
  const r = await post(body);
  if (!r) return;
  state.hits[n].verdict = v;
  if ("note" in body) state.hits[n].note = note;
  showVerdict(state.hits[n]);
  renderList();
  say(`saved: ${v}`);
  nextUnchecked();
}

async function saveNote() {
  const n = state.current;
  const note = $("note").value.trim();
  if (note === (state.hits[n].note || "")) return;
  if (await post({ note })) { state.hits[n].note = note; say("note saved"); }
}

function setStale(changed) {
  state.stale = changed;
  $("banner").hidden = !changed;
  $("banner-text").textContent = changed
    ? "The sample file was changed by another program. Nothing more is saved until you load it again." : "";
}

const actions = {
  yes: () => setVerdict("yes"), no: () => setVerdict("no"), skip: () => step(1),
  replay: () => replay(1), slow: () => replay(0.6), prev: () => step(-1), next: () => step(1),
};

document.addEventListener("keydown", (e) => {
  if (e.ctrlKey || e.altKey || e.metaKey) return;
  const typing = e.target instanceof HTMLInputElement || e.target instanceof HTMLSelectElement;
  if (typing) {
    if (e.key === "Escape" || (e.key === "Enter" && e.target.id === "note")) {
      if (e.target.id === "note") saveNote();
      e.target.blur();
      e.preventDefault();
    }
    return;
  }
  const key = { y: "yes", Y: "yes", n: "no", N: "no", s: "skip", S: "skip", r: "replay", R: "slow", ArrowLeft: "prev", ArrowRight: "next" }[e.key];
  if (key) { e.preventDefault(); actions[key](); }
});

window.addEventListener("DOMContentLoaded", () => {
  for (const b of document.querySelectorAll("#buttons button")) {
    b.addEventListener("click", () => { b.blur(); actions[b.dataset.act](); });
  }
  $("filter").addEventListener("change", () => {
    applyFilter();
    $("filter").blur();
    if (state.shown.length && !state.shown.includes(state.current)) show(state.shown[0], true);
  });
  $("note").addEventListener("change", saveNote);
  $("player").addEventListener("playing", () => { document.body.dataset.played = "yes"; });
  $("reload-file").addEventListener("click", async () => {
    try { await api("reload", {}); await load(); say("loaded the changed file"); }
    catch (e) { say("cannot load it: " + e.message); }
  });
  setInterval(async () => {
    try { const c = await api("changed"); if (c.changed !== state.stale) setStale(c.changed); }
    catch (e) { say("the trawl check server has stopped"); }
  }, 3000);
  requestAnimationFrame(tick);
  load().catch((e) => say("cannot load the sample: " + e.message));
});
