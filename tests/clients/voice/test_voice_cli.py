"""tickmark-voice's command line, profiles and inputs: clear errors (exit 2)
for bad input; ALSA capture through ALSA's own "null" and "file" plugins."""

from __future__ import annotations

import os
import subprocess
import wave

import numpy as np
import pytest

import voice_corpus
from conftest import BIN, CACHE, PROFILE, ROOT

VOICE = os.path.join(BIN, "tickmark-voice")


def run(*args, env=None, timeout=60):
    return subprocess.run([VOICE, *args], capture_output=True, text=True, timeout=timeout,
                          stdin=subprocess.DEVNULL, env=env)


def write(path, text):
    path.write_text(text)
    return str(path)


def test_help_states_privacy_and_the_phrases_advice():
    p = run("--help")
    assert p.returncode == 0
    assert "no audio is written or sent anywhere unless --keep-audio" in p.stdout
    assert "multi-syllable" in p.stdout and "--detect-only" in p.stdout


@pytest.mark.parametrize("profile,needle", [
    ('[[phrase]]\ntext = "good job"\nvalue = 1\ncolour = "red"\n', ":4:1: phrase 1: unknown field"),
    ('[[phrase]]\ntext = "good job"\nvalue = 1\nthreshold = 0\n', "threshold must be within"),
    ('[[phrase]]\ntext = "good job"\nvalue = 2000\n', "within [-1000, 1000]"),
    ('[[phrase]]\ntext = "good 2 job"\nvalue = 1\n', "spell numbers out"),
    ('[[phrase]]\ntext = "good job"\nvalue = 1\n[[phrase]]\ntext = "Good  Job"\nvalue = -1\n',
     "already listed at line 2"),
    ('[[phrase]]\ntext = "good job xyzzyq"\nvalue = 1\n', '"xyzzyq" is not in the dictionary'),
    ('name = "x"\n', "no [[phrase]] tables"),
    ('[recogniser]\nmodel = "/nonexistent"\n[[phrase]]\ntext = "good job"\nvalue = 1\n',
     "no acoustic model"),
])
def test_bad_profile_is_a_clear_error(tmp_path, profile, needle):
    p = run("--profile", write(tmp_path / "p.toml", profile), "--wav", "-", "--detect-only")
    assert p.returncode in (1, 2), p.stderr
    assert needle in p.stderr, p.stderr
    if "acoustic model" not in needle:
        assert p.returncode == 2


def test_one_syllable_phrase_warns(tmp_path):
    prof = write(tmp_path / "p.toml", '[[phrase]]\ntext = "yes"\nvalue = 1\n')
    silence = tmp_path / "s.wav"
    voice_corpus.write_wav(str(silence), np.zeros(16000))
    p = run("--profile", prof, "--wav", str(silence), "--detect-only")
    assert p.returncode == 0, p.stderr
    assert '"yes" has 1 syllable' in p.stderr


def test_wrong_sample_rate_says_how_to_convert(tmp_path):
    path = tmp_path / "cd.wav"
    with wave.open(str(path), "wb") as w:
        w.setnchannels(2)
        w.setsampwidth(2)
        w.setframerate(44100)
        w.writeframes(b"\0" * 4 * 44100)
    p = run("--profile", PROFILE, "--wav", str(path), "--detect-only")
    assert p.returncode == 2
    assert "44100 Hz" in p.stderr and "sox IN -r 16000 -c 1 -b 16 OUT.wav" in p.stderr


def test_not_a_wav_file(tmp_path):
    p = run("--profile", PROFILE, "--wav", write(tmp_path / "x.wav", "hello"), "--detect-only")
    assert p.returncode == 2 and "does not start with RIFF" in p.stderr


@pytest.mark.parametrize("args,needle", [
    (["--wav", "a.wav", "--server", "127.0.0.1:1", "--token", "t"], "needs --audio-start"),
    (["--wav", "a.wav", "--detect-only", "--keep-audio", "k"], "not with --detect-only"),
    (["--audio-start", "ends-now"], "--audio-start is for --wav and --raw"),
    (["--wav", "a.wav", "--audio-start", "soon"], "--audio-start"),
    (["--wav", "a.wav", "--raw", "b.raw"], "--raw"),
    (["--stop-after", "-1"], "--stop-after"),
])
def test_bad_flags_exit_2(args, needle):
    p = run("--profile", PROFILE, *args)
    assert p.returncode == 2, p.stderr
    assert needle in p.stderr, p.stderr


def test_ends_now_needs_a_known_length():
    p = subprocess.run([VOICE, "--profile", PROFILE, "--raw", "-", "--audio-start", "ends-now",
                        "--detect-only"], input=b"\0\0" * 100, capture_output=True, timeout=60)
    assert p.returncode == 2 and b"length is unknown" in p.stderr


def test_raw_stdin_and_float_stereo_wav_are_read(tmp_path):
    """The same phrase read as raw 16-bit PCM on a pipe and as a 32-bit float
    stereo WAV file (converted with sox, an outside writer) is heard at the
    same sample."""
    clips = os.path.join(CACHE, "clips")
    os.makedirs(clips, exist_ok=True)
    x = voice_corpus._clip(clips, "excellent", "slt")
    sig = np.concatenate([np.zeros(16000), x, np.zeros(16000)])
    sig += np.random.default_rng(1).normal(0, 30, len(sig))
    mono = tmp_path / "mono.wav"
    voice_corpus.write_wav(str(mono), sig)
    stereo = tmp_path / "stereo.wav"
    subprocess.run(["sox", str(mono), "-e", "floating-point", "-b", "32", "-c", "2", str(stereo)],
                   check=True)
    raw = np.clip(np.round(sig), -32768, 32767).astype("<i2").tobytes()
    p1 = subprocess.run([VOICE, "--profile", PROFILE, "--raw", "-", "--detect-only"], input=raw,
                        capture_output=True, timeout=60)
    p2 = run("--profile", PROFILE, "--wav", str(stereo), "--detect-only")
    h1 = [voice_corpus.parse_heard(l) for l in p1.stdout.decode().splitlines()]
    h2 = [voice_corpus.parse_heard(l) for l in p2.stdout.splitlines()]
    assert [h["phrase"] for h in h1] == ["excellent"] == [h["phrase"] for h in h2], (p1, p2)
    assert abs(h1[0]["onset_s"] - 1.0) <= 0.05
    assert abs(h1[0]["onset_s"] - h2[0]["onset_s"]) <= 0.002


def alsa_home(tmp_path, infile):
    """A HOME whose ~/.asoundrc defines a capture device reading `infile`
    through ALSA's file plugin (on top of the null plugin)."""
    home = tmp_path / "home"
    home.mkdir()
    (home / ".asoundrc").write_text(
        'pcm.voicetest {\n type file\n slave.pcm null\n file "/dev/null"\n'
        f' infile "{infile}"\n format "raw"\n}}\n')
    return {**os.environ, "HOME": str(home)}


def test_alsa_null_device_captures_silence(tmp_path):
    p = run("--profile", PROFILE, "--alsa-device", "null", "--detect-only", "--stop-after", "3")
    assert p.returncode == 0, p.stderr
    assert p.stdout == ""
    assert "heard 0 phrases in 3.0 s of audio" in p.stderr


def test_alsa_capture_hears_what_the_file_holds(tmp_path):
    """ALSA's file plugin plays a generated mix into the capture path: the
    phrases are heard at the same samples as when the mix is read as a WAV
    file, and near their insertion offsets (audio time: the plugin is not
    paced like a sound card, so monotonic times are not checked here)."""
    clips = os.path.join(CACHE, "clips")
    os.makedirs(clips, exist_ok=True)
    items = [({"phrase": p, "voice": v}, voice_corpus._clip(clips, p, v))
             for p, v in (("nice work", "awb"), ("not like that", "slt"))]
    entry = voice_corpus._mix(str(tmp_path), "alsa", items, 20, 11,
                              voice_corpus._noise(CACHE, 1800), 321 * voice_corpus.RATE)
    raw = tmp_path / "alsa.raw"
    raw.write_bytes(voice_corpus.read_wav(entry["path"]).astype("<i2").tobytes())
    p = run("--profile", PROFILE, "--alsa-device", "voicetest", "--detect-only", "--stop-after",
            f"{entry['seconds']:.2f}", env=alsa_home(tmp_path, raw))
    assert p.returncode == 0, p.stderr
    via_alsa = [voice_corpus.parse_heard(l) for l in p.stdout.splitlines()]
    via_wav = voice_corpus.detect(BIN, PROFILE, entry["path"])
    keys = ("phrase", "onset_s", "recogniser_s", "end_s", "method", "score")
    assert [[h[k] for k in keys] for h in via_alsa] == [[h[k] for k in keys] for h in via_wav]
    assert via_alsa, p.stderr
    for h in via_alsa:
        ins = next(i for i in entry["insertions"] if i["phrase"] == h["phrase"])
        assert abs(h["onset_s"] - ins["start"] / voice_corpus.RATE) <= 0.05


def test_alsa_missing_device_is_a_clear_error():
    p = run("--profile", PROFILE, "--alsa-device", "nosuchdevice", "--detect-only")
    assert p.returncode == 1
    assert 'ALSA device "nosuchdevice": cannot open for capture' in p.stderr


def test_list_devices_names_alsa_capture_devices():
    p = run("--list-devices")
    assert p.returncode == 0, p.stderr
    # alsa.conf defines pcm.null with a hint, so it is listed on every machine.
    assert any(line.startswith("null\t") for line in p.stdout.splitlines()), p.stdout
