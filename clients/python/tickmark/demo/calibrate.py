"""The simulated trainer's calibration run (docs/calibration.md).

A mover shows moves one after another; the simulated trainer approves the
ones the shown rule approves and disapproves the others, after a reaction
delay drawn from --delay (the same trainer as tickmark.demo.trainer), with
occasional misses and mistakes. The next move comes a short pause after the
answer (self-paced, as the real task). Everything goes to the server on a
Train stream through tickmark.CalibrationRun; the server fits the delays and
keeps the calibration for the token's trainer pseudonym.

    python3 -m tickmark.demo.calibrate --server 127.0.0.1:PORT --token-file cal.token
"""

from __future__ import annotations

import argparse
import random
import sys
import time

import tickmark
from tickmark.demo import delays
from tickmark.demo.trainer import DriftingClock
from tickmark.version import add_version_argument


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python3 -m tickmark.demo.calibrate", description=__doc__,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    add_version_argument(p)
    p.add_argument("--server", default="127.0.0.1:7461")
    p.add_argument("--token-file", required=True, help="trainer token (tickmark calibrate new)")
    p.add_argument("--answers", type=int, default=40, help="valid answers to collect")
    p.add_argument("--practice", type=int, default=3, help="practice moves first (not fitted)")
    p.add_argument("--delay", default=delays.DEFAULT,
                   help="reaction delay: lognormal:MU,SIGMA[,SHIFT] | exgauss:MU,SIGMA,TAU | "
                        "gamma:SHAPE,SCALE[,SHIFT] (seconds; default %(default)s)")
    p.add_argument("--pause", default="0.2,0.6",
                   help="pause after an answer before the next move, MIN,MAX seconds")
    p.add_argument("--miss", type=float, default=0.03, help="probability of not answering")
    p.add_argument("--mistake", type=float, default=0.02, help="probability of the wrong sign")
    p.add_argument("--clock-offset", type=float, default=3.2, help="source clock offset (s)")
    p.add_argument("--clock-drift-ppm", type=float, default=80.0, help="source clock drift (ppm)")
    p.add_argument("--seed", type=int, default=11)
    args = p.parse_args(argv)
    try:
        sample = delays.parse(args.delay)
        lo, hi = (float(v) for v in args.pause.split(","))
    except ValueError as e:
        p.error(str(e))
    if not 0 <= lo <= hi <= 10:
        p.error("--pause wants MIN,MAX with 0 <= MIN <= MAX <= 10")
    if not 3 <= args.answers <= 500 or not 0 <= args.practice <= 50:
        p.error("--answers must be in [3, 500] and --practice in [0, 50]")
    for name in ("miss", "mistake"):
        if not 0 <= getattr(args, name) < 1:
            p.error(f"--{name} must be in [0, 1)")

    rng = random.Random(args.seed)
    clock = DriftingClock(args.clock_offset, args.clock_drift_ppm)
    valid = 0
    try:
        with tickmark.CalibrationRun(args.server, token_file=args.token_file,
                                     client_id="sim-trainer-calibration",
                                     description=f"simulated trainer ({args.delay})",
                                     clock=clock) as run:
            limit = args.practice + 2 * args.answers
            while valid < args.answers and run.moves < limit:
                practice = run.moves < args.practice
                verdict = rng.random() < 0.5
                shown = clock()
                run.move(verdict, shown_ns=shown, practice=practice,
                         detail="right" if verdict else "left")
                if rng.random() < args.miss:
                    time.sleep(1.5)  # a missed move; the next comes after a longer pause
                    continue
                delay = min(sample(rng), 3.5)  # the task's answer window is 4 s
                sign = verdict if rng.random() >= args.mistake else not verdict
                # The press happens `delay` after the move appeared on the trainer's clock.
                time.sleep(max(0.0, delay - (clock() - shown) / 1e9))
                run.answer(sign, at_ns=shown + int(delay * 1e9), input="sim")
                valid += (sign == verdict) and not practice
                time.sleep(rng.uniform(lo, hi))
            calibration = run.finish(min_answers=args.answers,
                                     display_note="simulated: no display latency")
    except (tickmark.CalibrationFailed, tickmark.StreamError, TimeoutError, OSError) as e:
        print(f"calibration: {e}", file=sys.stderr)
        return 1
    print(f"calibration {calibration.id} for {calibration.trainer}: {calibration.valid} valid "
          f"answers of {calibration.moves} moves; chosen {calibration.kernel_description} "
          f"(true delays: {args.delay})", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
