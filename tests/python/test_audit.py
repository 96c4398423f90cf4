"""Audit end to end (docs/audit.md) against a real tickmarkd: close receipts
checked by the openssl command-line tool, `tickmark audit verify` finding a
flipped byte, a deleted record, a reordered pair and (only with a receipt) a
whole-chain rewrite, erasure of a participant leaving none of their values in
the file's bytes while every chain still verifies, and a single-session
archive verified on its own.

Outside references: the chain is recomputed with Python's hashlib (SHA-256,
FIPS 180-4) over rows read by Python's sqlite3 module; the Ed25519 receipt
(RFC 8032) is verified by `openssl pkeyutl -verify -rawin` (OpenSSL 3).
"""

from __future__ import annotations

import base64
import hashlib
import os
import shutil
import sqlite3
import stat
import subprocess
import tempfile
import time

import pytest

from tickmark._connect import open_channel
from tickmark._stream import ReconnectingStream
from tickmark.v1 import records_pb2, stream_pb2

from conftest import BIN, Server, tm

# Unique byte strings the participant "p-ava" gives; none may survive erasure.
AVA_INPUTS = [b"key:ava-input-Q7xk", b"key:ava-input-W3mz"]
AVA_ANSWER = b"key:ava-answer-J5tr"
AVA_AUDIO = hashlib.sha256(b"ava's kept audio").digest()
AVA_VALUE = 0.123456789  # its 8 IEEE 754 bytes must go too
BEN_INPUT = b"key:ben-input-K2pv"  # another participant: kept


def _send(server, session, admin, trainer, client_id, messages):
    token = server.token(session, admin, "trainer", trainer)
    s = ReconnectingStream(open_channel(server.address), "train", token, client_id,
                           records_pb2.SOURCE_KIND_SCRIPT, "test", "pytest")
    assert s.wait_connected(10)
    for m in messages:
        s.send(m)
    assert s.flush(15)
    s.close()


def _file_bytes(data_dir):
    out = b""
    for name in ("tickmark.db", "tickmark.db-wal"):
        p = os.path.join(data_dir, name)
        if os.path.exists(p):
            with open(p, "rb") as f:
                out += f.read()
    return out


def _verify(*args):
    return subprocess.run([os.path.join(BIN, "tickmark"), "audit", "verify", *args],
                          capture_output=True, text=True, timeout=60)


@pytest.fixture(scope="module")
def ledger():
    """One server: a session with two trainers' feedback and a calibration
    answer, closed (receipt), a second session, p-ava erased, an archive;
    then the server stops so copies can be tampered with."""
    with tempfile.TemporaryDirectory(prefix="tickmark-audit-") as d:
        data = os.path.join(d, "data")
        os.makedirs(data)
        server = Server(data)
        try:
            session, admin = server.session(title="audit")
            now = time.monotonic_ns
            _send(server, session, admin, "p-ava", "pytest-ava", [
                stream_pb2.FeedbackMessage(value=1.0, event_source_ns=now(),
                                           input=AVA_INPUTS[0].decode(), audio_sha256=AVA_AUDIO),
                stream_pb2.FeedbackMessage(value=AVA_VALUE, event_source_ns=now(),
                                           input=AVA_INPUTS[1].decode()),
                stream_pb2.CalibrationMessage(run="r1", move=stream_pb2.CalibrationMove(
                    move=1, shown_source_ns=now(), approve=True, detail="right")),
                stream_pb2.CalibrationMessage(run="r1", answer=stream_pb2.CalibrationAnswer(
                    event_source_ns=now(), approve=True, input=AVA_ANSWER.decode())),
            ])
            _send(server, session, admin, "p-ben", "pytest-ben", [
                stream_pb2.FeedbackMessage(value=-1.0, event_source_ns=now(),
                                           input=BEN_INPUT.decode())])
            other, other_admin = server.session(title="other")
            server.close_session(other, other_admin)
            closed = tm(server, "session", "close", session, token_file=None)
            receipt = os.path.join(d, "receipt.txt")
            tm(server, "audit", "receipt", "--session", session, "--out", receipt)
            before = _file_bytes(data)
            ok_before_erasure = _verify("--ledger", os.path.join(data, "tickmark.db"))
            erased = tm(server, "study", "erase-participant", "p-ava", "--reason", "withdrew")
            archive = os.path.join(d, "archive.db")
            archived = tm(server, "archive", "--session", session, "--out", archive,
                          "--data-dir", data)
        finally:
            server.stop()
        yield dict(dir=d, data=data, db=os.path.join(data, "tickmark.db"), session=session,
                   other=other, receipt=receipt, closed=closed, before=before,
                   ok_before_erasure=ok_before_erasure, erased=erased, archive=archive,
                   archived=archived, pub=os.path.join(data, "receipt-key.pub.pem"))


def test_close_prints_a_receipt_that_openssl_verifies(ledger):
    with open(ledger["receipt"], "rb") as f:
        text = f.read()
    assert text.decode() in ledger["closed"].stdout  # session close printed the same receipt
    lines = text.split(b"\n")
    assert lines[0] == b"tickmark receipt 1"
    assert lines[1] == b"session: " + ledger["session"].encode()
    msg = b"\n".join(lines[:7]) + b"\n"  # docs/audit.md: the first seven lines are signed
    assert lines[7].startswith(b"signature: ")
    sig = base64.b64decode(lines[7][len(b"signature: "):])
    assert len(sig) == 64  # RFC 8032 §5.1.6: an Ed25519 signature is 64 bytes
    d = ledger["dir"]
    with open(os.path.join(d, "msg"), "wb") as f:
        f.write(msg)
    with open(os.path.join(d, "sig"), "wb") as f:
        f.write(sig)
    # The outside verifier: OpenSSL 3's pkeyutl, Ed25519 over the raw message.
    ok = subprocess.run(["openssl", "pkeyutl", "-verify", "-pubin", "-inkey", ledger["pub"],
                         "-rawin", "-in", os.path.join(d, "msg"), "-sigfile",
                         os.path.join(d, "sig")], capture_output=True, text=True)
    assert ok.returncode == 0, ok.stdout + ok.stderr
    assert "Signature Verified Successfully" in ok.stdout
    with open(os.path.join(d, "msg"), "wb") as f:
        f.write(msg.replace(b"last_sequence: ", b"last_sequence: 9"))
    bad = subprocess.run(["openssl", "pkeyutl", "-verify", "-pubin", "-inkey", ledger["pub"],
                          "-rawin", "-in", os.path.join(d, "msg"), "-sigfile",
                          os.path.join(d, "sig")], capture_output=True, text=True)
    assert bad.returncode != 0
    # The head hash is the hash of the named record (read with sqlite3).
    seq = int(lines[2].split(b": ")[1])
    head = bytes.fromhex(lines[3].split(b": ")[1].decode())
    with sqlite3.connect(ledger["db"]) as db:
        (h,) = db.execute("SELECT hash FROM record WHERE session_id = ? AND seq = ?",
                          (ledger["session"], seq)).fetchone()
    assert h == head
    # The private key is the owner's alone (mode 0600).
    mode = os.stat(os.path.join(ledger["data"], "receipt-key.pem")).st_mode
    assert stat.S_IMODE(mode) == 0o600


def test_chain_matches_hashlib_and_personal_digests(ledger):
    """hash = SHA-256(prev || body), prev of record 1 = 32 zero bytes; a
    sealed record's digest = SHA-256(salt || content) (docs/audit.md)."""
    with sqlite3.connect(ledger["db"]) as db:
        rows = db.execute("SELECT seq, body, hash FROM record WHERE session_id = ? ORDER BY seq",
                          (ledger["session"],)).fetchall()
        personal = {seq: (salt, content) for seq, salt, content in db.execute(
            "SELECT seq, salt, content FROM personal WHERE session_id = ?", (ledger["session"],))}
        (version,) = db.execute("SELECT chain_version FROM session WHERE id = ?",
                                (ledger["session"],)).fetchone()
    assert version == 2
    prev = bytes(32)
    digests = 0
    for seq, body, h in rows:
        assert hashlib.sha256(prev + body).digest() == h, seq
        prev = h
        r = records_pb2.Record.FromString(body)
        digest = r.feedback.personal_digest or r.calibration_event.personal_digest
        if digest:
            digests += 1
            assert r.feedback.input == "" and r.calibration_event.detail == ""
            if seq in personal:
                salt, content = personal[seq]
                assert len(salt) == 32
                assert hashlib.sha256(salt + content).digest() == digest
    assert digests == 4  # ava's two feedback and one answer, ben's feedback
    assert len(personal) == 1  # ben's; ava's were erased


def test_erasure_leaves_no_byte_and_every_chain_verifies(ledger):
    assert ledger["ok_before_erasure"].returncode == 0, ledger["ok_before_erasure"].stdout
    value_bytes = records_pb2.PersonalContent(value=AVA_VALUE).SerializeToString()[1:]
    secrets = AVA_INPUTS + [AVA_ANSWER, AVA_AUDIO, value_bytes]
    for s in secrets:  # the control: they were in the file before
        assert s in ledger["before"], s
    assert "3 records erased" in ledger["erased"].stdout, ledger["erased"].stdout
    after = _file_bytes(ledger["data"])
    for s in secrets:
        assert s not in after, s
    assert BEN_INPUT in after  # the other participant's content stays
    v = _verify("--ledger", ledger["db"], "--receipt", ledger["receipt"])
    assert v.returncode == 0, v.stdout + v.stderr
    assert "2 erased" in v.stdout or "3 erased" in v.stdout
    # The erasure is a record: who, which records, why; not the values.
    with sqlite3.connect(ledger["db"]) as db:
        (body,) = db.execute("SELECT body FROM record WHERE session_id = ? AND kind = 'erasure'",
                             (ledger["session"],)).fetchone()
        typed = db.execute("SELECT input, erased FROM feedback WHERE session_id = ? ORDER BY seq",
                           (ledger["session"],)).fetchall()
    e = records_pb2.Record.FromString(body).erasure
    assert e.participant == "p-ava" and e.reason == "withdrew" and len(e.sequences) == 3
    assert typed == [("", 1), ("", 1), (BEN_INPUT.decode(), 0)]


def _tampered(ledger, name, sql_and_args):
    path = os.path.join(ledger["dir"], name)
    shutil.copy(ledger["db"], path)
    with sqlite3.connect(path) as db:
        for sql, args in sql_and_args:
            db.execute(sql, args)
    return path


def _feedback_seq(ledger):
    with sqlite3.connect(ledger["db"]) as db:
        return db.execute("SELECT MIN(seq) FROM record WHERE session_id = ? AND kind = 'feedback'",
                          (ledger["session"],)).fetchone()[0]


def test_verify_names_a_flipped_byte_a_deleted_record_and_a_reordered_pair(ledger):
    s, k = ledger["session"], _feedback_seq(ledger)
    with sqlite3.connect(ledger["db"]) as db:
        (body,) = db.execute("SELECT body FROM record WHERE session_id = ? AND seq = ?",
                             (s, k)).fetchone()
    flipped = bytearray(body)
    flipped[-3] ^= 0x01
    cases = {
        "flip.db": ([("UPDATE record SET body = ? WHERE session_id = ? AND seq = ?",
                      (bytes(flipped), s, k))], f"BROKEN at record {k}:"),
        "delete.db": ([("DELETE FROM record WHERE session_id = ? AND seq = ?", (s, k))],
                      f"BROKEN at record {k}: missing: record {k} is not in the ledger"),
        "swap.db": ([("UPDATE record SET seq = -1 WHERE session_id = ? AND seq = ?", (s, k)),
                     ("UPDATE record SET seq = ? WHERE session_id = ? AND seq = ?", (k, s, k + 1)),
                     ("UPDATE record SET seq = ? WHERE session_id = ? AND seq = -1", (k + 1, s))],
                    f"BROKEN at record {k}: reordered: row {k} holds record {k + 1}"),
    }
    for name, (sql, expect) in cases.items():
        v = _verify("--ledger", _tampered(ledger, name, sql))
        assert v.returncode == 1, (name, v.stdout, v.stderr)
        assert expect in v.stdout, (name, v.stdout)
        assert f"{ledger['other']}  chain v2" in v.stdout  # the other session still checks


def test_a_whole_chain_rewrite_is_caught_only_with_the_receipt(ledger):
    s, k = ledger["session"], _feedback_seq(ledger)
    path = os.path.join(ledger["dir"], "rewrite.db")
    shutil.copy(ledger["db"], path)
    with sqlite3.connect(path) as db:
        rows = db.execute("SELECT seq, body FROM record WHERE session_id = ? ORDER BY seq",
                          (s,)).fetchall()
        prev = bytes(32)
        for seq, body in rows:
            if seq == k:  # the forger moves a feedback 1 s earlier...
                r = records_pb2.Record.FromString(body)
                r.feedback.event_session_ns -= 1_000_000_000
                body = r.SerializeToString(deterministic=True)
            h = hashlib.sha256(prev + body).digest()  # ...and re-hashes everything after
            db.execute("UPDATE record SET body = ?, hash = ? WHERE session_id = ? AND seq = ?",
                       (body, h, s, seq))
            prev = h
        db.execute("DELETE FROM receipt")  # and removes the receipt kept in the file
    v = _verify("--ledger", path)
    assert v.returncode == 0, v.stdout  # the chains agree with themselves
    v = _verify("--ledger", path, "--receipt", ledger["receipt"], "--public-key", ledger["pub"])
    assert v.returncode == 1, v.stdout
    assert "the chain was rewritten after the receipt" in v.stdout
    # A receipt altered by hand fails its signature.
    with open(ledger["receipt"]) as f:
        text = f.read()
    forged = os.path.join(ledger["dir"], "forged.txt")
    lines = text.split("\n")
    lines[3] = "head_hash: " + prev.hex()  # the rewritten head, but the old signature
    with open(forged, "w") as f:
        f.write("\n".join(lines))
    v = _verify("--ledger", path, "--receipt", forged, "--public-key", ledger["pub"])
    assert v.returncode == 1 and "signature does not verify" in v.stdout, v.stdout


def test_archive_holds_one_session_and_verifies_alone(ledger):
    assert "chain verified" in ledger["archived"].stdout, ledger["archived"].stdout
    with sqlite3.connect(ledger["archive"]) as db:
        sessions = [r[0] for r in db.execute("SELECT id FROM session")]
        others = db.execute("SELECT COUNT(*) FROM record WHERE session_id != ?",
                            (ledger["session"],)).fetchone()[0]
        tokens = db.execute("SELECT COUNT(*) FROM token").fetchone()[0]
        (mode,) = db.execute("PRAGMA journal_mode").fetchone()
    assert sessions == [ledger["session"]] and others == 0 and tokens == 0
    assert mode == "delete"  # one self-contained file, no -wal needed
    v = _verify("--ledger", ledger["archive"], "--receipt", ledger["receipt"],
                "--public-key", ledger["pub"])
    assert v.returncode == 0, v.stdout + v.stderr
    assert "receipt matches" in v.stdout
    again = subprocess.run([os.path.join(BIN, "tickmark"), "archive", "--session",
                            ledger["session"], "--out", ledger["archive"], "--ledger",
                            ledger["db"]], capture_output=True, text=True)
    assert again.returncode == 1 and "exists" in again.stderr


def test_verify_exit_codes_for_what_cannot_be_checked(ledger):
    assert _verify("--ledger", os.path.join(ledger["dir"], "nope.db")).returncode == 3
    assert _verify("--ledger", ledger["db"], "--session", "s-none").returncode == 3
    bad = os.path.join(ledger["dir"], "bad-receipt.txt")
    with open(bad, "w") as f:
        f.write("hello\n")
    assert _verify("--ledger", ledger["db"], "--receipt", bad).returncode == 3
