"""Seeded end-to-end learning: the demo's rover, trainer and server for real.

After a fixed stretch of simulated feedback, the rover's greedy policy
learned from tickmark's labels must beat a random policy and the same
learner fed naive credit (arrival time, latest step) by clear margins. The
assertions are on outcomes, never on wall time. The learner explores a lot
(epsilon 0.5, 5 steps/s) so that what follows a judged step says little about it: the
situation where assigning credit by time matters.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

PY = sys.executable


def test_rover_learns_from_tickmark_labels_and_beats_naive_credit(server, links, tmp_path):
    session, admin = server.session(kernel="gamma:2,0.28")
    agent_token = tmp_path / "agent.token"
    trainer_token = tmp_path / "trainer.token"
    observer_token = tmp_path / "observer.token"
    agent_token.write_text(server.token(session, admin, "agent", "rover-1"))
    trainer_token.write_text(server.token(session, admin, "trainer", "trainer-sim"))
    observer_token.write_text(server.token(session, admin, "observer"))
    # A remote trainer: 150 ms ± 75 ms each way.
    link = links(server.address, delay_ms=150, jitter_ms=75)
    seconds = 45
    env = dict(os.environ)
    trainer = subprocess.Popen(
        [PY, "-m", "tickmark.demo.trainer", "--server", link.address,
         "--token-file", str(trainer_token), "--watch-server", server.address,
         "--watch-token-file", str(observer_token), "--seconds", str(seconds + 1), "--seed", "3",
         # The session's kernel is the trainer's true delay here (the demo's
         # default trainer is lognormal and calibrated instead).
         "--delay", "gamma:2,0.28"],
        env=env, stderr=subprocess.PIPE, text=True)
    summary = tmp_path / "summary.json"
    learner_log = open(tmp_path / "learner.err", "w")  # a file, not a terminal
    learner = subprocess.Popen(
        [PY, "-m", "tickmark.demo.learner", "--server", server.address,
         "--token-file", str(agent_token), "--seconds", str(seconds), "--epsilon", "0.5", "--rate", "5",
         "--seed", "3", "--summary", str(summary)],
        env=env, stdout=subprocess.PIPE, stderr=learner_log, text=True)
    try:
        assert trainer.wait(120) == 0, trainer.stderr.read()
        server.close_session(session, admin)
        learner.wait(120)
    finally:
        for p in (trainer, learner):
            if p.poll() is None:
                p.kill()
        learner_log.close()
    assert learner.returncode == 0
    result = json.loads(summary.read_text())
    print(json.dumps(result, indent=2))
    assert result["session_closed"]
    # Progress to a log: one line per episode, no carriage returns.
    log = (tmp_path / "learner.err").read_bytes()  # bytes: text mode would turn '\r' into '\n'
    assert b"\r" not in log
    assert sum(line.startswith(b"episode ") for line in log.split(b"\n")) == result["episodes"]
    assert result["feedback"] >= 100
    assert result["labels"] >= result["steps"] * 0.9
    # Margins (fractions of 100 seeded evaluation episodes).
    assert result["success_learned"] >= result["success_random"] + 0.5
    assert result["success_learned"] >= result["success_naive_credit"] + 0.2
