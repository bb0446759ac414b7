// trapline live view. Plain script, no build step. Every text that comes
// from the data (stream ids, messages, evidence, who acknowledged) is
// written with textContent, never as markup.
(function () {
  'use strict';

  // Okabe and Ito, "Color Universal Design" (2008): the sweep report's palette.
  const PAL = ['#0072B2', '#D55E00', '#009E73', '#CC79A7', '#E69F00', '#56B4E9', '#000000'];
  const WAVE_S = 20;       // waveform window shown, seconds of stream time
  const TREND_S = 3600;    // trend window, seconds of stream time
  const MAX_EVENTS = 200;  // timeline rows kept
  const FRAME_KEEP = 2000; // frame timings kept for the statistics

  const $ = (id) => document.getElementById(id);
  const ackOn = document.body.dataset.ack === 'on';

  const st = {
    sel: null,             // stream shown in detail
    es: null,              // the EventSource
    summaries: new Map(),  // id → latest summary
    rows: new Map(),       // id → row elements
    wave: { t: [], p: [], f: [] },
    trend: { t: [], peepi: [], trapped: [], r: [], c: [], pip: [], pplat: [] },
    events: [],            // newest last
    nowMs: 0,
    dirtyRows: new Set(),
    dirtyWave: false, dirtyTrend: false, dirtyEvents: false, dirtyActive: false,
    rebuildList: false,
    pending: false,
  };

  // ---- measurement of the page's own update work ----------------------
  const timing = { ms: [], frames: 0, snapshotMs: [], worst: [] };
  function record(ms, snapshot, parts) {
    if (snapshot) { timing.snapshotMs.push(ms); return; }
    timing.frames++;
    timing.ms.push(ms);
    if (timing.ms.length > FRAME_KEEP) timing.ms.splice(0, timing.ms.length - FRAME_KEEP);
    // The five slowest frames and what they updated, to tell where time goes.
    timing.worst.push({ ms: ms, parts: parts.join(' ') });
    timing.worst.sort((a, b) => b.ms - a.ms);
    if (timing.worst.length > 5) timing.worst.length = 5;
  }
  function pct(sorted, q) {
    if (!sorted.length) return 0;
    return sorted[Math.min(sorted.length - 1, Math.floor(q * sorted.length))];
  }
  // window.traplineLive is what tests (and the curious) read.
  window.traplineLive = {
    // Update work per animation frame, in ms: frames that applied a full
    // snapshot (page load, reconnect, another stream chosen) are listed
    // apart in snapshotMs; the rest are the steady frames.
    frameStats() {
      const s = timing.ms.slice().sort((a, b) => a - b);
      return {
        frames: timing.frames, kept: s.length,
        max: s.length ? s[s.length - 1] : 0,
        p50: pct(s, 0.5), p95: pct(s, 0.95), p99: pct(s, 0.99),
        snapshotMs: timing.snapshotMs.slice(), worst: timing.worst.slice(),
      };
    },
    resetFrameStats() { timing.ms = []; timing.frames = 0; timing.snapshotMs = []; timing.worst = []; },
    wavePoints() { return st.wave.t.length; },
    selected() { return st.sel; },
    streams() { return Array.from(st.summaries.keys()); },
  };

  // ---- small DOM functions --------------------------------------------
  function el(tag, cls, text) {
    const e = document.createElement(tag);
    if (cls) e.className = cls;
    if (text !== undefined && text !== null) e.textContent = String(text);
    return e;
  }
  function num(v, d) { return (v === null || v === undefined) ? '–' : Number(v).toFixed(d); }
  function clock(ms) {
    if (!ms) return '–';
    const d = new Date(ms);
    return d.toLocaleTimeString(undefined, { hour12: false });
  }
  function evidenceText(ev) {
    const keys = Object.keys(ev || {}).sort();
    return keys.map((k) => k + ' = ' + fmtEvidence(ev[k])).join('\n');
  }
  function fmtEvidence(v) {
    if (v === null || v === undefined) return '–';
    const a = Math.abs(v);
    return a !== 0 && (a < 0.01 || a >= 1e5) ? v.toExponential(2) : String(Math.round(v * 1000) / 1000);
  }
  function stateText(s) {
    if (s.state === 'silent') return 'silent since ' + clock(s.last_sample_ms);
    return s.state;
  }
  function alarmText(active) {
    if (!active || !active.length) return 'none';
    return active.map((a) => a.condition + ' (' + a.priority + (a.state === 'acknowledged' ? ', acknowledged' : '') + ')').join('; ');
  }

  // ---- charts ---------------------------------------------------------
  const charts = {};
  const AXIS_FONT = '11px system-ui, sans-serif';
  const LABEL_FONT = '12px system-ui, sans-serif';
  function chartWidth(id) { return Math.max(280, $(id).clientWidth || 560); }
  function makeChart(id, title, xLabel, yLabel, series, height) {
    const opts = {
      title: title, width: chartWidth(id), height: height,
      scales: { x: { time: false } },
      legend: { show: true },
      cursor: { drag: { x: false, y: false } },
      series: [{ label: xLabel }].concat(series.map((s, i) => ({
        label: s, stroke: PAL[seriesColour(id, i)], width: 1.4, spanGaps: id.startsWith('tr'),
        points: { show: id.startsWith('tr'), size: 3 },
      }))),
      axes: [
        { label: xLabel, stroke: '#222', font: AXIS_FONT, labelFont: LABEL_FONT, labelSize: 20,
          grid: { stroke: '#e4e4e4', width: 1 } },
        { label: yLabel, stroke: '#222', font: AXIS_FONT, labelFont: LABEL_FONT, labelSize: 20,
          grid: { stroke: '#e4e4e4', width: 1 }, size: 52 },
      ],
    };
    const data = [[]].concat(series.map(() => []));
    charts[id] = new uPlot(opts, data, $(id));
  }
  function seriesColour(id, i) {
    return { 'wave-p': [0], 'wave-f': [2], 'tr-p': [0, 4, 1], 'tr-v': [3], 'tr-r': [5], 'tr-c': [6] }[id][i];
  }
  function makeCharts() {
    makeChart('wave-p', 'Airway pressure', 'stream time (s)', 'pressure (cmH2O)', ['pressure (cmH2O)'], 220);
    makeChart('wave-f', 'Flow (inspiration positive)', 'stream time (s)', 'flow (L/min)', ['flow (L/min)'], 220);
    makeChart('tr-p', 'Pressures per breath', 'stream time (min)', 'pressure (cmH2O)',
      ['peak (cmH2O)', 'plateau (cmH2O)', 'intrinsic PEEP (cmH2O)'], 230);
    makeChart('tr-v', 'Trapped volume per breath', 'stream time (min)', 'volume (mL)', ['trapped volume (mL)'], 230);
    makeChart('tr-r', 'Resistance (least-squares fit)', 'stream time (min)', 'R (cmH2O·s/L)', ['R (cmH2O·s/L)'], 230);
    makeChart('tr-c', 'Compliance (least-squares fit)', 'stream time (min)', 'C (mL/cmH2O)', ['C (mL/cmH2O)'], 230);
  }
  window.addEventListener('resize', () => {
    fitList();
    for (const id in charts) charts[id].setSize({ width: chartWidth(id), height: charts[id].height });
  });

  // ---- applying frames ------------------------------------------------
  function clearDetail() {
    st.wave = { t: [], p: [], f: [] };
    st.trend = { t: [], peepi: [], trapped: [], r: [], c: [], pip: [], pplat: [] };
    st.events = [];
    st.dirtyWave = st.dirtyTrend = st.dirtyEvents = st.dirtyActive = true;
  }
  function trimFront(obj, n) {
    if (n <= 0) return;
    for (const k in obj) obj[k].splice(0, n);
  }
  function applyDetail(d) {
    if (d.full) clearDetail();
    const w = d.wave;
    if (w.t_s.length) {
      const last = st.wave.t.length ? st.wave.t[st.wave.t.length - 1] : -Infinity;
      if (w.t_s[0] < last) st.wave = { t: [], p: [], f: [] }; // the stream's clock went back
      for (let i = 0; i < w.t_s.length; i++) {
        st.wave.t.push(w.t_s[i]); st.wave.p.push(w.p_cmh2o[i]); st.wave.f.push(w.flow_lpm[i]);
      }
      const end = st.wave.t[st.wave.t.length - 1];
      let cut = 0;
      while (cut < st.wave.t.length && st.wave.t[cut] < end - WAVE_S) cut++;
      trimFront(st.wave, cut);
      st.dirtyWave = true;
    }
    const tr = d.trend;
    if (tr.t_s.length) {
      const last = st.trend.t.length ? st.trend.t[st.trend.t.length - 1] : -Infinity;
      if (tr.t_s[0] * 1 / 60 < last) clearTrend();
      for (let i = 0; i < tr.t_s.length; i++) {
        st.trend.t.push(tr.t_s[i] / 60);
        st.trend.peepi.push(tr.peepi_cmh2o[i]); st.trend.trapped.push(tr.trapped_ml[i]);
        st.trend.r.push(tr.r_cmh2o_s_per_l[i]); st.trend.c.push(tr.c_ml_per_cmh2o[i]);
        st.trend.pip.push(tr.pip_cmh2o[i]); st.trend.pplat.push(tr.pplat_cmh2o[i]);
      }
      const end = st.trend.t[st.trend.t.length - 1];
      let cut = 0;
      while (cut < st.trend.t.length && st.trend.t[cut] < end - TREND_S / 60) cut++;
      trimFront(st.trend, cut);
      st.dirtyTrend = true;
    }
    if (d.events.length) {
      for (const ev of d.events) st.events.push(ev);
      if (st.events.length > MAX_EVENTS) st.events.splice(0, st.events.length - MAX_EVENTS);
      st.dirtyEvents = true;
    }
  }
  function clearTrend() {
    st.trend = { t: [], peepi: [], trapped: [], r: [], c: [], pip: [], pplat: [] };
  }
  function applyFrame(f) {
    st.nowMs = f.now_ms;
    if (f.full) {
      st.summaries.clear();
      st.rebuildList = true;
    }
    for (const s of f.streams) {
      if (!st.summaries.has(s.id) && !f.full) st.rebuildList = true;
      st.summaries.set(s.id, s);
      st.dirtyRows.add(s.id);
      if (s.id === st.sel) st.dirtyActive = true;
    }
    if (f.detail) {
      if (f.full && st.sel !== f.detail.id) { st.sel = f.detail.id; }
      applyDetail(f.detail);
    } else if (f.full && st.sel === null) {
      clearDetail();
    }
    if (st.sel === null && st.summaries.size) select(Array.from(st.summaries.keys()).sort()[0]);
    schedule(f.full);
  }

  // ---- rendering, once per animation frame ----------------------------
  let pendingSnapshot = false;
  function schedule(full) {
    pendingSnapshot = pendingSnapshot || full;
    if (st.pending) return;
    st.pending = true;
    requestAnimationFrame(() => {
      st.pending = false;
      const snap = pendingSnapshot;
      pendingSnapshot = false;
      const t0 = performance.now();
      const parts = render();
      // uPlot draws in a microtask queued by setData; this one runs after
      // it, so the figure includes the drawing of the charts.
      queueMicrotask(() => record(performance.now() - t0, snap, parts));
    });
  }
  // render applies what changed since the last frame and returns the
  // names of the parts it updated.
  function render() {
    const parts = [];
    $('clock').textContent = 'server time ' + clock(st.nowMs);
    $('count').textContent = st.summaries.size + (st.summaries.size === 1 ? ' stream' : ' streams');
    const rebuilt = st.rebuildList;
    if (rebuilt) { rebuildList(); st.rebuildList = false; parts.push('list'); }
    if (st.dirtyRows.size) parts.push('rows:' + st.dirtyRows.size);
    for (const id of st.dirtyRows) updateRow(id);
    st.dirtyRows.clear();
    if (rebuilt) fitList();
    if (st.sel === null) return parts;
    $('detail').hidden = false;
    $('sel').textContent = st.sel;
    if (st.dirtyActive) { renderActive(); st.dirtyActive = false; parts.push('alarms'); }
    if (st.dirtyWave) {
      parts.push('wave');
      charts['wave-p'].setData([st.wave.t, st.wave.p]);
      charts['wave-f'].setData([st.wave.t, st.wave.f]);
      st.dirtyWave = false;
    }
    if (st.dirtyTrend) {
      parts.push('trend');
      const t = st.trend;
      charts['tr-p'].setData([t.t, t.pip, t.pplat, t.peepi]);
      charts['tr-v'].setData([t.t, t.trapped]);
      charts['tr-r'].setData([t.t, t.r]);
      charts['tr-c'].setData([t.t, t.c]);
      st.dirtyTrend = false;
    }
    if (st.dirtyEvents) { renderTimeline(); st.dirtyEvents = false; parts.push('timeline'); }
    return parts;
  }

  function rebuildList() {
    const body = $('streams').tBodies[0];
    const ids = Array.from(st.summaries.keys()).sort();
    const frag = document.createDocumentFragment();
    st.rows.clear();
    for (const id of ids) {
      const tr = el('tr');
      tr.dataset.stream = id;
      const idCell = el('td');
      const b = el('button', 'sid', id);
      b.type = 'button';
      idCell.appendChild(b);
      tr.appendChild(idCell);
      const cells = [];
      for (let i = 0; i < 7; i++) { const td = el('td'); cells.push(td); tr.appendChild(td); }
      cells[6].className = 'text';
      tr.addEventListener('click', () => select(id));
      st.rows.set(id, { tr: tr, cells: cells });
      st.dirtyRows.add(id);
      frag.appendChild(tr);
    }
    body.replaceChildren(frag);
  }
  // fitList gives the list box a fixed height, so that its layout is
  // contained (updating rows then costs no layout of the rest of the
  // page): 40 % of the window, or less for a short list.
  function fitList() {
    const box = $('streams').parentNode;
    box.style.height = Math.min(window.innerHeight * 0.4, $('streams').offsetHeight + 4) + 'px';
  }
  function updateRow(id) {
    const r = st.rows.get(id), s = st.summaries.get(id);
    if (!r || !s) return;
    r.tr.className = (id === st.sel ? 'selected ' : '') + 'state-' + s.state;
    r.cells[0].textContent = stateText(s);
    r.cells[1].textContent = s.breaths;
    r.cells[2].textContent = num(s.last.peepi_cmh2o, 1);
    r.cells[3].textContent = num(s.last.trapped_ml, 0);
    r.cells[4].textContent = num(s.last.r_cmh2o_s_per_l, 1);
    r.cells[5].textContent = num(s.last.c_ml_per_cmh2o, 1);
    r.cells[6].textContent = alarmText(s.active);
  }

  // renderActive updates the current alarms table in place: a row (and its
  // acknowledge button) lives as long as its alarm id, so that a click is
  // never lost to a re-render between press and release.
  const activeRows = new Map(); // alert id → { tr, cells, button }
  function activeRow(a) {
    const tr = el('tr');
    tr.dataset.id = a.id;
    tr.dataset.condition = a.condition;
    const cells = [];
    for (let i = 0; i < 7; i++) { const td = el('td'); cells.push(td); tr.appendChild(td); }
    cells[5].className = 'evidence';
    let button = null;
    if (ackOn) {
      button = el('button', 'ack', 'acknowledge');
      button.type = 'button';
      button.dataset.id = a.id;
      const stream = st.sel;
      button.addEventListener('click', () => acknowledge(stream, a.id, button));
      cells[6].appendChild(button);
    }
    return { tr: tr, cells: cells, button: button };
  }
  function renderActive() {
    const s = st.summaries.get(st.sel);
    const active = s ? s.active : [];
    const body = $('active').tBodies[0];
    const keep = new Set(active.map((a) => a.id));
    for (const [id, r] of activeRows) {
      if (!keep.has(id) || r.stream !== st.sel) { r.tr.remove(); activeRows.delete(id); }
    }
    active.forEach((a, i) => {
      let r = activeRows.get(a.id);
      if (!r) { r = activeRow(a); r.stream = st.sel; activeRows.set(a.id, r); }
      r.tr.dataset.state = a.state;
      r.cells[0].textContent = a.condition;
      r.cells[1].textContent = a.priority;
      r.cells[1].className = 'prio-' + a.priority;
      r.cells[2].textContent = a.state;
      r.cells[3].textContent = num(a.t_s, 1);
      r.cells[4].textContent = a.message;
      r.cells[5].textContent = evidenceText(a.evidence);
      if (r.button) r.button.hidden = a.state === 'acknowledged';
      if (body.children[i] !== r.tr) body.insertBefore(r.tr, body.children[i] || null);
    });
    $('no-active').hidden = active.length > 0;
    $('active').hidden = active.length === 0;
  }

  function renderTimeline() {
    const body = $('timeline').tBodies[0];
    const frag = document.createDocumentFragment();
    for (let i = st.events.length - 1; i >= 0; i--) {
      const ev = st.events[i];
      const tr = el('tr');
      tr.dataset.id = ev.id;
      tr.dataset.state = ev.state;
      tr.appendChild(el('td', null, clock(Date.parse(ev.time))));
      tr.appendChild(el('td', null, num(ev.t_s, 1)));
      tr.appendChild(el('td', null, ev.condition));
      tr.appendChild(el('td', 'prio-' + ev.priority, ev.priority));
      tr.appendChild(el('td', null, ev.state));
      tr.appendChild(el('td', null, ev.message));
      tr.appendChild(el('td', 'evidence', evidenceText(ev.evidence)));
      tr.appendChild(el('td', null, ev.id));
      frag.appendChild(tr);
    }
    body.replaceChildren(frag);
  }

  // ---- acknowledgement --------------------------------------------------
  async function acknowledge(stream, id, button) {
    button.disabled = true;
    const out = $('ack-result');
    out.textContent = 'sending…';
    try {
      const resp = await fetch('ack', {
        method: 'POST',
        headers: { 'Content-Type': 'application/json' },
        body: JSON.stringify({ stream: stream, id: id, by: $('ack-by').value, note: $('ack-note').value }),
      });
      const rep = await resp.json();
      out.textContent = rep.ok ? 'acknowledged ' + id : 'not acknowledged: ' + rep.error;
    } catch (e) {
      out.textContent = 'not acknowledged: ' + e;
    } finally {
      button.disabled = false;
    }
  }

  // ---- connection -------------------------------------------------------
  function connect() {
    if (st.es) st.es.close();
    const url = 'events' + (st.sel ? '?stream=' + encodeURIComponent(st.sel) : '');
    const es = new EventSource(url);
    st.es = es;
    es.onopen = () => { $('conn').textContent = 'connected'; };
    es.onerror = () => { $('conn').textContent = 'reconnecting'; };
    es.onmessage = (m) => {
      let f;
      try { f = JSON.parse(m.data); } catch (e) { return; }
      applyFrame(f);
    };
  }
  function select(id) {
    if (id === st.sel && st.es) return;
    const prev = st.sel;
    st.sel = id;
    if (prev !== null) st.dirtyRows.add(prev);
    st.dirtyRows.add(id);
    clearDetail();
    history.replaceState(null, '', '#stream=' + encodeURIComponent(id));
    connect();
  }

  function start() {
    const m = /^#stream=(.*)$/.exec(location.hash);
    if (m) st.sel = decodeURIComponent(m[1]);
    makeCharts();
    connect();
  }
  start();
})();
