"""Studies end to end (docs/studies.md): a study with two conditions, two
participants and a counterbalanced schedule made with the CLI against a real
tickmarkd; a small scripted session under it; the CSV export read back by
Python's csv module and by pandas with the codebook's types; the HTML report
opened in headless Chromium (screenshot in build/test-artifacts/)."""

from __future__ import annotations

import csv
import hashlib
import os
import re
import sqlite3
import tempfile
import time

import pytest

from conftest import BIN, Server, tm

import tickmark
from tickmark._connect import open_channel
from tickmark._stream import ReconnectingStream
from tickmark.v1 import admin_pb2, records_pb2, stream_pb2

ARTIFACTS = os.environ.get("TICKMARK_ARTIFACTS",
                           os.path.join(os.path.dirname(os.path.abspath(BIN)), "test-artifacts"))


@pytest.fixture(scope="module")
def study():
    """One server, one study, one scripted session under it (shared by the tests)."""
    with tempfile.TemporaryDirectory(prefix="tickmark-study-") as d:
        s = Server(d)
        try:
            out = tm(s, "study", "create", "dock rover pilot",
                     "--description", "two feedback schemes").stdout
            study_id = re.search(r"study\s+(y-[0-9a-f]+)", out).group(1)
            tm(s, "study", "condition", study_id, "binary", "--kernel", "uniform:0.2,4.0",
               "--values", "-1,1", "--notes", "approve/disapprove keys")
            tm(s, "study", "condition", study_id, "graded", "--kernel", "gamma:2,0.28",
               "--pin-kernels", "--allowed-lateness-ms", "3000", "--values", "-1,-0.5,0.5,1")
            tm(s, "study", "enroll", study_id, "P01", "P02")
            schedule = tm(s, "study", "schedule", study_id).stdout
            created = tm(s, "session", "create", "--title", "P01 binary", "--study", study_id,
                         "--condition", "binary", "--participant", "P01").stdout
            session = re.search(r"session (s-[0-9a-f]+) opened", created).group(1)
            admin = s.operator
            agent_token = s.token(session, admin, "agent", "rover-1")
            trainer_token = s.token(session, admin, "trainer", "P01")
            with tickmark.Agent(s.address, token=agent_token) as agent:
                for i in range(6):
                    agent.step("east" if i % 2 else "north", state=f"{i},0")
                    time.sleep(0.1)
                agent.flush(10)
                tm(s, "marker", "add", "--session", session, "block 1 ends")
                trainer = ReconnectingStream(open_channel(s.address), "train", trainer_token,
                                             "t1", records_pb2.SOURCE_KIND_SCRIPT, "test",
                                             "pytest")
                assert trainer.wait_connected(10)
                trainer.send(stream_pb2.FeedbackMessage(value=1.0,
                                                        event_source_ns=time.monotonic_ns(),
                                                        input="key:g"))
                trainer.send(stream_pb2.FeedbackMessage(value=-1.0,
                                                        event_source_ns=time.monotonic_ns(),
                                                        input="key:\"b\",x"))
                assert trainer.flush(10)
                trainer.close()
            tm(s, "session", "close", session)
            yield {"server": s, "study": study_id, "session": session, "schedule": schedule,
                   "dir": d}
        finally:
            s.stop()


def test_study_records_conditions_participants_schedule_and_sessions(study):
    s = study["server"]
    shown = tm(s, "study", "show", study["study"]).stdout
    assert "binary: kernel uniform" in shown and "graded: kernel gamma" in shown
    assert "participants 2 (P01, P02)" in shown
    # Two conditions: the Williams design is the two-period crossover AB/BA
    # (Williams 1949; for n = 2 every order of two treatments), participants
    # taking the orders in enrolment order.
    assert "order  1  binary -> graded" in study["schedule"]
    assert "order  2  graded -> binary" in study["schedule"]
    assert re.search(r"P01\s+order 1: binary\[" + study["session"] + r"\] graded", shown)
    assert "williams, 2 orders" in shown
    listed = tm(s, "study", "list").stdout
    assert study["study"] in listed and "dock rover pilot" in listed
    # The session took the condition's settings and names its study.
    show = tm(s, "session", "show", study["session"]).stdout
    assert "condition  binary" in show and "participants P01" in show
    assert "(dock rover pilot)" in show
    # Studies are not sessions.
    assert study["study"] not in tm(s, "session", "list", "--all").stdout


def test_refusals(study):
    s = study["server"]
    md = s.md(s.operator)
    import grpc
    for req, code in [
        (admin_pb2.CreateSessionRequest(title="x", study_id=study["study"], condition="binary",
                                        participants=["P99"]),
         grpc.StatusCode.FAILED_PRECONDITION),  # not enrolled
        (admin_pb2.CreateSessionRequest(title="x", study_id=study["study"], condition="none"),
         grpc.StatusCode.NOT_FOUND),
        (admin_pb2.CreateSessionRequest(title="x", study_id=study["study"], condition="binary",
                                        default_kernel="uniform:0,1"),
         grpc.StatusCode.INVALID_ARGUMENT),  # the condition decides the kernel
    ]:
        with pytest.raises(grpc.RpcError) as e:
            s.admin.CreateSession(req, metadata=md)
        assert e.value.code() == code, e.value.details()
    p = tm(s, "study", "enroll", study["study"], "P01", check=False)
    assert p.returncode != 0 and "enrolled already" in p.stderr
    p = tm(s, "study", "condition", study["study"], "late-one", check=False)
    assert p.returncode != 0 and "schedule" in p.stderr


def test_study_journal_is_its_own_hash_chain(study):
    # Recomputed with Python's hashlib (OpenSSL) over the stored bytes, as
    # DEVELOPERS.md "The ledger" states: hash = SHA-256(prev || body), prev
    # of the first record 32 zero bytes.
    db = sqlite3.connect(f"file:{os.path.join(study['dir'], 'tickmark.db')}?mode=ro", uri=True)
    rows = db.execute("SELECT seq, kind, body, hash FROM record WHERE session_id = ? ORDER BY seq",
                      (study["study"],)).fetchall()
    kinds = db.execute("SELECT kind FROM session WHERE id = ?", (study["study"],)).fetchone()
    events = [r[0] for r in db.execute(
        "SELECT event FROM study_event WHERE session_id = ? ORDER BY seq", (study["study"],))]
    db.close()
    assert kinds == ("study",)
    assert [r[0] for r in rows] == list(range(1, len(rows) + 1))
    assert all(r[1] == "study" for r in rows)
    assert events == ["created", "condition", "condition", "participants", "schedule", "session"]
    prev = bytes(32)
    for seq, _, body, digest in rows:
        assert hashlib.sha256(prev + body).digest() == digest, f"record {seq}"
        prev = digest
    record = records_pb2.Record.FromString(rows[-1][2])
    assert record.study.session_id == study["session"]
    assert list(record.study.participants) == ["P01"]


def _codebook(path):
    with open(os.path.join(path, "codebook.csv"), newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    book = {}
    for r in rows:
        book.setdefault(r["file"], []).append(r)
    return book


def test_csv_export_reads_back_with_the_codebooks_types(study, tmp_path):
    s = study["server"]
    out = tmp_path / "csv"
    tm(s, "export", "--format", "csv", "--study", study["study"], "--out", str(out))
    book = _codebook(out)
    for name in ("feedback.csv", "steps.csv", "credit.csv", "labels.csv", "markers.csv",
                 "probes.csv", "clock_models.csv", "calibrations.csv", "sessions.csv"):
        assert name in book, name
    # Every column described: type, and for times a unit and a clock.
    for name, cols in book.items():
        for c in cols:
            assert c["type"] in ("integer", "number", "string", "boolean"), c
            assert c["meaning"], c
            if c["column"].endswith("_ns") and c["column"] not in ("offset_ns",):
                assert c["unit"] == "ns", c
    # The records themselves, read over gRPC: what the CSV must hold.
    with tickmark.Subscription(open_channel(s.address), s.operator, study["session"],
                               follow=False) as sub:
        records = list(sub)
    feedback = [r.feedback for r in records if r.HasField("feedback")]
    steps = [r.step for r in records if r.HasField("step")]
    assert len(feedback) == 2 and len(steps) == 6

    # Python's csv module (RFC 4180 dialect "excel"): header = codebook order,
    # every field converts with its codebook type.
    convert = {"integer": int, "number": float, "string": str,
               "boolean": lambda v: {"0": False, "1": True}[v]}
    for name, cols in book.items():
        with open(out / name, newline="", encoding="utf-8") as f:
            reader = csv.reader(f)
            header = next(reader)
            assert header == [c["column"] for c in cols], name
            for row in reader:
                assert len(row) == len(cols), name
                for value, c in zip(row, cols):
                    convert[c["type"]](value)
    with open(out / "feedback.csv", newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    assert [float(r["value"]) for r in rows] == [f.value for f in feedback]
    assert [r["input"] for r in rows] == ["key:g", 'key:"b",x']  # quoting round-trips
    assert [int(r["event_session_ns"]) for r in rows] == [f.event_session_ns for f in feedback]

    # pandas (Debian's python3-pandas) with dtypes from the codebook: Int64
    # keeps nanosecond times exact (they exceed 2^53, which float64 would round).
    pd = pytest.importorskip("pandas")
    dtype = {"integer": "Int64", "number": "float64", "string": "string", "boolean": "Int64"}
    frames = {}
    for name, cols in book.items():
        frame = pd.read_csv(out / name, dtype={c["column"]: dtype[c["type"]] for c in cols},
                            keep_default_na=False, na_values=[])
        for c in cols:
            if c["type"] == "boolean":
                assert set(frame[c["column"]].tolist()) <= {0, 1}
                frame[c["column"]] = frame[c["column"]].astype(bool)
        frames[name] = frame
    fb = frames["feedback.csv"]
    assert fb["event_session_ns"].tolist() == [f.event_session_ns for f in feedback]
    assert fb["late"].tolist() == [f.late for f in feedback]
    st = frames["steps.csv"]
    assert st["start_session_ns"].tolist() == [x.start_session_ns for x in steps]
    assert st["action"].tolist() == [x.action for x in steps]
    assert len(frames["markers.csv"]) == 1 and frames["markers.csv"]["text"][0] == "block 1 ends"
    sessions = frames["sessions.csv"]
    assert sessions["condition"].tolist() == ["binary"]
    assert sessions["participants"].tolist() == ["P01"]


def _check_self_contained(text):
    # Nothing the browser would fetch: no scripts, stylesheets or links to
    # other places; images inline as data: URLs (RFC 2397).
    assert "<script" not in text.lower()
    assert "<link" not in text.lower()
    assert not re.search(r"(src|href)\s*=\s*['\"](?!data:)", text, re.I)
    assert "http://" not in text and "https://" not in text


@pytest.fixture(scope="module")
def browser():
    chromium, driver = "/usr/bin/chromium", "/usr/bin/chromedriver"
    for path in (chromium, driver):
        if not os.path.exists(path):
            pytest.fail(f"{path} is missing: ./run installs chromium, chromium-driver and "
                        "python3-selenium from Debian")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service
    options = webdriver.ChromeOptions()
    options.binary_location = chromium
    for a in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
              "--window-size=1200,900", "--no-first-run", "--disable-extensions"):
        options.add_argument(a)
    d = webdriver.Chrome(service=Service(driver), options=options)
    d.set_page_load_timeout(30)
    os.makedirs(ARTIFACTS, exist_ok=True)
    try:
        yield d
    finally:
        d.quit()


def _open_and_shoot(browser, path, name):
    from selenium.webdriver.common.by import By
    browser.get("file://" + str(path))
    images = browser.find_elements(By.TAG_NAME, "img")
    # Every figure decoded (naturalWidth > 0 once the data: URL parsed).
    for img in images:
        assert browser.execute_script("return arguments[0].complete && "
                                      "arguments[0].naturalWidth > 0", img)
    browser.execute_cdp_cmd("Emulation.setDeviceMetricsOverride", {
        "width": 1200, "deviceScaleFactor": 1, "mobile": False,
        "height": min(12000, int(browser.execute_script(
            "return document.documentElement.scrollHeight")))})
    shot = os.path.join(ARTIFACTS, name)
    browser.save_screenshot(shot)
    assert os.path.getsize(shot) > 10_000, f"{shot} looks empty"
    print(f"screenshot {shot}")
    return images


def test_session_report_is_one_self_contained_page(study, tmp_path, browser):
    s = study["server"]
    path = tmp_path / "report.html"
    out = tm(s, "report", "--session", study["session"], "--out", str(path),
             "--ledger", os.path.join(study["dir"], "tickmark.db"), timeout=300)
    assert str(path) in out.stdout
    text = path.read_text(encoding="utf-8")
    _check_self_contained(text)
    for title in ("Timeline", "Feedback per trainer", "Credit and labels", "Clock uncertainty"):
        assert f"alt='{title}'" in text, title
    assert "No calibration was measured in or applied" in text  # none here
    # The chain recomputed by `tickmark audit verify` from the server's own
    # file, and the receipt its close signed (both described in docs/audit.md).
    assert "id='audit-state'>verified<" in text
    summary = s.admin.GetSession(admin_pb2.GetSessionRequest(session_id=study["session"]),
                                 metadata=s.md(s.operator))
    assert f"id='receipt'>{summary.receipt.signed_utc}<" in text
    assert summary.receipt.head_hash.hex() in text
    # Without the file the report makes no claim.
    bare = tmp_path / "bare.html"
    tm(s, "report", "--session", study["session"], "--out", str(bare), timeout=300)
    assert "id='audit-state'>not checked<" in bare.read_text(encoding="utf-8")
    assert "P01" in text and "binary" in text
    images = _open_and_shoot(browser, path, "study_session_report.png")
    assert len(images) >= 4


def test_study_report_summarises_the_sessions(study, tmp_path, browser):
    s = study["server"]
    path = tmp_path / "study.html"
    tm(s, "report", "--study", study["study"], "--out", str(path), timeout=300)
    text = path.read_text(encoding="utf-8")
    _check_self_contained(text)
    assert "alt='Conditions compared'" in text
    assert study["session"] in text and "graded" in text
    images = _open_and_shoot(browser, path, "study_summary_report.png")
    assert len(images) >= 1
