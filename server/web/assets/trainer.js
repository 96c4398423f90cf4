// The trainer page: approve / disapprove (and graded values, when the invite
// offers them) by mouse, touch or keys, sent as feedback on the trainer's own
// Train stream through the server's bridge (docs/web.md).
//
// Event time is the input event's own timestamp (event.timeStamp, on the
// page's performance.now() base; see TM.clockNs), and the page answers the
// server's clock probes with the same clock, so the server maps the page's
// times to session time like any other source's. Every message gets the
// next client sequence and stays in the tab's storage until the server
// acknowledges it; after a reconnect (or a reload of the tab) the same
// client id resends the same messages, and the server stores each once.
'use strict';

(() => {
  const $ = (id) => document.getElementById(id);
  const ui = {
    approve: $('approve'), disapprove: $('disapprove'), grades: $('grades'), notice: $('notice'),
    conn: $('st-conn'), acked: $('st-acked'), pending: $('st-pending'), last: $('st-last'),
    clock: $('st-clock'), rejected: $('st-rejected'), title: $('session-title'), who: $('who'),
    calStart: $('cal-start'), calAnswers: $('cal-answers'), calSetup: $('cal-setup'),
    calRun: $('cal-run'), calStop: $('cal-stop'), calResult: $('cal-result'),
  };

  function notice(text) {
    ui.notice.textContent = text;
    TM.show(ui.notice, true);
  }

  const grant = TM.store.get('grant');
  if (!grant || grant.role !== 'trainer') {
    notice(grant ? 'This tab joined as ' + grant.role + ', not as a trainer. The trainer page ' +
        'needs a trainer invite link.' :
        'No trainer invite in this tab. Open the invite link you were sent (each link works ' +
        'once; ask for a new one if it was used).');
    ui.conn.textContent = 'Not joined';
    ui.conn.dataset.state = 'ended';
    return;
  }
  ui.title.textContent = grant.sessionTitle || grant.sessionId;
  ui.who.textContent = 'trainer ' + grant.subject;

  // What the tab keeps across reconnects and reloads.
  let state = TM.store.get('trainer');
  if (!state || state.sessionId !== grant.sessionId || state.subject !== grant.subject) {
    state = { sessionId: grant.sessionId, subject: grant.subject,
      clientId: 'web-' + TM.randomHex(8), nextSeq: 1, pending: [], acked: 0, rejected: 0,
      last: null };
  }
  const save = () => TM.store.set('trainer', state);
  save();

  let ws = null;
  let welcomed = false;
  let ended = false;
  let attempt = 0;
  let retryTimer = null;
  let retryAt = 0;

  function setConn(kind, text) {
    ui.conn.dataset.state = kind;
    ui.conn.textContent = text;
  }

  function render() {
    ui.acked.textContent = String(state.acked);
    ui.pending.textContent = String(state.pending.filter((p) => p.body.feedback).length);
    if (state.last) {
      const l = state.last;
      ui.last.textContent = TM.valueText(l.value) + ' · ' + l.input.replace(/^web:/, '') + ' · at ' +
          TM.clockText(l.eventSessionNs) + ' ±' + TM.msText(l.uncertaintyNs);
    }
    if (state.rejected > 0) {
      ui.rejected.textContent = state.rejected + ' not stored' +
          (state.lastRejection ? ': ' + state.lastRejection : '');
      TM.show(ui.rejected, true);
    }
  }

  function send(body) {
    if (ws && welcomed) ws.send(JSON.stringify(body));
  }

  // Numbers a message, keeps it until acknowledged, and sends it if connected.
  function queue(body) {
    const seq = state.nextSeq++;
    const key = body.feedback ? 'feedback' : 'calibration';
    body[key].clientSequence = String(seq);
    state.pending.push({ seq, body });
    save();
    send(body);
    render();
    return seq;
  }

  function connect() {
    retryTimer = null;
    setConn('connecting', 'Connecting…');
    const socket = new WebSocket(TM.socketUrl('/ws/train'));
    ws = socket;
    socket.onopen = () => {
      socket.send(JSON.stringify({ hello: { token: grant.token, clientId: state.clientId,
        sentClientNs: TM.nowNs() } }));
    };
    socket.onmessage = (ev) => {
      const t2 = TM.nowNs();  // first thing: the probe's receive time
      let m;
      try { m = JSON.parse(ev.data); } catch (e) { return; }
      handle(m, t2, socket);
    };
    socket.onclose = () => {
      if (ws === socket) ws = null;
      welcomed = false;
      if (ended) return;
      const wait = TM.backoffMs(attempt++);
      retryAt = performance.now() + wait;
      retryTimer = setTimeout(connect, wait);
      retryText();
    };
  }

  function retryText() {
    if (!retryTimer || ended) return;
    const s = Math.max(0, Math.ceil((retryAt - performance.now()) / 1000));
    setConn('retry', 'Reconnecting in ' + s + ' s… (presses are kept)');
  }

  // Codes after which trying again cannot help.
  const permanent = new Set([TM.Code.UNAUTHENTICATED, TM.Code.PERMISSION_DENIED,
    TM.Code.FAILED_PRECONDITION, TM.Code.INVALID_ARGUMENT]);

  function handle(m, t2, socket) {
    if (m.probe) {
      socket.send(JSON.stringify({ probeReply: { probeId: m.probe.probeId,
        t1SessionNs: m.probe.t1SessionNs, t2ClientNs: t2, t3ClientNs: TM.nowNs() } }));
    } else if (m.welcome) {
      welcomed = true;
      attempt = 0;
      setConn('connected', 'Connected');
      // Stored already: drop from the queue (resending would be harmless).
      const stored = BigInt(m.welcome.lastClientSequence || '0');
      state.pending = state.pending.filter((p) => {
        if (BigInt(p.seq) > stored) return true;
        if (p.body.feedback) state.acked++;
        return false;
      });
      if (BigInt(state.nextSeq) <= stored) state.nextSeq = Number(stored) + 1;
      save();
      for (const p of state.pending) socket.send(JSON.stringify(p.body));
      render();
      setButtons(true);
    } else if (m.ack) {
      onAck(m.ack);
    } else if (m.calibration) {
      calResult(m.calibration);
    } else if (m.clock) {
      ui.clock.textContent = '±' + TM.msText(m.clock.uncertaintyNs) + ' (' +
          (m.clock.samples || 0) + ' probes)';
    } else if (m.end) {
      if (permanent.has(m.end.code)) {
        ended = true;
        setConn('ended', 'Ended');
        notice('The server ended this page\'s connection: ' + m.end.message +
            (m.end.code === TM.Code.UNAUTHENTICATED ? ' Ask for a new invite link.' : ''));
        setButtons(false);
      } else {
        setConn('retry', 'Connection lost: ' + m.end.message);
      }
    }
  }

  function onAck(ack) {
    const seq = Number(ack.clientSequence);
    const i = state.pending.findIndex((p) => p.seq === seq);
    if (i < 0) return;  // a second ack of a resent message
    const p = state.pending.splice(i, 1)[0];
    if (ack.code === 0) {
      if (p.body.feedback) {
        state.acked++;
        state.last = { value: p.body.feedback.value, input: p.body.feedback.input,
          eventSessionNs: ack.eventSessionNs, uncertaintyNs: ack.uncertaintyNs,
          sequence: ack.sequence };
      }
    } else {
      state.rejected++;
      state.lastRejection = ack.message;
      if (p.body.calibration && p.body.calibration.finish) calFailed(ack.message);
    }
    save();
    render();
  }

  // Input. A press is timed by its event; the pointer's down event is the
  // press (the click comes later), and a click without a pointer (a screen
  // reader, Enter or Space on a focused button) counts as a press too.
  function press(value, input, eventMs, button) {
    if (ended) return;
    if (cal.running()) {
      if (value === 1 || value === -1) cal.answer(value > 0, input, eventMs);
    } else {
      queue({ feedback: { value, eventSourceNs: TM.clockNs(eventMs), input } });
    }
    if (button) {
      button.classList.add('pressed', 'sent');
      setTimeout(() => button.classList.remove('pressed'), 120);
      setTimeout(() => button.classList.remove('sent'), 600);
    }
  }

  function bind(button, value) {
    button.addEventListener('pointerdown', (e) => {
      if (e.pointerType === 'mouse' && e.button !== 0) return;
      e.preventDefault();  // no focus change, no emulated mouse events
      press(value, 'web:' + (e.pointerType || 'pointer'), e.timeStamp, button);
    });
    button.addEventListener('click', (e) => {
      if (e.detail === 0) press(value, 'web:button', e.timeStamp, button);
    });
  }
  bind(ui.approve, 1);
  bind(ui.disapprove, -1);

  const grades = (grant.gradedValues || []).slice(0, 9);
  grades.forEach((v, i) => {
    const b = document.createElement('button');
    b.type = 'button';
    b.className = 'grade-btn';
    b.disabled = true;
    b.setAttribute('aria-keyshortcuts', String(i + 1));
    b.textContent = (v > 0 ? '+' : v < 0 ? '−' : '') + Math.abs(v);
    const k = document.createElement('span');
    k.className = 'k';
    k.textContent = 'key ' + (i + 1);
    b.appendChild(k);
    b.setAttribute('aria-label', 'Graded ' + b.firstChild.textContent + ', key ' + (i + 1));
    bind(b, v);
    ui.grades.appendChild(b);
  });
  TM.show(ui.grades, grades.length > 0);

  document.addEventListener('keydown', (e) => {
    if (e.repeat || e.ctrlKey || e.metaKey || e.altKey) return;
    const tag = e.target && e.target.tagName;
    if (tag === 'INPUT' || tag === 'SELECT' || tag === 'TEXTAREA') return;
    const k = e.key;
    let value = null;
    let button = null;
    if (k === 'f' || k === 'F' || k === '+') { value = 1; button = ui.approve; }
    else if (k === 'j' || k === 'J' || k === '-') { value = -1; button = ui.disapprove; }
    else if (k >= '1' && k <= '9' && Number(k) <= grades.length) {
      value = grades[Number(k) - 1];
      button = ui.grades.children[Number(k) - 1];
    }
    if (value === null) return;
    e.preventDefault();
    press(value, 'web:key:' + k.toLowerCase(), e.timeStamp, button);
  });

  function setButtons(on) {
    ui.approve.disabled = !on;
    ui.disapprove.disabled = !on;
    for (const b of ui.grades.children) b.disabled = !on;
    ui.calStart.disabled = !on || cal.running();
  }

  // Calibration.
  const cal = TMCalibration.create({
    track: $('cal-track'),
    progress: $('cal-progress'),
    send: (body) => queue({ calibration: body }),
    onEnd: () => { TM.show(ui.calStop, false); },
  });
  ui.calStart.addEventListener('click', () => {
    TM.show(ui.calResult, false);
    TM.show(ui.calSetup, false);
    TM.show(ui.calRun, true);
    TM.show(ui.calStop, true);
    cal.start(Number(ui.calAnswers.value));
    ui.calStart.disabled = true;
  });
  ui.calStop.addEventListener('click', () => cal.stop());
  function calDone(text) {
    ui.calResult.textContent = text;
    TM.show(ui.calResult, true);
    TM.show(ui.calRun, false);
    TM.show(ui.calSetup, true);
    ui.calStart.disabled = ended;
  }
  function calResult(c) {
    let text = 'Calibration ' + c.id + ': ' + (c.valid || 0) + ' valid answers; your delay ' +
        'kernel is ' + c.kernelDescription + '.';
    if (c.warnings && c.warnings.length) text += ' Note: ' + c.warnings.join('; ');
    calDone(text);
  }
  function calFailed(message) {
    calDone('No calibration was fitted: ' + message);
  }

  // The enabled state follows the first welcome; presses made while
  // disconnected after that are kept and sent on reconnect.
  setButtons(false);
  setInterval(() => { retryText(); cal.tick(); }, 500);
  render();
  connect();
})();
