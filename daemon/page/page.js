// The live residual page of surmise: history from /api/history, then one update per Server-Sent
// Event from /events, drawn with uPlot. Plain script, no build step, nothing from the network.
'use strict';
(function () {
  // The four statuses of a tick (daemon/status.go), each with a colour, a word, a shape and a level
  // (its height in the status strip), so that no status is told by colour alone.
  const STATUS = {
    'tracking': { level: 1, color: '#1b7a3a', word: 'tracking', shape: 'circle', say: 'corrected with fresh measurements' },
    'coasting': { level: 2, color: '#a35a00', word: 'coasting', shape: 'diamond', say: 'no fresh measurement: predicting only' },
    'suspect': { level: 3, color: '#b3202a', word: 'suspect', shape: 'triangle', say: 'windowed NIS outside its 95 % band' },
    'stale-input': { level: 4, color: '#5a37b8', word: 'stale input', shape: 'square', say: 'an input is older than its max_age' },
  };
  const STATUS_ORDER = ['tracking', 'coasting', 'suspect', 'stale-input'];
  const INK = '#0e1116', GRID = '#e0e3da', BAND = 'rgba(13, 79, 86, 0.13)';
  const C = { // series colours
    main: '#0d4f56', second: '#c2410c', cand: '#7c3aed', meas: '#111827', reject: '#b3202a',
    band: '#5f8f94', late: '#0d4f56', compute: '#c2410c',
  };
  const PALETTE = ['#0d4f56', '#c2410c', '#2563eb', '#7c3aed', '#15803d', '#9f1239', '#854d0e', '#334155'];
  const FLAG_USED = 1, FLAG_GATE = 2, FLAG_STALE = 4;
  // The engine's sensor watch (active lane): a bias (two-sided CUSUM of the normalised
  // innovation), a stuck sensor, a gate lock-out.
  const FLAG_BIAS_HIGH = 8, FLAG_BIAS_LOW = 16, FLAG_STUCK = 32, FLAG_LOCKED = 64;
  const LB_LAGS = 10, LB_LEVEL = 0.01;

  const $ = (id) => document.getElementById(id);
  const root = document.documentElement;

  let infos = [];          // /api/estimators
  let cur = null;          // the estimator shown: {info, store, charts, source, ...}
  let paused = false, pausedCount = 0;
  let zoomed = null;       // {min, max} of a user zoom, or null to follow the data
  let programmatic = 0;    // > 0 while we change scales ourselves
  let pointerDown = false; // a mouse button went down on a chart and is not yet up
  let updates = 0;
  let drawTimer = null;

  // ---- formatting ----
  function num(v) {
    if (v == null || !isFinite(v)) return '—';
    const a = Math.abs(v);
    if (a !== 0 && a < 0.001) return v.toExponential(2);
    const d = a >= 1000 ? 0 : a >= 100 ? 1 : a >= 10 ? 2 : a >= 1 ? 3 : 4;
    return v.toFixed(d);
  }
  // short writes a duration or a timing with three significant digits at most: 0.2, 45.6, 1200.
  function short(v) {
    if (v == null || !isFinite(v)) return '—';
    const a = Math.abs(v);
    return a >= 100 ? v.toFixed(0) : String(Number(v.toPrecision(3)));
  }
  function secs(s) { return s == null || !isFinite(s) ? '—' : short(s) + ' s'; }
  function clock(t) { return new Date(t * 1000).toLocaleTimeString([], { hour12: false }); }
  function span(s) {
    if (!isFinite(s)) return '—';
    if (s < 90) return Math.round(s) + ' s';
    if (s < 5400) return Math.round(s / 60) + ' min';
    return (s / 3600).toFixed(1) + ' h';
  }
  function el(tag, attrs, ...kids) {
    const e = document.createElement(tag);
    for (const k in attrs || {}) {
      if (k === 'text') e.textContent = attrs[k];
      else if (k === 'class') e.className = attrs[k];
      else e.setAttribute(k, attrs[k]);
    }
    for (const k of kids) if (k != null) e.append(k);
    return e;
  }
  function withUnit(v, unit) {
    const td = el('td', { text: v });
    if (unit && v !== '—') td.append(el('span', { class: 'unit', text: unit }));
    return td;
  }

  // ---- status icons: a distinct shape per status, drawn in white on the badge ----
  const SVG = 'http://www.w3.org/2000/svg';
  function svg(tag, attrs) {
    const e = document.createElementNS(SVG, tag);
    for (const k in attrs) e.setAttribute(k, attrs[k]);
    return e;
  }
  function drawIcon(target, status) {
    target.replaceChildren();
    const s = { fill: 'none', stroke: '#fff', 'stroke-width': 3.5, 'stroke-linejoin': 'round', 'stroke-linecap': 'round' };
    switch ((STATUS[status] || {}).shape) {
      case 'circle': // a ring with a tick: corrected
        target.append(svg('circle', { cx: 20, cy: 20, r: 16.5, ...s }), svg('path', { d: 'M11.5 20.5l6 6 11-13', ...s }));
        break;
      case 'diamond': // a diamond with a glide wave: running on the model alone
        target.append(svg('path', { d: 'M20 2.5L37.5 20 20 37.5 2.5 20z', ...s }), svg('path', { d: 'M11 21q4.5-6 9 0t9 0', ...s }));
        break;
      case 'triangle': // a warning triangle
        target.append(svg('path', { d: 'M20 3.5L37 35H3z', ...s }), svg('path', { d: 'M20 14v10', ...s }),
          svg('circle', { cx: 20, cy: 29.5, r: 1.6, fill: '#fff' }));
        break;
      case 'square': // a square with a clock: an old input
        target.append(svg('rect', { x: 3, y: 3, width: 34, height: 34, rx: 2, ...s }), svg('circle', { cx: 20, cy: 20, r: 10, ...s }),
          svg('path', { d: 'M20 13.5V20l4.5 3', ...s }));
        break;
      default: // waiting: an empty ring
        target.append(svg('circle', { cx: 20, cy: 20, r: 16.5, ...s, 'stroke-dasharray': '4 4' }));
    }
  }

  // ---- the store: one column per plotted or shown quantity, oldest first ----
  function newStore(info) {
    const cols = { t: [], seq: [], status: [], gains: [], cgains: [], nis: [], mean: [], lo: [], hi: [], cnis: [], cmean: [], clo: [], chi: [], late: [], compute: [], missed: [] };
    for (let k = 0; k < 4; k++) cols['lvl' + k] = [];
    info.outputs.forEach((_, j) => {
      for (const c of ['meas', 'pred', 'inn', 'std', 'up', 'dn', 'age', 'flags', 'gate', 'cpred', 'cinn', 'cflags']) cols['o' + j + c] = [];
    });
    info.states.forEach((_, i) => { for (const c of ['v', 's', 'up', 'dn', 'cv']) cols['x' + i + c] = []; });
    info.inputs.forEach((_, i) => { for (const c of ['v', 'age', 'stale']) cols['u' + i + c] = []; });
    return { cols, lastSeq: 0, changes: [], cand: false, samples: null, gaps: 0 };
  }

  function push(store, info, r) {
    const c = store.cols;
    const prevGains = c.gains.length ? c.gains[c.gains.length - 1] : null;
    if (prevGains !== null && prevGains !== r.gains) store.changes.push({ t: r.t, from: prevGains, to: r.gains });
    c.t.push(r.t); c.seq.push(r.seq); c.status.push(r.status); c.gains.push(r.gains);
    c.nis.push(r.nis); c.mean.push(r.nis_mean); c.lo.push(r.nis_band[0]); c.hi.push(r.nis_band[1]);
    c.late.push(r.late == null ? null : r.late * 1000); c.compute.push(r.compute == null ? null : r.compute * 1000);
    c.missed.push(r.missed);
    const lvl = (STATUS[r.status] || {}).level;
    for (let k = 0; k < 4; k++) c['lvl' + k].push(lvl === k + 1 ? lvl : null);
    const cd = r.cand;
    c.cgains.push(cd ? cd.gains : null);
    c.cnis.push(cd ? cd.nis : null); c.cmean.push(cd ? cd.nis_mean : null);
    c.clo.push(cd ? cd.nis_band[0] : null); c.chi.push(cd ? cd.nis_band[1] : null);
    if (cd) store.cand = true;
    info.outputs.forEach((_, j) => {
      const o = r.out[j] || [], p = 'o' + j;
      const inn = o[2], std = o[3], flags = o[5] || 0;
      c[p + 'meas'].push(o[0]); c[p + 'pred'].push(o[1]); c[p + 'inn'].push(inn); c[p + 'std'].push(std);
      c[p + 'up'].push(std == null ? null : 2 * std); c[p + 'dn'].push(std == null ? null : -2 * std);
      c[p + 'age'].push(o[4]); c[p + 'flags'].push(flags);
      c[p + 'gate'].push(flags & FLAG_GATE ? inn : null);
      const co = cd && cd.out[j];
      c[p + 'cpred'].push(co ? co[0] : null); c[p + 'cinn'].push(co ? co[1] : null); c[p + 'cflags'].push(co ? co[3] : 0);
    });
    info.states.forEach((_, i) => {
      const x = r.x[i] || [], p = 'x' + i;
      const v = x[0], s = x[1];
      c[p + 'v'].push(v); c[p + 's'].push(s);
      c[p + 'up'].push(v == null || s == null ? null : v + 2 * s);
      c[p + 'dn'].push(v == null || s == null ? null : v - 2 * s);
      c[p + 'cv'].push(cd && cd.x[i] ? cd.x[i][0] : null);
    });
    info.inputs.forEach((_, i) => {
      const u = r.u[i] || [], p = 'u' + i;
      c[p + 'v'].push(u[0]); c[p + 'age'].push(u[1]); c[p + 'stale'].push(u[2]);
    });
    store.lastSeq = r.seq;
  }

  // trim drops what is older than the history the daemon keeps.
  function trim(store, info) {
    const t = store.cols.t;
    if (!t.length) return;
    const oldest = t[t.length - 1] - info.history;
    let k = 0;
    while (k < t.length && t[k] < oldest) k++;
    if (k < 64 && k * 20 < t.length) return; // trim in batches
    for (const name in store.cols) store.cols[name].splice(0, k);
    store.changes = store.changes.filter((ch) => ch.t >= oldest);
  }

  // ---- charts ----
  // The time axis in 24-hour clock time, with tenths of a second when zoomed in to a few seconds.
  function axisX() {
    return {
      stroke: INK, grid: { stroke: GRID }, ticks: { stroke: GRID }, font: '13px system-ui, sans-serif', size: 34, space: 90,
      values: (u, splits) => {
        const fine = u.scales.x.max - u.scales.x.min < 10;
        return splits.map((v) => {
          const s = clock(v);
          return fine ? s + '.' + Math.floor((v * 10) % 10) : s;
        });
      },
    };
  }
  function axisY(label, size) {
    return { stroke: INK, grid: { stroke: GRID }, ticks: { stroke: GRID }, font: '13px system-ui, sans-serif', label, labelFont: '600 13px system-ui, sans-serif', labelSize: 22, size: size || 62 };
  }
  function line(label, col, color, opts) {
    return Object.assign({ label, col, stroke: color, width: 2, spanGaps: false, points: { show: false } }, opts || {});
  }
  function dots(label, col, color, size) {
    return { label, col, stroke: color, fill: color, width: 0, paths: () => null, points: { show: true, size: size || 6, stroke: color, fill: color } };
  }

  // Vertical marks at the ticks where the active gain set changed, drawn on every chart.
  function gainMarks(u) {
    const store = cur && cur.store;
    if (!store || !store.changes.length) return;
    const ctx = u.ctx;
    ctx.save();
    ctx.strokeStyle = C.cand; ctx.fillStyle = C.cand; ctx.lineWidth = 2 * devicePixelRatio;
    ctx.setLineDash([6 * devicePixelRatio, 4 * devicePixelRatio]);
    ctx.font = (12 * devicePixelRatio) + 'px system-ui, sans-serif';
    for (const ch of store.changes) {
      const x = Math.round(u.valToPos(ch.t, 'x', true));
      if (x < u.bbox.left || x > u.bbox.left + u.bbox.width) continue;
      ctx.beginPath(); ctx.moveTo(x, u.bbox.top); ctx.lineTo(x, u.bbox.top + u.bbox.height); ctx.stroke();
      ctx.fillText('gains → ' + ch.to, x + 4 * devicePixelRatio, u.bbox.top + 12 * devicePixelRatio);
    }
    ctx.restore();
  }

  function chartSpecs(info, store) {
    const specs = [];
    const cand = store.cand;
    info.outputs.forEach((o, j) => {
      const p = 'o' + j, series = [
        line('innovation', p + 'inn', C.main, { width: 2, points: { show: true, size: 4 } }),
        line('+2√S', p + 'up', C.band, { width: 1.5, dash: [5, 4] }),
        line('−2√S', p + 'dn', C.band, { width: 1.5, dash: [5, 4] }),
        dots('rejected by gate', p + 'gate', C.reject, 11),
      ];
      if (cand) series.push(line('candidate innovation', p + 'cinn', C.cand, { width: 1.5, dash: [3, 3] }));
      specs.push({ key: p + 'inn', title: 'Innovation — ' + o.name, what: 'measured − predicted, with ±2√S', unit: o.unit, series, bands: [[2, 3]] });
    });
    const nis = [
      dots('NIS this tick', 'nis', '#6b7280', 4),
      line('window mean', 'mean', C.main, { width: 3 }),
      line('band low', 'lo', C.band, { width: 1.5, dash: [5, 4] }),
      line('band high', 'hi', C.band, { width: 1.5, dash: [5, 4] }),
    ];
    if (cand) nis.push(line('candidate window mean', 'cmean', C.cand, { width: 2, dash: [3, 3] }));
    specs.push({ key: 'nis', title: 'NIS', what: 'per tick, window mean and its 95 % chi-square band', unit: '', series: nis, bands: [[4, 3]] });
    info.outputs.forEach((o, j) => {
      const p = 'o' + j, series = [
        dots('measured', p + 'meas', C.meas, 5),
        line('predicted', p + 'pred', C.second, { width: 2 }),
      ];
      if (cand) series.push(line('candidate predicted', p + 'cpred', C.cand, { width: 1.5, dash: [3, 3] }));
      specs.push({ key: p + 'meas', title: 'Output — ' + o.name, what: 'measured beside predicted', unit: o.unit, series });
    });
    info.states.forEach((s, i) => {
      const p = 'x' + i, series = [
        line('estimate', p + 'v', C.main, { width: 2 }),
        line('+2σ', p + 'up', C.band, { width: 1.5, dash: [5, 4] }),
        line('−2σ', p + 'dn', C.band, { width: 1.5, dash: [5, 4] }),
      ];
      if (cand) series.push(line('candidate', p + 'cv', C.cand, { width: 1.5, dash: [3, 3] }));
      specs.push({ key: p + 'v', title: 'State — ' + s.name, what: 'estimate with ±2σ', unit: s.unit, series, bands: [[1, 2]] });
    });
    specs.push({
      key: 'timing', title: 'Tick timing', what: 'lateness and compute time', unit: 'ms',
      series: [line('lateness', 'late', C.late, { width: 2 }), line('compute', 'compute', C.compute, { width: 2 })],
    });
    const ages = [];
    info.outputs.forEach((o, j) => ages.push(line(o.name + ' age', 'o' + j + 'age', PALETTE[j % PALETTE.length], { width: 2 })));
    info.inputs.forEach((u, i) => ages.push(line(u.name + ' age', 'u' + i + 'age', PALETTE[(info.outputs.length + i) % PALETTE.length], { width: 2, dash: [6, 3] })));
    specs.push({ key: 'ages', title: 'Sample ages', what: 'age of the newest sample at each tick', unit: 's', series: ages });
    return specs;
  }

  // latest returns the last value of series si that is not null.
  function latest(u, si) {
    const d = u.data[si];
    if (!d) return null;
    for (let i = d.length - 1; i >= 0; i--) if (d[i] != null) return d[i];
    return null;
  }

  function dataOf(store, spec) {
    return [store.cols.t, ...spec.series.map((s) => store.cols[s.col])];
  }

  function makePlot(target, spec, store, height) {
    const width = Math.max(target.clientWidth, 300);
    const bands = (spec.bands || []).map(([a, b]) => ({ series: [a, b], fill: BAND }));
    const opts = {
      width, height,
      padding: [10, 30, 0, 0],
      cursor: { sync: { key: 'surmise' }, drag: { x: true, y: false } },
      scales: { x: { time: true } },
      axes: [axisX(), axisY(spec.unit)],
      // The legend shows the values under the cursor, and the latest ones
      // when the cursor is off the chart (not a row of dashes).
      series: [{ label: 'time', value: (u, v, si, idx) => {
        if (idx != null) return v == null ? '—' : clock(v);
        const t = latest(u, 0);
        return t == null ? '—' : 'latest ' + clock(t);
      } }].concat(spec.series.map((s) => {
        const o = Object.assign({}, s);
        delete o.col;
        o.value = (u, v, si, idx) => num(idx == null ? latest(u, si) : v);
        return o;
      })),
      bands,
      legend: { live: spec.live !== false },
      hooks: {
        setScale: [(u, key) => onScale(u, key)],
        draw: [gainMarks],
      },
    };
    if (spec.yRange) opts.scales.y = { range: spec.yRange };
    if (spec.axisY) opts.axes[1] = spec.axisY;
    const u = new uPlot(opts, dataOf(store, spec), target);
    target.addEventListener('mousedown', () => { pointerDown = true; });
    target.addEventListener('dblclick', () => resetZoom());
    return u;
  }

  function statusSpec() {
    const names = STATUS_ORDER.map((s) => STATUS[s].word);
    const series = STATUS_ORDER.map((s, k) => ({
      label: STATUS[s].word, col: 'lvl' + k, stroke: STATUS[s].color, fill: STATUS[s].color, width: 0,
      paths: uPlot.paths.bars({ size: [1, Infinity], gap: 0 }), points: { show: false },
    }));
    const ax = axisY('', 96);
    ax.splits = () => [1, 2, 3, 4];
    ax.values = (u, splits) => splits.map((v) => names[v - 1] || '');
    ax.grid = { show: false };
    return { key: 'status', unit: '', series, yRange: [0, 4.6], axisY: ax, live: false };
  }

  // onScale hears every change of a chart's time scale; one made by a drag across the chart is a
  // zoom, which every other chart follows and new data no longer moves. (uPlot also rescales on
  // its own, on a resize for one; those are not zooms.)
  function onScale(u, key) {
    if (key !== 'x') return;
    const x = u.scales.x;
    if (x.min != null) u.root.parentElement.dataset.xrange = x.min.toFixed(3) + '…' + x.max.toFixed(3);
    if (programmatic > 0 || !cur || !pointerDown) return;
    const { min, max } = u.scales.x;
    zoomed = { min, max };
    root.dataset.zoomed = 'true';
    root.dataset.xrange = min.toFixed(3) + '…' + max.toFixed(3);
    programmatic++;
    try {
      for (const other of cur.plots) if (other !== u) other.setScale('x', { min, max });
    } finally { programmatic--; }
  }

  function resetZoom() {
    zoomed = null;
    root.dataset.zoomed = 'false';
    draw(true);
  }

  function buildCharts() {
    for (const p of cur.plots || []) p.destroy();
    cur.plots = [];
    const grid = $('chart-grid');
    grid.replaceChildren();
    $('chart-status').replaceChildren();
    cur.plots.push(makePlot($('chart-status'), statusSpec(), cur.store, 150));
    cur.specs = [statusSpec()];
    cur.hasCand = cur.store.cand;
    for (const spec of chartSpecs(cur.info, cur.store)) {
      const target = el('div', { class: 'chart', 'data-chart': spec.key });
      const title = el('h3', { text: spec.title + ' ' }, el('span', { class: 'what', text: '· ' + spec.what + (spec.unit ? ' [' + spec.unit + ']' : '') }));
      grid.append(el('div', { class: 'chart-block' }, title, target));
      cur.plots.push(makePlot(target, spec, cur.store, 230));
      cur.specs.push(spec);
    }
  }

  let resizeObs = null;
  function watchSizes() {
    if (resizeObs) resizeObs.disconnect();
    resizeObs = new ResizeObserver(() => {
      if (!cur) return;
      for (const u of cur.plots) {
        const w = Math.max(u.root.parentElement.clientWidth, 300);
        if (Math.abs(w - u.width) > 2) u.setSize({ width: w, height: u.height });
      }
    });
    resizeObs.observe($('main'));
  }

  // draw puts the store on the charts, tables and figures; not while paused, unless forced.
  function draw(force) {
    if (!cur || (paused && !force)) return;
    if (cur.store.cand !== cur.hasCand) buildCharts();
    const store = cur.store;
    programmatic++;
    try {
      cur.plots.forEach((u, k) => {
        u.setData(dataOf(store, cur.specs[k]), zoomed == null);
        if (zoomed) u.setScale('x', zoomed);
        if (u.cursor.idx == null) u.setLegend({ idx: null });
        u.root.parentElement.dataset.points = String(store.cols.t.length);
      });
    } finally { programmatic--; }
    root.dataset.points = String(store.cols.t.length);
    if (cur.plots.length) {
      const x = cur.plots[0].scales.x;
      if (x.min != null) root.dataset.xrange = x.min.toFixed(3) + '…' + x.max.toFixed(3);
    }
    showFigures();
    showTables();
  }

  function scheduleDraw() {
    if (paused) return;
    if (drawTimer) return;
    drawTimer = setTimeout(() => { drawTimer = null; draw(false); }, 150);
  }

  // ---- figures and tables ----
  function lastIndex() { return cur.store.cols.t.length - 1; }

  function showFigures() {
    const c = cur.store.cols, k = lastIndex();
    if (k < 0) return;
    const status = c.status[k];
    const st = STATUS[status] || { word: status, say: '' };
    const badge = $('badge');
    badge.dataset.status = status;
    root.dataset.status = status;
    $('badge-word').textContent = st.word;
    drawIcon($('badge-icon'), status);
    let j = k;
    while (j > 0 && c.status[j - 1] === status) j--;
    $('badge-since').textContent = st.say + ' — for ' + span(c.t[k] - c.t[j]) + ' (since ' + clock(c.t[j]) + ')';

    const mean = c.mean[k], lo = c.lo[k], hi = c.hi[k];
    const judge = mean == null || lo == null ? '' : (mean < lo || mean > hi ? 'out' : 'in');
    const nm = $('nis-mean'), nb = $('nis-band');
    nm.textContent = num(mean);
    nm.dataset.judge = nb.dataset.judge = judge;
    nb.textContent = (judge === 'out' ? '▲ OUT of band ' : judge === 'in' ? '✓ in band ' : 'band ') + num(lo) + ' – ' + num(hi) +
      ' · this tick ' + num(c.nis[k]);

    $('tick-seq').textContent = String(c.seq[k]);
    $('tick-time').textContent = clock(c.t[k]) + ' · every ' + secs(cur.info.period);
    $('tick-timing').textContent = c.late[k] == null ? '—' : short(c.late[k]) + ' ms';
    let missed = 0, worst = 0;
    for (let i = 0; i <= k; i++) { missed += c.missed[i] || 0; worst = Math.max(worst, c.late[i] || 0); }
    $('tick-timing-sub').textContent = 'late now · compute ' + (c.compute[k] == null ? '—' : short(c.compute[k]) + ' ms') +
      ' · worst ' + short(worst) + ' ms late · ' + missed + ' missed';
    $('active-gains').textContent = c.gains[k] || '—';
    const set = setInfo(c.gains[k]);
    $('active-form').textContent = set ? set.form + ' form · ' + (set.method || 'method unknown') : '';
  }

  function setInfo(name) {
    const g = cur.info.gains;
    if (!g || !name) return null;
    return g.sets.find((s) => s.name === name) || null;
  }

  function samplesOf(signal) {
    const s = cur.store.samples && cur.store.samples[signal];
    if (!s) return '—';
    let refused = 0;
    const why = [];
    for (const k in s) if (k !== 'received' && s[k] > 0) { refused += s[k]; why.push(k + ' ' + s[k]); }
    return (s.received || 0) + ' / ' + refused + (why.length ? ' (' + why.join(', ') + ')' : '');
  }

  function showTables() {
    const info = cur.info, c = cur.store.cols, k = lastIndex();
    if (k < 0) return;
    const outRows = info.outputs.map((o, j) => {
      const p = 'o' + j, flags = c[p + 'flags'];
      let gate = 0, stale = 0;
      for (const f of flags) { if (f & FLAG_GATE) gate++; if (f & FLAG_STALE) stale++; }
      const age = c[p + 'age'][k];
      const ageTd = withUnit(num(age), 's');
      if (age != null && o.max_age && age > o.max_age) ageTd.dataset.flag = 'bad';
      const innTd = withUnit(num(c[p + 'inn'][k]), o.unit);
      if (flags[k] & FLAG_GATE) innTd.dataset.flag = 'bad';
      const gateTd = el('td', { text: String(gate) });
      if (gate) gateTd.dataset.flag = 'warn';
      const staleTd = el('td', { text: String(stale) });
      if (stale) staleTd.dataset.flag = 'warn';
      return el('tr', {}, el('td', { class: 'name', text: o.name }),
        withUnit(num(c[p + 'meas'][k]), o.unit), withUnit(num(c[p + 'pred'][k]), o.unit), innTd,
        withUnit(c[p + 'up'][k] == null ? '—' : '±' + num(c[p + 'up'][k]), o.unit), ageTd, gateTd, staleTd,
        sensorCell(j, k), whitenessCell(j), el('td', { class: 'small', text: samplesOf(o.name) }));
    });
    $('outputs-table').tBodies[0].replaceChildren(...outRows);
    const stRows = info.states.map((s, i) => {
      const p = 'x' + i;
      const sd = c[p + 's'][k];
      return el('tr', {}, el('td', { class: 'name', text: s.name }), withUnit(num(c[p + 'v'][k]), s.unit),
        withUnit(sd == null ? '—' : '±' + num(2 * sd), s.unit), withUnit(num(c[p + 'cv'][k]), s.unit));
    });
    $('states-table').tBodies[0].replaceChildren(...stRows);
    const inRows = info.inputs.map((u, i) => {
      const p = 'u' + i, stale = c[p + 'stale'][k];
      const cond = el('td', { text: stale ? 'stale' : 'fresh' });
      if (stale) cond.dataset.flag = 'bad';
      return el('tr', {}, el('td', { class: 'name', text: u.name }), withUnit(num(c[p + 'v'][k]), u.unit),
        withUnit(num(c[p + 'age'][k]), 's'), cond, el('td', { class: 'small', text: samplesOf(u.name) }));
    });
    $('inputs-table').tBodies[0].replaceChildren(...inRows);
    showGains();
  }

  // sensorCell shows the sensor watch's indicators of output j at row k, and the share of the
  // last window of rows without a fresh sample.
  function sensorCell(j, k) {
    const c = cur.store.cols, p = 'o' + j, f = c[p + 'flags'][k] || 0, meas = c[p + 'meas'];
    const words = [];
    if (f & FLAG_BIAS_HIGH) words.push('bias, reads high');
    if (f & FLAG_BIAS_LOW) words.push('bias, reads low');
    if (f & FLAG_STUCK) words.push('stuck');
    if (f & FLAG_LOCKED) words.push('locked out');
    let missing = 0, n = 0;
    for (let i = meas.length - 1; i >= 0 && n < cur.info.window; i--, n++) if (meas[i] == null) missing++;
    const share = n ? Math.round(100 * missing / n) : 0;
    const td = el('td', { text: (words.length ? words.join(', ') : 'ok') + (share ? ' · ' + share + ' % no sample' : '') });
    if (words.length) td.dataset.flag = 'bad';
    else if (share > 50) td.dataset.flag = 'warn';
    return td;
  }

  // whitenessCell tests the innovations output j's active lane used over the last window.
  function whitenessCell(j) {
    const c = cur.store.cols, p = 'o' + j, inn = c[p + 'inn'], flags = c[p + 'flags'];
    const x = [];
    for (let i = inn.length - 1; i >= 0 && x.length < cur.info.window; i--) {
      if ((flags[i] & FLAG_USED) && inn[i] != null) x.push(inn[i]);
    }
    x.reverse();
    const lb = window.surmiseStats.ljungBox(x, LB_LAGS);
    if (!lb) return el('td', { text: '—', title: 'too few innovations in the window to test' });
    const white = lb.p >= LB_LEVEL;
    const td = el('td', { text: (white ? 'white' : 'not white') + ' (p ' + (lb.p < 1e-3 ? lb.p.toExponential(1) : lb.p.toFixed(3)) + ')',
      title: 'Ljung–Box Q = ' + lb.q.toFixed(1) + ' over lags 1–' + LB_LAGS + ' of the last ' + x.length + ' innovations' });
    if (!white) td.dataset.flag = 'warn';
    return td;
  }

  // rms is the root mean square of the innovations of output j that the lane used, over the last
  // window of them since the lane took its current set (the engine's innovation RMS, which starts
  // again on a swap).
  function rms(j, cand) {
    const c = cur.store.cols, p = 'o' + j;
    const inn = c[p + (cand ? 'cinn' : 'inn')], flags = c[p + (cand ? 'cflags' : 'flags')];
    const sets = cand ? c.cgains : c.gains, set = sets[sets.length - 1];
    let s = 0, n = 0;
    for (let i = inn.length - 1; i >= 0 && n < cur.info.window && sets[i] === set; i--) {
      if ((flags[i] & FLAG_USED) && inn[i] != null) { s += inn[i] * inn[i]; n++; }
    }
    return n ? Math.sqrt(s / n) : null;
  }

  function showGains() {
    const info = cur.info, c = cur.store.cols, k = lastIndex();
    const active = c.gains[k];
    const running = c.cgains[k] != null;
    const named = info.gains && info.gains.candidate && info.gains.candidate !== active ? info.gains.candidate : '';
    const candName = running ? c.cgains[k] : named;
    const a = setInfo(active), b = setInfo(candName);
    const rows = [];
    const row = (label, va, vb, cls) => rows.push(el('tr', {}, el('td', { text: label }), el('td', { text: va, class: cls || '' }), el('td', { text: vb, class: cls || '' })));
    row('set', active || '—', running ? candName : 'no shadow lane running' + (named ? ' (the gains file names ' + named + ')' : ''));
    row('form', a ? a.form : '—', b ? b.form : '—');
    row('design method', a ? a.method : '—', b ? b.method : '—');
    row('error-dynamics poles', a && a.poles ? a.poles.join(', ') : '—', b && b.poles ? b.poles.join(', ') : '—', 'mono');
    row('output patterns designed', a ? String(a.patterns) : '—', b ? String(b.patterns) : '—');
    row('designed', a ? [a.created, a.tool].filter(Boolean).join(' · ') || '—' : '—', b ? [b.created, b.tool].filter(Boolean).join(' · ') || '—' : '—');
    const band = (m, lo, hi) => m == null ? '—' : num(m) + '  [' + num(lo) + ' – ' + num(hi) + ']' + (lo != null && (m < lo || m > hi) ? '  ▲ out of band' : '');
    row('NIS window mean [95 % band]', band(c.mean[k], c.lo[k], c.hi[k]), running ? band(c.cmean[k], c.clo[k], c.chi[k]) : '—');
    info.outputs.forEach((o, j) => {
      row('innovation RMS, ' + o.name + ' (last ' + info.window + ')', num(rms(j, false)) + ' ' + o.unit,
        running ? num(rms(j, true)) + ' ' + o.unit : '—');
    });
    $('gains-table').tBodies[0].replaceChildren(...rows);
  }

  function showAudit(entries) {
    const body = $('audit-table').tBodies[0];
    $('audit-empty').hidden = entries.length > 0;
    $('audit-table').hidden = entries.length === 0;
    const ref = (r) => (r && r.name ? r.name : '—');
    body.replaceChildren(...entries.map((e) => el('tr', {},
      el('td', { text: new Date(e.time).toLocaleString([], { hour12: false }) }),
      el('td', { text: e.action }), el('td', { text: e.trigger || '' }),
      el('td', { text: ref(e.old_active) + ' → ' + ref(e.new_active) }),
      el('td', { text: (e.old_candidate ? ref(e.old_candidate) : 'none') + ' → ' + (e.new_candidate ? ref(e.new_candidate) : 'none') }),
      el('td', { text: e.note || '' }))));
  }

  // ---- data in ----
  async function getJSON(url) {
    const res = await fetch(url, { cache: 'no-store' });
    if (!res.ok) throw new Error(url + ': ' + res.status);
    return res.json();
  }

  function take(msg) {
    const store = cur.store;
    if (msg.gap) store.gaps++;
    let n = 0;
    for (const r of msg.rows) {
      if (r.seq <= store.lastSeq) continue;
      push(store, cur.info, r);
      n++;
    }
    if (msg.samples) store.samples = msg.samples;
    trim(store, cur.info);
    root.dataset.rows = String(store.cols.t.length);
    return n;
  }

  let lastMsgAt = 0;
  function onTick(ev) {
    const msg = JSON.parse(ev.data);
    if (msg.reset) { // the daemon restarted: start again with what it runs now
      location.reload();
      return;
    }
    const n = take(msg);
    updates++;
    root.dataset.updates = String(updates);
    lastMsgAt = Date.now();
    setConn('live');
    maybeRefresh();
    if (paused) {
      pausedCount += n;
      $('paused-count').textContent = String(pausedCount);
    } else scheduleDraw();
  }

  // maybeRefresh re-reads the gain sets and the audit trail when the lanes changed sets.
  let refreshing = false;
  function maybeRefresh() {
    const c = cur.store.cols, k = lastIndex();
    if (k < 0 || refreshing) return;
    const g = cur.info.gains;
    const key = c.gains[k] + '|' + (c.cgains[k] || '');
    if (cur.laneKey === key) return;
    const known = !g || (g.sets.some((s) => s.name === c.gains[k]) && (!c.cgains[k] || g.sets.some((s) => s.name === c.cgains[k])));
    cur.laneKey = key;
    refreshing = true;
    const name = cur.info.name;
    Promise.all([known ? null : getJSON('/api/estimators'), getJSON('/api/audit?estimator=' + encodeURIComponent(name))])
      .then(([list, audit]) => {
        if (!cur || cur.info.name !== name) return;
        if (list) {
          const info = list.find((i) => i.name === name);
          if (info) cur.info.gains = info.gains;
        }
        showAudit(audit);
        if (!paused) showGains();
      })
      .catch(() => {})
      .finally(() => { refreshing = false; });
  }

  function setConn(state) {
    const c = $('conn');
    if (c.dataset.state === state) return;
    c.dataset.state = state;
    c.textContent = { live: 'live', connecting: 'connecting…', lost: 'connection lost, retrying' }[state];
  }

  async function show(name) {
    if (cur && cur.source) cur.source.close();
    const info = infos.find((i) => i.name === name) || infos[0];
    for (const b of $('tabs').children) b.setAttribute('aria-selected', String(b.dataset.name === info.name));
    zoomed = null;
    cur = { info, store: newStore(info), plots: [], specs: [], laneKey: '' };
    root.dataset.estimator = info.name;
    $('history-note').textContent = 'History kept: ' + span(info.history) + (info.every > 1 ? ' (one tick in ' + info.every + ')' : '') +
      ' · tick every ' + secs(info.period) + ' · NIS window ' + info.window + ' ticks';
    const hist = await getJSON('/api/history?estimator=' + encodeURIComponent(info.name));
    if (cur.info !== info) return;
    take(hist);
    buildCharts();
    watchSizes();
    draw(true);
    maybeRefresh();
    getJSON('/api/audit?estimator=' + encodeURIComponent(info.name)).then(showAudit).catch(() => {});
    const src = new EventSource('/events?estimator=' + encodeURIComponent(info.name) + '&since=' + cur.store.lastSeq);
    src.addEventListener('tick', onTick);
    src.onopen = () => setConn('live');
    src.onerror = () => setConn('lost');
    cur.source = src;
    lastMsgAt = Date.now();
  }

  function watchStaleness() {
    setInterval(() => {
      if (!cur) return;
      const age = (Date.now() - lastMsgAt) / 1000;
      const limit = Math.max(3 * cur.info.period, 3);
      const stale = age > limit;
      $('stale-note').hidden = !stale;
      $('stale-age').textContent = String(Math.round(age));
      $('badge').dataset.stale = String(stale);
      root.dataset.stale = String(stale);
    }, 1000);
    // The audit trail also changes without a swap (a load of the same sets, a reset).
    setInterval(() => {
      if (!cur) return;
      getJSON('/api/audit?estimator=' + encodeURIComponent(cur.info.name)).then(showAudit).catch(() => {});
    }, 15000);
  }

  function setPaused(p) {
    paused = p;
    const b = $('pause');
    b.setAttribute('aria-pressed', String(p));
    b.textContent = p ? 'Resume' : 'Pause';
    root.dataset.paused = String(p);
    $('paused-note').hidden = !p;
    if (!p) { pausedCount = 0; $('paused-count').textContent = '0'; draw(true); }
  }

  async function start() {
    drawIcon($('badge-icon'), 'none');
    root.dataset.zoomed = 'false';
    // uPlot ends a drag on the document's mouseup; this runs after it, in the bubbling order.
    window.addEventListener('mouseup', () => { pointerDown = false; });
    $('pause').addEventListener('click', () => setPaused(!paused));
    $('zoom-reset').addEventListener('click', resetZoom);
    try {
      infos = await getJSON('/api/estimators');
    } catch (e) {
      setConn('lost');
      $('badge-since').textContent = 'cannot read /api/estimators: ' + e.message;
      return;
    }
    if (!infos.length) { $('badge-since').textContent = 'this daemon runs no estimator'; return; }
    $('tabs').replaceChildren(...infos.map((i) => {
      const b = el('button', { type: 'button', role: 'tab', 'data-name': i.name, text: i.name });
      b.addEventListener('click', () => { location.hash = encodeURIComponent(i.name); });
      return b;
    }));
    window.addEventListener('hashchange', () => show(decodeURIComponent(location.hash.slice(1))));
    watchStaleness();
    await show(decodeURIComponent(location.hash.slice(1)));
  }

  document.addEventListener('DOMContentLoaded', start);
})();
