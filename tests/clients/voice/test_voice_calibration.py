"""tickmark-voice --calibrate end to end: the task in a pseudo-terminal, the
answers spoken (flite clips written in real time into a FIFO that
tickmark-voice reads as live raw audio), the fit stored by a real tickmarkd.
The terminal helpers and the scripted player are tests/python's
(test_calibration_keys.py): it watches the mover on the screen and answers
each move by the shown rule about 0.2 s later. No timing assertions: moves
come 1.5 to 2 s apart, so each spoken answer (its onset is the answer's
time) lands on the move it judged."""

from __future__ import annotations

import importlib.util
import os
import re
import threading
import time

import numpy as np

import voice_corpus
from conftest import BIN, CACHE, PROFILE, ROOT

_spec = importlib.util.spec_from_file_location(
    "tickmark_calibration_keys", os.path.join(ROOT, "tests", "python", "test_calibration_keys.py"))
_keys = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(_keys)

RATE = voice_corpus.RATE
CHUNK = RATE // 50  # 20 ms


class LiveMicrophone:
    """Writes 16-bit mono audio into a FIFO at the real-time rate: quiet
    noise, with a phrase mixed in whenever say() asks for one."""

    def __init__(self, path):
        clips = os.path.join(CACHE, "clips")
        os.makedirs(clips, exist_ok=True)
        self.clips = {p: voice_corpus._clip(clips, p, "slt") for p in ("excellent", "not like that")}
        self.path = path
        self.queue = []
        self.lock = threading.Lock()
        self.stop = False
        self.thread = threading.Thread(target=self.run, daemon=True)
        self.thread.start()

    def say(self, phrase):
        with self.lock:
            self.queue.append(self.clips[phrase].copy())

    def run(self):
        rng = np.random.default_rng(5)
        current = np.zeros(0)
        try:
            with open(self.path, "wb", buffering=0) as f:
                start = time.monotonic()
                sent = 0
                while not self.stop:
                    chunk = rng.normal(0, 30, CHUNK)
                    if len(current) == 0:
                        with self.lock:
                            if self.queue:
                                current = self.queue.pop(0)
                    n = min(CHUNK, len(current))
                    chunk[:n] += current[:n]
                    current = current[n:]
                    f.write(np.clip(np.round(chunk), -32768, 32767).astype("<i2").tobytes())
                    sent += CHUNK
                    delay = start + sent / RATE - time.monotonic()
                    if delay > 0:
                        time.sleep(delay)
        except (BrokenPipeError, OSError):
            pass  # tickmark-voice has exited


def test_calibration_answered_by_voice(server, tmp_path):
    _keys.require_calibration_support(server)
    session, token = _keys.session_with_trainer(server, tmp_path, "voice-cal", "dan")
    fifo = str(tmp_path / "mic.raw")
    os.mkfifo(fifo)
    mic = LiveMicrophone(fifo)
    term = _keys.Pty([os.path.join(BIN, "tickmark-voice"), "--profile", PROFILE, "--raw", fifo,
                      "--audio-start", "live", "--server", server.address, "--token-file", token,
                      "--calibrate", "--answers", "4", "--practice", "1", "--min-interval", "1.5",
                      "--max-interval", "2.0", "--seed", "5", "--run", "cal-voice",
                      "--client-id", "pytest:dan:voice"])
    try:
        term.wait_for(rb"Press space")
        assert b'saying "excellent"' in term.out and b'"not like that"' in term.out, term.out
        rule = re.search(rb"approve moves to the (RIGHT|LEFT)", term.out).group(1)
        term.send(b" ")
        seen, said, _ = _keys.play(term, rule == b"RIGHT", {},
                                   lambda sign: mic.say("excellent" if sign else "not like that"))
        code, screen = term.finish()
    finally:
        mic.stop = True
    assert code == 0, screen
    cal_id = re.search(r"Calibration (c-[0-9a-f]+) stored for trainer dan", screen).group(1)
    with _keys.ledger(server) as db:
        answers = db.execute(
            "SELECT approve, detail, at_source_ns FROM calibration_event WHERE session_id = ? "
            "AND run = 'cal-voice' AND kind = 'answer' ORDER BY seq", (session,)).fetchall()
        valid = db.execute("SELECT valid FROM calibration WHERE id = ?", (cal_id,)).fetchone()[0]
    assert valid == 4
    # Every spoken answer arrived, with its sign and the voice input label.
    assert [bool(a[0]) for a in answers] == said, (answers, said)
    assert all(re.fullmatch(r"voice:(excellent|not like that) onset=(energy|recogniser) lat=\d+ms",
                            a[1]) for a in answers), answers
