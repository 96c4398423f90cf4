"""After-the-fact retiming end to end (issue 12, part 4): `tickmark retime`, then
`tickmark replay --retimed`, against a real tickmarkd.

A trainer sends feedback through tickmark-linkemu (20 ms ± 5 ms each way) from a
clock 3.2 s ahead of this machine's CLOCK_MONOTONIC and 150 ppm fast; an agent
publishes steps from a clock 1.5 s behind and 60 ppm slow. Session time is the
server's CLOCK_MONOTONIC anchored to UTC (the session row's utc_anchor_ns and
mono_anchor_ns), so the true session time of every event is known here. The
ledger is read with Debian's sqlite3 CLI, which shares no code with tickmarkd.
"""

from __future__ import annotations

import os
import re
import statistics
import subprocess
import time

import grpc

from conftest import tm
from tickmark._stream import ReconnectingStream
from tickmark.demo.trainer import DriftingClock
from tickmark.v1 import records_pb2, stream_pb2




def sqlite3_cli(server, sql):
    """Rows of one query through Debian's sqlite3 CLI, each a list of strings."""
    db = os.path.join(server.data_dir, "tickmark.db")
    p = subprocess.run(["sqlite3", "-readonly", db, sql], capture_output=True, text=True,
                       timeout=30)
    assert p.returncode == 0, p.stderr
    return [line.split("|") for line in p.stdout.splitlines()]


def test_retime_then_replay_with_the_retimed_times(server, links, tmp_path):
    session, admin = server.session(kernel="uniform:0.2,4.0")
    admin_file = str(tmp_path / "admin.token")
    with open(admin_file, "w") as f:
        f.write(admin + "\n")
    link = links(server.address, delay_ms=20, jitter_ms=5)
    trainer_clock = DriftingClock(3.2, 150.0)
    agent_clock = DriftingClock(-1.5, -60.0)
    trainer = ReconnectingStream(
        grpc.insecure_channel(link.address), "train",
        server.token(session, admin, "trainer", "ava"), "pytest:ava", records_pb2.SOURCE_KIND_SCRIPT,
        "pytest trainer behind a 20 ms link", "pytest", trainer_clock)
    agent = ReconnectingStream(
        grpc.insecure_channel(server.address), "act",
        server.token(session, admin, "agent", "rover"), "pytest:rover",
        records_pb2.SOURCE_KIND_UNSPECIFIED, "pytest agent", "pytest", agent_clock)
    truth = {}  # (client reading) -> this machine's CLOCK_MONOTONIC at the event
    try:
        assert trainer.wait_connected(10) and agent.wait_connected(10)
        start = time.monotonic_ns()
        step_id = 0
        next_step = start
        next_feedback = start + 150_000_000
        end = start + 14 * 10**9
        while time.monotonic_ns() < end:
            now = time.monotonic_ns()
            if now >= next_step:  # a 200 ms step on the agent's clock
                step_id += 1
                s, e = agent_clock.at(next_step), agent_clock.at(next_step + 200_000_000)
                truth[s], truth[e] = next_step, next_step + 200_000_000
                agent.send(stream_pb2.StepMessage(step_id=step_id, start_agent_ns=s,
                                                  end_agent_ns=e, action="north"))
                next_step += 200_000_000
            if now >= next_feedback:  # feedback stamped when it happens
                stamped = trainer_clock.at(now)
                truth[stamped] = now
                trainer.send(stream_pb2.FeedbackMessage(value=1.0, event_source_ns=stamped,
                                                        input="key:g"))
                next_feedback += 270_000_000
            time.sleep(0.01)
        assert trainer.flush(30) and agent.flush(30)
    finally:
        trainer.close()
        agent.close()
    assert not trainer.rejected and not agent.rejected
    tm(server, "session", "close", session, token_file=admin_file)

    out = tm(server, "retime", "--session", session, token_file=admin_file).stdout
    time_set = re.search(r"time set (ts-[0-9a-f]{8}) stored", out).group(1)
    assert "moved from live      median" in out
    assert "uncertainty retimed  median" in out and "narrower for" in out

    # The ledger, read with the sqlite3 CLI: the set names the journal state it
    # was computed from, and every event time is in it next to the original.
    (anchor,) = sqlite3_cli(server, f"SELECT utc_anchor_ns, mono_anchor_ns FROM session "
                                    f"WHERE id = '{session}'")
    utc_anchor, mono_anchor = int(anchor[0]), int(anchor[1])
    (set_row,) = sqlite3_cli(server, f"SELECT t.events, t.retimed, t.method, "
                                     f"hex(t.head_hash) = hex(r.hash), t.through_seq = "
                                     f"(SELECT MAX(seq) FROM record WHERE session_id = "
                                     f"'{session}') FROM time_set t JOIN record r ON "
                                     f"r.session_id = t.session_id AND r.seq = t.through_seq "
                                     f"WHERE t.id = '{time_set}'")
    assert set_row[2] == "two-sided probe bounds" and set_row[3:] == ["1", "1"]
    rows = sqlite3_cli(server, f"""
        SELECT d.kind, d.event_session_ns, d.uncertainty_ns, d.live_session_ns,
               d.live_uncertainty_ns, d.outcome,
               COALESCE(f.event_source_ns, CASE d.kind WHEN 'step_start' THEN s.start_agent_ns
                                                       ELSE s.end_agent_ns END),
               COALESCE(f.event_session_ns, CASE d.kind WHEN 'step_start' THEN s.start_session_ns
                                                        ELSE s.end_session_ns END)
        FROM derived_time d
        LEFT JOIN feedback f ON f.session_id = d.session_id AND f.seq = d.seq
        LEFT JOIN step s ON s.session_id = d.session_id AND s.seq = d.seq
        WHERE d.time_set = '{time_set}'""")
    kinds = [r[0] for r in rows]
    assert kinds.count("feedback") > 30 and kinds.count("step_start") > 50
    assert int(set_row[0]) == len(rows) and int(set_row[1]) == len(rows)
    live_u, retimed_u = [], []
    for kind, at, u, live, lu, outcome, client, original in rows:
        assert outcome == "retimed"
        assert live == original  # the records keep their live times
        true_session = utc_anchor + truth[int(client)] - mono_anchor
        # The claim of the retimed uncertainty: the truth lies within it.
        assert abs(int(at) - true_session) <= int(u), (kind, int(at) - true_session, u)
        live_u.append(int(lu))
        retimed_u.append(int(u))
    assert statistics.median(retimed_u) <= statistics.median(live_u)

    replayed = tm(server, "replay", "--session", session, "--name", "retimed-1", "--retimed",
                  token_file=admin_file).stdout
    m = re.search(r"event times from time set (ts-[0-9a-f]{8}) \((\d+) feedback and step records\)",
                  replayed)
    assert m and m.group(1) == time_set and int(m.group(2)) == len(set(
        r[0] for r in sqlite3_cli(server, f"SELECT seq FROM derived_time WHERE time_set = "
                                          f"'{time_set}'")))
    assert "labels compared" in replayed
    (spec,) = sqlite3_cli(server, f"SELECT spec FROM derived_set WHERE session_id = '{session}' "
                                  f"AND name = 'retimed-1'")
    assert f"time set {time_set}" in spec[0]
    by_id = tm(server, "replay", "--session", session, "--name", "retimed-2", "--time-set",
               time_set, token_file=admin_file).stdout
    assert f"time set {time_set}" in by_id

    unknown = tm(server, "replay", "--session", session, "--name", "r3", "--time-set",
                 "ts-00000000", token_file=admin_file, check=False)
    assert unknown.returncode == 1 and "ts-00000000" in unknown.stderr
    both = tm(server, "replay", "--session", session, "--name", "r4", "--retimed", "--time-set",
              time_set, token_file=admin_file, check=False)
    assert both.returncode == 2


def test_retime_refuses_a_session_without_events_and_bad_flags(server, tmp_path):
    session, admin = server.session()
    admin_file = str(tmp_path / "admin.token")
    with open(admin_file, "w") as f:
        f.write(admin + "\n")
    empty = tm(server, "retime", "--session", session, token_file=admin_file, check=False)
    assert empty.returncode == 1 and "no feedback or steps" in empty.stderr
    bad = tm(server, "retime", "--session", session, "--half-window-s", "0", check=False)
    assert bad.returncode == 2 and "--half-window-s" in bad.stderr
    missing = tm(server, "retime", check=False)
    assert missing.returncode == 2 and "--session" in missing.stderr
    helped = tm(server, "retime", "--help")
    assert "time set" in helped.stdout
