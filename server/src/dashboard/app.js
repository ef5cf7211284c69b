// Tessera dashboard: campaign list and one campaign's coverage map, drawn from the
// server's JSON API. Plain script, no libraries. The access token lives in this
// tab's sessionStorage only and is sent as `Authorization: Bearer`.
'use strict';
(function () {
  const TOKEN_KEY = 'tessera.token';
  const POLL_MS = 3000;
  // A full reload of the map now and then, besides the incremental updates.
  const FULL_RELOAD_MS = 60000;
  // Changes are stamped before their transaction commits: ask again from a little
  // before the previous answer's time so that none is missed.
  const SINCE_SLACK_MS = 10000;
  const PAGE = 20000;
  const HISTORY_MS = 15000;
  // The cell statuses come from the server, written into the page (one list, built
  // from the server's status enum): name, label, leaf, drawing rank, bar position, colour.
  const STATUSES = JSON.parse(document.getElementById('cell-statuses').textContent);
  const LEAVES = STATUSES.filter((s) => s.leaf);
  const byKey = (k) => LEAVES.slice().sort((a, b) => a[k] - b[k]).map((s) => s.name);
  // Drawing order, best to worst: where cells overlap in the chosen two axes (they
  // differ in the other dimensions) the worst status ends on top.
  const SEVERITY = byKey('rank');
  const BAR_ORDER = byKey('bar');
  const LABEL = Object.fromEntries(LEAVES.map((s) => [s.name, s.label]));
  const COLOR = Object.fromEntries(LEAVES.map((s) => [s.name, s.color]));
  const IS_LEAF = Object.fromEntries(STATUSES.map((s) => [s.name, s.leaf]));
  // Changes of a follow-up, drawn least important first so that losses end on top.
  const CHANGE_ORDER = ['same', 'still-safe', 'newly-safe', 'lost-safe', 'safe-counterexample'];
  const CHANGE_LABEL = {
    'same': 'not safe before nor now', 'still-safe': 'safe before and now', 'newly-safe': 'newly proven safe',
    'lost-safe': 'was safe, now unresolved or open', 'safe-counterexample': 'was safe, now in a counterexample cell',
  };
  const CHANGES_MS = 10000;
  const CHANGE_ROWS = 50000;
  function changeKind(from, to) {
    if (from === 'safe') return to === 'safe' ? 'still-safe' : (to === 'counterexample' ? 'safe-counterexample' : 'lost-safe');
    return to === 'safe' ? 'newly-safe' : 'same';
  }

  const $ = (id) => document.getElementById(id);
  let token = null;
  let role = null;
  let timer = null;

  // ------------------------------------------------------------ helpers

  function el(tag, attrs, ...children) {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (k === 'class') e.className = v;
      else if (k === 'text') e.textContent = v;
      else e.setAttribute(k, v);
    }
    for (const c of children) e.append(c);
    return e;
  }

  class ApiError extends Error {
    constructor(status, message) { super(message); this.status = status; }
  }

  async function api(path, method) {
    const r = await fetch(path, {
      method: method || 'GET',
      headers: { Authorization: 'Bearer ' + token },
      cache: 'no-store',
    });
    let body = null;
    try { body = await r.json(); } catch (_) { body = null; }
    if (r.status === 401) {
      logout('The token was not accepted; please log in again.');
      throw new ApiError(401, 'unauthorized');
    }
    if (!r.ok) throw new ApiError(r.status, (body && body.detail) || ('HTTP ' + r.status));
    return body;
  }

  function fmtNum(x, digits) {
    if (x === null || x === undefined || !isFinite(x)) return '—';
    return Number(x).toLocaleString('en-US', { maximumFractionDigits: digits === undefined ? 2 : digits });
  }
  function fmtPct(f) { return (100 * f).toFixed(f > 0 && f < 0.001 ? 4 : 2) + ' %'; }
  function fmtTime(ms) { return ms ? new Date(ms).toISOString().replace('T', ' ').replace(/\.\d+Z$/, ' UTC') : '—'; }
  function fmtDuration(s) {
    if (s < 90) return Math.round(s) + ' s';
    if (s < 5400) return Math.round(s / 60) + ' min';
    if (s < 172800) return (s / 3600).toFixed(1) + ' h';
    return (s / 86400).toFixed(1) + ' days';
  }
  function finishText(c, cov) {
    if (c.state === 'done') return 'finished ' + fmtTime(c.finished_at_ms);
    if (c.state === 'cancelled') return 'cancelled';
    const eta = cov.estimated_seconds_remaining;
    if (eta === null || eta === undefined) return 'unknown (no results yet)';
    if (eta === 0) return 'nothing left to check';
    const t = fmtTime(Date.now() + eta * 1000);
    return t + ' (in ' + fmtDuration(eta) + (c.state === 'paused' ? ', once resumed' : '') + ')';
  }
  function setStatus(text, isError) {
    const s = $('status-line');
    s.textContent = text;
    s.classList.toggle('error', !!isError);
  }

  // Colour an element as status `s` (through the CSS object model: the page's policy
  // refuses inline style attributes).
  function swatch(e, s) {
    e.style.background = COLOR[s] || '#999';
    return e;
  }

  function legend(container, statuses) {
    container.replaceChildren(...statuses.map((s) => el('span', {}, swatch(el('i', {}), s), LABEL[s])));
  }

  function volumeBar(container, cov) {
    const parts = [];
    const tip = [];
    for (const s of BAR_ORDER) {
      const st = cov.statuses[s];
      if (!st) continue;
      tip.push(LABEL[s] + ': ' + fmtPct(st.fraction) + ' (' + st.reduced + ')');
      if (st.fraction > 0) {
        const seg = swatch(el('span', { title: LABEL[s] + ': ' + fmtPct(st.fraction) }), s);
        // Set through the CSS object model: the page's policy refuses inline style attributes.
        seg.style.width = (100 * st.fraction) + '%';
        parts.push(seg);
      }
    }
    container.replaceChildren(...parts);
    container.title = tip.join('\n');
    container.setAttribute('aria-label', tip.join('; '));
  }

  const specCache = new Map();
  async function specOf(c) {
    if (!specCache.has(c.spec_hash)) specCache.set(c.spec_hash, await api('/api/v1/campaigns/' + c.id + '/spec'));
    return specCache.get(c.spec_hash);
  }
  function modelHashes(spec) {
    return ((spec.controller && spec.controller.networks) || []).map((n) => String(n).replace(/^sha256:/, ''));
  }
  function hashList(hashes) {
    return el('span', {}, ...hashes.map((h, i) =>
      el('span', { class: 'hash', title: h, text: (i ? ', ' : '') + h.slice(0, 12) + '…' })));
  }

  // ------------------------------------------------------------ login

  function takeFragment() {
    const h = location.hash.replace(/^#/, '');
    if (!h) return;
    const p = new URLSearchParams(h);
    if (p.get('token')) {
      sessionStorage.setItem(TOKEN_KEY, p.get('token'));
      p.delete('token');
      const rest = p.toString();
      history.replaceState(null, '', location.pathname + location.search + (rest ? '#' + rest : ''));
    }
  }

  function showOnly(id) {
    for (const v of ['login-view', 'list-view', 'campaign-view']) $(v).hidden = v !== id;
  }

  function logout(message) {
    sessionStorage.removeItem(TOKEN_KEY);
    token = null;
    role = null;
    if (timer) clearTimeout(timer);
    timer = null;
    $('who').textContent = '';
    $('logout').hidden = true;
    showOnly('login-view');
    $('login-error').textContent = message || '';
    $('token-input').focus();
  }

  async function login(candidate) {
    token = candidate;
    const me = await api('/api/v1/whoami');
    role = me.role;
    sessionStorage.setItem(TOKEN_KEY, candidate);
    $('who').textContent = 'role: ' + role;
    $('logout').hidden = false;
    $('login-error').textContent = '';
  }

  $('login-form').addEventListener('submit', async (ev) => {
    ev.preventDefault();
    const t = $('token-input').value.trim();
    if (!t) return;
    try {
      await login(t);
      $('token-input').value = '';
      route();
    } catch (e) {
      if (e.status !== 401) $('login-error').textContent = 'Could not log in: ' + e.message;
    }
  });
  $('logout').addEventListener('click', () => logout(''));

  // ------------------------------------------------------------ routing and polling

  function campaignIdFromPath() {
    const m = location.pathname.match(/^\/dashboard\/campaigns\/([^/]+)\/?$/);
    return m ? decodeURIComponent(m[1]) : null;
  }

  function poll(fn) {
    if (timer) clearTimeout(timer);
    const tick = async () => {
      try {
        await fn();
        setStatus('Updated ' + new Date().toLocaleTimeString() + '; refreshing every ' + POLL_MS / 1000 + ' s.');
      } catch (e) {
        if (e.status === 401) return;
        setStatus('Update failed: ' + e.message, true);
      }
      if (token) timer = setTimeout(tick, POLL_MS);
    };
    return tick();
  }

  function route() {
    const id = campaignIdFromPath();
    if (id) {
      showOnly('campaign-view');
      openCampaign(id);
    } else {
      showOnly('list-view');
      legend($('list-legend'), BAR_ORDER);
      poll(refreshList);
    }
  }

  // ------------------------------------------------------------ campaign list

  async function refreshList() {
    const list = await api('/api/v1/campaigns');
    const rows = await Promise.all(list.campaigns.map(async (c) => {
      const [cov, spec] = await Promise.all([api('/api/v1/campaigns/' + c.id + '/coverage'), specOf(c)]);
      return { c, cov, spec };
    }));
    const tbody = $('campaigns').tBodies[0];
    tbody.replaceChildren(...rows.map(({ c, cov, spec }) => {
      const bar = el('div', { class: 'bar' });
      volumeBar(bar, cov);
      const link = el('a', { href: '/dashboard/campaigns/' + encodeURIComponent(c.id), text: c.name });
      return el('tr', { 'data-id': c.id },
        el('td', {}, link),
        el('td', {}, el('span', { class: 'state ' + c.state, text: c.state })),
        el('td', {}, bar),
        el('td', { class: 'num', text: fmtPct(cov.statuses.safe.fraction) }),
        el('td', { class: 'num', text: fmtNum(cov.cells_per_second, 1) }),
        el('td', { text: finishText(c, cov) }),
        el('td', {}, hashList(modelHashes(spec))));
    }));
    $('list-empty').hidden = rows.length > 0;
  }

  // ------------------------------------------------------------ one campaign

  const M = {
    id: null, campaign: null, cov: null, spec: null,
    states: [], envelope: [], split: [], splitPos: [],
    cells: new Map(), // rowid -> {s: status, d: depth, b: [lo0, hi0, lo1, hi1, ...] over split states}
    sinceMs: null, lastFull: 0, dirty: true,
    ax: 0, ay: 1, cex: [], cexCount: -1, cexAt: 0,
    view: null, // pixel mapping of the last drawing
    history: [], historyAt: 0,
    timing: {}, // milliseconds of the last map load and drawing, for the benchmark
  };

  async function openCampaign(id) {
    M.id = id;
    M.cells = new Map();
    M.sinceMs = null;
    M.lastFull = 0;
    M.cexCount = -1;
    M.historyAt = 0;
    M.changesAt = 0;
    M.changes = null;
    $('changes-view').hidden = true;
    legend($('map-legend'), SEVERITY);
    await poll(refreshCampaign);
  }

  async function loadLeaves(full) {
    let after = 0;
    let asOf = null;
    const base = '/api/v1/campaigns/' + M.id + '/leaves?limit=' + PAGE + (full ? '' : '&since_ms=' + M.sinceMs);
    if (full) M.cells = new Map();
    for (;;) {
      const page = await api(base + '&after=' + after);
      if (asOf === null) {
        asOf = page.as_of_ms;
        M.states = page.states;
        M.envelope = page.envelope;
        M.split = page.split_states;
        M.splitPos = M.states.map((s) => M.split.indexOf(s));
      }
      for (const row of page.rows) {
        const s = page.statuses[row[1]];
        if (!IS_LEAF[s]) M.cells.delete(row[0]);
        else M.cells.set(row[0], { s, d: row[2], b: row.slice(3) });
      }
      if (page.rows.length) M.dirty = true;
      if (page.next_after === null || page.next_after === undefined) break;
      after = page.next_after;
    }
    M.sinceMs = asOf - SINCE_SLACK_MS;
    if (full) { M.lastFull = Date.now(); M.dirty = true; }
  }

  async function refreshCampaign() {
    const base = '/api/v1/campaigns/' + M.id;
    const [c, cov, recent] = await Promise.all([api(base), api(base + '/coverage'), api(base + '/results?limit=15')]);
    M.campaign = c;
    M.cov = cov;
    if (!M.spec || M.spec._hash !== c.spec_hash) {
      M.spec = await api(base + '/spec');
      M.spec._hash = c.spec_hash;
    }
    const full = M.sinceMs === null || Date.now() - M.lastFull > FULL_RELOAD_MS;
    const t0 = performance.now();
    await loadLeaves(full);
    M.timing.load_ms = Math.round(performance.now() - t0);
    M.timing.full = full;
    if (M.cexCount !== c.cells.counterexample || Date.now() - M.cexAt > 30000) await loadCounterexamples();
    if (Date.now() - M.historyAt > HISTORY_MS) {
      M.history = (await api(base + '/history?points=120')).points;
      M.historyAt = Date.now();
      drawHistory();
    }
    renderHeader();
    renderAxes();
    renderRecent(recent.results);
    if (c.follow_up_of && Date.now() - M.changesAt > CHANGES_MS) {
      M.changes = await api(base + '/changes?rows=' + CHANGE_ROWS);
      M.changesAt = Date.now();
      renderChanges();
    }
    if (M.dirty) drawMap();
    publishTiming();
  }

  function publishTiming() { $('map').dataset.timing = JSON.stringify(M.timing); }

  async function loadCounterexamples() {
    const r = await api('/api/v1/campaigns/' + M.id + '/counterexamples?limit=200');
    M.cex = r.counterexamples;
    M.cexCount = M.campaign.cells.counterexample;
    M.cexAt = Date.now();
    M.dirty = true;
  }

  function renderHeader() {
    const c = M.campaign;
    const cov = M.cov;
    document.title = c.name + ' — Tessera';
    $('c-name').textContent = c.name;
    const st = $('c-state');
    st.textContent = c.state;
    st.className = 'state ' + c.state;
    volumeBar($('c-bar'), cov);
    const facts = [
      ['Proven safe', fmtPct(cov.statuses.safe.fraction) + ' of the envelope (' + cov.statuses.safe.reduced + ')'],
      ['Holds a counterexample', fmtPct(cov.statuses.counterexample.fraction) + ' (' + c.cells.counterexample +
        ' cells; an upper bound on the unsafe volume in them)'],
      ['Unresolved', fmtPct(cov.statuses.unresolved.fraction) + ' (' + c.cells.unresolved + ' cells)'],
      ['Pending', fmtPct(cov.statuses.pending.fraction + cov.statuses.leased.fraction) + ' (' + (c.cells.pending + c.cells.leased) + ' cells, ' + c.cells.leased + ' being checked)'],
      ['Failed', String(c.cells.failed) + ' cells'],
      ['Leaves / results', fmtNum(cov.leaves, 0) + ' / ' + fmtNum(cov.results, 0)],
      ['Cells per second', fmtNum(cov.cells_per_second, 1)],
      ['Estimated finish', finishText(c, cov)],
      ['Split states', (M.split || []).join(', ') + ' (max depth ' + c.max_depth + ')'],
      ['Spec SHA-256', c.spec_hash],
      ['Controller models', modelHashes(M.spec).join(', ') || '—'],
      ['Created', fmtTime(c.created_at_ms)],
    ];
    $('c-facts').replaceChildren(...facts.flatMap(([k, v]) => [el('dt', { text: k }), el('dd', { text: v })]));
    renderActions();
  }

  function renderActions() {
    const c = M.campaign;
    const mayAct = role === 'submitter' || role === 'admin';
    const allowed = {
      pause: c.state === 'running',
      resume: c.state === 'paused',
      cancel: c.state === 'running' || c.state === 'paused',
    };
    for (const a of ['pause', 'resume', 'cancel']) {
      const b = $('btn-' + a);
      b.disabled = !(mayAct && allowed[a]);
      b.hidden = !mayAct;
    }
    $('action-note').textContent = mayAct ? '' : 'Your role (' + role + ') may look but not pause, resume or cancel.';
  }

  async function act(action) {
    if (action === 'cancel' && !window.confirm('Cancel this campaign? Outstanding leases are withdrawn; it cannot be resumed.')) return;
    try {
      const c = await api('/api/v1/campaigns/' + M.id + '/' + action, 'POST');
      M.campaign = c;
      renderActions();
      $('c-state').textContent = c.state;
      $('c-state').className = 'state ' + c.state;
      setStatus('Campaign ' + c.state + '.');
    } catch (e) {
      setStatus('Could not ' + action + ': ' + e.message, true);
    }
  }
  for (const a of ['pause', 'resume', 'cancel']) $('btn-' + a).addEventListener('click', () => act(a));

  function renderAxes() {
    const xs = $('axis-x');
    const ys = $('axis-y');
    if (xs.options.length !== M.states.length) {
      const opts = () => M.states.map((s, i) => el('option', { value: String(i), text: s }));
      xs.replaceChildren(...opts());
      ys.replaceChildren(...opts());
      // Default axes: the first two split states, else the first two states.
      const pref = M.split.map((s) => M.states.indexOf(s)).concat(M.states.map((_, i) => i));
      const uniq = [...new Set(pref)];
      M.ax = uniq[0] || 0;
      M.ay = uniq.length > 1 ? uniq[1] : M.ax;
      xs.value = String(M.ax);
      ys.value = String(M.ay);
    }
  }
  $('axis-x').addEventListener('change', (e) => { M.ax = Number(e.target.value); drawMap(); drawChanges(); });
  $('axis-y').addEventListener('change', (e) => { M.ay = Number(e.target.value); drawMap(); drawChanges(); });

  function renderRecent(results) {
    const tbody = $('recent').tBodies[0];
    tbody.replaceChildren(...results.map((r) => el('tr', {},
      el('td', { text: new Date(r.received_at_ms).toLocaleTimeString() }),
      el('td', {}, el('span', { class: 'state', text: r.kind })),
      el('td', { class: 'num', text: String(r.depth) }),
      el('td', { class: 'hash', text: boxText(r.box) }),
      el('td', { text: r.worker }))));
  }

  function boxText(box) {
    return Object.entries(box).map(([k, [lo, hi]]) => k + '∈[' + fmtNum(lo, 4) + ', ' + fmtNum(hi, 4) + ']').join(' ');
  }

  // Interval of a cell in state `k`: its own bounds when k is split, else the envelope's.
  function cellIv(cell, k) {
    const j = M.splitPos[k];
    return j >= 0 ? [cell.b[2 * j], cell.b[2 * j + 1]] : M.envelope[k];
  }

  function setupCanvas(cv) {
    const dpr = window.devicePixelRatio || 1;
    const w = Number(cv.getAttribute('width'));
    const h = Number(cv.getAttribute('height'));
    if (!cv.dataset.w) {
      cv.dataset.w = w;
      cv.dataset.h = h;
      cv.style.width = w + 'px';
      cv.style.height = h + 'px';
      cv.width = Math.round(w * dpr);
      cv.height = Math.round(h * dpr);
    }
    const ctx = cv.getContext('2d');
    ctx.setTransform(dpr, 0, 0, dpr, 0, 0);
    return { ctx, w: Number(cv.dataset.w), h: Number(cv.dataset.h) };
  }

  function padRange([lo, hi]) {
    if (!(hi > lo)) return [lo - 0.5, hi + 0.5];
    return [lo, hi];
  }

  // A tick step of 1, 2 or 5 × 10^k, the smallest not below `raw` (common practice
  // for axis labels).
  function niceStep(raw) {
    const p = Math.pow(10, Math.floor(Math.log10(raw)));
    for (const m of [1, 2, 5]) if (m * p >= raw * (1 - 1e-9)) return m * p;
    return 10 * p;
  }

  // Ticks of a time axis from 0 to `span` seconds at round values, in seconds,
  // minutes or hours: [{v: seconds, label}], 3 to 6 of them.
  function timeAxis(span) {
    const unit = span >= 3 * 3600 ? ['hours', 3600] : span >= 180 ? ['minutes', 60] : ['seconds', 1];
    const extent = span / unit[1];
    const step = niceStep(extent / 5);
    const decimals = Math.max(0, -Math.floor(Math.log10(step) + 1e-9));
    const ticks = [];
    for (let k = 0; k * step <= extent * (1 + 1e-9); k++) {
      ticks.push({ v: k * step * unit[1], label: (k * step).toFixed(decimals) });
    }
    return { unit: unit[0], step, ticks };
  }

  // `xticks` (optional): [{v, label}] for the horizontal axis; else five even ticks.
  function axesFrame(ctx, w, h, xr, yr, xname, yname, xticks) {
    const m = { l: 56, r: 18, t: 10, b: 40 };
    const pw = w - m.l - m.r;
    const ph = h - m.t - m.b;
    const X = (x) => m.l + (x - xr[0]) / (xr[1] - xr[0]) * pw;
    const Y = (y) => m.t + ph - (y - yr[0]) / (yr[1] - yr[0]) * ph;
    ctx.fillStyle = '#fff';
    ctx.fillRect(0, 0, w, h);
    ctx.strokeStyle = '#444';
    ctx.lineWidth = 1;
    ctx.strokeRect(m.l - 0.5, m.t - 0.5, pw + 1, ph + 1);
    ctx.fillStyle = '#333';
    ctx.font = '11px system-ui, sans-serif';
    const xt = xticks || [0, 1, 2, 3, 4].map((i) => {
      const v = xr[0] + (xr[1] - xr[0]) * i / 4;
      return { v, label: fmtNum(v, 3) };
    });
    ctx.textAlign = 'center';
    for (const t of xt) ctx.fillText(t.label, X(t.v), m.t + ph + 14);
    ctx.textAlign = 'right';
    for (let i = 0; i <= 4; i++) {
      const yv = yr[0] + (yr[1] - yr[0]) * i / 4;
      ctx.fillText(fmtNum(yv, 3), m.l - 5, Y(yv) + 4);
    }
    ctx.textAlign = 'center';
    ctx.font = '12px system-ui, sans-serif';
    ctx.fillText(xname, m.l + pw / 2, h - 6);
    ctx.save();
    ctx.translate(13, m.t + ph / 2);
    ctx.rotate(-Math.PI / 2);
    ctx.fillText(yname, 0, 0);
    ctx.restore();
    return { m, pw, ph, X, Y, xr, yr };
  }

  function drawMap() {
    const t0 = performance.now();
    M.dirty = false;
    const cv = $('map');
    const { ctx, w, h } = setupCanvas(cv);
    const ax = M.ax;
    const ay = M.ay;
    const xr = padRange(M.envelope[ax] || [0, 1]);
    const yr = padRange(M.envelope[ay] || [0, 1]);
    const f = axesFrame(ctx, w, h, xr, yr, M.states[ax] || '', M.states[ay] || '');
    const dpr = window.devicePixelRatio || 1;
    const snap = (v) => Math.round(v * dpr) / dpr;
    const buckets = Object.fromEntries(SEVERITY.map((s) => [s, []]));
    for (const cell of M.cells.values()) (buckets[cell.s] || (buckets[cell.s] = [])).push(cell);
    const drawn = { total: 0 };
    const few = M.cells.size <= 4000;
    ctx.save();
    ctx.beginPath();
    ctx.rect(f.m.l, f.m.t, f.pw, f.ph);
    ctx.clip();
    for (const s of SEVERITY) {
      ctx.fillStyle = COLOR[s];
      ctx.strokeStyle = 'rgba(255,255,255,0.8)';
      ctx.lineWidth = 0.5;
      let n = 0;
      for (const cell of buckets[s]) {
        const [x0, x1] = cellIv(cell, ax);
        const [y0, y1] = cellIv(cell, ay);
        // Edges snapped to device pixels: neighbours share an edge exactly, so that
        // thousands of small cells show no seams or moiré from anti-aliasing.
        const px = snap(f.X(x0));
        const py = snap(f.Y(y1));
        const pw = Math.max(snap(f.X(x1)) - px, 1 / dpr);
        const ph = Math.max(snap(f.Y(y0)) - py, 1 / dpr);
        ctx.fillRect(px, py, pw, ph);
        if (few && pw > 3 && ph > 3) ctx.strokeRect(px, py, pw, ph);
        n++;
      }
      drawn[s] = n;
      drawn.total += n;
    }
    // Starting points of counterexamples.
    const k = M.cex.length;
    for (const cx of M.cex) {
      const tr = cx.counterexample && cx.counterexample.trajectory;
      if (!tr || !tr.length || !tr[0].x) continue;
      const p = tr[0].x;
      ctx.beginPath();
      ctx.arc(f.X(p[ax]), f.Y(p[ay]), 3.5, 0, 2 * Math.PI);
      ctx.fillStyle = '#000';
      ctx.fill();
      ctx.strokeStyle = '#fff';
      ctx.lineWidth = 1;
      ctx.stroke();
    }
    ctx.restore();
    drawn.counterexamples = k;
    // For tests and benchmarks only (read from the element), not shown on the page.
    cv.dataset.drawn = JSON.stringify(drawn);
    M.view = f;
    const other = M.states.filter((_, i) => i !== ax && i !== ay);
    $('map-note').textContent = M.cells.size + ' leaf cells drawn' +
      (other.length ? '; over ' + other.join(', ') + ' each point shows the worst status of the cells above it' : '') +
      '. Black dots: starting points of counterexamples.';
    drawTrajectories();
    M.timing.draw_ms = Math.round(performance.now() - t0);
  }

  // The diff of a follow-up against the campaign it follows up: table and map.
  function renderChanges() {
    const ch = M.changes;
    $('changes-view').hidden = false;
    const a = $('ch-against');
    a.textContent = ch.against;
    a.href = '/dashboard/campaigns/' + encodeURIComponent(ch.against);
    $('ch-note').textContent = (ch.final ? '' : 'Provisional: a campaign is still open; open cells count as pending. ') +
      'Each row is the volume that had the first status in the earlier campaign and has the second now, exactly. ' +
      'Counterexample volume is that of whole cells holding a re-checked counterexample.';
    const tbody = $('changes-table').tBodies[0];
    tbody.replaceChildren(...ch.transitions.map((t) => el('tr', { class: 'c-' + changeKind(t.from, t.to) },
      el('td', {}, el('span', { class: 'state', text: t.from })),
      el('td', {}, el('span', { class: 'state', text: t.to })),
      el('td', { class: 'num', text: fmtPct(t.fraction) }),
      el('td', { class: 'hash', text: t.reduced }))));
    $('changes-legend').replaceChildren(...CHANGE_ORDER.map((k) => el('span', {}, el('i', { class: 'c-' + k }), CHANGE_LABEL[k])));
    drawChanges();
  }

  function drawChanges() {
    const ch = M.changes;
    if (!ch || !M.states) return;
    const cv = $('changes-map');
    const { ctx, w, h } = setupCanvas(cv);
    const ax = M.ax;
    const ay = M.ay;
    const f = axesFrame(ctx, w, h, padRange(M.envelope[ax] || [0, 1]), padRange(M.envelope[ay] || [0, 1]), M.states[ax] || '', M.states[ay] || '');
    const dpr = window.devicePixelRatio || 1;
    const snap = (v) => Math.round(v * dpr) / dpr;
    const buckets = Object.fromEntries(CHANGE_ORDER.map((k) => [k, []]));
    for (const r of ch.rows) buckets[changeKind(ch.statuses[r[0]], ch.statuses[r[1]])].push({ b: r.slice(3) });
    const drawn = {};
    ctx.save();
    ctx.beginPath();
    ctx.rect(f.m.l, f.m.t, f.pw, f.ph);
    ctx.clip();
    for (const k of CHANGE_ORDER) {
      ctx.fillStyle = getComputedStyle(document.documentElement).getPropertyValue('--ch-' + k).trim() || '#999';
      for (const cell of buckets[k]) {
        const [x0, x1] = cellIv(cell, ax);
        const [y0, y1] = cellIv(cell, ay);
        const px = snap(f.X(x0));
        const py = snap(f.Y(y1));
        ctx.fillRect(px, py, Math.max(snap(f.X(x1)) - px, 1 / dpr), Math.max(snap(f.Y(y0)) - py, 1 / dpr));
      }
      drawn[k] = buckets[k].length;
    }
    ctx.restore();
    cv.dataset.drawn = JSON.stringify(drawn);
    const other = M.states.filter((_, i) => i !== ax && i !== ay);
    $('changes-map-note').textContent = ch.rows.length + ' pieces drawn' + (ch.rows_truncated ? ' (of ' + ch.rows_total + '; the rest are not shown)' : '') +
      (other.length ? '; over ' + other.join(', ') + ' the most important change is on top' : '') + '.';
  }

  function drawTrajectories() {
    const cv = $('traj');
    const { ctx, w, h } = setupCanvas(cv);
    const ax = M.ax;
    const ay = M.ay;
    const trs = M.cex.map((c) => c.counterexample && c.counterexample.trajectory).filter((t) => Array.isArray(t) && t.length);
    let xr = (M.envelope[ax] || [0, 1]).slice();
    let yr = (M.envelope[ay] || [0, 1]).slice();
    for (const t of trs) for (const p of t) {
      if (!p.x) continue;
      const x = p.x[ax];
      const y = p.x[ay];
      if (isFinite(x)) { xr[0] = Math.min(xr[0], x); xr[1] = Math.max(xr[1], x); }
      if (isFinite(y)) { yr[0] = Math.min(yr[0], y); yr[1] = Math.max(yr[1], y); }
    }
    xr = padRange(xr);
    yr = padRange(yr);
    const f = axesFrame(ctx, w, h, xr, yr, M.states[ax] || '', M.states[ay] || '');
    const [ex0, ex1] = M.envelope[ax] || [0, 1];
    const [ey0, ey1] = M.envelope[ay] || [0, 1];
    ctx.setLineDash([4, 3]);
    ctx.strokeStyle = COLOR.safe;
    ctx.strokeRect(f.X(ex0), f.Y(ey1), f.X(ex1) - f.X(ex0), f.Y(ey0) - f.Y(ey1));
    ctx.setLineDash([]);
    for (const t of trs) {
      ctx.strokeStyle = COLOR.counterexample;
      ctx.lineWidth = 1.5;
      ctx.beginPath();
      t.forEach((p, i) => {
        if (!p.x) return;
        if (i === 0) ctx.moveTo(f.X(p.x[ax]), f.Y(p.x[ay]));
        else ctx.lineTo(f.X(p.x[ax]), f.Y(p.x[ay]));
      });
      ctx.stroke();
      const a = t[0].x;
      const z = t[t.length - 1].x;
      if (a) { ctx.fillStyle = '#000'; ctx.beginPath(); ctx.arc(f.X(a[ax]), f.Y(a[ay]), 3, 0, 2 * Math.PI); ctx.fill(); }
      if (z) {
        ctx.strokeStyle = '#000';
        ctx.lineWidth = 1.5;
        const X = f.X(z[ax]);
        const Y = f.Y(z[ay]);
        ctx.beginPath();
        ctx.moveTo(X - 4, Y - 4); ctx.lineTo(X + 4, Y + 4); ctx.moveTo(X + 4, Y - 4); ctx.lineTo(X - 4, Y + 4);
        ctx.stroke();
      }
    }
    $('traj-note').textContent = trs.length
      ? trs.length + ' trajectories (dot: start, cross: end); dashed box: the envelope.'
      : 'No counterexample found so far.';
    $('cex-list').replaceChildren(...M.cex.slice(0, 30).map((c) => {
      const t = c.counterexample && c.counterexample.trajectory;
      const start = t && t[0] && t[0].x ? M.states.map((s, i) => s + '=' + fmtNum(t[0].x[i], 4)).join(', ') : 'no trajectory';
      return el('li', { text: 'depth ' + c.depth + ': start ' + start + (t ? ', ' + t.length + ' points' : '') +
        (c.reason ? ' — ' + c.reason : '') });
    }));
  }

  // Stacked areas of the proven-safe, counterexample and unresolved fractions over time.
  function drawHistory() {
    const cv = $('history');
    const { ctx, w, h } = setupCanvas(cv);
    const pts = M.history;
    if (!pts.length) {
      ctx.fillStyle = '#fff';
      ctx.fillRect(0, 0, w, h);
      $('history-note').textContent = 'No results yet.';
      return;
    }
    const t0 = pts[0].t_ms;
    const t1 = Math.max(pts[pts.length - 1].t_ms, t0 + 1);
    const span = (t1 - t0) / 1000;
    const axis = timeAxis(span);
    const f = axesFrame(ctx, w, h, [0, span], [0, 1], axis.unit + ' since the first result', 'fraction', axis.ticks);
    // For tests (read from the element), not shown on the page.
    cv.dataset.ticks = JSON.stringify({ unit: axis.unit, step: axis.step, labels: axis.ticks.map((t) => t.label) });
    let base = pts.map(() => 0);
    // The decided statuses the history gives, in bar order.
    for (const s of BAR_ORDER.filter((k) => typeof pts[0][k] === 'number')) {
      const top = pts.map((p, i) => base[i] + p[s]);
      ctx.beginPath();
      pts.forEach((p, i) => {
        const x = f.X((p.t_ms - t0) / 1000);
        if (i === 0) ctx.moveTo(x, f.Y(top[i])); else ctx.lineTo(x, f.Y(top[i]));
      });
      for (let i = pts.length - 1; i >= 0; i--) ctx.lineTo(f.X((pts[i].t_ms - t0) / 1000), f.Y(base[i]));
      ctx.closePath();
      ctx.fillStyle = COLOR[s];
      ctx.fill();
      base = top;
    }
    const last = pts[pts.length - 1];
    $('history-note').textContent = 'Now: ' + fmtPct(last.safe) + ' proven safe, ' + fmtPct(last.counterexample) + ' in counterexample cells, ' +
      fmtPct(last.unresolved) + ' unresolved (stacked, colours as in the map).';
  }

  // Hover: the cells under the pointer in the chosen axes, worst status first.
  let hoverPending = null;
  $('map').addEventListener('mousemove', (ev) => {
    hoverPending = ev;
    requestAnimationFrame(() => {
      if (hoverPending) showHover(hoverPending);
      hoverPending = null;
    });
  });
  $('map').addEventListener('mouseleave', () => { $('hover').hidden = true; });

  function showHover(ev) {
    const t0 = performance.now();
    try { hover(ev); } finally {
      M.timing.hover_ms = Math.round(10 * (performance.now() - t0)) / 10;
      publishTiming();
    }
  }

  function hover(ev) {
    const f = M.view;
    if (!f) return;
    const rect = $('map').getBoundingClientRect();
    const px = ev.clientX - rect.left;
    const py = ev.clientY - rect.top;
    const x = f.xr[0] + (px - f.m.l) / f.pw * (f.xr[1] - f.xr[0]);
    const y = f.yr[0] + (f.m.t + f.ph - py) / f.ph * (f.yr[1] - f.yr[0]);
    let worst = null;
    let count = 0;
    for (const cell of M.cells.values()) {
      const [x0, x1] = cellIv(cell, M.ax);
      const [y0, y1] = cellIv(cell, M.ay);
      if (x < x0 || x > x1 || y < y0 || y > y1) continue;
      count++;
      if (!worst || SEVERITY.indexOf(cell.s) > SEVERITY.indexOf(worst.s)) worst = cell;
    }
    const tip = $('hover');
    if (!worst) { tip.hidden = true; return; }
    const lines = [LABEL[worst.s] + ' — depth ' + worst.d];
    M.states.forEach((s, k) => {
      const [lo, hi] = cellIv(worst, k);
      lines.push(s + ' ∈ [' + lo + ', ' + hi + ']');
    });
    if (count > 1) lines.push(count + ' cells project here; the worst is shown');
    tip.textContent = lines.join('\n');
    tip.hidden = false;
    tip.style.left = Math.min(px + 14, rect.width - 200) + 'px';
    tip.style.top = (py + 14) + 'px';
  }

  // ------------------------------------------------------------ start

  async function start() {
    takeFragment();
    const saved = sessionStorage.getItem(TOKEN_KEY);
    if (!saved) { logout(''); return; }
    try {
      await login(saved);
    } catch (e) {
      if (e.status !== 401) { showOnly('login-view'); $('login-error').textContent = 'Server not reachable: ' + e.message; }
      return;
    }
    route();
  }
  // A link with a new token in the fragment, followed from this page, logs in again.
  window.addEventListener('hashchange', () => {
    if (new URLSearchParams(location.hash.replace(/^#/, '')).get('token')) start();
  });
  start();
})();
