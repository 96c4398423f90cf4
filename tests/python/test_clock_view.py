"""`tickmark session show` lists the clock of each connected client (issue 12, part 5).

A trainer stream answers the server's probes from a clock that runs 3.2 s ahead of
this machine's CLOCK_MONOTONIC and 80 ppm fast. The server's session time is
its CLOCK_MONOTONIC anchored to UTC (the session row's utc_anchor_ns and
mono_anchor_ns, read with Debian's sqlite3 CLI), so the true offset of the client's
clock is known here and the reported one must lie within the reported
uncertainty of it.
"""

from __future__ import annotations

import os
import subprocess
import time

import grpc

from conftest import tm
from tickmark._stream import ReconnectingStream
from tickmark.demo.trainer import DriftingClock
from tickmark.v1 import admin_pb2, records_pb2




def sqlite3_cli(server, sql):
    """One query through Debian's sqlite3 CLI (an outside reader of the ledger)."""
    db = os.path.join(server.data_dir, "tickmark.db")
    p = subprocess.run(["sqlite3", "-readonly", db, sql], capture_output=True, text=True,
                       timeout=30)
    assert p.returncode == 0, p.stderr
    return p.stdout


def wait_for(predicate, timeout=20.0, what="condition"):
    deadline = time.monotonic() + timeout
    while True:
        value = predicate()
        if value:
            return value
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(0.05)


def test_session_show_lists_connected_clocks_and_flags_uncertain_ones(server, tmp_path):
    session, admin = server.session()
    (tmp_path / "admin.token").write_text(admin + "\n")
    admin_file = str(tmp_path / "admin.token")
    token = server.token(session, admin, "trainer", "ava")
    clock = DriftingClock(3.2, 80.0)
    stream = ReconnectingStream(grpc.insecure_channel(server.address), "train", token,
                                "keys:ava:1", records_pb2.SOURCE_KIND_SCRIPT, "pytest trainer",
                                "pytest", clock)
    try:
        assert stream.wait_connected(10)
        get = admin_pb2.GetSessionRequest(session_id=session)

        def probed():
            s = server.admin.GetSession(get, metadata=server.md(admin))
            return s if s.clocks and s.clocks[0].probes >= 8 else None

        wait_for(probed, what="the burst of probes")
        anchors = sqlite3_cli(server, f"SELECT utc_anchor_ns, mono_anchor_ns FROM session "
                                      f"WHERE id = '{session}'").split("|")
        utc_anchor, mono_anchor = int(anchors[0]), int(anchors[1])
        before = time.monotonic_ns()
        summary = server.admin.GetSession(get, metadata=server.md(admin))
        after = time.monotonic_ns()
        assert len(summary.clocks) == 1
        c = summary.clocks[0]
        assert (c.client_id, c.subject, c.role) == ("keys:ava:1", "ava", records_pb2.ROLE_TRAINER)
        assert c.source_kind == records_pb2.SOURCE_KIND_SCRIPT
        assert c.probed and c.probes >= 8 and c.rejected_probes == 0 and c.udp_probe_drops == 0
        assert 0 <= c.since_update_ns < 30 * 10**9
        # True offset = client reading − session time at the moment the server
        # answered (somewhere between before and after): the offset moves by
        # 80 ppm of that span at most, which the slack covers.
        def true_offset(mono):
            return clock.at(mono) - (utc_anchor + mono - mono_anchor)
        span_slack = (after - before) * 100e-6 + 1000
        err = min(abs(c.offset_ns - true_offset(before)), abs(c.offset_ns - true_offset(after)))
        assert err <= c.uncertainty_ns + span_slack, (c.offset_ns, true_offset(before), c)

        shown = tm(server, "session", "show", session, token_file=admin_file).stdout
        assert "clocks     as modelled now" in shown
        row = next(line for line in shown.splitlines() if "keys:ava:1" in line)
        assert "trainer" in row and "ava" in row and "ppm" in row and " ago" in row
        assert not row.lstrip().startswith("!")  # a loopback clock is well within 50 ms
        flagged = tm(server, "session", "show", session, "--max-uncertainty-ms", "0.001",
                     token_file=admin_file).stdout
        assert any(line.lstrip().startswith("! keys:ava:1") for line in flagged.splitlines())
        assert "exceeds 0.001 ms" in flagged
        bad = tm(server, "session", "show", session, "--max-uncertainty-ms", "0",
                 token_file=admin_file, check=False)
        assert bad.returncode == 2 and "--max-uncertainty-ms" in bad.stderr
    finally:
        stream.close()

    def gone():
        s = server.admin.GetSession(admin_pb2.GetSessionRequest(session_id=session),
                                    metadata=server.md(admin))
        return not s.clocks

    wait_for(gone, what="the stream to leave the table")
    assert "clocks     none connected" in tm(server, "session", "show", session,
                                              token_file=admin_file).stdout
