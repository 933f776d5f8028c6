// plotweave live picture. Plain browser JavaScript, no libraries, no build step: served by the
// service itself (see service/src/page.rs and docs/page.md).
//
// Data: /v1/frames (WebSocket, the track picture), /v1/detections (WebSocket, each scan's
// detections in the site frame), /v1/sensors (configuration, coverage, health; polled),
// /metrics (batch counts, rejects, latency; polled), /v1/tracks/{id} (the selected track).
// Site frame: x east, y north, metres; bearings clockwise from north, degrees.
(() => {
  'use strict';

  // ---- constants ---------------------------------------------------------------------------
  const SENSOR_COLOURS = ['#0f766e', '#b45309', '#7c3aed', '#4d7c0f', '#be185d', '#0369a1'];
  const C = {
    bg: '#f5f4ef', grid: '#e4e2da', axis: '#cfccc2', gridText: '#97948a',
    confirmed: '#1d4e89', tentative: '#8a8d93', selected: '#c2410c', halo: 'rgba(245,244,239,0.9)',
  };
  const TRAIL_POINTS = 40;      // updates kept per track for its trail
  const FADE_SCANS = 4;         // scans of detections shown per sensor, newest brightest
  const FADE_ALPHA = [1, 0.55, 0.3, 0.14];
  const LEAD_S = 60;            // velocity vectors show the position 60 s ahead
  const SIGMA = 2;              // covariance ellipses at 2 sigma (Mahalanobis distance 2)
  const POLL_MS = 2000;         // /v1/sensors and /metrics
  const TRACK_POLL_MS = 1000;   // the selected track

  // ---- token -------------------------------------------------------------------------------
  // From ?token= (then removed from the address bar) or the input field; kept per tab only.
  const params = new URLSearchParams(location.search);
  let token = sessionStorage.getItem('plotweave.token') || '';
  if (params.has('token')) {
    token = params.get('token') || '';
    sessionStorage.setItem('plotweave.token', token);
    params.delete('token');
    const rest = params.toString();
    history.replaceState(null, '', location.pathname + (rest ? '?' + rest : '') + location.hash);
  }
  const hex = (s) => Array.from(new TextEncoder().encode(s), (b) => b.toString(16).padStart(2, '0')).join('');
  const protocols = () => (token ? ['plotweave.v1', 'plotweave.bearer.' + hex(token)] : ['plotweave.v1']);
  const wsUrl = (path) => (location.protocol === 'https:' ? 'wss://' : 'ws://') + location.host + path;

  class Unauthorized extends Error {}
  async function get(path, text) {
    const r = await fetch(path, { headers: token ? { Authorization: 'Bearer ' + token } : {}, cache: 'no-store' });
    if (r.status === 401 || r.status === 403) throw new Unauthorized(path);
    if (!r.ok) {
      const e = new Error(path + ': HTTP ' + r.status);
      e.status = r.status;
      throw e;
    }
    return text ? r.text() : r.json();
  }

  // ---- state -------------------------------------------------------------------------------
  const S = {
    site: null,
    sensors: [],              // from /v1/sensors
    colour: new Map(),        // sensor id -> colour
    tracks: [],               // the picture shown
    trails: new Map(),        // track id -> [{x, y, t}]
    dets: new Map(),          // sensor id -> [{time, pts: [[x, y], ...]}], newest last
    frameTime: null,
    lastScan: new Map(),      // sensor id -> {time, age} of its latest frame
    paused: false,
    held: null,               // newest frame received while paused
    heldDets: [],
    selected: null,           // track id
    selectedInfo: null,       // /v1/tracks/{id} answer
    view: { cx: 0, cy: 0, s: 0.1 },   // centre (m) and scale (px per m)
    fitted: false,
    metrics: null,            // previous scrape {t, values}
    rates: new Map(),         // sensor id -> {batches, dets}
    rejects: new Map(),       // sensor id -> total
    latency: null,            // mean ingest-to-frame latency over the last poll, s
    needToken: false,
  };

  const $ = (id) => document.getElementById(id);
  const canvas = $('map');
  const ctx = canvas.getContext('2d');

  // ---- geometry ----------------------------------------------------------------------------
  /**
   * The k-sigma ellipse of a track's position covariance.
   * cov: the frame's 10 upper-triangle entries of the 4x4 covariance of [x, y, vx, vy]
   * ([Pxx, Pxy, Pxvx, Pxvy, Pyy, ...], m^2...). The position block [[a, b], [b, c]] has the
   * eigenvalues l = (a+c)/2 +- sqrt(((a-c)/2)^2 + b^2); the semi-axes are k*sqrt(l) (m) and the
   * major axis makes the angle 0.5*atan2(2b, a-c) with east, counter-clockwise (radians).
   */
  function covEllipse(cov, k) {
    const a = cov[0], b = cov[1], c = cov[4];
    const m = (a + c) / 2, d = Math.hypot((a - c) / 2, b);
    const l1 = m + d, l2 = Math.max(m - d, 0);
    return { major: k * Math.sqrt(l1), minor: k * Math.sqrt(l2), angle: 0.5 * Math.atan2(2 * b, a - c) };
  }
  // A small read-only hook for the end-to-end test and for debugging from the console.
  window.plotweave = {
    covEllipse,
    tracksOnScreen: () => S.tracks.filter((t) => Number.isFinite(t.x) && Number.isFinite(t.y)).map((t) => {
      const [x, y] = toScreen(t.x, t.y);
      const r = canvas.getBoundingClientRect();
      return { id: t.id, status: t.status, x: x + r.left, y: y + r.top };
    }),
  };

  const toScreen = (x, y) => {
    const v = S.view;
    return [canvas.clientWidth / 2 + (x - v.cx) * v.s, canvas.clientHeight / 2 - (y - v.cy) * v.s];
  };
  const toSite = (px, py) => {
    const v = S.view;
    return [v.cx + (px - canvas.clientWidth / 2) / v.s, v.cy - (py - canvas.clientHeight / 2) / v.s];
  };
  const rad = (deg) => (deg * Math.PI) / 180;

  /** Site-frame outline of a sensor's coverage, as a closed polygon. */
  function coverageOutline(sensor) {
    const f = sensor.fov;
    if (!f) return [];
    if (f.shape === 'rect') {
      return [[f.x_min, f.y_min], [f.x_max, f.y_min], [f.x_max, f.y_max], [f.x_min, f.y_max]];
    }
    const p = sensor.noise && sensor.noise.position ? sensor.noise.position : { x: 0, y: 0 };
    const n = Math.max(8, Math.ceil(f.bearing_extent_deg / 2));
    const pts = [];
    for (let i = 0; i <= n; i++) {
      const b = rad(f.bearing_start_deg + (f.bearing_extent_deg * i) / n);
      pts.push([p.x + f.max_range * Math.sin(b), p.y + f.max_range * Math.cos(b)]);
    }
    if (f.min_range > 0) {
      for (let i = n; i >= 0; i--) {
        const b = rad(f.bearing_start_deg + (f.bearing_extent_deg * i) / n);
        pts.push([p.x + f.min_range * Math.sin(b), p.y + f.min_range * Math.cos(b)]);
      }
    } else if (f.bearing_extent_deg < 360) {
      pts.push([p.x, p.y]);
    }
    return pts;
  }

  function fit() {
    let x0 = Infinity, y0 = Infinity, x1 = -Infinity, y1 = -Infinity;
    const add = (x, y) => { x0 = Math.min(x0, x); x1 = Math.max(x1, x); y0 = Math.min(y0, y); y1 = Math.max(y1, y); };
    for (const s of S.sensors) for (const [x, y] of coverageOutline(s)) add(x, y);
    for (const t of S.tracks) if (Number.isFinite(t.x) && Number.isFinite(t.y)) add(t.x, t.y);
    if (!Number.isFinite(x0)) { x0 = -1000; x1 = 1000; y0 = -1000; y1 = 1000; }
    const w = Math.max(canvas.clientWidth, 100), h = Math.max(canvas.clientHeight, 100);
    S.view.cx = (x0 + x1) / 2;
    S.view.cy = (y0 + y1) / 2;
    S.view.s = 0.92 * Math.min(w / Math.max(x1 - x0, 1), h / Math.max(y1 - y0, 1));
    draw();
  }

  // ---- drawing -----------------------------------------------------------------------------
  let drawQueued = false;
  function draw() {
    if (drawQueued) return;
    drawQueued = true;
    requestAnimationFrame(() => { drawQueued = false; render(); });
  }

  function resize() {
    const dpr = window.devicePixelRatio || 1;
    canvas.width = Math.round(canvas.clientWidth * dpr);
    canvas.height = Math.round(canvas.clientHeight * dpr);
    ctx.setTransform(dpr, 0, 0, dpr, 0, 0);
    draw();
  }

  function niceStep(minMetres) {
    let step = 1;
    while (true) {
      for (const m of [1, 2, 5]) if (m * step >= minMetres) return m * step;
      step *= 10;
    }
  }

  const fmtDist = (m) => (Math.abs(m) >= 1000 ? (m / 1000).toString() + ' km' : m.toString() + ' m');

  function renderGrid(w, h) {
    const step = niceStep(90 / S.view.s);
    const [sx0, sy1] = toSite(0, 0), [sx1, sy0] = toSite(w, h);
    ctx.lineWidth = 1;
    ctx.font = '11px system-ui, sans-serif';
    ctx.fillStyle = C.gridText;
    for (let x = Math.ceil(sx0 / step) * step; x <= sx1; x += step) {
      const [px] = toScreen(x, 0);
      ctx.strokeStyle = x === 0 ? C.axis : C.grid;
      ctx.beginPath(); ctx.moveTo(Math.round(px) + 0.5, 0); ctx.lineTo(Math.round(px) + 0.5, h); ctx.stroke();
      ctx.textAlign = 'left'; ctx.textBaseline = 'top';
      ctx.fillText(x === 0 ? '0' : fmtDist(Math.abs(x)) + (x > 0 ? ' E' : ' W'), px + 3, 3);
    }
    for (let y = Math.ceil(sy0 / step) * step; y <= sy1; y += step) {
      const [, py] = toScreen(0, y);
      ctx.strokeStyle = y === 0 ? C.axis : C.grid;
      ctx.beginPath(); ctx.moveTo(0, Math.round(py) + 0.5); ctx.lineTo(w, Math.round(py) + 0.5); ctx.stroke();
      ctx.textAlign = 'left'; ctx.textBaseline = 'bottom';
      // Clear of the east-west labels at the top and the scale note at the bottom.
      if (y !== 0 && py > 30 && py < h - 30) ctx.fillText(fmtDist(Math.abs(y)) + (y > 0 ? ' N' : ' S'), 3, py - 2);
    }
    // Scale bar text
    $('scale').textContent = 'grid ' + fmtDist(step) + '  ·  north up';
  }

  function renderCoverage() {
    for (const s of S.sensors) {
      const col = S.colour.get(s.id);
      const pts = coverageOutline(s);
      if (pts.length < 3) continue;
      ctx.beginPath();
      pts.forEach(([x, y], i) => { const [px, py] = toScreen(x, y); i ? ctx.lineTo(px, py) : ctx.moveTo(px, py); });
      ctx.closePath();
      ctx.globalAlpha = 0.06; ctx.fillStyle = col; ctx.fill();
      ctx.globalAlpha = 0.55; ctx.strokeStyle = col; ctx.lineWidth = 1.2; ctx.setLineDash([6, 4]); ctx.stroke();
      ctx.setLineDash([]); ctx.globalAlpha = 1;
      // Sensor position (polar sensors) or coverage label (cartesian).
      ctx.font = '600 11px system-ui, sans-serif';
      ctx.fillStyle = col;
      if (s.kind === 'polar' && s.noise && s.noise.position) {
        const [px, py] = toScreen(s.noise.position.x, s.noise.position.y);
        ctx.beginPath(); ctx.moveTo(px, py - 6); ctx.lineTo(px + 6, py); ctx.lineTo(px, py + 6); ctx.lineTo(px - 6, py); ctx.closePath();
        ctx.fill(); ctx.strokeStyle = '#fff'; ctx.lineWidth = 1.5; ctx.stroke();
        ctx.textAlign = 'left'; ctx.textBaseline = 'top';
        ctx.fillText(s.id, px + 9, py + 4);
      } else if (s.fov && s.fov.shape === 'rect') {
        const [px, py] = toScreen(s.fov.x_min, s.fov.y_max);
        ctx.textAlign = 'left'; ctx.textBaseline = 'bottom';
        ctx.fillText(s.id, px + 2, py - 3);
      }
    }
  }

  function renderDetections() {
    for (const [id, scans] of S.dets) {
      ctx.fillStyle = S.colour.get(id) || '#555';
      for (let i = 0; i < scans.length; i++) {
        const age = scans.length - 1 - i;
        ctx.globalAlpha = FADE_ALPHA[Math.min(age, FADE_ALPHA.length - 1)];
        for (const [x, y] of scans[i].pts) {
          const [px, py] = toScreen(x, y);
          ctx.fillRect(px - 1.75, py - 1.75, 3.5, 3.5);
        }
      }
    }
    ctx.globalAlpha = 1;
  }

  function renderTracks() {
    const confirmed = S.tracks.filter((t) => t.status === 'confirmed');
    const tentative = S.tracks.filter((t) => t.status !== 'confirmed');
    const ok = (t) => Number.isFinite(t.x) && Number.isFinite(t.y);
    // Tentative tracks: small hollow circles, faint ellipses, labels only when zoomed in.
    for (const t of tentative) {
      if (!ok(t)) continue;
      const [px, py] = toScreen(t.x, t.y);
      if (Array.isArray(t.cov) && t.cov.every(Number.isFinite)) {
        const e = covEllipse(t.cov, SIGMA);
        ctx.beginPath(); ctx.ellipse(px, py, Math.max(e.major * S.view.s, 1), Math.max(e.minor * S.view.s, 1), -e.angle, 0, 2 * Math.PI);
        ctx.strokeStyle = 'rgba(138,141,147,0.22)'; ctx.lineWidth = 1; ctx.setLineDash([2, 3]); ctx.stroke(); ctx.setLineDash([]);
      }
      ctx.beginPath(); ctx.arc(px, py, 3.5, 0, 2 * Math.PI);
      ctx.strokeStyle = C.tentative; ctx.lineWidth = 1.4; ctx.stroke();
      if (S.view.s > 0.6) label(String(t.id), px, py, C.tentative, '10px');
    }
    // Confirmed tracks: trail, ellipse, velocity vector, filled dot, id label.
    for (const t of confirmed) {
      if (!ok(t)) continue;
      const trail = S.trails.get(t.id) || [];
      if (trail.length > 1) {
        ctx.beginPath();
        trail.forEach((p, i) => { const [px, py] = toScreen(p.x, p.y); i ? ctx.lineTo(px, py) : ctx.moveTo(px, py); });
        const [px, py] = toScreen(t.x, t.y); ctx.lineTo(px, py);
        ctx.strokeStyle = 'rgba(29,78,137,0.35)'; ctx.lineWidth = 1.5; ctx.stroke();
      }
      const [px, py] = toScreen(t.x, t.y);
      if (Array.isArray(t.cov) && t.cov.every(Number.isFinite)) {
        const e = covEllipse(t.cov, SIGMA);
        ctx.beginPath(); ctx.ellipse(px, py, Math.max(e.major * S.view.s, 1), Math.max(e.minor * S.view.s, 1), -e.angle, 0, 2 * Math.PI);
        ctx.strokeStyle = 'rgba(29,78,137,0.55)'; ctx.lineWidth = 1.2; ctx.stroke();
        ctx.fillStyle = 'rgba(29,78,137,0.06)'; ctx.fill();
      }
      if (Number.isFinite(t.vx) && Number.isFinite(t.vy)) {
        const [qx, qy] = toScreen(t.x + t.vx * LEAD_S, t.y + t.vy * LEAD_S);
        arrow(px, py, qx, qy, C.confirmed);
      }
      ctx.beginPath(); ctx.arc(px, py, 5, 0, 2 * Math.PI);
      ctx.fillStyle = C.confirmed; ctx.fill(); ctx.strokeStyle = '#fff'; ctx.lineWidth = 1.5; ctx.stroke();
      label(String(t.id), px, py, C.confirmed, '600 12px');
    }
    // The selected track: its fetched history and a ring.
    const sel = S.tracks.find((t) => t.id === S.selected);
    if (S.selectedInfo && S.selectedInfo.history && S.selectedInfo.history.length > 1) {
      ctx.beginPath();
      S.selectedInfo.history.forEach((p, i) => { const [hx, hy] = toScreen(p.x, p.y); i ? ctx.lineTo(hx, hy) : ctx.moveTo(hx, hy); });
      ctx.strokeStyle = C.selected; ctx.lineWidth = 1.5; ctx.setLineDash([4, 3]); ctx.stroke(); ctx.setLineDash([]);
      for (const p of S.selectedInfo.history) {
        const [hx, hy] = toScreen(p.x, p.y);
        ctx.fillStyle = C.selected; ctx.fillRect(hx - 1.5, hy - 1.5, 3, 3);
      }
    }
    if (sel && ok(sel)) {
      const [px, py] = toScreen(sel.x, sel.y);
      ctx.beginPath(); ctx.arc(px, py, 10, 0, 2 * Math.PI);
      ctx.strokeStyle = C.selected; ctx.lineWidth = 2; ctx.stroke();
    }
  }

  function label(text, px, py, colour, font) {
    ctx.font = font + ' system-ui, sans-serif';
    ctx.textAlign = 'left'; ctx.textBaseline = 'bottom';
    ctx.lineWidth = 3; ctx.strokeStyle = C.halo; ctx.lineJoin = 'round';
    ctx.strokeText(text, px + 7, py - 5);
    ctx.fillStyle = colour; ctx.fillText(text, px + 7, py - 5);
  }

  function arrow(x0, y0, x1, y1, colour) {
    const len = Math.hypot(x1 - x0, y1 - y0);
    ctx.strokeStyle = colour; ctx.lineWidth = 1.6;
    ctx.beginPath(); ctx.moveTo(x0, y0); ctx.lineTo(x1, y1); ctx.stroke();
    if (len < 8) return;
    const a = Math.atan2(y1 - y0, x1 - x0), h = 6;
    ctx.beginPath();
    ctx.moveTo(x1 - h * Math.cos(a - 0.45), y1 - h * Math.sin(a - 0.45));
    ctx.lineTo(x1, y1);
    ctx.lineTo(x1 - h * Math.cos(a + 0.45), y1 - h * Math.sin(a + 0.45));
    ctx.stroke();
  }

  function render() {
    const w = canvas.clientWidth, h = canvas.clientHeight;
    ctx.fillStyle = C.bg;
    ctx.fillRect(0, 0, w, h);
    renderGrid(w, h);
    renderCoverage();
    renderDetections();
    renderTracks();
    if (S.frameTime !== null && document.body.dataset.ready !== '1') document.body.dataset.ready = '1';
  }

  // ---- frames and detections ---------------------------------------------------------------
  function applyFrame(f) {
    const live = new Set();
    for (const t of f.tracks) {
      live.add(t.id);
      let trail = S.trails.get(t.id);
      if (!trail) { trail = []; S.trails.set(t.id, trail); }
      const last = trail[trail.length - 1];
      if (!last || last.t !== t.last_update) {
        trail.push({ x: t.x, y: t.y, t: t.last_update });
        if (trail.length > TRAIL_POINTS) trail.shift();
      }
    }
    for (const id of [...S.trails.keys()]) if (!live.has(id)) S.trails.delete(id);
    S.tracks = f.tracks;
    S.frameTime = f.time;
    const confirmed = f.tracks.filter((t) => t.status === 'confirmed').length;
    $('confirmed-count').textContent = String(confirmed);
    $('tentative-count').textContent = String(f.tracks.length - confirmed);
    if (f.time !== null) $('clock').textContent = 'picture at ' + new Date(f.time * 1000).toISOString().slice(11, 21) + ' UTC';
    if (!S.fitted && S.sensors.length) { S.fitted = true; fit(); }
    draw();
  }

  function applyDetections(d) {
    let scans = S.dets.get(d.sensor);
    if (!scans) { scans = []; S.dets.set(d.sensor, scans); }
    scans.push({ time: d.time, pts: d.detections.filter((p) => Number.isFinite(p.x) && Number.isFinite(p.y)).map((p) => [p.x, p.y]) });
    while (scans.length > FADE_SCANS) scans.shift();
    draw();
  }

  const sockets = {};
  let generation = 0;          // bumped when the token changes: older connection loops stop
  function connect(path, onMessage) {
    let backoff = 1000;
    const gen = generation;
    const open = () => {
      if (S.needToken || gen !== generation) return;
      const ws = new WebSocket(wsUrl(path), protocols());
      sockets[path] = ws;
      ws.onopen = () => { backoff = 1000; status(); };
      ws.onmessage = (ev) => {
        let m;
        try { m = JSON.parse(ev.data); } catch (_) { return; }
        if (m && typeof m.skipped === 'number') return; // the picture is replaced whole by the next frame
        onMessage(m);
      };
      ws.onclose = () => {
        status();
        if (sockets[path] !== ws || gen !== generation) return;
        // A refused upgrade looks like any other failure here: ask an HTTP path why.
        get('/v1/sensors').catch((e) => { if (e instanceof Unauthorized) askToken(); });
        setTimeout(open, backoff);
        backoff = Math.min(backoff * 2, 8000);
      };
    };
    open();
  }

  function status() {
    const f = sockets['/v1/frames'];
    const el = $('conn');
    if (S.needToken) { el.textContent = 'read token needed'; el.className = 'conn bad'; return; }
    if (f && f.readyState === WebSocket.OPEN) { el.textContent = S.paused ? 'paused' : 'live'; el.className = 'conn ok'; }
    else { el.textContent = 'reconnecting'; el.className = 'conn bad'; }
  }

  // ---- side panel --------------------------------------------------------------------------
  function parseMetrics(text) {
    const out = [];
    for (const line of text.split('\n')) {
      if (!line || line[0] === '#') continue;
      const m = /^([A-Za-z_:][\w:]*)(?:\{(.*)\})?\s+(\S+)/.exec(line);
      if (!m) continue;
      const labels = {};
      if (m[2]) for (const l of m[2].matchAll(/(\w+)="((?:[^"\\]|\\.)*)"/g)) labels[l[1]] = l[2];
      out.push({ name: m[1], labels, value: Number(m[3]) });
    }
    return out;
  }

  function sumBy(samples, name, key) {
    const r = new Map();
    for (const s of samples) if (s.name === name) r.set(s.labels[key], (r.get(s.labels[key]) || 0) + s.value);
    return r;
  }

  async function pollMetrics() {
    try {
      const samples = parseMetrics(await get('/metrics', true));
      const now = performance.now() / 1000;
      const values = {
        acked: sumBy(samples, 'plotweave_batches_acked_total', 'sensor'),
        dets: sumBy(samples, 'plotweave_detections_total', 'sensor'),
        rejected: sumBy(samples, 'plotweave_batches_rejected_total', 'sensor'),
        latSum: samples.find((s) => s.name === 'plotweave_ingest_to_frame_latency_seconds_sum'),
        latCount: samples.find((s) => s.name === 'plotweave_ingest_to_frame_latency_seconds_count'),
      };
      const prev = S.metrics;
      if (prev) {
        const dt = now - prev.t;
        for (const [id, n] of values.acked) {
          const db = n - (prev.values.acked.get(id) || 0);
          const dd = (values.dets.get(id) || 0) - (prev.values.dets.get(id) || 0);
          S.rates.set(id, { batches: db / dt, dets: db > 0 ? dd / db : null });
        }
        if (values.latSum && values.latCount && prev.values.latSum && prev.values.latCount) {
          const dc = values.latCount.value - prev.values.latCount.value;
          S.latency = dc > 0 ? (values.latSum.value - prev.values.latSum.value) / dc : S.latency;
        }
      }
      S.rejects = values.rejected;
      S.metrics = { t: now, values };
      renderSensors();
    } catch (e) {
      if (e instanceof Unauthorized) askToken();
    }
  }

  async function pollSensors() {
    try {
      const r = await get('/v1/sensors');
      S.site = r.site;
      $('site-name').textContent = r.site;
      document.title = 'plotweave: ' + r.site;
      S.sensors = r.sensors;
      r.sensors.forEach((s, i) => S.colour.set(s.id, SENSOR_COLOURS[i % SENSOR_COLOURS.length]));
      if (!S.fitted) { S.fitted = true; fit(); }
      renderSensors();
      draw();
    } catch (e) {
      if (e instanceof Unauthorized) askToken();
    }
  }

  const num = (v, digits) => (v === null || v === undefined || !Number.isFinite(v) ? '–' : v.toFixed(digits));
  const esc = (s) => String(s).replace(/[&<>"']/g, (c) => ({ '&': '&amp;', '<': '&lt;', '>': '&gt;', '"': '&quot;', "'": '&#39;' }[c]));

  function renderSensors() {
    const host = $('sensors');
    const parts = [];
    for (const s of S.sensors) {
      const h = s.health || {};
      const rate = S.rates.get(s.id) || {};
      const last = S.lastScan.get(s.id);
      const dim = s.kind === 'polar' && s.noise && s.noise.range_rate ? 3 : 2;
      // Rules of thumb (common practice, not a test): flag an estimate more than 50 % away
      // from its configured value, a mean NIS over twice its expectation (the measurement
      // dimension), and more than 10 % of NIS samples outside the 95 % interval.
      const off = (est, cfg) => est !== null && est !== undefined && cfg > 0 && Math.abs(est - cfg) / cfg > 0.5;
      const cls = (bad) => (bad ? 'v warn' : 'v');
      parts.push(`<div class="sensor">
        <div class="name"><i></i>${esc(s.id)}</div>
        <div class="kind">${esc(s.kind)} sensor, a scan every ${num(s.period, 1)} s</div>
        <table>
        <tr><td>batches / s</td><td class="v">${num(rate.batches, 2)}</td></tr>
        <tr><td>detections / scan</td><td class="v">${num(rate.dets, 1)}</td></tr>
        <tr><td>clutter / scan, set · est.</td><td class="${cls(off(h.clutter_rate_estimate, h.configured_clutter_rate))}">${num(h.configured_clutter_rate, 2)} · ${num(h.clutter_rate_estimate, 2)}</td></tr>
        <tr><td>P<sub>D</sub>, set · est.</td><td class="${cls(off(h.detection_probability_estimate, h.configured_detection_probability))}">${num(h.configured_detection_probability, 2)} · ${num(h.detection_probability_estimate, 2)}</td></tr>
        <tr><td>NIS mean (expect ${dim})</td><td class="${cls(h.nis_mean > 2 * dim)}">${num(h.nis_mean, 2)}</td></tr>
        <tr><td>NIS outside 95 %</td><td class="${cls(h.nis_outside_95 > 0.1)}">${h.nis_outside_95 === null || h.nis_outside_95 === undefined ? '–' : num(100 * h.nis_outside_95, 1) + ' %'}</td></tr>
        <tr><td>scan age at display</td><td class="v">${last ? num(last.age * 1000, 0) + ' ms' : '–'}</td></tr>
        <tr><td>rejected batches</td><td class="${cls((S.rejects.get(s.id) || 0) > 0)}">${num(S.rejects.get(s.id) || 0, 0)}</td></tr>
        </table></div>`);
    }
    host.innerHTML = parts.join('');
    // Colours set through the CSSOM: the page's CSP allows no inline style attributes.
    host.querySelectorAll('.sensor .name i').forEach((el, i) => { el.style.background = S.colour.get(S.sensors[i].id); });
    $('service').textContent = 'ingest → frame latency (mean, last 2 s): ' + (S.latency === null ? '–' : num(S.latency * 1000, 1) + ' ms') +
      ' · ' + S.tracks.length + ' live tracks';
  }

  // ---- the selected track ------------------------------------------------------------------
  async function pollTrack() {
    if (S.selected === null) return;
    const id = S.selected;
    try {
      const r = await get('/v1/tracks/' + id);
      if (S.selected !== id) return;
      S.selectedInfo = r;
      renderTrack();
    } catch (e) {
      if (S.selected !== id) return;
      if (e instanceof Unauthorized) { askToken(); return; }
      if (e.status === 404) {
        S.selectedInfo = null;
        $('track-state').innerHTML = '<tr><td>this track has ended</td></tr>';
        $('track-history').innerHTML = '';
      }
    }
    draw();
  }

  function renderTrack() {
    const r = S.selectedInfo;
    if (!r) return;
    const t = r.track;
    const speed = Math.hypot(t.vx, t.vy);
    const course = ((Math.atan2(t.vx, t.vy) * 180) / Math.PI + 360) % 360;
    const sd = (i) => (Array.isArray(t.cov) && Number.isFinite(t.cov[i]) ? Math.sqrt(Math.max(t.cov[i], 0)) : null);
    const age = r.time !== null && Number.isFinite(t.last_update) ? r.time - t.last_update : null;
    $('track-id').textContent = String(t.id);
    $('track-state').innerHTML = [
      ['status', esc(t.status)],
      ['existence', num(t.existence, 3)],
      ['x, y', num(t.x, 0) + ', ' + num(t.y, 0) + ' m'],
      ['σ x, σ y', num(sd(0), 1) + ', ' + num(sd(4), 1) + ' m'],
      ['speed', num(speed, 2) + ' m/s'],
      ['course', num(course, 1) + '° from north'],
      ['σ vx, σ vy', num(sd(7), 2) + ', ' + num(sd(9), 2) + ' m/s'],
      ['last update', age === null ? '–' : num(age, 1) + ' s before frame'],
      ['sensors', esc((t.sensors || []).join(', ') || '–')],
    ].map(([k, v]) => `<tr><td>${k}</td><td class="v">${v}</td></tr>`).join('');
    const hist = (r.history || []).slice(-8).reverse();
    $('track-history').innerHTML = '<tr><th>age s</th><th>x m</th><th>y m</th><th>m/s</th><th></th></tr>' + hist.map((p) =>
      `<tr><td>${num(r.time - p.time, 1)}</td><td>${num(p.x, 0)}</td><td>${num(p.y, 0)}</td><td>${num(Math.hypot(p.vx, p.vy), 1)}</td><td>${p.status === 'confirmed' ? '' : 'tent.'}</td></tr>`).join('');
  }

  function select(id) {
    S.selected = id;
    S.selectedInfo = null;
    $('track-card').hidden = id === null;
    if (id !== null) {
      $('track-id').textContent = String(id);
      $('track-state').innerHTML = '<tr><td>loading…</td></tr>';
      $('track-history').innerHTML = '';
      pollTrack();
    }
    draw();
  }

  function pick(px, py) {
    let best = null, bestD = 12;
    for (const t of S.tracks) {
      if (!Number.isFinite(t.x)) continue;
      const [sx, sy] = toScreen(t.x, t.y);
      // Confirmed tracks win ties against the tentative ones around them.
      const d = Math.hypot(sx - px, sy - py) - (t.status === 'confirmed' ? 4 : 0);
      if (d < bestD) { bestD = d; best = t.id; }
    }
    return best;
  }

  // ---- interaction -------------------------------------------------------------------------
  let drag = null;
  canvas.addEventListener('pointerdown', (e) => {
    drag = { x: e.clientX, y: e.clientY, cx: S.view.cx, cy: S.view.cy, moved: false };
    canvas.setPointerCapture(e.pointerId);
  });
  canvas.addEventListener('pointermove', (e) => {
    const r = canvas.getBoundingClientRect();
    const [x, y] = toSite(e.clientX - r.left, e.clientY - r.top);
    $('cursor').textContent = 'x ' + x.toFixed(0) + ' m  y ' + y.toFixed(0) + ' m';
    if (!drag) return;
    const dx = e.clientX - drag.x, dy = e.clientY - drag.y;
    if (Math.hypot(dx, dy) > 3) { drag.moved = true; canvas.classList.add('dragging'); }
    if (drag.moved) {
      S.view.cx = drag.cx - dx / S.view.s;
      S.view.cy = drag.cy + dy / S.view.s;
      draw();
    }
  });
  canvas.addEventListener('pointerup', (e) => {
    if (drag && !drag.moved) {
      const r = canvas.getBoundingClientRect();
      select(pick(e.clientX - r.left, e.clientY - r.top));
    }
    drag = null;
    canvas.classList.remove('dragging');
  });
  canvas.addEventListener('wheel', (e) => {
    e.preventDefault();
    const r = canvas.getBoundingClientRect();
    const px = e.clientX - r.left, py = e.clientY - r.top;
    const [x, y] = toSite(px, py);
    const k = Math.exp(-e.deltaY * 0.0015);
    S.view.s = Math.min(Math.max(S.view.s * k, 0.005), 50);
    // Keep the site point under the cursor where it is.
    S.view.cx = x - (px - canvas.clientWidth / 2) / S.view.s;
    S.view.cy = y + (py - canvas.clientHeight / 2) / S.view.s;
    draw();
  }, { passive: false });

  function togglePause() {
    S.paused = !S.paused;
    $('pause').textContent = S.paused ? 'Resume' : 'Pause';
    $('pause').classList.toggle('on', S.paused);
    if (!S.paused) {
      for (const d of S.heldDets) applyDetections(d);
      S.heldDets = [];
      if (S.held) applyFrame(S.held);
      S.held = null;
    }
    status();
  }
  $('pause').addEventListener('click', togglePause);
  $('fit').addEventListener('click', fit);
  $('track-close').addEventListener('click', () => select(null));
  window.addEventListener('keydown', (e) => {
    if (e.target instanceof HTMLInputElement) return;
    if (e.key === 'p' || e.key === ' ') { e.preventDefault(); togglePause(); }
    if (e.key === 'f') fit();
    if (e.key === 'Escape') select(null);
  });
  window.addEventListener('resize', resize);

  function askToken() {
    if (S.needToken) return;
    S.needToken = true;
    const n = $('notice');
    n.textContent = token ? 'The read token was refused. Enter the right one above.' : 'This service needs its read token: enter it above (or open the page with ?token=...).';
    n.hidden = false;
    $('token').focus();
    status();
  }
  $('token-form').addEventListener('submit', (e) => {
    e.preventDefault();
    token = $('token').value.trim();
    $('token').value = '';
    sessionStorage.setItem('plotweave.token', token);
    $('notice').hidden = true;
    S.needToken = false;
    generation += 1;
    for (const ws of Object.values(sockets)) ws.close();
    start();
  });

  // ---- start -------------------------------------------------------------------------------
  let started = false;
  function start() {
    pollSensors();
    pollMetrics();
    connect('/v1/frames', (f) => {
      if (!Array.isArray(f.tracks)) return;
      if (f.sensor) S.lastScan.set(f.sensor, { time: f.time, age: Date.now() / 1000 - f.time });
      if (S.paused) { S.held = f; return; }
      applyFrame(f);
    });
    connect('/v1/detections', (d) => {
      if (!Array.isArray(d.detections)) return;
      if (S.paused) { S.heldDets.push(d); if (S.heldDets.length > 16) S.heldDets.shift(); return; }
      applyDetections(d);
    });
    if (!started) {
      started = true;
      setInterval(pollSensors, POLL_MS);
      setInterval(pollMetrics, POLL_MS);
      setInterval(pollTrack, TRACK_POLL_MS);
      setInterval(() => { if (S.tracks.length) renderSensors(); }, 1000);
    }
  }
  resize();
  start();
})();
