"""tickmark-keys --calibrate end to end, in a pseudo-terminal, against the real
server: a scripted trainer reads the mover off the screen and answers by the
shown rule (with a few wrong signs, a miss and a double answer); then the
ledger is read with Python's sqlite3 (an outside reader of the SQLite file)
and the record bodies with the protobuf runtime, and must agree with what the
script did. A new session for the same trainer must get a kernel setting that
names the calibration.

No timing assertions: the moves come 1.5 to 2 s apart and the script answers
within about 0.3 s, so each answer lands on the move it judged even on a busy
machine; nothing checks how long anything took.
"""

from __future__ import annotations

import fcntl
import os
import pty
import re
import select
import sqlite3
import struct
import subprocess
import termios
import time
import tty

import pytest

from conftest import BIN
from tickmark.v1 import records_pb2

KEYS = os.path.join(BIN, "tickmark-keys")
TRACK = re.compile(rb"\|((?: - |\[O\]){21})\|  (ready|practice (\d+)/\d+|move (\d+))")


def tm(server, *args, token_file=None):
    cmd = [os.path.join(BIN, "tickmark"), "--server", server.address,
           "--token-file", token_file or os.path.join(server.data_dir, "operator.token"), *args]
    p = subprocess.run(cmd, capture_output=True, text=True, timeout=60)
    assert p.returncode == 0, p.stderr
    return p.stdout


def ledger(server):
    return sqlite3.connect(f"file:{os.path.join(server.data_dir, 'tickmark.db')}?mode=ro",
                           uri=True, timeout=30)


def require_calibration_support(server):
    """Skips (with the reason) when this tickmarkd has no calibration support."""
    with ledger(server) as db:
        tables = {r[0] for r in db.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    if "calibration_event" not in tables:
        pytest.skip("tickmarkd lacks calibration support (no calibration_event table in its "
                    "ledger): the server's calibration work is not in this build")


def session_with_trainer(server, tmp_path, name, subject):
    out = tm(server, "session", "create", "--title", name,
             "--token-out", str(tmp_path / f"{name}.admin.token"))
    session = out.split()[1]
    token = tmp_path / f"{name}.{subject}.token"
    tm(server, "token", "issue", "--session", session, "--role", "trainer", "--subject", subject,
       "--out", str(token), token_file=str(tmp_path / f"{name}.admin.token"))
    return session, str(token)


class Pty:
    """A child process on a pseudo-terminal of 80x24; collects its output."""

    def __init__(self, argv):
        master, slave = pty.openpty()
        fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 80, 0, 0))
        self.proc = subprocess.Popen(argv, stdin=slave, stdout=slave, stderr=slave,
                                     close_fds=True, start_new_session=True)
        os.close(slave)
        self.master = master
        self.out = b""

    def pump(self, timeout):
        """Reads what is there (waiting up to timeout); False at end of output."""
        ready, _, _ = select.select([self.master], [], [], timeout)
        if not ready:
            return True
        try:
            data = os.read(self.master, 65536)
        except OSError:  # EIO: the child closed the terminal
            return False
        if not data:
            return False
        self.out += data
        return True

    def wait_for(self, pattern, timeout=30):
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if re.search(pattern, self.out):
                return
            if not self.pump(0.1):
                break
        raise AssertionError(f"no {pattern!r} on the screen; got:\n{self.out.decode(errors='replace')}")

    def send(self, data):
        os.write(self.master, data)

    def finish(self, timeout=120):
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline and self.pump(0.2):
            if self.proc.poll() is not None:
                while self.pump(0.2):
                    pass
                break
        self.proc.wait(10)
        os.close(self.master)
        return self.proc.returncode, self.out.decode(errors="replace")


def play(term, approve_right, plan, answer):
    """Watches the track and answers each move through answer(sign) by the
    rule, or as plan says for measured move N ("wrong", "miss", "double").
    Returns the moves seen (label, direction), the signs sent, what was done."""
    seen_moves, pressed = [], []
    done = {"wrong": 0, "miss": 0, "double": 0}
    position = last_label = None
    scan_from = 0
    deadline = time.monotonic() + 180
    while time.monotonic() < deadline and term.proc.poll() is None:
        term.pump(0.05)
        for m in TRACK.finditer(term.out, scan_from):
            scan_from = m.end()
            cell = m.group(1).index(b"[O]") // 3
            label = m.group(2)
            if label == last_label:
                continue  # a redraw of the same move
            last_label = label
            if label == b"ready":
                position = cell
                continue
            right = cell > position
            position = cell
            seen_moves.append((label.decode(), "right" if right else "left"))
            approve = right == approve_right
            practice = m.group(3) is not None
            what = "right" if practice else plan.get(int(m.group(4)), "right")
            if what == "miss":
                done["miss"] += 1
                continue
            sign = approve if what != "wrong" else not approve
            time.sleep(0.2)  # the scripted delay
            answer(sign)
            pressed.append(sign)
            if what == "wrong":
                done["wrong"] += 1
            if what == "double":
                time.sleep(0.15)
                answer(sign)
                pressed.append(sign)
                done["double"] += 1
    return seen_moves, pressed, done


# What the script does on each measured move (by its number); others: answer
# right. Worked out by the matching rule of server/core/calibration_match.h.
PLAN = {3: "wrong", 5: "miss", 6: "double", 7: "wrong"}
ANSWERS = 12
PRACTICE = 2


def test_calibration_in_a_terminal_is_stored_fitted_and_applied(server, tmp_path):
    require_calibration_support(server)
    session, token = session_with_trainer(server, tmp_path, "calibration", "ava")
    run_id = "cal-pytest-1"
    term = Pty([KEYS, "--server", server.address, "--token-file", token, "--calibrate",
                "--answers", str(ANSWERS), "--practice", str(PRACTICE), "--min-interval", "1.5",
                "--max-interval", "2.0", "--seed", "11", "--run", run_id,
                "--client-id", "pytest:ava:calibration"])
    term.wait_for(rb"Press space")
    rule = re.search(rb"approve moves to the (RIGHT|LEFT)", term.out).group(1)
    approve_right = rule == b"RIGHT"
    term.send(b" ")

    seen_moves, pressed, done = play(term, approve_right, PLAN,
                                     lambda sign: term.send(b"f" if sign else b"j"))
    code, screen = term.finish()
    assert code == 0, screen
    assert done == {"wrong": 2, "miss": 1, "double": 1}, (done, screen)
    measured = [label for label, _ in seen_moves if label.startswith("move")]
    # 12 valid answers: moves 1, 2, 4, 6 and 8..15 (3, 7 wrong; 5 missed).
    assert len(measured) == 15, seen_moves
    assert sum(1 for label, _ in seen_moves if label.startswith("practice")) == PRACTICE

    # The result is printed: the id, every family, the chosen kernel, the plot hint.
    cal_id = re.search(r"Calibration (c-[0-9a-f]+) stored for trainer ava", screen).group(1)
    assert "chosen kernel:" in screen
    assert f"tickmark calibrate show {cal_id} --plot fit.png" in screen
    assert "bootstrap interval" in screen

    with ledger(server) as db:
        events = db.execute(
            "SELECT kind, move, approve, practice, detail, client_seq FROM calibration_event "
            "WHERE session_id = ? AND run = ? ORDER BY seq", (session, run_id)).fetchall()
        row = db.execute("SELECT trainer, session_id, seq, valid, kernel_description "
                         "FROM calibration WHERE id = ?", (cal_id,)).fetchone()
        body = db.execute("SELECT body FROM record WHERE session_id = ? AND seq = ?",
                          (row[1], row[2])).fetchone()[0]
    moves = [e for e in events if e[0] == "move"]
    answers = [e for e in events if e[0] == "answer"]
    # Every move shown on the screen is in the ledger, numbered from 1, with
    # the direction drawn and the rule's verdict.
    assert [m[1] for m in moves] == list(range(1, len(seen_moves) + 1))
    assert [m[4] for m in moves] == [d for _, d in seen_moves]
    assert [bool(m[2]) for m in moves] == [(d == "right") == approve_right for _, d in seen_moves]
    assert [bool(m[3]) for m in moves] == [label.startswith("practice") for label, _ in seen_moves]
    assert [bool(a[2]) for a in answers] == pressed
    assert all(a[4] in ("key:f", "key:j") for a in answers)
    # Client sequences: one counter, increasing in the order sent.
    client_seqs = [e[5] for e in events]
    assert client_seqs == sorted(client_seqs) and len(set(client_seqs)) == len(client_seqs)

    assert row[0] == "ava" and row[3] == ANSWERS
    record = records_pb2.Record()
    record.ParseFromString(body)
    c = record.calibration
    assert c.id == cal_id and c.run == run_id and c.trainer == "ava"
    assert (c.moves, c.valid, c.wrong_sign, c.missed, c.double_answers, c.stray,
            c.practice_answers) == (15, ANSWERS, 2, 1, 1, 0, PRACTICE)
    assert len(c.delays_s) == ANSWERS and all(0.0 < d < 4.0 for d in c.delays_s)
    assert c.min_answers == ANSWERS
    assert "10-50 ms" in c.display_note
    for fit in c.fits:
        assert fit.family in screen
    assert c.kernel_description == row[4]
    assert c.kernel_description[:160] in screen  # longer texts are cut

    # A new session: when ava joins, her kernel comes from the calibration.
    session2, token2 = session_with_trainer(server, tmp_path, "next", "ava")
    joined = subprocess.run([KEYS, "--server", server.address, "--token-file", token2,
                             "--stdin-lines", "--quiet", "--client-id", "pytest:ava:next"],
                            input="+1 key:f\n", capture_output=True, text=True, timeout=60)
    assert joined.returncode == 0, joined.stderr
    setting = None
    for _ in range(100):  # the setting is written when the join is handled
        with ledger(server) as db:
            setting = db.execute("SELECT trainer, description, calibration FROM kernel_setting "
                                 "WHERE session_id = ? AND calibration != ''",
                                 (session2,)).fetchone()
        if setting:
            break
        time.sleep(0.1)
    assert setting == ("ava", c.kernel_description, cal_id), setting


def test_calibrate_needs_a_terminal_and_checks_its_flags(tmp_path):
    token = tmp_path / "t.token"
    token.write_text("tmk_unused\n")
    p = subprocess.run([KEYS, "--token-file", str(token), "--calibrate"], capture_output=True,
                       text=True, stdin=subprocess.DEVNULL, timeout=30)
    assert p.returncode == 2 and "needs a terminal" in p.stderr
    p = subprocess.run([KEYS, "--answers", "12"], capture_output=True, text=True, timeout=30)
    assert p.returncode == 2 and "--calibrate" in p.stderr
    help_text = subprocess.run([KEYS, "--help"], capture_output=True, text=True).stdout
    assert "--calibrate" in help_text and "evaluative delay" in help_text


def test_quitting_before_enough_answers_reports_no_calibration(server, tmp_path):
    """q after the practice: the finish is sent with what there is, the server
    refuses to fit fewer than 3 valid answers, the program says so and exits 1."""
    require_calibration_support(server)
    _, token = session_with_trainer(server, tmp_path, "quit", "ben")
    term = Pty([KEYS, "--server", server.address, "--token-file", token, "--calibrate",
                "--answers", "5", "--practice", "1", "--min-interval", "0.5",
                "--max-interval", "0.6", "--client-id", "pytest:ben:calibration"])
    term.wait_for(rb"Press space")
    term.send(b" ")
    term.wait_for(rb"move 1")
    term.send(b"q")
    code, screen = term.finish()
    assert code == 1, screen
    assert "stopped by the trainer" in screen
    assert "no calibration stored" in screen and "FAILED_PRECONDITION" in screen, screen


def test_serial_box_calibration(server, tmp_path):
    """tickmark-serial --calibrate: the same task in the terminal, answered
    with a line-protocol box on a second pseudo-terminal."""
    require_calibration_support(server)
    session, token = session_with_trainer(server, tmp_path, "serial", "cai")
    box_master, box_slave = pty.openpty()
    tty.setraw(box_slave)
    profile = os.path.join(os.path.dirname(__file__), "..", "..", "clients", "serial",
                           "profiles", "line-box.toml")
    term = Pty([os.path.join(BIN, "tickmark-serial"), "--server", server.address,
                "--token-file", token, "--port", os.ttyname(box_slave), "--profile", profile,
                "--calibrate", "--answers", "5", "--practice", "1", "--min-interval", "1.5",
                "--max-interval", "2.0", "--run", "cal-serial", "--client-id", "pytest:cai:box"])
    try:
        term.wait_for(rb"Press space")
        assert b"approve:    B1" in term.out and b"disapprove: B2" in term.out
        term.send(b" ")
        seen, pressed, _ = play(term, True, {}, lambda sign: os.write(
            box_master, b"B1 down\nB1 up\n" if sign else b"B2 down\nB2 up\n"))
        code, screen = term.finish()
    finally:
        os.close(box_master)
        os.close(box_slave)
    assert code == 0, screen
    assert len(seen) == 6 and len(pressed) == 6
    cal_id = re.search(r"Calibration (c-[0-9a-f]+) stored for trainer cai", screen).group(1)
    with ledger(server) as db:
        answers = db.execute("SELECT approve, detail FROM calibration_event WHERE session_id = ? "
                             "AND run = 'cal-serial' AND kind = 'answer' ORDER BY seq",
                             (session,)).fetchall()
        valid, source = db.execute("SELECT valid, source_kind FROM calibration WHERE id = ?",
                                   (cal_id,)).fetchone()
    assert [bool(a[0]) for a in answers] == pressed
    assert all(a[1] in ("serial:B1", "serial:B2") for a in answers)
    assert valid == 5 and "SERIAL" in source.upper()
