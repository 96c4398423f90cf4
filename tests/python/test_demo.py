"""The whole demo as ./run demo runs it, shortened: calibration, training, comparison.

Checks outcomes in its output, never wall time: the fit table, both
precision columns side by side (default kernel and calibrated), and the
safety note.
"""

from __future__ import annotations

import os
import subprocess

from conftest import BIN

ROOT = os.path.join(os.path.dirname(__file__), "../..")


def test_demo_calibrates_then_compares_default_and_calibrated_kernels(tmp_path):
    build = os.path.abspath(os.path.join(BIN, ".."))
    env = dict(os.environ, TICKMARK_DEMO_ANSWERS="12")
    p = subprocess.run(["bash", os.path.join(ROOT, "scripts/demo.sh"), build, "20"],
                       capture_output=True, text=True, env=env, timeout=400)
    assert p.returncode == 0, p.stdout[-3000:] + p.stderr[-3000:]
    out = p.stdout
    assert "emergency stop" in out  # the safety note stays
    assert "FAMILY" in out and "* " in out  # the fit table of the calibration
    # The trainer joined the session (default kernel uniform) and got its calibration.
    assert "kernel of (session default): uniform(" in out
    assert any(line.startswith("kernel of trainer-sim: ") and " from calibration c-" in line
               for line in out.splitlines())
    # Both precision columns, side by side on one row.
    assert any(line.split() == ["default", "kernel", "calibrated"] for line in out.splitlines())
    row = next(line for line in out.splitlines() if line.startswith("credit precision"))
    values = [float(v) for v in row.split()[2:]]
    assert len(values) == 2 and all(0 <= v <= 1 for v in values)
    assert any(line.startswith("greedy dock success") for line in out.splitlines())
    learned = [line for line in out.splitlines() if line.startswith("  from ")]
    assert learned and all(len(line.split()[-2:]) == 2 for line in learned)
    # The session was made under a study and its report written (docs/studies.md).
    assert any(line.startswith("session s-") and " in study y-" in line
               for line in out.splitlines())
    report = next(line.split()[1] for line in out.splitlines() if line.startswith("report:"))
    with open(report, encoding="utf-8") as f:
        page = f.read()
    assert page.count("data:image/png;base64,") >= 5
    assert "alt='Calibration fits'" in page  # trainer-sim's calibration, applied on joining


def test_compare_reads_precision_of_each_derived_set_from_a_ledger(tmp_path):
    """compare.analyse on a hand-made ledger: two steps, one feedback judging step 2."""
    import sqlite3

    from tickmark.demo import compare

    db = sqlite3.connect(tmp_path / "t.db")
    db.executescript("""
        CREATE TABLE step (session_id TEXT, seq INTEGER, state BLOB, action TEXT);
        CREATE TABLE feedback (session_id TEXT, seq INTEGER, value REAL, input TEXT);
        CREATE TABLE credit (session_id TEXT, derived_set TEXT, feedback_seq INTEGER,
                             step_seq INTEGER, step_id INTEGER, credit REAL, kernel TEXT);
        INSERT INTO step VALUES ('s', 1, CAST('0,0' AS BLOB), 'north'), ('s', 2, CAST('0,1' AS BLOB), 'east');
        INSERT INTO feedback VALUES ('s', 3, 1.0, 'judged:2');
        INSERT INTO credit VALUES ('s', 'wide', 3, 1, 1, 0.75, 'uniform'), ('s', 'wide', 3, 2, 2, 0.25, 'uniform'),
                                  ('s', 'sharp', 3, 1, 1, 0.1, 'lognormal'), ('s', 'sharp', 3, 2, 2, 0.9, 'lognormal');
    """)
    db.commit()
    wide = compare.analyse(db, "s", "wide")
    sharp = compare.analyse(db, "s", "sharp")
    # Precision: credit on the judged step over all credit (worked by hand: 0.25/1, 0.9/1).
    assert wide["credit_precision"] == 0.25 and sharp["credit_precision"] == 0.9
    assert wide["kernels"] == ["uniform"] and sharp["feedback_credited"] == 1
    text = compare.table({"default kernel": wide, "calibrated": sharp})
    assert text.splitlines()[0].split() == ["default", "kernel", "calibrated"]
    assert text.splitlines()[1].split() == ["credit", "precision", "0.25", "0.90"]
