"""tickmark-voice against a real tickmarkd, reading a generated WAV file whose
first sample is declared on CLOCK_MONOTONIC: every phrase becomes one stored
feedback whose event time is the phrase's onset mapped to session time."""

from __future__ import annotations

import hashlib
import os
import re
import sqlite3
import subprocess
import time
import wave

import voice_corpus
from conftest import BIN, CACHE, PROFILE

from tickmark.v1 import records_pb2

RATE = voice_corpus.RATE
# The phrases said in the file, one voice each.
SAID = [("excellent", 1.0, "slt"), ("not like that", -1.0, "rms"), ("nice work", 1.0, "awb"),
        ("stop that", -1.0, "kal16")]
# Onset accuracy per phrase at 20 dB SNR: the p90 target of docs/voice.md.
ONSET_TOLERANCE_NS = 50_000_000


def make_file(folder):
    clips = os.path.join(CACHE, "clips")
    os.makedirs(clips, exist_ok=True)
    voice_corpus.check_tools()
    items = [({"phrase": p, "value": v, "voice": voice}, voice_corpus._clip(clips, p, voice))
             for p, v, voice in SAID]
    noise = voice_corpus._noise(CACHE, 1800)
    return voice_corpus._mix(folder, "said", items, 20, 7, noise, 123 * RATE)


def test_feedback_times_are_the_onsets_mapped_to_session_time(server, tmp_path):
    entry = make_file(str(tmp_path))
    session, admin = server.session(title="voice e2e")
    token = tmp_path / "trainer.token"
    token.write_text(server.token(session, admin, "trainer", "trainer-v1"))
    keep = tmp_path / "kept"
    # The file "was recorded" so that it ended a second ago.
    start_ns = time.clock_gettime_ns(time.CLOCK_MONOTONIC) - int((entry["seconds"] + 1) * 1e9)
    p = subprocess.run(
        [os.path.join(BIN, "tickmark-voice"), "--profile", PROFILE, "--wav", entry["path"],
         "--audio-start", str(start_ns), "--server", server.address, "--token-file", str(token),
         "--client-id", "voice-e2e", "--keep-audio", str(keep)],
        capture_output=True, text=True, timeout=120, stdin=subprocess.DEVNULL)
    assert p.returncode == 0, (p.stdout, p.stderr)
    acks = [l for l in p.stdout.splitlines() if l.startswith("ack ")]
    assert len(acks) == len(SAID), p.stdout

    db = sqlite3.connect(os.path.join(server.data_dir, "tickmark.db"))
    utc_anchor, mono_anchor = db.execute(
        "SELECT utc_anchor_ns, mono_anchor_ns FROM session WHERE id = ?", (session,)).fetchone()
    rows = db.execute("SELECT client_seq, value, input, event_source_ns, event_session_ns, "
                      "uncertainty_ns FROM feedback WHERE session_id = ? ORDER BY client_seq",
                      (session,)).fetchall()
    # Chain version 2 (docs/audit.md): the body holds a digest of the personal
    # fields; the fields themselves sit in the `personal` table.
    bodies = {seq: (body, salt, content) for seq, body, salt, content in db.execute(
        "SELECT r.client_seq, r.body, p.salt, p.content FROM record r JOIN personal p "
        "ON p.session_id = r.session_id AND p.seq = r.seq "
        "WHERE r.session_id = ? AND r.client_id = 'voice-e2e'", (session,))}
    assert len(rows) == len(SAID)
    for (seq, value, label, source_ns, session_ns, uncertainty_ns), ins in zip(
            rows, entry["insertions"]):
        assert value == ins["value"]
        assert re.fullmatch(r"voice:%s onset=(energy|recogniser) lat=\d+ms" % ins["phrase"], label)
        # The onset: the phrase's first sample, by construction.
        inserted_ns = start_ns + ins["start"] * 1_000_000_000 // RATE
        assert abs(source_ns - inserted_ns) <= ONSET_TOLERANCE_NS, (ins, source_ns - inserted_ns)
        # Client and server share CLOCK_MONOTONIC here, so the true mapping is
        # session = utc_anchor + (mono - mono_anchor) (server/core/time.h
        # SessionClock); the server's estimate lies within its stated bound.
        true_session_ns = utc_anchor + (source_ns - mono_anchor)
        assert abs(session_ns - true_session_ns) <= uncertainty_ns, (
            session_ns - true_session_ns, uncertainty_ns)
        assert abs(session_ns - (utc_anchor + inserted_ns - mono_anchor)) <= (
            uncertainty_ns + ONSET_TOLERANCE_NS)
        print(f"{ins['phrase']}: onset {(source_ns - inserted_ns) / 1e6:+.1f} ms from the insertion; "
              f"mapped {(session_ns - true_session_ns) / 1e3:+.1f} us from the true session time, "
              f"stated uncertainty {uncertainty_ns / 1e3:.1f} us; {label}")
        # --keep-audio: the file named by the client sequence, its SHA-256 in
        # the record's personal content, which the chained body commits to as
        # SHA-256(salt || content); hashlib is the outside SHA-256. The file
        # is readable by Python's wave module.
        body, salt, content = bodies[seq]
        record = records_pb2.Record.FromString(body)
        personal = records_pb2.PersonalContent.FromString(content)
        kept = keep / f"feedback-{seq}.wav"
        data = kept.read_bytes()
        assert personal.audio_sha256 == hashlib.sha256(data).digest()
        assert record.feedback.personal_digest == hashlib.sha256(salt + content).digest()
        with wave.open(str(kept)) as w:
            assert (w.getnchannels(), w.getsampwidth(), w.getframerate()) == (1, 2, RATE)
            assert w.getnframes() >= ins["end"] - ins["start"]
        assert oct(kept.stat().st_mode & 0o777) == "0o600"
    assert sorted(os.listdir(keep)) == sorted(f"feedback-{r[0]}.wav" for r in rows)


def test_without_keep_audio_nothing_is_written(server, tmp_path):
    entry = make_file(str(tmp_path))
    session, admin = server.session(title="voice privacy")
    token = tmp_path / "trainer.token"
    token.write_text(server.token(session, admin, "trainer", "trainer-v2"))
    work = tmp_path / "cwd"
    work.mkdir()
    start_ns = time.clock_gettime_ns(time.CLOCK_MONOTONIC) - int((entry["seconds"] + 1) * 1e9)
    p = subprocess.run(
        [os.path.join(BIN, "tickmark-voice"), "--profile", PROFILE, "--wav", entry["path"],
         "--audio-start", str(start_ns), "--server", server.address, "--token-file", str(token)],
        capture_output=True, text=True, timeout=120, cwd=work, stdin=subprocess.DEVNULL,
        env={**os.environ, "TMPDIR": str(work)})
    assert p.returncode == 0, p.stderr
    assert os.listdir(work) == []
    db = sqlite3.connect(os.path.join(server.data_dir, "tickmark.db"))
    for (body,) in db.execute("SELECT body FROM record WHERE session_id = ? AND kind = 'feedback'",
                              (session,)):
        assert records_pb2.Record.FromString(body).feedback.audio_sha256 == b""


def test_a_refused_token_stops_listening(server, tmp_path):
    """Endless audio (ALSA's null device) and a token the server does not
    know: the stream fails for good, and tickmark-voice says so and exits 1
    instead of listening on."""
    token = tmp_path / "bad.token"
    token.write_text("tmk_not_a_token\n")
    p = subprocess.run(
        [os.path.join(BIN, "tickmark-voice"), "--profile", PROFILE, "--alsa-device", "null",
         "--server", server.address, "--token-file", str(token)],
        capture_output=True, text=True, timeout=60, stdin=subprocess.DEVNULL)
    assert p.returncode == 1, p.stderr
    assert "UNAUTHENTICATED" in p.stderr, p.stderr
