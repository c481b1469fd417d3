// audiodsm listening page: open comparison and blind A/B/X trials, played with the Web Audio API.
//
// Every clip of a view is decoded into an AudioBuffer and all of them run together from one
// start time, each through its own gain; switching only moves the gains (a 5 ms ramp), so the
// new clip continues at exactly the same sample position. Nothing plays until the caution is
// acknowledged and the listener presses Play. The page reads no network resource: the clips
// come as script files beside it (a file:// page may not fetch files).
"use strict";
(function () {
  const manifest = JSON.parse(document.getElementById("manifest").textContent);
  const START_LEVEL_DB = -30;
  const RAMP_S = 0.005;
  const $ = (id) => document.getElementById(id);

  // ---- state -------------------------------------------------------------------------------
  let ctx = null; // AudioContext, made on the first Play
  let master = null; // level control
  let unlocked = false; // caution acknowledged
  const buffers = new Map(); // data name -> AudioBuffer
  let view = null; // {names: [...], selected: name}
  let voices = null; // {sources: Map(name -> node), gains: Map(name -> GainNode), t0, offset}
  let positionS = 0;
  let wantPlaying = false; // Play pressed and not stopped since
  let playGeneration = 0; // a newer play() or a stop() makes a pending play() give up
  let mode = "open";
  let trialIndex = 0;
  const answers = new Map(); // trial id -> "A" | "B"

  // ---- helpers -------------------------------------------------------------------------------
  function dbToGain(db) { return Math.pow(10, db / 20); }
  function setStatus(text) { $("status").textContent = text; }

  function loadScript(src) {
    return new Promise((resolve, reject) => {
      const s = document.createElement("script");
      s.src = src;
      s.onload = () => resolve();
      s.onerror = () => reject(new Error("cannot load " + src));
      document.head.appendChild(s);
    });
  }

  const loading = new Map(); // data name -> Promise of its AudioBuffer

  function clipBuffer(name, src) {
    if (!loading.has(name)) {
      loading.set(name, (async () => {
        const store = window.audiodsmClipData || {};
        if (!(name in store)) await loadScript(src);
        const text = window.audiodsmClipData[name];
        const bytes = Uint8Array.from(atob(text), (c) => c.charCodeAt(0));
        const buf = await ctx.decodeAudioData(bytes.buffer);
        delete window.audiodsmClipData[name]; // the decoded buffer is kept; free the text
        buffers.set(name, buf);
        return buf;
      })());
    }
    return loading.get(name);
  }

  function duration() {
    if (!view) return 0;
    let d = Infinity;
    for (const n of view.names) if (buffers.has(n)) d = Math.min(d, buffers.get(n).duration);
    return isFinite(d) ? d : 0;
  }

  function currentPosition() {
    if (!voices) return positionS;
    const d = duration();
    const p = Math.max(0, ctx.currentTime - voices.t0) + voices.offset; // 0 until the start
    return d > 0 ? p % d : 0;
  }

  // ---- playback -----------------------------------------------------------------------------
  function ensureContext() {
    if (ctx) return;
    const rate = manifest.rate_hz || undefined;
    try {
      ctx = new AudioContext(rate ? { sampleRate: rate } : undefined);
    } catch (e) {
      ctx = new AudioContext();
    }
    master = ctx.createGain();
    master.gain.value = dbToGain(Number($("level").value));
    master.connect(ctx.destination);
  }

  async function setView(names, sources, selected) {
    stopVoices();
    view = { names: names, selected: selected, sources: sources };
    if (wantPlaying) await play();
  }

  async function play() {
    if (!unlocked || !view) return;
    wantPlaying = true;
    const gen = ++playGeneration;
    const v = view;
    ensureContext();
    if (ctx.state === "suspended") await ctx.resume();
    setStatus("loading clips...");
    await Promise.all(v.names.map((n, i) => clipBuffer(n, v.sources[i])));
    if (gen !== playGeneration || v !== view || !wantPlaying) return; // overtaken meanwhile
    stopVoices();
    const d = duration();
    const offset = d > 0 ? positionS % d : 0;
    const t0 = ctx.currentTime + 0.05;
    const sources = new Map();
    const gains = new Map();
    for (const n of v.names) {
      const src = ctx.createBufferSource();
      src.buffer = buffers.get(n);
      src.loop = true;
      src.loopStart = 0;
      src.loopEnd = d;
      const g = ctx.createGain();
      g.gain.value = n === v.selected ? 1 : 0;
      src.connect(g).connect(master);
      src.start(t0, offset);
      sources.set(n, src);
      gains.set(n, g);
    }
    voices = { sources: sources, gains: gains, t0: t0, offset: offset };
    document.body.dataset.playing = "yes";
    setStatus("playing");
  }

  function stopVoices() {
    if (voices) {
      positionS = currentPosition();
      for (const s of voices.sources.values()) { try { s.stop(); } catch (e) { /* stopped */ } }
      voices = null;
    }
    document.body.dataset.playing = "no";
  }

  function stop() {
    wantPlaying = false;
    playGeneration += 1;
    stopVoices();
    if (unlocked) setStatus("stopped");
  }

  function select(name) {
    if (!view) return;
    view.selected = name;
    if (!voices) return;
    const now = ctx.currentTime;
    for (const [n, g] of voices.gains) {
      g.gain.cancelScheduledValues(now);
      g.gain.setValueAtTime(g.gain.value, now);
      g.gain.linearRampToValueAtTime(n === name ? 1 : 0, now + RAMP_S);
    }
  }

  // ---- open comparison ---------------------------------------------------------------------------
  function openInputIndex() {
    const sel = $("input-choice");
    return sel ? Number(sel.value) : 0;
  }

  function openView() {
    const inp = manifest.inputs[openInputIndex()];
    const names = inp.clips.map((c) => c.id);
    const sources = names.map((n) => "page/data/" + n + ".js");
    const checked = document.querySelector('input[name="pick-' + inp.id + '"]:checked');
    return setView(names, sources, checked ? checked.value : names[0]);
  }

  // ---- trials ----------------------------------------------------------------------------------
  function trialNames(t) { return { A: t.a, B: t.b, X: t.trial }; }

  function trialView() {
    const t = manifest.trials[trialIndex];
    const n = trialNames(t);
    const sources = ["page/data/" + t.a + ".js", "page/data/" + t.b + ".js", "page/trials/" + t.trial + ".js"];
    $("trial-title").textContent = "Trial " + (trialIndex + 1) + " of " + manifest.trials.length;
    $("trial-about").textContent = "A = " + t.a_label + ", B = " + t.b_label + "; input: " + t.input;
    markTrialButtons("A");
    showProgress();
    return setView([n.A, n.B, n.X], sources, n.A);
  }

  function markTrialButtons(role) {
    for (const r of ["A", "B", "X"]) $("hear-" + r).classList.toggle("selected", r === role);
    const t = manifest.trials[trialIndex];
    const a = answers.get(t.trial);
    for (const r of ["A", "B"]) $("answer-" + r).classList.toggle("chosen", a === r);
  }

  function showProgress() {
    $("trial-progress").textContent = answers.size + " of " + manifest.trials.length + " trials answered";
    $("trials-done").hidden = answers.size !== manifest.trials.length;
  }

  function hear(role) {
    const t = manifest.trials[trialIndex];
    select(trialNames(t)[role]);
    markTrialButtons(role);
  }

  async function answer(choice) {
    const t = manifest.trials[trialIndex];
    answers.set(t.trial, choice);
    markTrialButtons(choice);
    showProgress();
    if (trialIndex + 1 < manifest.trials.length) {
      trialIndex += 1;
      stopVoices();
      positionS = 0;
      await trialView();
    }
  }

  // CRC-32 (ISO/IEC 3309, the polynomial of zlib.crc32) of the answers, as the scorer checks it.
  function crc32(text) {
    let c, crc = 0xffffffff;
    const bytes = new TextEncoder().encode(text);
    for (let i = 0; i < bytes.length; i++) {
      c = (crc ^ bytes[i]) & 0xff;
      for (let k = 0; k < 8; k++) c = c & 1 ? (c >>> 1) ^ 0xedb88320 : c >>> 1;
      crc = (crc >>> 8) ^ c;
    }
    return ((crc ^ 0xffffffff) >>> 0).toString(16).padStart(8, "0");
  }

  function answersText() {
    const list = manifest.trials.filter((t) => answers.has(t.trial)).map((t) => ({ trial: t.trial, answer: answers.get(t.trial) }));
    const checkText = manifest.set_id + list.map((a) => ";" + a.trial + "=" + a.answer).join("");
    const doc = { format: manifest.answers_format, set_id: manifest.set_id, answers: list, check: crc32(checkText) };
    return JSON.stringify(doc, null, 2) + "\n";
  }

  function saveAnswers() {
    const text = answersText();
    const blob = new Blob([text], { type: "application/json" });
    const a = document.createElement("a");
    a.href = URL.createObjectURL(blob);
    a.download = "answers-" + manifest.set_id + ".json";
    document.body.appendChild(a);
    a.click();
    a.remove();
    $("saved-note").textContent = "offered as " + a.download;
    window.audiodsmSavedAnswers = text;
  }

  // ---- wiring ----------------------------------------------------------------------------------
  function showLevel() { $("level-text").textContent = $("level").value + " dB"; }

  $("caution-level").textContent = START_LEVEL_DB + " dB";
  $("level").value = String(START_LEVEL_DB);
  showLevel();
  $("level").addEventListener("input", () => {
    showLevel();
    if (master) master.gain.setTargetAtTime(dbToGain(Number($("level").value)), ctx.currentTime, 0.02);
  });
  $("caution-ok").addEventListener("click", () => {
    unlocked = true;
    $("caution").classList.add("acknowledged");
    $("play").disabled = false;
    $("stop").disabled = false;
    setStatus("ready: press Play");
  });
  $("play").addEventListener("click", () => { play().catch((e) => setStatus(String(e))); });
  $("stop").addEventListener("click", () => stop());
  $("position").addEventListener("change", async () => {
    stopVoices();
    positionS = (Number($("position").value) / 1000) * duration();
    if (wantPlaying) await play();
  });
  setInterval(() => {
    const d = duration();
    const p = currentPosition();
    $("position-text").textContent = p.toFixed(2) + " s";
    if (d > 0 && voices) $("position").value = String(Math.round((p / d) * 1000));
  }, 200);

  document.querySelectorAll('#open-view input[type="radio"]').forEach((r) => {
    r.addEventListener("change", () => { if (r.checked) select(r.value); });
  });
  const inputChoice = $("input-choice");
  if (inputChoice) {
    inputChoice.addEventListener("change", () => {
      document.querySelectorAll(".input-block").forEach((b) => { b.hidden = b.dataset.input !== inputChoice.value; });
      stopVoices();
      positionS = 0;
      openView();
    });
  }
  for (const r of ["A", "B", "X"]) $("hear-" + r).addEventListener("click", () => hear(r));
  for (const r of ["A", "B"]) $("answer-" + r).addEventListener("click", () => { answer(r); });
  $("save-answers").addEventListener("click", saveAnswers);

  function setMode(m) {
    mode = m;
    $("mode-open").classList.toggle("active", m === "open");
    $("mode-trials").classList.toggle("active", m === "trials");
    $("open-view").hidden = m !== "open";
    $("trials-view").hidden = m !== "trials";
    stopVoices();
    positionS = 0;
    return m === "open" ? openView() : trialView();
  }
  $("mode-open").addEventListener("click", () => setMode("open"));
  $("mode-trials").addEventListener("click", () => setMode("trials"));

  document.addEventListener("keydown", (ev) => {
    if (ev.target && ev.target.tagName === "INPUT" && ev.target.type === "range") return;
    if (ev.key === " ") { ev.preventDefault(); if (wantPlaying) stop(); else play(); return; }
    if (mode === "open" && /^[1-9]$/.test(ev.key)) {
      const inp = manifest.inputs[openInputIndex()];
      const c = inp.clips[Number(ev.key) - 1];
      if (c) { $("pick-" + c.id).checked = true; select(c.id); }
    }
    if (mode === "trials" && ["a", "b", "x"].includes(ev.key)) hear(ev.key.toUpperCase());
  });

  // for scripted checks: the answers text and the current playback state, read-only
  window.audiodsmPage = {
    answersText: answersText,
    playing: () => voices !== null,
    position: currentPosition,
    selected: () => (view ? view.selected : null),
    contextTime: () => (ctx ? ctx.currentTime : 0),
    loadedClips: () => buffers.size,
  };
  openView();
})();
