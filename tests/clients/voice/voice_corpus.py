"""Synthetic speech corpus for tickmark-voice's tests and bench.

Ground truth by construction: every phrase of a profile is spoken by flite
(Debian's flite; voices slt, rms, awb, kal16), resampled to 16 kHz mono and
cut with sox's silence effect so that the clip's first sample is where the
speech starts (the first 5 ms above 1% of full scale: `silence 1 0.005 1%`).
The clips are scaled to one speech level and inserted at known sample offsets
into pink noise made by sox (`synth pinknoise`, repeatable with -R), scaled
for the wanted SNR: 20 log10(rms(clip) / rms(noise)), the RMS of each clip
over its whole length (common practice, no source). Non-keyword sentences
(ordinary lab talk, none holding a profile phrase) are mixed the same way to
count false detections.

Everything is generated once and cached under a folder keyed by the inputs
and the tools' versions, so a test session (and the bench) pays for it once.
"""

from __future__ import annotations

import hashlib
import json
import os
import random
import re
import shlex
import shutil
import subprocess
import tempfile
import tomllib
import wave
from concurrent.futures import ThreadPoolExecutor

import numpy as np

RATE = 16000
VOICES = ("slt", "rms", "awb", "kal16")
SPEECH_RMS = 0.05 * 32768  # every clip is scaled to this RMS (-26 dBFS)
TRIM = ["silence", "1", "0.005", "1%"]
GENERATOR = "voice-corpus 2"  # bump when the generation changes

# Ordinary things said in a lab while an agent trains; none holds a phrase of
# the shipped profiles (the test checks that).
SENTENCES = (
    "The rover is heading towards the charging dock now.",
    "Please write down the time when the block begins.",
    "We will take a short break after this episode.",
    "Can you move the camera a little to the left?",
    "The battery level looks fine for another hour.",
    "I think the floor is slippery near the door.",
    "Let me check the cable before we start again.",
    "How many episodes are left in this session?",
    "The light in the corner keeps flickering.",
    "She said the meeting was moved to Thursday.",
    "This part of the track has a small bump.",
    "Turn the volume down a bit, it is too loud.",
    "We ran out of paper for the printer.",
    "The robot paused because the sensor was blocked.",
    "Remember to save the log file at the end.",
    "My coffee is getting cold on the table.",
    "The wheels need a little cleaning tomorrow.",
    "Is the window open or is that the fan?",
    "He walked across the room to get a chair.",
    "The next trial starts in about a minute.",
    "Look at the screen, the map is updating.",
    "It is a quiet afternoon in the lab today.",
    "Somebody left a bag under the desk.",
    "The agent seems to prefer the longer route.",
    "Good morning, everyone, let us begin.",
    "Which way did it turn at the crossing?",
    "That was not what I expected to see.",
    "Well, the weather is nice outside today.",
)


def profile_phrases(profile_path):
    """[(text, value)] of a tickmark-voice profile, text normalised as the program does."""
    with open(profile_path, "rb") as f:
        doc = tomllib.load(f)
    return [(" ".join(p["text"].lower().split()), float(p["value"])) for p in doc["phrase"]]


def read_wav(path):
    with wave.open(path) as w:
        assert w.getnchannels() == 1 and w.getsampwidth() == 2 and w.getframerate() == RATE, path
        return np.frombuffer(w.readframes(w.getnframes()), dtype="<i2").astype(np.float64)


def write_wav(path, x):
    with wave.open(path, "wb") as w:
        w.setnchannels(1)
        w.setsampwidth(2)
        w.setframerate(RATE)
        w.writeframes(np.clip(np.round(x), -32768, 32767).astype("<i2").tobytes())


def _version(cmd):
    r = subprocess.run(cmd, capture_output=True, text=True)
    return (r.stdout + r.stderr).strip()


def check_tools():
    missing = [t for t in ("flite", "sox") if shutil.which(t) is None]
    if missing:
        raise RuntimeError(f"{', '.join(missing)} missing: apt-get install flite sox (./run does)")


def _clip(folder, text, voice):
    """The trimmed 16 kHz clip of `text` in `voice` (cached), scaled to SPEECH_RMS."""
    name = os.path.join(folder, f"{voice}-{hashlib.sha1(text.encode()).hexdigest()[:12]}.wav")
    if not os.path.exists(name):
        with tempfile.TemporaryDirectory() as tmp:
            raw = os.path.join(tmp, "flite.wav")
            subprocess.run(["flite", "-voice", voice, "-t", text, "-o", raw], check=True,
                           capture_output=True)
            subprocess.run(["sox", raw, "-r", str(RATE), "-c", "1", "-b", "16",
                            os.path.join(tmp, "clip.wav"), *TRIM], check=True, capture_output=True)
            os.replace(os.path.join(tmp, "clip.wav"), name)
    x = read_wav(name)
    return x / np.sqrt(np.mean(x ** 2)) * SPEECH_RMS


def _noise(folder, seconds):
    path = os.path.join(folder, f"pink-{int(seconds)}.wav")
    if not os.path.exists(path):
        subprocess.run(["sox", "-R", "-n", "-r", str(RATE), "-c", "1", "-b", "16", path + ".tmp.wav",
                        "synth", str(int(seconds)), "pinknoise"], check=True, capture_output=True)
        os.replace(path + ".tmp.wav", path)
    return read_wav(path)


def _mix(folder, name, items, snr_db, seed, noise, noise_at, gap_s=(1.5, 3.0)):
    """Writes name.wav: items [(label dict, samples)] in noise, each followed
    by a gap drawn from gap_s (keyword clips need over 1.15 s of noise before
    them for the onset search's floor); returns the manifest entry."""
    rng = random.Random(seed)
    pos = RATE  # the first second is noise only: the onset search's floor
    placed = []
    gaps = [int(rng.uniform(*gap_s) * RATE) for _ in items]
    total = pos + sum(len(x) + g for (_, x), g in zip(items, gaps)) + RATE
    seg = noise[(noise_at + np.arange(total)) % len(noise)]  # wraps round a long noise file
    seg = seg / np.sqrt(np.mean(seg ** 2)) * SPEECH_RMS / 10 ** (snr_db / 20)
    for (label, x), g in zip(items, gaps):
        seg[pos:pos + len(x)] += x
        placed.append(dict(label, start=pos, end=pos + len(x)))
        pos += len(x) + g
    path = os.path.join(folder, name + ".wav")
    write_wav(path, seg)
    return {"path": path, "snr_db": snr_db, "seconds": total / RATE, "insertions": placed,
            "speech_seconds": sum(p["end"] - p["start"] for p in placed) / RATE}


def build(cache_root, profile_path, snrs=(20, 10), sentence_snrs=(20,), repeats=2):
    """Generates (or finds cached) mixes; returns the manifest dict.

    Files: kw<SNR> (every phrase x voice, `repeats` times in random order) and
    nk<SNR> (every sentence x voice)."""
    check_tools()
    phrases = profile_phrases(profile_path)
    key_src = json.dumps([GENERATOR, phrases, SENTENCES, VOICES, list(snrs), list(sentence_snrs),
                          repeats, _version(["flite", "--version"]), _version(["sox", "--version"])])
    key = hashlib.sha256(key_src.encode()).hexdigest()[:16]
    folder = os.path.join(cache_root, key)
    manifest_path = os.path.join(folder, "manifest.json")
    if os.path.exists(manifest_path):
        with open(manifest_path) as f:
            return json.load(f)
    os.makedirs(folder, exist_ok=True)
    clips = os.path.join(cache_root, "clips")
    os.makedirs(clips, exist_ok=True)
    jobs = [(t, v) for t in [p for p, _ in phrases] + [s for s in SENTENCES] for v in VOICES]
    with ThreadPoolExecutor(max_workers=2) as pool:
        audio = dict(zip(jobs, pool.map(lambda j: _clip(clips, *j), jobs)))
    noise = _noise(cache_root, 1800)
    manifest = {"key": key, "profile": os.path.abspath(profile_path), "files": {}}
    at = 0
    for i, snr in enumerate(snrs):
        rng = random.Random(100 + i)
        items = [({"phrase": p, "value": v, "voice": voice}, audio[(p, voice)])
                 for _ in range(repeats) for p, v in phrases for voice in VOICES]
        rng.shuffle(items)
        entry = _mix(folder, f"kw{snr}", items, snr, 200 + i, noise, at)
        at += int(entry["seconds"] * RATE)
        manifest["files"][f"kw{snr}"] = entry
    for i, snr in enumerate(sentence_snrs):
        items = [({"sentence": s, "voice": voice}, audio[(s, voice)])
                 for s in SENTENCES for voice in VOICES]
        random.Random(300 + i).shuffle(items)
        entry = _mix(folder, f"nk{snr}", items, snr, 400 + i, noise, at, gap_s=(0.4, 0.8))
        at += int(entry["seconds"] * RATE)
        manifest["files"][f"nk{snr}"] = entry
    with open(manifest_path + ".tmp", "w") as f:
        json.dump(manifest, f)
    os.replace(manifest_path + ".tmp", manifest_path)
    return manifest


HEARD = re.compile(r"^heard (.*)$")


def parse_heard(line):
    """A `heard ...` line of tickmark-voice as a dict (numbers converted)."""
    m = HEARD.match(line.strip())
    if not m:
        return None
    out = {}
    for tok in shlex.split(m.group(1)):
        k, _, v = tok.partition("=")
        try:
            out[k] = float(v) if re.fullmatch(r"[-+]?[0-9.]+(e[-+]?[0-9]+)?", v) else v
        except ValueError:
            out[k] = v
    return out


def detect(bin_dir, profile_path, wav_path, extra=()):
    """Runs tickmark-voice --detect-only on a file; returns its heard lines as dicts."""
    r = subprocess.run([os.path.join(bin_dir, "tickmark-voice"), "--profile", profile_path,
                        "--wav", wav_path, "--detect-only", "--quiet", *extra],
                       capture_output=True, text=True, timeout=300)
    if r.returncode != 0:
        raise RuntimeError(f"tickmark-voice failed ({r.returncode}): {r.stderr}")
    return [d for d in map(parse_heard, r.stdout.splitlines()) if d]


def match(entry, detections, slack_s=0.3):
    """Pairs insertions with detections of the same phrase overlapping them.

    Returns (pairs [(insertion, detection)], missed [insertion], extra [detection])."""
    used = set()
    pairs, missed = [], []
    for ins in entry["insertions"]:
        a, b = ins["start"] / RATE - slack_s, ins["end"] / RATE + slack_s
        hit = None
        for k, d in enumerate(detections):
            if k in used or d["phrase"] != ins.get("phrase"):
                continue
            if d["recogniser_s"] < b and d["end_s"] > a:
                hit = k
                break
        if hit is None:
            missed.append(ins)
        else:
            used.add(hit)
            pairs.append((ins, detections[hit]))
    extra = [d for k, d in enumerate(detections) if k not in used]
    return pairs, missed, extra


def sox_onset(wav_path, around_s, back_s=0.35, floor_s=0.8, rise_db=9.0):
    """An independent onset estimate with sox alone: the noise floor's RMS is
    measured by `sox stat` over the floor_s before the search window, and
    sox's silence effect trims the window [around_s - back_s, ...] up to the
    first 20 ms above floor x 10^(rise_db/20). Returns seconds, or None."""
    start = max(0.0, around_s - back_s - floor_s)
    floor_len = around_s - back_s - start
    if floor_len < 0.1:
        return None
    r = subprocess.run(["sox", wav_path, "-n", "trim", f"{start:.6f}", f"{floor_len:.6f}", "stat"],
                       capture_output=True, text=True)
    m = re.search(r"RMS\s+amplitude:\s+([0-9.eE+-]+)", r.stderr)
    if not m:
        return None
    level = min(0.99, float(m.group(1)) * 10 ** (rise_db / 20))
    with tempfile.TemporaryDirectory() as tmp:
        out = os.path.join(tmp, "t.wav")
        win_start = around_s - back_s
        subprocess.run(["sox", wav_path, out, "trim", f"{win_start:.6f}", "1.5",
                        "silence", "1", "0.02", f"{level * 100:.4f}%"], check=True,
                       capture_output=True)
        with wave.open(out) as w:
            kept = w.getnframes()
    trimmed = int(1.5 * RATE) - kept
    if kept == 0:
        return None
    return win_start + trimmed / RATE


def summarise(manifest, results, with_sox=True):
    """Per file: detections, misses, false detections, onset errors. `results`
    maps a file key to its detections."""
    rows = {}
    for key, entry in manifest["files"].items():
        dets = results[key]
        pairs, missed, extra = match(entry, dets)
        row = {"snr_db": entry["snr_db"], "insertions": len(entry["insertions"]),
               "speech_minutes": entry["speech_seconds"] / 60, "seconds": entry["seconds"]}
        if key.startswith("kw"):
            row["detected"] = len(pairs)
            row["rate"] = len(pairs) / len(entry["insertions"])
            row["wrong_or_extra"] = len(extra)
            err = np.array([d["onset_s"] - i["start"] / RATE for i, d in pairs])
            rec = np.array([d["recogniser_s"] - i["start"] / RATE for i, d in pairs])
            row["onset_abs_ms"] = np.abs(err) * 1000
            row["onset_signed_ms"] = err * 1000
            row["recogniser_abs_ms"] = np.abs(rec) * 1000
            row["energy_share"] = (sum(1 for _, d in pairs if d["method"] == "energy") /
                                   max(1, len(pairs)))
            row["missed"] = [f'{m["phrase"]}|{m["voice"]}' for m in missed]
            if with_sox:
                sox = [sox_onset(entry["path"], d["recogniser_s"]) for _, d in pairs]
                ok = [(s, i) for s, (i, _) in zip(sox, pairs) if s is not None]
                row["sox_abs_ms"] = np.array([abs(s - i["start"] / RATE) for s, i in ok]) * 1000
                row["sox_found"] = len(ok)
        else:
            row["false"] = len(dets)
            row["false_per_minute"] = len(dets) / (entry["speech_seconds"] / 60)
            row["false_list"] = [(d["phrase"], d["onset_s"]) for d in dets]
        rows[key] = row
    return rows


def run_all(bin_dir, manifest, workers=2):
    """Detections of every file, two at a time."""
    keys = list(manifest["files"])
    with ThreadPoolExecutor(max_workers=workers) as pool:
        found = pool.map(lambda k: detect(bin_dir, manifest["profile"],
                                          manifest["files"][k]["path"]), keys)
        return dict(zip(keys, found))


def pct(a, q):
    return float(np.percentile(a, q)) if len(a) else float("nan")


def table(rows):
    """The bench table as text."""
    out = []
    out.append("keyword phrases (flite voices %s over sox pink noise)" % ", ".join(VOICES))
    out.append(f"{'SNR':>5} {'detected':>10} {'rate':>6} {'extra':>6} "
               f"{'onset p50':>10} {'p90':>6} {'max':>6} {'energy':>7} "
               f"{'recog p50':>10} {'p90':>6} {'sox p50':>8} {'p90':>6}  ms, |error|")
    for key in sorted(k for k in rows if k.startswith("kw")):
        r = rows[key]
        out.append(f"{r['snr_db']:>4}dB {r['detected']:>4}/{r['insertions']:<5} {r['rate']:>6.0%} "
                   f"{r['wrong_or_extra']:>6} {pct(r['onset_abs_ms'], 50):>10.0f} "
                   f"{pct(r['onset_abs_ms'], 90):>6.0f} "
                   f"{(r['onset_abs_ms'].max() if len(r['onset_abs_ms']) else float('nan')):>6.0f} "
                   f"{r['energy_share']:>7.0%} {pct(r['recogniser_abs_ms'], 50):>10.0f} "
                   f"{pct(r['recogniser_abs_ms'], 90):>6.0f} "
                   f"{pct(r.get('sox_abs_ms', []), 50):>8.0f} {pct(r.get('sox_abs_ms', []), 90):>6.0f}")
    out.append("non-keyword sentences")
    for key in sorted(k for k in rows if k.startswith("nk")):
        r = rows[key]
        out.append(f"{r['snr_db']:>4}dB {r['false']:>3} false detections in "
                   f"{r['speech_minutes']:.1f} min of speech = {r['false_per_minute']:.2f}/min "
                   f"{r['false_list']}")
    return "\n".join(out)
