// brimline lookout: the live page of a daemon's status stream, drawn on <canvas>.
// Part of brimline and under the same licence as the package (Apache-2.0). Written for
// brimline; it loads nothing from the network and uses no other library.
//
// The server sends one "snapshot" (history to start from) when the page connects, then one
// "update" per status message (see brimline/daemon/views/lookout_data.py for both layouts).
'use strict';

(function () {
  const KEEP_POINTS = 1200;   // rate and margin points kept on the page
  const KEEP_ROWS = 240;      // waterfall rows kept
  const KEEP_MARKS = 400;
  const WINDOW_S = 120;       // link time shown by the rate and margin charts
  const QUIET_S = 3;          // no status for longer than this: say so

  const MARK_COLOURS = {
    bit_swap: '#2a9d8f', reload: '#3d5a80', emergency: '#c1121f', fallback: '#e36414',
    alarm: '#c1121f', other: '#7a8699'
  };
  const SERIES = {
    line_rate_mbps: {label: 'line rate (every symbol)', colour: '#98a2b3', dash: [5, 3]},
    net_rate_mbps: {label: 'net data rate', colour: '#2563eb', dash: []},
    goodput_mbps: {label: 'goodput', colour: '#15803d', dash: []},
    headroom_db: {label: 'headroom above target margin', colour: '#7c3aed', dash: []},
    target_margin_db: {label: 'target margin', colour: '#d97706', dash: [5, 3]}
  };
  // Waterfall colour ramp (low SNR dark, high SNR light), stops at 0, 1/4, ... 1.
  const RAMP = [[18, 24, 58], [44, 78, 140], [38, 150, 140], [226, 192, 92], [250, 246, 226]];

  const state = {
    frame: null, points: [], rows: [], marks: [], alarmBook: [], view: null, updates: 0,
    snrRange: [0, 40], endpoint: '', lastAt: null, connected: false, drawPending: false
  };

  // ---- small drawing kit ------------------------------------------------------------------

  function prepare(canvas) {
    const ratio = window.devicePixelRatio || 1;
    const w = canvas.clientWidth, h = canvas.clientHeight;
    if (canvas.width !== Math.round(w * ratio) || canvas.height !== Math.round(h * ratio)) {
      canvas.width = Math.round(w * ratio);
      canvas.height = Math.round(h * ratio);
    }
    const ctx = canvas.getContext('2d');
    ctx.setTransform(ratio, 0, 0, ratio, 0, 0);
    ctx.clearRect(0, 0, w, h);
    ctx.font = '11px system-ui, "DejaVu Sans", sans-serif';
    return {ctx: ctx, w: w, h: h};
  }

  function niceStep(span, count) {
    const raw = span / Math.max(1, count);
    const power = Math.pow(10, Math.floor(Math.log10(raw)));
    const unit = raw / power;
    return power * (unit < 1.5 ? 1 : unit < 3.5 ? 2 : unit < 7.5 ? 5 : 10);
  }

  function ticks(lo, hi, count) {
    if (!(hi > lo)) return [lo];
    const step = niceStep(hi - lo, count);
    const out = [];
    for (let v = Math.ceil(lo / step) * step; v <= hi + step * 1e-9; v += step) {
      out.push(Math.abs(v) < step * 1e-9 ? 0 : v);
    }
    return out;
  }

  function fmt(v, digits) {
    return v === null || v === undefined ? '\u2014' : Number(v).toFixed(digits);
  }

  function digitsFor(values) {
    if (values.length < 2) return 0;
    const step = Math.abs(values[1] - values[0]);
    return step >= 1 ? 0 : step >= 0.1 ? 1 : 2;
  }

  // A plot box: scale functions and axes with ticks, grid and labels (units in the labels).
  function box(ctx, x0, y0, w, h, xr, yr) {
    return {
      ctx: ctx, x0: x0, y0: y0, w: w, h: h, xr: xr, yr: yr,
      x: function (v) { return x0 + (v - xr[0]) / (xr[1] - xr[0]) * w; },
      y: function (v) { return y0 + h - (v - yr[0]) / (yr[1] - yr[0]) * h; }
    };
  }

  function yAxis(b, label, count) {
    const ctx = b.ctx, ts = ticks(b.yr[0], b.yr[1], count || 4), d = digitsFor(ts);
    ctx.strokeStyle = '#e6e9ef';
    ctx.fillStyle = '#667085';
    ctx.lineWidth = 1;
    ctx.textAlign = 'right';
    ctx.textBaseline = 'middle';
    for (const t of ts) {
      const y = Math.round(b.y(t)) + 0.5;
      ctx.beginPath(); ctx.moveTo(b.x0, y); ctx.lineTo(b.x0 + b.w, y); ctx.stroke();
      ctx.fillText(t.toFixed(d), b.x0 - 4, y);
    }
    ctx.save();
    ctx.translate(b.x0 - 38, b.y0 + b.h / 2);
    ctx.rotate(-Math.PI / 2);
    ctx.textAlign = 'center';
    ctx.textBaseline = 'bottom';
    ctx.fillText(label, 0, 0);
    ctx.restore();
    ctx.strokeStyle = '#b8bec9';
    ctx.strokeRect(b.x0 + 0.5, b.y0 + 0.5, b.w - 1, b.h - 1);
  }

  function xAxis(b, label, count, values) {
    const ctx = b.ctx, ts = values || ticks(b.xr[0], b.xr[1], count || 8), d = digitsFor(ts);
    ctx.fillStyle = '#667085';
    ctx.strokeStyle = '#b8bec9';
    ctx.textAlign = 'center';
    ctx.textBaseline = 'top';
    for (const t of ts) {
      const x = Math.round(b.x(t)) + 0.5;
      ctx.beginPath(); ctx.moveTo(x, b.y0 + b.h); ctx.lineTo(x, b.y0 + b.h + 4); ctx.stroke();
      ctx.fillText(t.toFixed(d), x, b.y0 + b.h + 5);
    }
    ctx.fillText(label, b.x0 + b.w / 2, b.y0 + b.h + 18);
  }

  // A marked empty place: hatched, with what is missing written in it.
  function absent(ctx, x0, y0, w, h, text) {
    ctx.save();
    ctx.beginPath(); ctx.rect(x0, y0, w, h); ctx.clip();
    ctx.strokeStyle = '#e4e7ec';
    ctx.lineWidth = 1;
    for (let k = -h; k < w; k += 9) {
      ctx.beginPath(); ctx.moveTo(x0 + k, y0 + h); ctx.lineTo(x0 + k + h, y0); ctx.stroke();
    }
    ctx.restore();
    ctx.strokeStyle = '#c9ced8';
    ctx.strokeRect(x0 + 0.5, y0 + 0.5, w - 1, h - 1);
    ctx.fillStyle = '#98a2b3';
    ctx.textAlign = 'center';
    ctx.textBaseline = 'middle';
    ctx.fillText(text, x0 + w / 2, y0 + h / 2);
  }

  // A line through (xs[i], ys[i]) with gaps where a value is missing.
  function polyline(b, xs, ys, colour, dash, width) {
    const ctx = b.ctx;
    ctx.save();
    ctx.beginPath(); ctx.rect(b.x0, b.y0, b.w, b.h); ctx.clip();
    ctx.strokeStyle = colour;
    ctx.lineWidth = width || 1.6;
    ctx.setLineDash(dash || []);
    ctx.beginPath();
    let open = false;
    for (let i = 0; i < xs.length; i++) {
      const v = ys[i];
      if (v === null || v === undefined) { open = false; continue; }
      const x = b.x(xs[i]), y = b.y(v);
      if (open) ctx.lineTo(x, y); else ctx.moveTo(x, y);
      open = true;
    }
    ctx.stroke();
    ctx.restore();
  }

  function span(values, fallback) {
    let lo = Infinity, hi = -Infinity;
    for (const v of values) {
      if (v === null || v === undefined) continue;
      lo = Math.min(lo, v); hi = Math.max(hi, v);
    }
    return lo <= hi ? [lo, hi] : fallback;
  }

  function ramp(f) {
    const x = Math.min(1, Math.max(0, f)) * (RAMP.length - 1);
    const i = Math.min(RAMP.length - 2, Math.floor(x)), t = x - i;
    return RAMP[i].map(function (c, k) { return Math.round(c + (RAMP[i + 1][k] - c) * t); });
  }

  function bitsColour(bits, most) {
    if (!(bits > 0)) return '#d0d5dd';
    const hue = 205 - 185 * Math.min(1, (bits - 1) / Math.max(1, most - 1));
    return 'hsl(' + hue.toFixed(0) + ', 62%, 48%)';
  }

  // ---- the charts --------------------------------------------------------------------------

  function drawBand() {
    const {ctx, w, h} = prepare(document.getElementById('band-chart'));
    const band = state.frame ? state.frame.band : null;
    const left = 52, right = 14, top = 6, bottom = 34, gap = 10;
    const inner = h - top - bottom - 2 * gap;
    const hs = [inner * 0.46, inner * 0.30, inner * 0.24];
    const ys = [top, top + hs[0] + gap, top + hs[0] + hs[1] + 2 * gap];
    const pw = w - left - right;
    if (!band || !band.tone_axis.length) {
      absent(ctx, left, top, pw, h - top - bottom, 'no band in the status yet');
      return;
    }
    const axis = band.tone_axis;
    const step = axis.length > 1 ? (axis[axis.length - 1] - axis[0]) / (axis.length - 1) : 1;
    const xr = [axis[0] - step / 2, axis[axis.length - 1] + step / 2];

    const snrBox = box(ctx, left, ys[0], pw, hs[0], xr, state.snrRange);
    if (band.snr_db.length) {
      yAxis(snrBox, 'SNR dB', 5);
      ctx.save();
      ctx.beginPath(); ctx.rect(snrBox.x0, snrBox.y0, snrBox.w, snrBox.h); ctx.clip();
      ctx.fillStyle = 'rgba(37, 99, 235, 0.13)';
      for (let i = 0; i < axis.length; i++) {
        const v = band.snr_db[i];
        if (v === null || v === undefined) continue;
        const x = snrBox.x(axis[i] - step / 2), y = snrBox.y(v);
        ctx.fillRect(x, y, Math.max(1, snrBox.x(axis[i] + step / 2) - x), snrBox.y0 + snrBox.h - y);
      }
      ctx.restore();
      polyline(snrBox, axis, band.snr_db, '#2563eb', [], 1.5);
    } else {
      absent(ctx, left, ys[0], pw, hs[0], 'SNR dB: no estimate yet');
    }

    const most = Math.max(8, Math.ceil(span(band.bits, [0, 8])[1]));
    const bitsBox = box(ctx, left, ys[1], pw, hs[1], xr, [0, most]);
    if (band.bits.length) {
      yAxis(bitsBox, 'bits per tone', 3);
      for (let i = 0; i < axis.length; i++) {
        const v = band.bits[i];
        if (v === null || v === undefined) continue;
        const x = bitsBox.x(axis[i] - step / 2), x1 = bitsBox.x(axis[i] + step / 2);
        ctx.fillStyle = bitsColour(v, most);
        const y = bitsBox.y(Math.max(v, 0.12 * (v <= 0)));  // unloaded: a thin grey sliver
        ctx.fillRect(x + 0.25, y, Math.max(1, x1 - x - 0.5), bitsBox.y0 + bitsBox.h - y);
      }
    } else {
      absent(ctx, left, ys[1], pw, hs[1], 'bits: no map in force');
    }

    const pr = span(band.power_db, [-1, 1]);
    const powerBox = box(ctx, left, ys[2], pw, hs[2], xr,
                         [Math.min(-6, Math.floor(pr[0] - 1)), Math.max(4, Math.ceil(pr[1] + 1))]);
    if (band.power_db.length) {
      yAxis(powerBox, 'power dB', 3);
      ctx.strokeStyle = '#98a2b3';
      ctx.setLineDash([3, 3]);
      ctx.beginPath();
      ctx.moveTo(powerBox.x0, powerBox.y(0)); ctx.lineTo(powerBox.x0 + pw, powerBox.y(0));
      ctx.stroke();
      ctx.setLineDash([]);
      polyline(powerBox, axis, band.power_db, '#b42318', [], 1.4);
    } else {
      absent(ctx, left, ys[2], pw, hs[2], 'power: no map in force');
    }
    xAxis(powerBox, 'tone (daemon numbering; power re nominal, unloaded tones left out)', 10);
  }

  function drawWaterfall() {
    const {ctx, w, h} = prepare(document.getElementById('waterfall-chart'));
    const left = 52, right = 58, top = 6, bottom = 34;
    const pw = w - left - right, ph = h - top - bottom;
    const rows = state.rows;
    const band = state.frame ? state.frame.band : null;
    if (!rows.length || !band || !band.tone_axis.length) {
      absent(ctx, left, top, pw, ph, 'no SNR rows yet');
      return;
    }
    const axis = band.tone_axis, cols = axis.length;
    const step = cols > 1 ? (axis[cols - 1] - axis[0]) / (cols - 1) : 1;
    const xr = [axis[0] - step / 2, axis[cols - 1] + step / 2];
    const [lo, hi] = state.snrRange;
    const shown = rows.slice(-Math.max(1, Math.min(KEEP_ROWS, Math.floor(ph))));
    const image = ctx.createImageData(cols, shown.length);
    for (let r = 0; r < shown.length; r++) {
      const row = shown[shown.length - 1 - r];  // newest at the top
      const rAxis = row.tone_axis, rn = row.snr_db.length;
      const same = rn === cols && rAxis[0] === axis[0] && rAxis[rn - 1] === axis[cols - 1];
      for (let j = 0; j < cols; j++) {
        let k = j;
        if (!same) {
          const f = rn > 1 ? (axis[j] - rAxis[0]) / (rAxis[rn - 1] - rAxis[0]) : 0;
          k = Math.round(f * (rn - 1));
        }
        const v = k >= 0 && k < rn ? row.snr_db[k] : null;
        const at = 4 * (r * cols + j);
        const c = v === null || v === undefined ? [205, 209, 216] : ramp((v - lo) / (hi - lo));
        image.data[at] = c[0]; image.data[at + 1] = c[1]; image.data[at + 2] = c[2];
        image.data[at + 3] = 255;
      }
    }
    const sheet = document.createElement('canvas');
    sheet.width = cols; sheet.height = shown.length;
    sheet.getContext('2d').putImageData(image, 0, 0);
    ctx.imageSmoothingEnabled = false;
    const rowH = ph / Math.max(shown.length, 40);  // rows fill the chart, then scroll
    ctx.drawImage(sheet, left, top, pw, rowH * shown.length);
    const b = box(ctx, left, top, pw, ph, xr, [0, 1]);
    ctx.strokeStyle = '#b8bec9';
    ctx.strokeRect(left + 0.5, top + 0.5, pw - 1, ph - 1);
    // time labels: the link time of every few rows
    ctx.fillStyle = '#667085';
    ctx.textAlign = 'right';
    ctx.textBaseline = 'middle';
    const every = Math.max(1, Math.ceil(18 / rowH));
    for (let r = 0; r < shown.length; r += every * Math.ceil(shown.length / every / 8)) {
      const t = shown[shown.length - 1 - r].t;
      ctx.fillText(t.toFixed(1), left - 4, top + (r + 0.5) * rowH);
    }
    ctx.save();
    ctx.translate(left - 40, top + ph / 2);
    ctx.rotate(-Math.PI / 2);
    ctx.textAlign = 'center';
    ctx.textBaseline = 'bottom';
    ctx.fillText('link time s', 0, 0);
    ctx.restore();
    xAxis(b, 'tone (daemon numbering)', 6);
    // the colour scale
    const cx = left + pw + 10, cw = 10;
    for (let y = 0; y < ph; y++) {
      const c = ramp(1 - y / ph);
      ctx.fillStyle = 'rgb(' + c.join(',') + ')';
      ctx.fillRect(cx, top + y, cw, 1);
    }
    ctx.strokeStyle = '#b8bec9';
    ctx.strokeRect(cx + 0.5, top + 0.5, cw, ph - 1);
    ctx.fillStyle = '#667085';
    ctx.textAlign = 'left';
    for (const t of ticks(lo, hi, 5)) {
      ctx.fillText(t.toFixed(0), cx + cw + 4, top + ph - (t - lo) / (hi - lo) * ph);
    }
    ctx.textAlign = 'center';
    ctx.textBaseline = 'top';
    ctx.fillText('SNR dB', cx + cw, top + ph + 18);  // below the lowest tick's label
  }

  function drawMarks(b) {
    const ctx = b.ctx;
    ctx.save();
    ctx.beginPath(); ctx.rect(b.x0, b.y0, b.w, b.h); ctx.clip();
    for (const m of state.marks) {
      if (m.t < b.xr[0] || m.t > b.xr[1]) continue;
      const x = Math.round(b.x(m.t)) + 0.5;
      if (m.type === 'alarm') {
        ctx.fillStyle = MARK_COLOURS.alarm;
        ctx.beginPath();
        ctx.moveTo(x - 5, b.y0 + 1); ctx.lineTo(x + 5, b.y0 + 1); ctx.lineTo(x, b.y0 + 9);
        ctx.fill();
      } else {
        ctx.strokeStyle = MARK_COLOURS[m.kind] || MARK_COLOURS.other;
        ctx.lineWidth = m.kind === 'emergency' ? 2 : 1;
        ctx.setLineDash(m.kind === 'bit_swap' ? [2, 2] : []);
        ctx.beginPath(); ctx.moveTo(x, b.y0); ctx.lineTo(x, b.y0 + b.h); ctx.stroke();
      }
    }
    ctx.restore();
  }

  function drawSeries(canvasId, keys, unit, floorZero) {
    const {ctx, w, h} = prepare(document.getElementById(canvasId));
    const left = 52, right = 14, top = 22, bottom = 34;
    const pw = w - left - right, ph = h - top - bottom;
    const pts = state.points;
    if (!pts.length) {
      absent(ctx, left, top, pw, ph, 'no status yet');
      return;
    }
    const t1 = pts[pts.length - 1].t;
    // from the first point, or an earlier mark (the first map comes before the first status)
    const firstMark = state.marks.length ? Math.max(0, state.marks[0].t) : pts[0].t;
    const t0 = Math.max(Math.min(pts[0].t, firstMark), t1 - WINDOW_S);
    const xr = t1 > t0 ? [t0, t1] : [t0 - 1, t0 + 1];
    const inView = pts.filter(function (p) { return p.t >= xr[0]; });
    const xs = inView.map(function (p) { return p.t; });
    let values = [];
    for (const k of keys) values = values.concat(inView.map(function (p) { return p[k]; }));
    const known = values.some(function (v) { return v !== null && v !== undefined; });
    // legend (a key the status never carried says so)
    ctx.textBaseline = 'middle';
    ctx.textAlign = 'left';
    let lx = left;
    for (const k of keys) {
      const s = SERIES[k];
      const has = inView.some(function (p) { return p[k] !== null && p[k] !== undefined; });
      ctx.strokeStyle = s.colour;
      ctx.lineWidth = 2;
      ctx.setLineDash(s.dash);
      ctx.beginPath(); ctx.moveTo(lx, 9); ctx.lineTo(lx + 16, 9); ctx.stroke();
      ctx.setLineDash([]);
      ctx.fillStyle = has ? '#344054' : '#98a2b3';
      const text = s.label + (has ? '' : ' (not in status)');
      ctx.fillText(text, lx + 20, 9);
      lx += 28 + ctx.measureText(text).width;
    }
    if (!known) {
      absent(ctx, left, top, pw, ph, 'not in status');
      return;
    }
    let [lo, hi] = span(values, [0, 1]);
    if (floorZero) lo = Math.min(0, lo); else { lo = Math.min(lo, 0); hi = Math.max(hi, 0); }
    const pad = (hi - lo) * 0.08 || 1;
    const st = niceStep(hi - lo + 2 * pad, 4);
    const yr = [floorZero && lo >= 0 ? 0 : Math.floor((lo - pad) / st) * st,
                Math.ceil((hi + pad) / st) * st];
    const b = box(ctx, left, top, pw, ph, xr, yr);
    yAxis(b, unit, 4);
    drawMarks(b);
    for (const k of keys) {
      polyline(b, xs, inView.map(function (p) { return p[k]; }), SERIES[k].colour,
               SERIES[k].dash, 1.8);
    }
    xAxis(b, 'link time s', 8);
  }

  // ---- the page's text ---------------------------------------------------------------------

  function el(tag, cls, text) {
    const e = document.createElement(tag);
    if (cls) e.className = cls;
    if (text !== undefined) e.textContent = text;
    return e;
  }

  function setText(id, text) { document.getElementById(id).textContent = text; }

  function writeHead() {
    const f = state.frame;
    if (!f) return;
    setText('time', f.time_s === null ? '\u2014' : f.time_s.toFixed(1) + ' s');
    const src = f.source;
    const ppm = src.clock_offset_ppm;
    setText('source', (src.name || '\u2014') + ' ' + (src.state || '') +
            (typeof ppm === 'number' ? ', sample clock ' + (ppm >= 0 ? '+' : '') +
             ppm.toFixed(1) + ' ppm' : '') +
            (src.error ? ' (' + src.error + ')' : ''));
    setText('map', f.map ? 'seq ' + f.map.seq + ' ' + (f.map.kind || '') +
            (f.map.fallback ? ' (fallback)' : '') : 'none yet');
    setText('epoch', f.epoch || '\u2014');
    document.body.dataset.statusSeq = f.status_seq === null ? '' : String(f.status_seq);
    document.body.dataset.mapSeq = f.map ? String(f.map.seq) : '';
    document.body.dataset.updates = String(state.updates);
    const band = f.band;
    setText('band-summary', band.tone_first === null ? 'no tones yet' :
            'tones ' + band.tone_first + ' \u2026 ' + band.tone_last + ', ' +
            (band.tones || 0) + ' data tones in ' + band.columns + ' groups; SNR scale ' +
            state.snrRange[0] + ' to ' + state.snrRange[1] + ' dB');

    // Alarms stay: active ones first (red), then cleared ones (grey), each with how often it
    // was raised and when last, in link time.
    const alarms = document.getElementById('alarms');
    alarms.replaceChildren();
    const book = state.alarmBook;
    if (!book.some(function (a) { return a.active; })) {
      alarms.appendChild(el('span', 'no-alarm', 'no alarms now'));
    }
    for (const a of book) {
      const chip = el('span', a.active ? 'alarm' : 'alarm cleared', a.name.toUpperCase());
      chip.appendChild(el('small', '', ' \u00d7' + a.count));
      if (a.raised_s !== null) {
        const ago = f.time_s === null ? '' : ', ' + (f.time_s - a.raised_s).toFixed(1) + ' s ago';
        chip.appendChild(el('small', '', ', last raised at ' + a.raised_s.toFixed(1) + ' s' + ago));
      }
      if (!a.active) chip.appendChild(el('small', '', ', cleared'));
      chip.title = a.meaning || a.name;
      alarms.appendChild(chip);
    }

    const figs = document.getElementById('figures');
    figs.replaceChildren();
    for (const g of f.figures) {
      const cell = el('div', 'figure');
      cell.dataset.key = g.key;
      cell.appendChild(el('div', 'label', g.label));
      if (g.value === null) {
        cell.appendChild(el('div', 'value absent', 'not in status'));
      } else {
        const digits = g.unit === 'Mbit/s' ? 3 : g.unit === 'dB' ? 2 : g.unit === 's' ? 2 :
                       g.unit === '' ? 4 : 0;
        const text = g.unit === '' ? Number(g.value).toPrecision(2) : fmt(g.value, digits);
        cell.appendChild(el('div', 'value', text + (g.unit ? ' ' + g.unit : '')));
      }
      figs.appendChild(cell);
    }

    const body = document.querySelector('#changes tbody');
    body.replaceChildren();
    if (!f.changes.length) {
      const row = el('tr');
      const td = el('td', 'absent', 'no map yet');
      td.colSpan = 4;
      row.appendChild(td);
      body.appendChild(row);
    }
    for (const c of f.changes.slice(0, 8)) {
      const row = el('tr', c.kind || '');
      row.appendChild(el('td', 'num', fmt(c.time_s, 2)));
      row.appendChild(el('td', 'num', c.seq === null ? '\u2014' : String(c.seq)));
      row.appendChild(el('td', 'kind', c.kind || '\u2014'));
      row.appendChild(el('td', '', c.reason || ''));
      body.appendChild(row);
    }
  }

  function writeCounts() {
    const v = state.view;
    if (!v) return;
    const dropped = Object.keys(v.dropped).map(function (k) { return k + ' ' + v.dropped[k]; });
    setText('view-counts', 'status messages ' + v.received + ', missed ' + v.missed +
            ', dropped ' + (dropped.length ? dropped.join(', ') : '0') + '; pages open ' +
            v.pages + '; listening to ' + state.endpoint +
            '. Chart code: part of brimline (Apache-2.0), served by this viewer.');
  }

  function writeLegend() {
    const legend = document.getElementById('mark-legend');
    if (legend.childElementCount) return;
    legend.appendChild(el('span', '', 'marks:'));
    for (const k of ['bit_swap', 'reload', 'emergency', 'fallback']) {
      const item = el('span');
      const sw = el('span', 'swatch');
      sw.style.background = MARK_COLOURS[k];
      item.appendChild(sw);
      item.appendChild(document.createTextNode(k.replace('_', ' ')));
      legend.appendChild(item);
    }
    const alarm = el('span', '', '\u25bc alarm raised');
    alarm.style.color = MARK_COLOURS.alarm;
    legend.appendChild(alarm);
  }

  function tickAge() {
    const c = document.getElementById('connection');
    const age = state.lastAt === null ? null : (Date.now() - state.lastAt) / 1000;
    if (!state.connected) {
      c.textContent = 'viewer unreachable, retrying';
      c.className = 'connection down';
    } else if (age === null || age > QUIET_S) {
      c.textContent = age === null ? 'waiting for status' : 'daemon quiet';
      c.className = 'connection down';
    } else {
      c.textContent = 'live';
      c.className = 'connection live';
    }
    setText('age', age === null ? '\u2014' : age.toFixed(1) + ' s ago');
  }

  function draw() {
    state.drawPending = false;
    writeLegend();
    writeHead();
    writeCounts();
    tickAge();
    drawBand();
    drawWaterfall();
    drawSeries('rate-chart', ['line_rate_mbps', 'net_rate_mbps', 'goodput_mbps'], 'Mbit/s', true);
    drawSeries('margin-chart', ['headroom_db', 'target_margin_db'], 'dB', false);
  }

  function schedule() {
    if (state.drawPending) return;
    state.drawPending = true;
    // a hidden tab gets no animation frames: the timer draws then
    const once = function () { if (state.drawPending) draw(); };
    window.requestAnimationFrame(once);
    window.setTimeout(once, 250);
  }

  // ---- the stream --------------------------------------------------------------------------

  function keep(list, items, most) {
    for (const x of items) list.push(x);
    if (list.length > most) list.splice(0, list.length - most);
  }

  function take(msg) {
    if (msg.view) state.view = msg.view;
    if (msg.alarm_book) state.alarmBook = msg.alarm_book;
    if (msg.kind === 'snapshot') {
      if (msg.settings) {
        state.snrRange = msg.settings.snr_range_db;
        state.endpoint = msg.settings.endpoint;
      }
      state.frame = msg.frame;
      state.points = msg.points.slice(-KEEP_POINTS);
      state.rows = msg.rows.slice(-KEEP_ROWS);
      state.marks = msg.marks.slice(-KEEP_MARKS);
      if (msg.frame) state.lastAt = Date.now();
    } else if (msg.kind === 'update') {
      if (msg.reset) { state.points = []; state.rows = []; state.marks = []; }
      state.frame = msg.frame;
      if (msg.point) keep(state.points, [msg.point], KEEP_POINTS);
      if (msg.row) keep(state.rows, [msg.row], KEEP_ROWS);
      keep(state.marks, msg.marks, KEEP_MARKS);
      state.lastAt = Date.now();
      state.updates += 1;
    }
    schedule();
  }

  function connect() {
    const scheme = window.location.protocol === 'https:' ? 'wss://' : 'ws://';
    const ws = new WebSocket(scheme + window.location.host + '/stream');
    ws.onopen = function () { state.connected = true; schedule(); };
    ws.onmessage = function (event) { take(JSON.parse(event.data)); };
    ws.onclose = function () {
      state.connected = false;
      schedule();
      window.setTimeout(connect, 1000);
    };
  }

  window.addEventListener('resize', schedule);
  window.setInterval(tickAge, 500);
  connect();
  schedule();
})();
