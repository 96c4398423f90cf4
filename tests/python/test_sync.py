"""Sync pulses and `tickmark align` (docs/sync.md).

The align fit is checked against NumPy (numpy.polyfit) and SciPy
(scipy.stats.linregress, its slope/intercept standard errors) from Debian's
python3-numpy and python3-scipy, on synthetic pulse trains with a known
offset and drift, timing jitter, missed and spurious pulses. End to end:
tickmark-serial --sync-out DTR --sync-simulate against a real tickmarkd (no
line moves: pseudo-terminals have no modem lines, docs/sync.md says what
stays untested), pulses and a marker pulse land in the ledger (read back
with the sqlite3 command-line tool), and align runs against them.
"""

from __future__ import annotations

import csv
import json
import os
import pty
import shutil
import signal
import subprocess
import threading
import time
import tty

import numpy as np
import pytest
from scipy import stats

import grpc

from conftest import BIN, first_ack, tm
from tickmark.v1 import admin_pb2, records_pb2, stream_pb2

TICKMARK = os.path.join(BIN, "tickmark")
PROFILE = os.path.join(os.path.dirname(__file__), "..", "..", "clients", "serial", "profiles",
                       "line-box.toml")


def jittered_train(rng, n, interval=1.0, jitter=0.25, start=2.0):
    """Pulse times as tickmark-serial draws them: gaps uniform in
    interval * [1 - jitter, 1 + jitter]."""
    return start + np.cumsum(rng.uniform(interval * (1 - jitter), interval * (1 + jitter), n))


def write_session_pulses(path, session_s):
    """A sync_pulses.csv as `tickmark align --pulses-out` writes it (rising edges)."""
    with open(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["session_id", "seq", "client_id", "direction", "line", "level", "edge",
                    "pulse_index", "session_s"])
        for i, t in enumerate(session_s):
            w.writerow(["s-test", i + 10, "box", "out", "DTR", 1, "rising", i + 1, f"{t:.9f}"])


def run_align(*args):
    return subprocess.run([TICKMARK, "align", *args], capture_output=True, text=True, timeout=60)


def read_residuals(path):
    with open(path, newline="") as f:
        return list(csv.DictReader(f))


def test_align_recovers_offset_and_drift_like_numpy_and_scipy(tmp_path):
    rng = np.random.default_rng(20261203)
    session_s = jittered_train(rng, 600)
    # The other recorder: its clock reads 8123.25 s at session time 0 and
    # runs 47 ppm fast; each pulse is timed with 0.4 ms of Gaussian jitter
    # (e.g. a 2.5 kHz amplifier), 8 % of the pulses are missed, and 40
    # spurious ones are recorded anywhere in the run.
    a_true, b_true = 8123.25, 1 + 47e-6
    keep = rng.random(session_s.size) > 0.08
    real = a_true + b_true * session_s[keep] + rng.normal(0, 0.4e-3, keep.sum())
    spurious = rng.uniform(real.min(), real.max(), 40)
    other = np.concatenate([real, spurious])
    order = rng.permutation(other.size)  # any order in the file
    other = other[order]
    is_real = order < real.size
    session_csv, other_csv = tmp_path / "sync_pulses.csv", tmp_path / "amp.csv"
    write_session_pulses(session_csv, session_s)
    with open(other_csv, "w") as f:
        f.write("sample,time_s\n")
        for i, t in enumerate(other):
            f.write(f"{i},{t:.7f}\n")
    out = tmp_path / "map.json"
    p = run_align("--session-pulses", str(session_csv), "--pulses", str(other_csv), "--column",
                  "time_s", "--tolerance", "20", "--out", str(out))
    assert p.returncode == 0, p.stderr
    m = json.loads(out.read_text())
    rows = read_residuals(str(out) + ".residuals.csv")
    assert len(rows) == m["pairs"]
    # Every pair is a real pulse with its true partner (no spurious one kept).
    s_true_index = {round(float(t), 6): i for i, t in enumerate(session_s)}
    real_rows = {r: k for k, r in enumerate(np.flatnonzero(keep))}
    for r in rows:
        row = int(r["other_row"]) - 1
        assert is_real[row], r
        assert real_rows[s_true_index[round(float(r["session_s"]), 6)]] == order[row], r
    assert m["pairs"] >= 0.97 * keep.sum()
    # The fit is ordinary least squares over the listed pairs: numpy.polyfit
    # and scipy.stats.linregress give the same line and standard errors.
    x = np.array([float(r["session_s"]) for r in rows])
    y = np.array([float(r["other_s"]) for r in rows])
    b_np, a_np = np.polyfit(x, y, 1)
    assert m["b"] == pytest.approx(b_np, rel=1e-12)
    assert m["a"] == pytest.approx(a_np, abs=1e-7)
    # Standard errors: numpy.polyfit's covariance (scaled by chi2 / (N - 2)),
    # and scipy.stats.linregress. linregress computes them from 1 - r**2,
    # which cancels when r is within 1e-12 of 1 as here, so it is given the
    # residuals about the line instead: the same x, the same residuals,
    # hence the same standard errors, with r near 0.
    _, cov = np.polyfit(x, y, 1, cov=True)
    assert m["b_se"] == pytest.approx(np.sqrt(cov[0, 0]), rel=1e-6)
    assert m["a_se"] == pytest.approx(np.sqrt(cov[1, 1]), rel=1e-6)
    lr = stats.linregress(x, y - (a_np + b_np * x))
    assert m["b_se"] == pytest.approx(lr.stderr, rel=1e-6)
    assert m["a_se"] == pytest.approx(lr.intercept_stderr, rel=1e-6)
    res = y - (a_np + b_np * x)
    assert m["rms_residual_s"] == pytest.approx(np.sqrt(np.mean(res ** 2)), rel=1e-6)
    assert m["max_abs_residual_s"] == pytest.approx(np.max(np.abs(res)), rel=1e-6)
    # And it recovers the truth to within its statistics (4 standard errors).
    assert abs(m["a"] - a_true) < 4 * m["a_se"] + 1e-9
    assert abs(m["drift_ppm"] - 47) < 4 * m["b_se"] * 1e6
    assert 0.3e-3 < m["rms_residual_s"] < 0.5e-3
    assert "drift" in p.stdout and "ppm" in p.stdout


def test_align_refuses_when_too_few_pulses_pair(tmp_path):
    rng = np.random.default_rng(7)
    session_csv, other_csv = tmp_path / "s.csv", tmp_path / "o.csv"
    write_session_pulses(session_csv, jittered_train(rng, 100))
    np.savetxt(other_csv, jittered_train(rng, 100) + 50.0, fmt="%.6f")  # an unrelated train
    p = run_align("--session-pulses", str(session_csv), "--pulses", str(other_csv))
    assert p.returncode == 1
    assert "tickmark align:" in p.stderr and ("same pulses" in p.stderr or "pair" in p.stderr)
    p = run_align("--session-pulses", str(session_csv), "--pulses", "/nonexistent.csv")
    assert p.returncode == 2 and "cannot read" in p.stderr


class Lines:
    """Collects a child's stderr lines on a thread."""

    def __init__(self, stream):
        self.lines, self._stream = [], stream
        self._t = threading.Thread(target=self._run, daemon=True)
        self._t.start()

    def _run(self):
        for line in self._stream:
            self.lines.append(line)

    def wait_for(self, text, timeout=30):
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if any(text in line for line in self.lines):
                return
            time.sleep(0.05)
        raise TimeoutError(f"no line with {text!r}: {self.lines}")


def rows_of(server, session, path):
    tm(server, "align", "--session", session, "--pulses-out", str(path))
    with open(path, newline="") as f:
        return list(csv.DictReader(f))


@pytest.mark.skipif(shutil.which("sqlite3") is None, reason="needs the sqlite3 CLI")
def test_sync_out_pulses_land_in_the_ledger_and_align(server, tmp_path):
    sid, admin = server.session(title="sync")
    trainer = tmp_path / "trainer.token"
    observer = tmp_path / "observer.token"
    trainer.write_text(server.token(sid, admin, "trainer", "dana") + "\n")
    observer.write_text(server.token(sid, admin, "observer") + "\n")
    os.chmod(trainer, 0o600)
    os.chmod(observer, 0o600)
    box_master, box_slave = pty.openpty()
    tty.setraw(box_slave)
    proc = subprocess.Popen(
        [os.path.join(BIN, "tickmark-serial"), "--server", server.address, "--token-file",
         str(trainer), "--port", os.ttyname(box_slave), "--profile", PROFILE, "--client-id",
         "pytest:dana:box", "--sync-out", "DTR", "--sync-simulate", "--sync-interval", "0.2",
         "--sync-width", "5", "--sync-seed", "11", "--sync-marker-token", str(observer),
         "--verbose"],
        stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    err = Lines(proc.stderr)
    try:
        err.wait_for("following markers")
        marker = tm(server, "marker", "add", "--session", sid, "block 2 starts")
        marker_seq = int(marker.stdout.split()[1].lstrip("#"))
        deadline = time.monotonic() + 60
        while True:
            rows = rows_of(server, sid, tmp_path / "live.csv")
            rises = [r for r in rows if r["edge"] == "rising"]
            if len(rises) >= 24 and any(r["reason"] == "marker" for r in rows):
                break
            assert time.monotonic() < deadline, (rows, err.lines)
            time.sleep(0.3)
    finally:
        proc.send_signal(signal.SIGINT)
        code = proc.wait(30)
        os.close(box_master)
        os.close(box_slave)
    assert code == 0, err.lines

    rows = rows_of(server, sid, tmp_path / "sync_pulses.csv")
    assert rows and all(r["direction"] == "out" and r["line"] == "DTR" for r in rows)
    assert all(r["simulated"] == "1" and r["client_id"] == "pytest:dana:box" for r in rows)
    # Every pulse rises and falls (the last one released at exit).
    rises = [r for r in rows if r["edge"] == "rising"]
    falls = [r for r in rows if r["edge"] == "falling"]
    assert sorted(r["pulse_index"] for r in rises) == sorted(r["pulse_index"] for r in falls)
    markers = [r for r in rises if r["reason"] == "marker"]
    assert len(markers) == 1 and int(markers[0]["marker_seq"]) == marker_seq
    for r in rows:
        # The session time carries the clock model's and the bracket's
        # uncertainty (a source bracket of at most a millisecond here).
        assert int(r["uncertainty_ns"]) >= int(r["source_uncertainty_ns"]) >= 0
        assert int(r["source_uncertainty_ns"]) < 1_000_000
    # The typed table, read by the sqlite3 command-line tool.
    db = os.path.join(server.data_dir, "tickmark.db")
    out = subprocess.run(
        ["sqlite3", db, "SELECT COUNT(*), SUM(level), SUM(reason = 'marker'), MAX(marker_seq) "
                        f"FROM sync_pulse WHERE session_id = '{sid}'"],
        capture_output=True, text=True, check=True).stdout.strip()
    assert out == f"{len(rows)}|{len(rises)}|2|{marker_seq}"
    summary = server.admin.GetSession(admin_pb2.GetSessionRequest(session_id=sid),
                                      metadata=server.md(admin))
    assert summary.sync_pulse_count == len(rows)

    # Another recorder saw the rising edges on its own clock: offset -37.5 s
    # (it started later), 120 ppm slow, 0.1 ms jitter, two pulses missed; it
    # stopped after the 24th (the loop above may have waited for more), so
    # the same 22 jitter draws meet the same pulses on every run.
    rng = np.random.default_rng(3)
    s = np.array([float(r["session_s"]) for r in rises])[:24]
    keep = np.ones(s.size, bool)
    keep[[3, 9]] = False
    other = np.round(-37.5 + (1 - 120e-6) * s[keep] + rng.normal(0, 0.1e-3, keep.sum()), 7)
    np.savetxt(tmp_path / "video.csv", other, fmt="%.7f", header="led_on_s", comments="")
    p = tm(server, "align", "--session", sid, "--pulses", str(tmp_path / "video.csv"),
           "--tolerance", "5", "--out", str(tmp_path / "map.json"))
    m = json.loads((tmp_path / "map.json").read_text())
    assert m["pairs"] == keep.sum() and m["session"] == sid
    # The true pairs. align reads session times as integer nanoseconds, the
    # CSV gives them to 1 ns: agreement to that rounding over a few seconds.
    b_np, a_np = np.polyfit(s[keep], other, 1)
    assert m["b"] == pytest.approx(b_np, rel=1e-8)
    assert m["a"] == pytest.approx(a_np, abs=1e-7)
    assert abs(m["a"] + 37.5) < 1e-3
    assert "offset" in p.stdout

    # The CSV export's sync_pulses.csv holds the same edges, read back with
    # Python's csv module and typed by the export's own codebook.
    tm(server, "export", "--format", "csv", "--session", sid, "--out", str(tmp_path / "csv"))
    with open(tmp_path / "csv" / "codebook.csv", newline="", encoding="utf-8") as f:
        cols = [c for c in csv.DictReader(f) if c["file"] == "sync_pulses.csv"]
    assert {c["column"]: c["clock"] for c in cols}["event_source_ns"] == "source clock"
    with open(tmp_path / "csv" / "sync_pulses.csv", newline="", encoding="utf-8") as f:
        exported = list(csv.DictReader(f))
    assert list(exported[0].keys()) == [c["column"] for c in cols]
    assert [int(r["event_session_ns"]) for r in exported] == \
        [int(r["event_session_ns"]) for r in rows]
    assert {r["line"] for r in exported} == {"DTR"} and {r["direction"] for r in exported} == {"out"}


def test_a_sync_pulse_on_the_wrong_line_is_refused(server):
    """Validation (server/rpc/validation.cc): an outgoing pulse is on DTR or
    RTS; the Ack names the rule and nothing is stored."""
    session, admin = server.session()
    token = server.token(session, admin, "trainer", "p11")
    ack = first_ack(server, token, "py-sync-raw", stream_pb2.TrainerMessage(
        sync_pulse=stream_pb2.SyncPulseMessage(
            client_sequence=1, direction=records_pb2.SYNC_DIRECTION_OUT, line="CTS", level=True,
            event_source_ns=time.monotonic_ns(), reason=records_pb2.SYNC_REASON_INTERVAL,
            pulse_index=1)))
    assert ack.code == grpc.StatusCode.INVALID_ARGUMENT.value[0]
    assert "DTR or RTS" in ack.message
    summary = server.admin.GetSession(admin_pb2.GetSessionRequest(session_id=session),
                                      metadata=server.md(admin))
    assert summary.sync_pulse_count == 0


TIOCM_LOOP = 0x8000  # <asm-generic/termios.h>: the UART's loopback bit (MCR bit 4)


@pytest.mark.skipif(not os.environ.get("TICKMARK_SYNC_TTY"),
                    reason="set TICKMARK_SYNC_TTY to a 16550-type serial port this test may "
                           "put in loopback (never one with anything attached)")
def test_sync_out_moves_a_real_line(server, tmp_path):
    """On a real UART (TICKMARK_SYNC_TTY, e.g. /dev/ttyS0 with nothing
    attached) in its internal loopback mode, DSR follows DTR (TIA-232 /
    16550 data sheet: loopback wires DTR to DSR, RTS to CTS). A thread polls
    TIOCMGET every ~0.2 ms on CLOCK_MONOTONIC, the clock tickmark-serial
    stamps with, and every DSR change it sees must be a recorded DTR edge
    within the polling gap. Not run by default: it drives a real port."""
    import fcntl
    import struct
    import termios
    dev = os.environ["TICKMARK_SYNC_TTY"]
    fd = os.open(dev, os.O_RDWR | os.O_NOCTTY | os.O_NONBLOCK)

    def bits():
        return struct.unpack("i", fcntl.ioctl(fd, termios.TIOCMGET, struct.pack("i", 0)))[0]

    fcntl.ioctl(fd, termios.TIOCMBIS, struct.pack("i", TIOCM_LOOP))
    seen, stop = [], threading.Event()

    def poll():
        prev = time.monotonic_ns()
        last = bits() & termios.TIOCM_DSR
        while not stop.is_set():
            before = time.monotonic_ns()
            now = bits() & termios.TIOCM_DSR
            if now != last:
                # The change happened after the previous read began and
                # before this one returned.
                seen.append((prev, time.monotonic_ns(), bool(now)))
                last = now
            prev = before
            time.sleep(0.0002)

    sid, admin = server.session(title="sync-hw")
    trainer = tmp_path / "trainer.token"
    trainer.write_text(server.token(sid, admin, "trainer", "hw") + "\n")
    os.chmod(trainer, 0o600)
    box_master, box_slave = pty.openpty()
    poller = threading.Thread(target=poll, daemon=True)
    poller.start()
    proc = subprocess.Popen(
        [os.path.join(BIN, "tickmark-serial"), "--server", server.address, "--token-file",
         str(trainer), "--port", os.ttyname(box_slave), "--profile", PROFILE, "--sync-out", "DTR",
         "--sync-port", dev, "--sync-interval", "0.1", "--sync-width", "20"],
        stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        time.sleep(3)
    finally:
        proc.send_signal(signal.SIGINT)
        code = proc.wait(30)
        stop.set()
        poller.join(5)
        fcntl.ioctl(fd, termios.TIOCMBIC, struct.pack("i", TIOCM_LOOP))
        os.close(fd)
        os.close(box_master)
        os.close(box_slave)
    assert code == 0, proc.stderr.read()
    rows = rows_of(server, sid, tmp_path / "hw.csv")
    assert all(r["simulated"] == "0" and r["device"] == dev for r in rows)
    # Opening a tty asserts DTR and RTS (termios(3), HUPCL/open); the first
    # thing tickmark-serial does is release the line, unrecorded.
    if seen and not seen[0][2] and rows and rows[0]["level"] == "1":
        seen = seen[1:]
    assert len(rows) >= 20 and len(seen) == len(rows), (len(seen), len(rows))
    for (before, after, level), r in zip(seen, rows):
        assert level == (r["level"] == "1")
        edge = int(r["event_source_ns"])
        half = int(r["source_uncertainty_ns"])
        # Causality, no timing bound: the ioctl that made the edge overlaps
        # the interval between the read before and the read that saw it.
        assert edge - half <= after, (before, after, edge)
        assert edge + half >= before, (before, after, edge)
