"""A full disk, end to end with the real tickmarkd (issue 9, items 1 and 2).

The data folder sits on a small tmpfs that the test mounts (root only; the
test is skipped with the reason otherwise — the ledger's own disk-full tests
in tests/ledger cover the no-root case with RLIMIT_FSIZE). The disk is filled
with a filler file while a trainer is connected. Then:

- feedback sent meanwhile is neither acknowledged as stored nor dropped: the
  server answers UNAVAILABLE, the client keeps it and sends it again;
- the server keeps answering (session show says the ledger is not writable,
  with the reason) and never hangs;
- once the filler is removed, writes resume without a restart, every
  feedback is stored exactly once, and SIGTERM stops the server promptly.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import tempfile
import time
import urllib.request

import grpc
import pytest

from conftest import BIN, Server, _wait_line, wait_until
from tickmark._stream import ReconnectingStream
from tickmark.v1 import records_pb2, stream_pb2


def _fill(path):
    """Writes a filler file until the file system is full (ENOSPC)."""
    chunk = b"\0" * (64 << 10)
    with open(path, "wb", buffering=0) as f:
        try:
            while True:
                f.write(chunk)
        except OSError:
            pass


@pytest.fixture
def small_disk():
    if os.geteuid() != 0:
        pytest.skip("mounting a small tmpfs needs root; tests/ledger/disk_full_test covers "
                    "the no-root case with RLIMIT_FSIZE")
    d = tempfile.mkdtemp(prefix="tickmark-diskfull-")
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=24m", "tmpfs", d],
                       capture_output=True, text=True)
    if r.returncode != 0:
        os.rmdir(d)
        pytest.skip(f"cannot mount a tmpfs here: {r.stderr.strip()}")
    try:
        yield d
    finally:
        subprocess.run(["umount", "-l", d], check=False)
        shutil.rmtree(d, ignore_errors=True)


def _show(server, session):
    return subprocess.run([os.path.join(BIN, "tickmark"), "--server", server.address,
                           "--token-file", os.path.join(server.data_dir, "operator.token"),
                           "session", "show", session],
                          capture_output=True, text=True, timeout=30)


def _metric(server, name):
    """One sample of the server's /metrics (its --metrics-listen port)."""
    with urllib.request.urlopen(f"http://127.0.0.1:{server.metrics_port}/metrics",
                                timeout=10) as r:
        for line in r.read().decode().splitlines():
            if line.startswith(name + " ") or line.startswith(name + "{"):
                key, value = line.rsplit(" ", 1)
                if key == name:
                    return float(value)
    return None


def test_full_disk_loses_nothing_and_recovers_without_restart(small_disk):
    server = Server(small_disk, extra=("--ledger-reserve-bytes", str(2 << 20),
                                       "--metrics-listen", "127.0.0.1:0"))
    server.metrics_port = int(_wait_line(server.proc, r"metrics port=(\d+)").group(1))
    stream = None
    try:
        session, admin = server.session(title="disk full")
        token = server.token(session, admin, "trainer", "ava")
        stream = ReconnectingStream(grpc.insecure_channel(server.address), "train", token,
                                    "pad-1", records_pb2.SOURCE_KIND_SCRIPT, "pytest",
                                    "pytest")
        assert stream.wait_connected(10)
        for _ in range(5):
            stream.send(stream_pb2.FeedbackMessage(value=1.0, event_source_ns=time.monotonic_ns()))
        assert stream.flush(30), "the first feedback were not acknowledged"

        filler = os.path.join(small_disk, "filler")
        _fill(filler)
        for _ in range(10):
            stream.send(stream_pb2.FeedbackMessage(value=-1.0, event_source_ns=time.monotonic_ns()))
        # The server notices, says so, and keeps answering.
        wait_until(lambda: "NOT WRITABLE" in _show(server, session).stdout, 30,
              "session show to report the ledger not writable")
        shown = _show(server, session)
        assert shown.returncode == 0, shown.stderr
        assert "disk full" in shown.stdout
        assert stream.pending > 0, "feedback was acknowledged although the disk is full"
        assert not stream.rejected, f"feedback dropped as rejected: {stream.rejected}"
        # The metrics say the same (docs/operations.md).
        wait_until(lambda: _metric(server, "tickmark_ledger_disk_full") == 1, 30,
              "tickmark_ledger_disk_full to say 1")
        assert _metric(server, "tickmark_ledger_writable") == 0
        assert _metric(server, 'tickmark_ingest_rejected_total{kind="feedback",'
                               'reason="unavailable"}') >= 1

        os.remove(filler)  # room again: no restart
        assert stream.flush(60), f"{stream.pending} feedback never stored after space returned"
        wait_until(lambda: "ledger     writable" in _show(server, session).stdout, 30,
              "the ledger to report writable again")
        wait_until(lambda: _metric(server, "tickmark_ledger_writable") == 1, 30,
              "tickmark_ledger_writable to say 1 again")
        assert _metric(server, "tickmark_ledger_disk_full") == 0
        assert not stream.rejected
        stream.close()
        stream = None

        lines = subprocess.run([os.path.join(BIN, "tickmark"), "--server", server.address,
                                "--token-file", os.path.join(server.data_dir, "operator.token"),
                                "export", "--session", session],
                               capture_output=True, text=True, timeout=60, check=True).stdout
        feedback = [r for r in map(json.loads, lines.splitlines()) if r["kind"] == "feedback"]
        seqs = sorted(r["client_sequence"] for r in feedback)
        assert seqs == list(range(1, 16)), seqs  # all 15, each exactly once

        # SIGTERM still ends the server promptly.
        server.channel.close()
        server.proc.send_signal(signal.SIGTERM)
        assert server.proc.wait(20) == 0
    finally:
        if stream is not None:
            stream.close(2)
        server.stop()
