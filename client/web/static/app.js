// beamtap browser view: one WebSocket to the server that served this page; power rows and
// audio arrive as binary frames (layout in client/web/feed.py), the rest as small JSON.
// No framework and no build step; nothing is fetched from anywhere else.

const HISTORY_S = 600;          // rows kept: at least ten minutes at the power rate
const NO_DATA_S = 3;            // the warning appears after this long without a message
const SCALE_DECAY_DB_PER_S = 0.5; // auto scale: the top rises at once, comes down slowly (as in watch)
const RERENDER_DB = 3;          // auto scale: repaint the history when the top moved this far
const JITTER_S = 0.2;           // audio: buffered ahead of the playhead
const MAX_AHEAD_S = 0.8;        // audio: blocks that would play later than this are dropped
const LIMIT_DBFS = -6;          // audio: hard limit after the volume

const $ = (id) => document.getElementById(id);
const state = {
  ws: null, role: null, palette: null, lut: null,
  beams: null, az: [], nBands: 0, nBeams: 0, capacity: 0, rows: null, times: null, merged: 0,
  total: 0, lastMessageMs: 0, status: null, autoTop: null, renderedTop: null, renderedRange: null,
  trails: [], tracks: [], drawPending: false, lastRowMs: 0,
  audio: null, listening: null, underruns: 0, audioDropped: 0,
};
window.beamtapView = state;      // read by the browser tests (and handy in the console)

// ---- colours: the project's palette, sent by the server -----------------------------------
function buildLut(stops) {
  const rgb = stops.map((h) => [1, 3, 5].map((i) => parseInt(h.slice(i, i + 2), 16)));
  const lut = new Uint8ClampedArray(256 * 3);
  for (let k = 0; k < 256; k++) {
    const x = (k / 255) * (rgb.length - 1);
    const i = Math.min(Math.floor(x), rgb.length - 2);
    const t = x - i;
    for (let c = 0; c < 3; c++) lut[3 * k + c] = Math.round((1 - t) * rgb[i][c] + t * rgb[i + 1][c]);
  }
  return lut;
}

function scale() {
  const range = Math.max(3, Number($("range").value) || 30);
  const top = $("auto").checked ? (state.autoTop ?? -20) : Number($("top").value);
  return { top, bottom: top - range, range };
}

// ---- history: a ring of rows in a tall off-screen canvas (newest row at the smallest y) -------------
const history = document.createElement("canvas");
const hctx = history.getContext("2d");

function resetHistory(beams) {
  state.beams = beams;
  state.az = beams.power_deg.map((d) => d[0]);  // the beams' azimuths, for bearing <-> x
  state.nBands = beams.bands_hz.length;
  state.nBeams = beams.power_deg.length;
  const rate = beams.samplerate_hz / (beams.power_block_frames || 1024);
  state.capacity = Math.max(64, Math.ceil(HISTORY_S * rate) + 1);
  state.rows = new Float32Array(state.capacity * state.nBands * state.nBeams).fill(NaN);
  state.times = new Float64Array(state.capacity).fill(NaN);
  state.total = 0;
  state.trails = [];
  history.width = state.nBeams;
  history.height = state.capacity;
  hctx.fillStyle = state.palette ? state.palette[0] : "#000";
  hctx.fillRect(0, 0, history.width, history.height);
  const band = $("band");
  band.innerHTML = "";
  beams.bands_hz.forEach(([lo, hi], i) => {
    const o = document.createElement("option");
    o.value = String(i);
    o.textContent = `${Math.round(lo)}–${Math.round(hi)} Hz`;
    band.appendChild(o);
  });
  band.disabled = state.nBands < 2;
  drawAxis();
}

function slot(n) { return state.capacity - 1 - (n % state.capacity); }  // ring position of row n

function paintRow(n, img, s) {
  const b = Number($("band").value) || 0;
  const base = (slot(n) * state.nBands + b) * state.nBeams;
  const d = img.data;
  for (let i = 0; i < state.nBeams; i++) {
    const v = state.rows[base + i];
    const level = Number.isFinite(v) ? Math.min(Math.max((v - s.bottom) / s.range, 0), 1) : 0;
    const k = 3 * Math.round(level * 255);
    d[4 * i] = state.lut[k]; d[4 * i + 1] = state.lut[k + 1]; d[4 * i + 2] = state.lut[k + 2]; d[4 * i + 3] = 255;
  }
  hctx.putImageData(img, 0, slot(n));
}

function repaintHistory() {
  if (!state.beams || !state.lut) return;
  const s = scale();
  const img = hctx.createImageData(state.nBeams, 1);
  const first = Math.max(0, state.total - state.capacity);
  for (let n = first; n < state.total; n++) paintRow(n, img, s);
  state.renderedTop = s.top;
  state.renderedRange = s.range;
  drawColourbar();
  requestDraw();
}

function addRow(values, time, merged) {
  // values: Float32Array, bands x beams (dB re full scale)
  if (!state.beams || values.length !== state.nBands * state.nBeams) return;
  const n = state.total;
  state.rows.set(values, slot(n) * state.nBands * state.nBeams);
  state.times[slot(n)] = time;
  state.total = n + 1;
  state.merged += merged;
  const b = Number($("band").value) || 0;
  const row = values.subarray(b * state.nBeams, (b + 1) * state.nBeams);
  let peak = -Infinity;
  for (const v of row) if (Number.isFinite(v) && v > peak) peak = v;
  const now = performance.now();
  if (Number.isFinite(peak)) {
    if (state.autoTop === null || peak > state.autoTop) state.autoTop = peak;
    else state.autoTop = Math.max(peak, state.autoTop - SCALE_DECAY_DB_PER_S * (now - state.lastRowMs) / 1000);
  }
  state.lastRowMs = now;
  const s = scale();
  if ($("auto").checked) $("top").value = s.top.toFixed(0);
  if (state.renderedTop === null || Math.abs(s.top - state.renderedTop) > RERENDER_DB || s.range !== state.renderedRange) {
    repaintHistory();
  } else {
    paintRow(n, hctx.createImageData(state.nBeams, 1), { top: state.renderedTop, bottom: state.renderedTop - state.renderedRange, range: state.renderedRange });
  }
  requestDraw();
}

// ---- drawing ---------------------------------------------------------------------------------
function requestDraw() {
  if (state.drawPending) return;
  state.drawPending = true;
  requestAnimationFrame(() => { state.drawPending = false; drawWaterfall(); drawFan(); });
}

function spanRows() {
  if (!state.beams) return 1;
  const rate = state.beams.samplerate_hz / (state.beams.power_block_frames || 1024);
  return Math.max(2, Math.min(state.capacity, Math.round(Number($("span").value) * rate)));
}

function drawWaterfall() {
  const c = $("waterfall");
  const ctx = c.getContext("2d");
  ctx.imageSmoothingEnabled = false;
  ctx.fillStyle = state.palette ? state.palette[0] : "#000";
  ctx.fillRect(0, 0, c.width, c.height);
  if (!state.beams || state.total === 0) return;
  const S = spanRows();
  const shown = Math.min(S, state.total);
  const top = slot(state.total - 1);               // newest row's y in the history canvas
  const first = Math.min(shown, state.capacity - top);
  const px = c.height / S;
  ctx.drawImage(history, 0, top, state.nBeams, first, 0, 0, c.width, first * px);
  if (shown > first) ctx.drawImage(history, 0, 0, state.nBeams, shown - first, 0, first * px, c.width, (shown - first) * px);
  $("span-label").textContent = `${$("span").selectedOptions[0].textContent} shown, ${(state.total).toLocaleString()} rows received`;
  drawOverlay(S, px);
}

function drawOverlay(S, px) {
  const c = $("overlay");
  const ctx = c.getContext("2d");
  ctx.clearRect(0, 0, c.width, c.height);
  ctx.strokeStyle = "#e7ecf3";
  ctx.fillStyle = "#e7ecf3";
  ctx.font = "12px system-ui, sans-serif";
  const labelled = new Set();
  const lastY = new Map();          // one mark per track per 3 pixels, however many rows that is
  ctx.globalAlpha = 0.8;
  for (let k = state.trails.length - 1; k >= 0; k--) {
    const t = state.trails[k];
    const age = state.total - 1 - t.row;
    if (age >= S) break;
    const y = (age + 0.5) * px;
    if (lastY.has(t.id) && y - lastY.get(t.id) < 3) continue;
    lastY.set(t.id, y);
    const x = xOfBearing(t.bearing, c.width);
    ctx.fillRect(x - 1, y - 1, 2, 2);
    if (!labelled.has(t.id)) { ctx.fillText(`T${t.id}`, x + 6, y + 12); labelled.add(t.id); }
  }
  ctx.globalAlpha = 1;
  if (state.listening) {
    const x = xOfBearing(state.listening.azimuth_deg, c.width);
    ctx.setLineDash([4, 4]);
    ctx.beginPath(); ctx.moveTo(x, 0); ctx.lineTo(x, c.height); ctx.stroke();
    ctx.setLineDash([]);
  }
}

function newestRow() {
  if (!state.beams || state.total === 0) return null;
  const b = Number($("band").value) || 0;
  const base = (slot(state.total - 1) * state.nBands + b) * state.nBeams;
  return state.rows.subarray(base, base + state.nBeams);
}

function drawFan() {
  const c = $("fan");
  const ctx = c.getContext("2d");
  ctx.fillStyle = "#0b1220";
  ctx.fillRect(0, 0, c.width, c.height);
  const row = newestRow();
  if (!row) return;
  const s = scale();
  const y = (db) => c.height - 4 - (Math.min(Math.max(db, s.bottom), s.top) - s.bottom) / s.range * (c.height - 8);
  ctx.strokeStyle = "#2a3650";
  ctx.fillStyle = "#93a1b8";
  ctx.font = "11px system-ui, sans-serif";
  for (let db = Math.ceil(s.bottom / 10) * 10; db <= s.top; db += 10) {
    ctx.beginPath(); ctx.moveTo(0, y(db)); ctx.lineTo(c.width, y(db)); ctx.stroke();
    ctx.fillText(`${db} dB`, 4, y(db) - 2);
  }
  let peak = 0;
  ctx.strokeStyle = state.palette ? state.palette[6] : "#f88";
  ctx.lineWidth = 2;
  ctx.beginPath();
  for (let i = 0; i < state.nBeams; i++) {
    const x = (i + 0.5) * c.width / state.nBeams;
    if (i === 0) ctx.moveTo(x, y(row[i])); else ctx.lineTo(x, y(row[i]));
    if (row[i] > row[peak]) peak = i;
  }
  ctx.stroke();
  ctx.lineWidth = 1;
  const az = state.beams.power_deg[peak][0];
  $("peak").textContent = `peak ${az.toFixed(1)}° at ${row[peak].toFixed(1)} dB`;
  ctx.fillStyle = "#fff1e7";
  for (const t of state.tracks) {
    const x = xOfBearing(t.bearing_deg, c.width);
    ctx.setLineDash([3, 3]);
    ctx.strokeStyle = "#fff1e7";
    ctx.beginPath(); ctx.moveTo(x, 12); ctx.lineTo(x, c.height); ctx.stroke();
    ctx.setLineDash([]);
    ctx.fillText(`T${t.track}`, x + 3, 11);
  }
}

function drawAxis() {
  const c = $("axis");
  const ctx = c.getContext("2d");
  ctx.clearRect(0, 0, c.width, c.height);
  if (!state.beams) return;
  ctx.fillStyle = "#93a1b8";
  ctx.strokeStyle = "#93a1b8";
  ctx.font = "12px system-ui, sans-serif";
  ctx.textAlign = "center";
  const lo = Math.min(...state.az), hi = Math.max(...state.az);
  const step = hi - lo > 120 ? 30 : hi - lo > 40 ? 10 : 5;
  for (let a = Math.ceil(lo / step) * step; a <= hi; a += step) {
    const x = xOfBearing(a, c.width);
    ctx.beginPath(); ctx.moveTo(x, 0); ctx.lineTo(x, 6); ctx.stroke();
    ctx.fillText(`${a}°`, x, 20);
  }
  ctx.textAlign = "left";
  ctx.fillText("bearing (azimuth)", 2, 32);
}

function drawColourbar() {
  const c = $("colourbar");
  const ctx = c.getContext("2d");
  if (!state.lut) return;
  const s = scale();
  for (let x = 0; x < c.width; x++) {
    const k = 3 * Math.round((x / (c.width - 1)) * 255);
    ctx.fillStyle = `rgb(${state.lut[k]},${state.lut[k + 1]},${state.lut[k + 2]})`;
    ctx.fillRect(x, 0, 1, 22);
  }
  ctx.clearRect(0, 22, c.width, c.height - 22);
  ctx.fillStyle = "#93a1b8";
  ctx.font = "11px system-ui, sans-serif";
  ctx.fillText(`${s.bottom.toFixed(0)} dB`, 0, 36);
  ctx.textAlign = "right";
  ctx.fillText(`${s.top.toFixed(0)} dB re FS`, c.width, 36);
  ctx.textAlign = "left";
}

// Beam index <-> canvas x: beams are drawn in table order, one column each.
function xOfBearing(azimuth, width) {
  const az = state.az;
  const n = az.length;
  if (n < 2) return width / 2;
  const dir = Math.sign(az[n - 1] - az[0]) || 1;
  let pos;
  if ((azimuth - az[0]) * dir <= 0) pos = (azimuth - az[0]) / (az[1] - az[0]);
  else if ((azimuth - az[n - 1]) * dir >= 0) pos = n - 1 + (azimuth - az[n - 1]) / (az[n - 1] - az[n - 2]);
  else {
    let i = 0;
    while ((az[i + 1] - azimuth) * dir < 0) i++;
    pos = i + (azimuth - az[i]) / (az[i + 1] - az[i]);
  }
  return (Math.min(Math.max(pos, -0.5), n - 0.5) + 0.5) * width / n;
}

function beamAtEvent(ev) {
  const c = ev.currentTarget;
  const r = c.getBoundingClientRect();
  const i = Math.floor(((ev.clientX - r.left) / r.width) * state.nBeams);
  return state.beams.power_deg[Math.min(Math.max(i, 0), state.nBeams - 1)];
}

// ---- status ------------------------------------------------------------------------------------
function setStatus(st) {
  state.status = st;
  const put = (key, text) => { document.querySelector(`#status [data-key="${key}"]`).textContent = text; };
  put("stream", `stream ${st.stream ?? "–"}`);
  if (st.samplerate_hz) put("rate", `${st.samplerate_hz} Hz`);
  put("delay", `D ${st.bulk_delay_samples} samples`);
  put("blocks", `blocks ${st.blocks}`);
  put("gaps", `gaps ${st.gaps}`);
  put("overflows", `overflows ${st.overflows}`);
  put("cpu", `CPU ${(100 * (st.cpu_share ?? 0)).toFixed(0)} %`);
  const w = st.web || {};
  const parts = [];
  if (w.pages > 1) parts.push(`${w.pages} pages open`);
  if (w.rows_merged) parts.push(`${w.rows_merged} rows merged (this page fell behind)`);
  if (w.audio_dropped) parts.push(`${w.audio_dropped} audio blocks dropped`);
  if (w.error) parts.push(w.error);
  put("web", parts.join(", "));
}

function tick() {
  const age = state.lastMessageMs ? (performance.now() - state.lastMessageMs) / 1000 : null;
  const el = document.querySelector('#status [data-key="age"]');
  el.textContent = age === null ? "no message yet" : `last message ${age.toFixed(1)} s ago`;
  const warn = $("nodata");
  const connected = state.ws && state.ws.readyState === WebSocket.OPEN;
  if (!connected && state.role !== null) {
    warn.hidden = false;
    warn.textContent = "No connection to the web server: retrying…";
  } else if (age !== null && age > NO_DATA_S) {
    warn.hidden = false;
    warn.textContent = `No data for ${age.toFixed(0)} s: is the service running?`;
  } else {
    warn.hidden = true;
  }
  if (state.audio) {
    $("audio-stats").textContent = `audio: ${state.underruns} underruns, ${state.audioDropped} blocks dropped`;
  }
}

function trackAge(t) {
  const fs = state.beams ? state.beams.samplerate_hz : 0;
  return fs > 0 && Number.isFinite(t.last_sample - t.first_sample) ? (t.last_sample - t.first_sample) / fs : 0;
}

function setTracks(msg) {
  state.tracks = (msg.tracks || []).filter((t) => t.state === "confirmed" || t.state === "coasting");
  for (const t of state.tracks) state.trails.push({ row: state.total - 1, id: t.track, bearing: t.bearing_deg });
  const oldest = state.total - state.capacity;
  while (state.trails.length && state.trails[0].row < oldest) state.trails.shift();
  const body = $("tracks").tBodies[0];
  body.innerHTML = "";
  for (const t of state.tracks) {
    const tr = document.createElement("tr");
    for (const text of [`T${t.track}`, `${t.bearing_deg.toFixed(1)}°`, `${(t.rate_deg_per_s ?? 0).toFixed(2)}°/s`,
      `${(t.snr_db ?? 0).toFixed(1)} dB`, `${trackAge(t).toFixed(0)} s`]) {
      const td = document.createElement("td");
      td.textContent = text;
      tr.appendChild(td);
    }
    body.appendChild(tr);
  }
  $("no-tracks").hidden = state.tracks.length > 0;
}

function say(text) {
  const m = $("message");
  m.textContent = text;
  m.hidden = !text;
}

// ---- listening ----------------------------------------------------------------------------------
function startAudio() {
  if (state.audio || !state.beams) return;
  const ctx = new AudioContext({ sampleRate: state.beams.samplerate_hz });
  const gain = ctx.createGain();
  gain.gain.value = 0;
  // A fast compressor, then a hard clip at the limit: nothing louder than LIMIT_DBFS leaves the page.
  const comp = ctx.createDynamicsCompressor();
  comp.threshold.value = LIMIT_DBFS - 3; comp.knee.value = 0; comp.ratio.value = 20;
  comp.attack.value = 0.001; comp.release.value = 0.1;
  const clip = ctx.createWaveShaper();
  const lim = 10 ** (LIMIT_DBFS / 20);
  const curve = new Float32Array(1025);
  for (let i = 0; i < curve.length; i++) curve[i] = Math.max(-lim, Math.min(lim, (i / 512) - 1));
  clip.curve = curve;
  gain.connect(comp).connect(clip).connect(ctx.destination);
  state.audio = { ctx, gain, next: 0 };
  setVolume(true);
}

function setVolume(fadeIn) {
  const db = Number($("volume").value);
  $("volume-db").textContent = `${db} dB`;
  if (!state.audio) return;
  const g = state.audio.gain.gain;
  const now = state.audio.ctx.currentTime;
  g.cancelScheduledValues(now);
  g.setValueAtTime(g.value, now);
  g.linearRampToValueAtTime(10 ** (db / 20), now + (fadeIn ? 0.5 : 0.05));
}

function playBlock(samples) {
  const a = state.audio;
  if (!a) return;
  const now = a.ctx.currentTime;
  if (a.next < now) {                // ran dry (or first block): build the jitter buffer again
    if (a.next > 0) state.underruns++;
    a.next = now + JITTER_S;
  }
  if (a.next - now > MAX_AHEAD_S) { state.audioDropped++; return; }
  const buf = a.ctx.createBuffer(1, samples.length, state.beams.samplerate_hz);
  buf.copyToChannel(samples, 0);
  const src = a.ctx.createBufferSource();
  src.buffer = buf;
  src.connect(a.gain);
  src.start(a.next);
  a.next += samples.length / state.beams.samplerate_hz;
}

function stopAudio() {
  if (state.audio) { state.audio.ctx.close(); state.audio = null; }
  state.listening = null;
  $("stop").disabled = true;
  $("listen-state").textContent = "Click a bearing on either plot to listen there.";
}

function listenAt(ev) {
  if (!state.beams || !state.ws || state.ws.readyState !== WebSocket.OPEN) return;
  if (state.role !== "operator") { say("Listening needs an operator token; this page can only view."); return; }
  const [az, el] = beamAtEvent(ev);
  startAudio();                      // inside the click: browsers allow sound after a gesture only
  state.ws.send(JSON.stringify({ type: "listen", azimuth_deg: az, elevation_deg: el }));
  $("listen-state").textContent = `asking for a beam at ${az.toFixed(1)}°…`;
}

// ---- the connection ----------------------------------------------------------------------------
function onBinary(buf) {
  const v = new DataView(buf);
  const kind = v.getUint8(0), merged = v.getUint8(1);
  const a = v.getUint32(4, true), b = v.getUint32(8, true);
  const time = v.getFloat64(16, true);
  const values = new Float32Array(buf, 24, a * b);
  if (kind === 1) addRow(values, time, merged);
  else if (kind === 2 && state.listening) playBlock(values);
}

function onJson(msg) {
  switch (msg.type) {
    case "hello":
      state.palette = msg.palette;
      state.lut = buildLut(msg.palette);
      $("caution").textContent = msg.caution;
      if (msg.auth) {
        const saved = sessionStorage.getItem("beamtap-token");
        if (saved) state.ws.send(JSON.stringify({ type: "auth", token: saved }));
        else $("login").hidden = false;
      }
      drawColourbar();
      break;
    case "welcome":
      state.role = msg.role;
      $("login").hidden = true;
      say(msg.role === "operator" ? "" : "View only: this token cannot point the listening beam.");
      break;
    case "denied":
      sessionStorage.removeItem("beamtap-token");
      $("login").hidden = false;
      $("login-error").textContent = "That token was refused.";
      break;
    case "beams":
      if (!state.beams || msg.beam_table !== state.beams.beam_table) {
        const same = state.beams && JSON.stringify(state.beams.power_deg) === JSON.stringify(msg.power_deg)
          && JSON.stringify(state.beams.bands_hz) === JSON.stringify(msg.bands_hz);
        if (same) { state.beams = msg; } else { resetHistory(msg); repaintHistory(); }
      }
      break;
    case "status": setStatus(msg); break;
    case "tracks": setTracks(msg); requestDraw(); break;
    case "listening":
      if (msg.on) {
        state.listening = msg;
        $("stop").disabled = false;
        $("listen-state").textContent = `listening at ${msg.azimuth_deg.toFixed(1)}°`;
      }
      requestDraw();
      break;
    case "error": say(msg.error); break;
    default: break;
  }
}

function connect() {
  const ws = new WebSocket(`${location.protocol === "https:" ? "wss" : "ws"}://${location.host}/ws`);
  ws.binaryType = "arraybuffer";
  state.ws = ws;
  ws.onmessage = (ev) => {
    state.lastMessageMs = performance.now();
    if (typeof ev.data === "string") {
      let msg;
      try { msg = JSON.parse(ev.data); } catch { return; }
      onJson(msg);
    } else {
      onBinary(ev.data);
    }
  };
  ws.onclose = () => { setTimeout(connect, 2000); };
}

$("login").addEventListener("submit", (ev) => {
  ev.preventDefault();
  const token = $("token").value.trim();
  sessionStorage.setItem("beamtap-token", token);
  $("login-error").textContent = "";
  if (state.ws && state.ws.readyState === WebSocket.OPEN) state.ws.send(JSON.stringify({ type: "auth", token }));
});
$("fan").addEventListener("click", listenAt);
$("waterfall").addEventListener("click", listenAt);
$("stop").addEventListener("click", () => {
  if (state.ws && state.ws.readyState === WebSocket.OPEN) state.ws.send(JSON.stringify({ type: "stop" }));
  stopAudio();
});
$("volume").addEventListener("input", () => setVolume(false));
$("band").addEventListener("change", repaintHistory);
$("span").addEventListener("change", requestDraw);
$("range").addEventListener("change", repaintHistory);
$("top").addEventListener("change", repaintHistory);
$("auto").addEventListener("change", () => { $("top").disabled = $("auto").checked; repaintHistory(); });
setInterval(tick, 250);
connect();
