// The calibration task in the page (docs/calibration.md): the same task as
// the other sources' (clients/common/calibration_task.h) — a mover on a
// track of 21 cells jumps 2 cells left or right at random intervals of
// 0.8-3 s, 5 practice moves first, then real moves until the wanted number
// of valid answers (or 3 times as many moves); the trainer approves moves to
// the right and disapproves moves to the left. Every move and answer goes to
// the server as a CalibrationMessage on the trainer's own stream; the server
// matches and fits them and answers the finish with the Calibration.
//
// Timing: a move is drawn in a requestAnimationFrame callback, and its shown
// time is the timestamp of the next frame's callback, which is about when the
// frame holding the move reached the display. The display's own latency is
// not measured (the display note says so).
'use strict';

const TMCalibration = (() => {
  const CELLS = 21;
  const STEP = 2;
  const PRACTICE = 5;
  const MIN_S = 0.8;
  const MAX_S = 3.0;
  const WINDOW_NS = 4000000000n;  // the server's matching window (4 s)
  const NOTE = 'web page: a move\'s time is the requestAnimationFrame timestamp of the frame ' +
      'after the one that drew it (about when it reached the display); the display\'s own ' +
      'latency, typically a few to tens of ms, is not measured and is part of every delay';

  // opts: track, progress (elements); send(body) queues a calibration body
  // ({run, move|answer|finish}) and returns its client sequence; onEnd()
  // when the run has finished (the result arrives later).
  function create(opts) {
    let run = null;

    function cells() {
      opts.track.textContent = '';
      for (let i = 0; i < CELLS; i++) {
        const c = document.createElement('div');
        c.className = 'cal-cell';
        opts.track.appendChild(c);
      }
    }

    function draw() {
      const all = opts.track.children;
      for (let i = 0; i < all.length; i++) {
        all[i].className = 'cal-cell' + (i === run.cell ? ' mover' : '') +
            (run.practiceShown < PRACTICE || run.real === 0 ? ' practice' : '');
      }
    }

    function progress() {
      if (!run) return;
      const block = run.real === 0 ? 'Practice: move ' + run.practiceShown + ' of ' + PRACTICE :
          'Move ' + run.real + ' · valid answers ' + run.valid + ' of ' + run.answers;
      opts.progress.textContent = block + (run.last ? ' · last answer: ' + run.last : '');
    }

    function scheduleNext() {
      const delayMs = (MIN_S + Math.random() * (MAX_S - MIN_S)) * 1000;
      run.timer = setTimeout(() => requestAnimationFrame(move), delayMs);
    }

    function move() {
      if (!run || run.finished) return;
      const practice = run.practiceShown < PRACTICE;
      if (!practice && run.real >= run.maxMoves) return;  // tick() ends the run
      const roomLeft = Math.floor(run.cell / STEP);
      const roomRight = Math.floor((CELLS - 1 - run.cell) / STEP);
      const right = Math.random() * (roomLeft + roomRight) < roomRight;
      run.cell += right ? STEP : -STEP;
      if (practice) run.practiceShown++; else run.real++;
      draw();
      const number = ++run.number;
      requestAnimationFrame((shownMs) => {
        if (!run || run.finished) return;
        const shownNs = TM.clockNs(shownMs);
        run.moves.push({ number, shownNs: BigInt(shownNs), approve: right, practice, answered: false });
        opts.send({ run: run.id, move: { move: number, shownSourceNs: shownNs, approve: right,
          practice, detail: right ? 'right' : 'left' } });
        progress();
        scheduleNext();
      });
    }

    // An answer: event time on the page clock (ms, performance.now() base).
    function answer(approve, input, eventMs) {
      if (!run || run.finished) return;
      const atNs = TM.clockNs(eventMs);
      const at = BigInt(atNs);
      opts.send({ run: run.id, answer: { eventSourceNs: atNs, approve, input } });
      // The live counts, by the server's rule: the latest move shown before
      // the answer, if still open.
      let m = null;
      for (let i = run.moves.length - 1; i >= 0; i--) {
        if (run.moves[i].shownNs < at) { m = run.moves[i]; break; }
      }
      if (!m || at - m.shownNs > WINDOW_NS) {
        run.last = 'late or stray';
      } else if (m.answered) {
        run.last = 'double';
      } else {
        m.answered = true;
        const delay = Number(at - m.shownNs) / 1e9;
        if (m.practice) {
          run.last = (approve === m.approve ? 'practice ok ' : 'practice: wrong sign ') +
              delay.toFixed(2) + ' s';
        } else if (approve === m.approve) {
          run.valid++;
          run.last = 'valid ' + delay.toFixed(2) + ' s';
        } else {
          run.last = 'WRONG SIGN';
        }
      }
      progress();
      if (run.valid >= run.answers) finish();
    }

    function finish() {
      if (!run || run.finished) return;
      run.finished = true;
      clearTimeout(run.timer);
      opts.send({ run: run.id, finish: { minAnswers: run.answers, displayNote: NOTE } });
      opts.progress.textContent = 'Finished: ' + run.valid + ' valid answers. The server is ' +
          'fitting your delay…';
      opts.onEnd();
    }

    return {
      start(answers) {
        run = { id: 'cal-' + TM.randomHex(6), answers, maxMoves: 3 * answers, cell: 10,
          number: 0, real: 0, practiceShown: 0, moves: [], valid: 0, last: '', timer: null,
          finished: false };
        cells();
        draw();
        progress();
        scheduleNext();
      },
      running() { return run !== null && !run.finished; },
      answer,
      stop: finish,
      // Real moves whose window has passed end the run at max_moves.
      tick() {
        if (!run || run.finished || run.real < run.maxMoves) return;
        const lastMove = run.moves[run.moves.length - 1];
        if (lastMove && (lastMove.answered || BigInt(TM.nowNs()) - lastMove.shownNs > WINDOW_NS)) {
          finish();
        }
      },
    };
  }

  return { create };
})();
