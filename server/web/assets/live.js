// The live view: a session's records as they are written (the same ordered
// stream as Subscribe, read through the server's bridge), drawn as a
// scrolling timeline — each agent's steps and their settled labels, each
// trainer's feedback at its event time with its uncertainty, the credit from
// feedback to steps, and markers — with the connected clients and counts.
// Read-only. After a lost connection it resumes after the last record it
// drew; the server never waits for it (a page that falls behind is dropped
// and resumes).
'use strict';

(() => {
  const $ = (id) => document.getElementById(id);
  const ui = {
    notice: $('notice'), title: $('session-title'), conn: $('live-conn'), canvas: $('timeline'),
    follow: $('tl-follow'), clients: document.querySelector('#clients tbody'), feed: $('feed'),
    markers: $('markers'), seq: $('c-seq'),
  };
  const KEEP_MS = 15 * 60 * 1000;  // what the timeline can scroll back to
  const FEED_ITEMS = 12;

  function notice(text) {
    ui.notice.textContent = text;
    TM.show(ui.notice, true);
  }
  function setConn(kind, text) {
    ui.conn.dataset.state = kind;
    ui.conn.textContent = text;
  }

  const grant = TM.store.get('grant');
  if (!grant) {
    notice('No invite in this tab. Open the live-view link you were sent (made with ' +
        '"tickmark invite --role observer"; each link works once).');
    setConn('ended', 'Not joined');
    return;
  }
  ui.title.textContent = (grant.sessionTitle || grant.sessionId) + ' · live';

  // The session as the records so far describe it.
  const M = {
    lastSeq: 0,
    nowMs: 0, nowAtPerf: 0,  // latest written time, and when it came
    clients: new Map(),      // client id -> {role, subject, source, connected, uncNs, feedback, steps}
    agents: new Map(),       // agent -> [step]
    steps: new Map(),        // step sequence -> {agent, start, end, action, label}
    trainers: new Map(),     // trainer -> [feedback]
    feedback: new Map(),     // feedback sequence -> {trainer, t, unc, value, late}
    credits: [],             // {f, s, c}
    markers: [],             // {t, text, author}
    counts: { records: 0, feedback: 0, steps: 0, labels: 0, credit: 0, unmatched: 0, late: 0 },
    closed: false,
    dirty: true,
  };
  const ms = (ns) => Number(ns || 0) / 1e6;
  const shortRole = (r) => (r || '').replace('ROLE_', '').toLowerCase();
  const shortSource = (s) => (s || '').replace('SOURCE_KIND_', '').toLowerCase().replace('_', ' ');

  function client(id) {
    let c = M.clients.get(id);
    if (!c) {
      c = { id, role: '', subject: '', source: '', connected: false, uncNs: null, feedback: 0,
        steps: 0 };
      M.clients.set(id, c);
    }
    return c;
  }

  function apply(r) {
    M.counts.records++;  // every record received, repeats included (there should be none)
    const seq = Number(r.sequence);
    if (seq <= M.lastSeq) return;  // a resumed stream repeats nothing, but be sure
    M.lastSeq = seq;
    const written = ms(r.writtenSessionNs);
    if (written > M.nowMs) { M.nowMs = written; M.nowAtPerf = performance.now(); }
    M.dirty = true;
    if (r.clientEvent) {
      const ci = r.clientEvent.client || {};
      const c = client(ci.clientId || '?');
      c.role = shortRole(ci.role);
      c.subject = ci.subject || '';
      c.source = shortSource(ci.sourceKind);
      c.connected = r.clientEvent.event === 'KIND_CONNECTED';
    } else if (r.feedback) {
      const f = r.feedback;
      const item = { seq, trainer: f.trainer || '?', t: ms(f.eventSessionNs),
        unc: ms(f.uncertaintyNs), value: f.value || 0, late: !!f.late, input: f.input || '' };
      M.feedback.set(seq, item);
      if (!M.trainers.has(item.trainer)) M.trainers.set(item.trainer, []);
      M.trainers.get(item.trainer).push(item);
      client(f.clientId).feedback++;
      M.counts.feedback++;
      if (item.late) M.counts.late++;
      addFeed(item);
    } else if (r.step) {
      const s = r.step;
      const item = { seq, agent: s.agent || '?', start: ms(s.startSessionNs),
        end: ms(s.endSessionNs), action: s.action || '', label: null };
      M.steps.set(seq, item);
      if (!M.agents.has(item.agent)) M.agents.set(item.agent, []);
      M.agents.get(item.agent).push(item);
      client(s.clientId).steps++;
      M.counts.steps++;
      if (s.late) M.counts.late++;
    } else if (r.clockModel) {
      client(r.clockModel.clientId).uncNs = Number(r.clockModel.uncertaintyNs || 0);
    } else if (r.marker) {
      const m = { t: ms(r.marker.atSessionNs), text: r.marker.text || '', author: r.marker.author || '' };
      M.markers.push(m);
      addMarker(m);
    } else if (r.credit) {
      M.credits.push({ f: Number(r.credit.feedbackSequence), s: Number(r.credit.stepSequence),
        c: r.credit.credit || 0 });
      M.counts.credit++;
    } else if (r.label) {
      const s = M.steps.get(Number(r.label.stepSequence));
      if (s) {
        s.label = { value: r.label.value || 0, weight: r.label.weight || 0, settled: !!r.label.settled };
        if (!s.end && r.label.endSessionNs) s.end = ms(r.label.endSessionNs);
      }
      if (r.label.settled) M.counts.labels++;
    } else if (r.unmatched) {
      M.counts.unmatched++;
    } else if (r.sessionEvent) {
      if (r.sessionEvent.event === 'KIND_CLOSED') M.closed = true;
    }
  }

  function addFeed(f) {
    const li = document.createElement('li');
    const mark = document.createElement('span');
    mark.className = f.value > 0 ? 'up' : f.value < 0 ? 'down' : '';
    mark.textContent = f.value > 0 ? '▲ ' : f.value < 0 ? '▼ ' : '◆ ';
    li.appendChild(mark);
    li.appendChild(document.createTextNode(f.trainer + ' ' + TM.valueText(f.value) + ' at ' +
        TM.clockText(String(BigInt(Math.round(f.t * 1e6)))) + ' ±' + TM.msText(f.unc * 1e6) +
        (f.late ? ' (late)' : '') + ' · ' + f.input));
    ui.feed.insertBefore(li, ui.feed.firstChild);
    while (ui.feed.children.length > FEED_ITEMS) ui.feed.removeChild(ui.feed.lastChild);
  }

  function addMarker(m) {
    const li = document.createElement('li');
    li.textContent = TM.clockText(String(BigInt(Math.round(m.t * 1e6)))) + ' · ' + m.text +
        (m.author ? ' (' + m.author + ')' : '');
    ui.markers.insertBefore(li, ui.markers.firstChild);
  }

  // Drops what lies too far behind to be drawn; counts stay.
  function prune() {
    const cut = M.nowMs - KEEP_MS;
    for (const [k, list] of M.agents) {
      const kept = list.filter((s) => (s.end || s.start) >= cut);
      for (const s of list) if ((s.end || s.start) < cut) M.steps.delete(s.seq);
      M.agents.set(k, kept);
    }
    for (const [k, list] of M.trainers) {
      const kept = list.filter((f) => f.t >= cut);
      for (const f of list) if (f.t < cut) M.feedback.delete(f.seq);
      M.trainers.set(k, kept);
    }
    M.credits = M.credits.filter((c) => M.feedback.has(c.f) && M.steps.has(c.s));
    M.markers = M.markers.filter((m) => m.t >= cut);
  }

  function renderDom() {
    const counts = M.counts;
    for (const k of Object.keys(counts)) $('c-' + k).textContent = String(counts[k]);
    ui.seq.textContent = M.lastSeq ? String(M.lastSeq) : '–';
    const rows = [];
    for (const c of M.clients.values()) {
      const tr = document.createElement('tr');
      const cells = [c.id, c.role, c.subject, c.source, c.connected ? 'connected' : 'left',
        c.uncNs === null ? '–' : '±' + TM.msText(c.uncNs), String(c.feedback), String(c.steps)];
      for (const text of cells) {
        const td = document.createElement('td');
        td.textContent = text;
        if (!c.connected) td.className = 'gone';
        tr.appendChild(td);
      }
      rows.push(tr);
    }
    ui.clients.replaceChildren(...rows);
  }

  // The timeline.
  let windowMs = 30000;
  let follow = true;
  let frozenNow = 0;
  const css = getComputedStyle(document.documentElement);
  const color = (name) => css.getPropertyValue(name).trim();
  const C = { ink: color('--ink'), muted: color('--muted'), approve: color('--approve'),
    disapprove: color('--disapprove'), amber: color('--amber'), line: color('--line'),
    approveSoft: color('--approve-soft'), disapproveSoft: color('--disapprove-soft') };

  function nowMs() {
    if (!follow) return frozenNow;
    if (!M.nowMs) return Date.now();
    return M.nowMs + (M.closed ? 0 : performance.now() - M.nowAtPerf);
  }

  // Grid spacing: at least 64 px between lines.
  function tickStep(windowMs, plotPx) {
    for (const s of [1000, 2000, 5000, 10000, 15000, 30000, 60000]) {
      if (s / windowMs * plotPx >= 64) return s;
    }
    return 120000;
  }

  function draw() {
    const cv = ui.canvas;
    const agents = [...M.agents.keys()].sort();
    const trainers = [...M.trainers.keys()].sort();
    const laneH = 52;
    const top = 24;
    const axis = 24;
    const lanes = agents.length + trainers.length;
    const cssH = Math.max(160, top + axis + Math.max(1, lanes) * laneH);
    if (cv.style.height !== cssH + 'px') cv.style.height = cssH + 'px';
    const dpr = window.devicePixelRatio || 1;
    const cssW = cv.clientWidth;
    if (cv.width !== Math.round(cssW * dpr) || cv.height !== Math.round(cssH * dpr)) {
      cv.width = Math.round(cssW * dpr);
      cv.height = Math.round(cssH * dpr);
    }
    const g = cv.getContext('2d');
    g.setTransform(dpr, 0, 0, dpr, 0, 0);
    g.clearRect(0, 0, cssW, cssH);
    const left = Math.min(110, cssW * 0.22);
    const right = 8;
    const now = nowMs();
    const t0 = now - windowMs;
    const x = (t) => left + (t - t0) / windowMs * (cssW - left - right);
    g.font = '12px system-ui, sans-serif';
    g.textBaseline = 'middle';

    // Lanes and their names.
    const laneY = new Map();
    let y = top;
    for (const a of agents) { laneY.set('a:' + a, y); y += laneH; }
    for (const t of trainers) { laneY.set('t:' + t, y); y += laneH; }
    let i = 0;
    for (const [key, ly] of laneY) {
      g.fillStyle = i++ % 2 ? '#f6f2e9' : '#fbf9f4';
      g.fillRect(0, ly, cssW, laneH);
      g.fillStyle = C.ink;
      g.fillText((key[0] === 'a' ? 'agent ' : 'trainer ') + key.slice(2), 6, ly + laneH / 2, left - 10);
    }
    if (!lanes) {
      g.fillStyle = C.muted;
      g.fillText('Waiting for steps and feedback…', left, top + laneH / 2);
    }

    // Time axis: lines at whole steps before now, labelled by their age.
    const step = tickStep(windowMs, cssW - left - right);
    g.strokeStyle = C.line;
    g.fillStyle = C.muted;
    for (let age = step; age < windowMs; age += step) {
      const tx = x(now - age);
      g.beginPath(); g.moveTo(tx, top); g.lineTo(tx, cssH - axis); g.stroke();
      g.fillText('−' + age / 1000 + ' s', tx + 3, cssH - axis / 2);
    }
    g.textAlign = 'right';
    g.fillText('now', cssW - right - 2, cssH - axis / 2);
    g.textAlign = 'left';

    // Steps, with settled labels.
    for (const a of agents) {
      const ly = laneY.get('a:' + a);
      const list = M.agents.get(a);
      for (let k = 0; k < list.length; k++) {
        const s = list[k];
        const end = s.end || (k + 1 < list.length ? list[k + 1].start : now);
        if (end < t0 || s.start > now) continue;
        const x1 = Math.max(left, x(s.start));
        const x2 = Math.min(cssW - right, x(end));
        if (x2 <= x1) continue;
        g.fillStyle = k % 2 ? '#ddd6c6' : '#e9e3d5';
        g.fillRect(x1, ly + 8, x2 - x1 - 1, laneH - 16);
        if (s.label && s.label.weight > 0) {
          const v = Math.max(-1, Math.min(1, s.label.value / s.label.weight));
          const h = Math.abs(v) * (laneH / 2 - 10);
          g.fillStyle = v >= 0 ? C.approve : C.disapprove;
          if (s.label.settled) {
            g.fillRect(x1 + 1, v >= 0 ? ly + laneH / 2 - h : ly + laneH / 2, Math.max(2, x2 - x1 - 3), h);
          } else {
            g.strokeStyle = g.fillStyle;
            g.strokeRect(x1 + 1, v >= 0 ? ly + laneH / 2 - h : ly + laneH / 2, Math.max(2, x2 - x1 - 3), h);
          }
        }
        if (x2 - x1 > 34) {
          g.fillStyle = C.ink;
          g.fillText(s.action, x1 + 3, ly + 14, x2 - x1 - 6);
        }
      }
    }

    // Credit from feedback to steps.
    g.strokeStyle = '#6a7fb0';
    for (const c of M.credits) {
      const f = M.feedback.get(c.f);
      const s = M.steps.get(c.s);
      if (!f || !s || f.t < t0 - windowMs) continue;
      const end = s.end || s.start;
      g.globalAlpha = Math.max(0.08, Math.min(0.9, c.c));
      g.beginPath();
      g.moveTo(x(f.t), laneY.get('t:' + f.trainer) + laneH / 2);
      g.lineTo(x((s.start + end) / 2), laneY.get('a:' + s.agent) + laneH - 8);
      g.stroke();
    }
    g.globalAlpha = 1;

    // Feedback at its event time, with its uncertainty.
    for (const tn of trainers) {
      const ly = laneY.get('t:' + tn) + laneH / 2;
      for (const f of M.trainers.get(tn)) {
        if (f.t + f.unc < t0 || f.t - f.unc > now) continue;
        const fx = x(f.t);
        g.strokeStyle = C.ink;
        g.beginPath();
        g.moveTo(x(f.t - f.unc), ly); g.lineTo(x(f.t + f.unc), ly);
        g.moveTo(x(f.t - f.unc), ly - 4); g.lineTo(x(f.t - f.unc), ly + 4);
        g.moveTo(x(f.t + f.unc), ly - 4); g.lineTo(x(f.t + f.unc), ly + 4);
        g.stroke();
        g.fillStyle = f.value > 0 ? C.approve : f.value < 0 ? C.disapprove : C.ink;
        g.beginPath();
        if (f.value > 0) { g.moveTo(fx, ly - 11); g.lineTo(fx - 8, ly + 5); g.lineTo(fx + 8, ly + 5); }
        else if (f.value < 0) { g.moveTo(fx, ly + 11); g.lineTo(fx - 8, ly - 5); g.lineTo(fx + 8, ly - 5); }
        else { g.moveTo(fx, ly - 8); g.lineTo(fx + 8, ly); g.lineTo(fx, ly + 8); g.lineTo(fx - 8, ly); }
        g.closePath();
        if (f.late) { g.strokeStyle = g.fillStyle; g.stroke(); } else { g.fill(); }
        if (f.value !== 1 && f.value !== -1) {
          g.fillStyle = C.ink;
          g.fillText(String(f.value), fx + 10, ly - 10);
        }
      }
    }

    // Markers.
    g.setLineDash([4, 4]);
    g.strokeStyle = C.amber;
    for (const m of M.markers) {
      if (m.t < t0 || m.t > now) continue;
      const mx = x(m.t);
      g.beginPath(); g.moveTo(mx, 4); g.lineTo(mx, cssH - axis); g.stroke();
      g.fillStyle = C.amber;
      // The text on the side with room for it.
      const w = Math.min(200, g.measureText(m.text).width);
      g.fillText(m.text, mx + 4 + w > cssW - right ? mx - 4 - w : mx + 4, 12, 200);
    }
    g.setLineDash([]);
  }

  let lastDom = 0;
  let lastPrune = 0;
  function frame(t) {
    if (t - lastDom > 250 && M.dirty) { renderDom(); M.dirty = false; lastDom = t; }
    if (t - lastPrune > 5000) { prune(); lastPrune = t; }
    draw();
    requestAnimationFrame(frame);
  }
  requestAnimationFrame(frame);

  for (const b of document.querySelectorAll('[data-window]')) {
    b.addEventListener('click', () => {
      windowMs = Number(b.dataset.window) * 1000;
      for (const o of document.querySelectorAll('[data-window]')) {
        o.setAttribute('aria-pressed', String(o === b));
      }
    });
  }
  ui.follow.addEventListener('click', () => {
    if (follow) frozenNow = nowMs();
    follow = !follow;
    ui.follow.setAttribute('aria-pressed', String(follow));
    ui.follow.textContent = follow ? 'Following' : 'Paused';
  });

  // The connection.
  let attempt = 0;
  let ended = false;
  const explain = {
    [TM.Code.PERMISSION_DENIED]: 'This tab holds a ' + grant.role + '\'s invite, and the live ' +
        'view needs an observer invite: ask for a link made with "tickmark invite --role observer".',
    [TM.Code.UNAUTHENTICATED]: 'The invite\'s token is not valid any more (revoked, or from ' +
        'another server): ask for a new live-view link.',
    [TM.Code.NOT_FOUND]: 'The session was not found on this server.',
    [TM.Code.INVALID_ARGUMENT]: 'The page and the server do not understand each other.',
  };

  function connect() {
    setConn('connecting', 'Connecting…');
    const socket = new WebSocket(TM.socketUrl('/ws/live'));
    socket.onopen = () => {
      socket.send(JSON.stringify({ subscribe: { token: grant.token, sessionId: grant.sessionId,
        fromSequence: String(M.lastSeq + 1) } }));
      setConn('live', 'Live');
    };
    socket.onmessage = (ev) => {
      let m;
      try { m = JSON.parse(ev.data); } catch (e) { return; }
      if (m.record) {
        apply(m.record);
        attempt = 0;
      } else if (m.summary) {
        const s = m.summary.session || {};
        if (s.title) ui.title.textContent = s.title + ' · live';
      } else if (m.end) {
        const why = explain[m.end.code];
        if (why) {
          ended = true;
          notice(why + ' (The server said: ' + m.end.message + ')');
          setConn('ended', 'Refused');
        } else if (M.closed) {
          ended = true;
          setConn('ended', 'Session closed');
        }
      }
    };
    socket.onclose = () => {
      if (ended) return;
      if (M.closed) { setConn('ended', 'Session closed'); return; }
      const wait = TM.backoffMs(attempt++);
      setConn('retry', 'Reconnecting… (resumes after record ' + M.lastSeq + ')');
      setTimeout(connect, wait);
    };
  }
  connect();
})();
