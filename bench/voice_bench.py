"""tickmark-voice accuracy on synthetic speech, the full table per SNR.

Keyword phrases of a profile spoken by four flite voices, inserted into sox
pink noise at 20 and 10 dB SNR, and non-keyword sentences at both SNRs
(tests/clients/voice/voice_corpus.py builds and caches them): detection
rate, false detections per minute of other speech, and the onset error
against the known insertion offsets, with two baselines measured in the same
run: the recogniser's own word start, and an onset found by sox alone
(`sox stat` floor, then the silence effect 9 dB above it). Accuracy of
deterministic inputs; nothing here is timed or asserted.

  bench/voice_bench.py --bin build/bin [--cache DIR] [--profile FILE]
"""

from __future__ import annotations

import argparse
import os
import sys

import numpy as np

ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), ".."))
sys.path.insert(0, os.path.join(ROOT, "tests", "clients", "voice"))

import voice_corpus  # noqa: E402


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    ap.add_argument("--bin", default=os.path.join(ROOT, "build", "bin"))
    ap.add_argument("--cache", default=None, help="corpus cache (default: BIN/../voice-corpus)")
    ap.add_argument("--profile", default=os.path.join(ROOT, "clients", "voice", "profiles",
                                                      "en-basic.toml"))
    args, _ = ap.parse_known_args()  # scripts/bench.sh passes every bench the same extras
    cache = args.cache or os.path.join(os.path.dirname(os.path.abspath(args.bin)), "voice-corpus")
    manifest = voice_corpus.build(cache, args.profile, snrs=(20, 10), sentence_snrs=(20, 10),
                                  repeats=2)
    rows = voice_corpus.summarise(manifest, voice_corpus.run_all(args.bin, manifest))
    print(f"profile {args.profile}")
    print(voice_corpus.table(rows))
    print("onset error p90, tickmark-voice against the baselines (ratio < 1: better)")
    for key in sorted(k for k in rows if k.startswith("kw")):
        r = rows[key]
        ours = np.percentile(r["onset_abs_ms"], 90)
        rec = np.percentile(r["recogniser_abs_ms"], 90)
        sox = np.percentile(r["sox_abs_ms"], 90) if len(r["sox_abs_ms"]) else float("nan")
        print(f"  {r['snr_db']:>3} dB: {ours:.0f} ms; / recogniser's word start {ours / rec:.2f}; "
              f"/ sox silence onset {ours / sox:.2f}; signed mean {np.mean(r['onset_signed_ms']):+.1f} ms")
        if r["missed"]:
            print(f"         missed: {', '.join(r['missed'])}")


if __name__ == "__main__":
    main()
