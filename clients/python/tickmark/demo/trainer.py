"""The simulated trainer: watches the rover's steps and approves or disapproves.

It approves moves that bring the rover closer to its dock (and waiting on
the dock) and disapproves the rest, after a reaction delay drawn from
--delay (lognormal by default; tickmark/demo/delays.py), with occasional
misses and mistakes. Its source clock is offset and
drifting, and its feedback goes to the server through whatever link --server
names (the demo puts a delay/jitter emulator there). Each feedback's input
label says which step it judged ("judged:<step id>"), so credit precision can
be measured afterwards: simulation only, no real trainer knows this.

    python3 -m tickmark.demo.trainer --server 127.0.0.1:PORT --token-file trainer.token \\
        --watch-server 127.0.0.1:7461 --watch-token-file observer.token
"""

from __future__ import annotations

import argparse
import heapq
import random
import sys
import threading
import time

import tickmark
from tickmark._connect import open_channel, read_token
from tickmark._stream import ReconnectingStream
from tickmark.demo import delays, world
from tickmark.subscription import Subscription
from tickmark.v1 import records_pb2, stream_pb2
from tickmark.version import add_version_argument


class DriftingClock:
    """A source clock: offset and drift against this machine's monotonic clock."""

    def __init__(self, offset_s: float, drift_ppm: float):
        self.base = time.monotonic_ns()
        self.offset_ns = int(offset_s * 1e9)
        self.rate = 1.0 + drift_ppm * 1e-6

    def at(self, mono_ns: int) -> int:
        return self.base + self.offset_ns + int((mono_ns - self.base) * self.rate)

    def __call__(self) -> int:
        return self.at(time.monotonic_ns())


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python3 -m tickmark.demo.trainer", description=__doc__,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    add_version_argument(p)
    p.add_argument("--server", default="127.0.0.1:7461", help="where feedback goes (the link)")
    p.add_argument("--token-file", required=True, help="trainer token")
    p.add_argument("--watch-server", default=None, help="where steps are watched (default --server)")
    p.add_argument("--watch-token-file", required=True, help="observer token of the session")
    p.add_argument("--delay", default=delays.DEFAULT,
                   help="reaction delay: lognormal:MU,SIGMA[,SHIFT] | exgauss:MU,SIGMA,TAU | "
                        "gamma:SHAPE,SCALE[,SHIFT] (seconds; default %(default)s)")
    p.add_argument("--delay-min", type=float, default=0.15, help="no press faster than this (s)")
    p.add_argument("--miss", type=float, default=0.1, help="probability of not reacting")
    p.add_argument("--mistake", type=float, default=0.05, help="probability of the wrong judgement")
    p.add_argument("--clock-offset", type=float, default=3.2, help="source clock offset (s)")
    p.add_argument("--clock-drift-ppm", type=float, default=80.0, help="source clock drift (ppm)")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--seconds", type=float, default=600, help="stop after this long")
    args = p.parse_args(argv)
    for name in ("miss", "mistake"):
        if not 0 <= getattr(args, name) <= 1:
            p.error(f"--{name} must be in [0, 1]")
    try:
        sample = delays.parse(args.delay)
    except ValueError as e:
        p.error(str(e))

    rng = random.Random(args.seed)
    clock = DriftingClock(args.clock_offset, args.clock_drift_ppm)
    channel = open_channel(args.server)
    stream = ReconnectingStream(channel, "train", read_token(token_file=args.token_file),
                                "sim-trainer", records_pb2.SOURCE_KIND_SCRIPT,
                                f"simulated trainer ({args.delay})",
                                "tickmark-demo-trainer 0.1", clock)
    if not stream.wait_connected(10):
        print("trainer: could not connect", file=sys.stderr)
        return 1
    watch = Subscription(open_channel(args.watch_server or args.server),
                         read_token(token_file=args.watch_token_file), stream.session_id,
                         kinds=("step",))
    presses: list = []  # heap of (monotonic press time, step id, value)
    cv = threading.Condition()
    done = threading.Event()

    def presser():
        while not done.is_set():
            with cv:
                while not presses and not done.is_set():
                    cv.wait(0.5)
                if done.is_set():
                    return
                when, step_id, value = presses[0]
                wait = (when - time.monotonic_ns()) / 1e9
                if wait > 0:
                    cv.wait(wait)  # the trainer's reaction delay
                    continue
                heapq.heappop(presses)
            # The event time is the press moment on the trainer's own clock.
            stream.send(stream_pb2.FeedbackMessage(value=value, event_source_ns=clock.at(when),
                                                   input=f"judged:{step_id}"))

    threading.Thread(target=presser, daemon=True).start()
    stop_at = time.monotonic() + args.seconds
    threading.Timer(args.seconds, watch.close).start()
    sent = 0
    for record in watch:
        if record.HasField("session_event"):
            break
        step = record.step
        try:
            x, y = (int(v) for v in step.state.decode().split(","))
        except ValueError:
            continue
        if rng.random() < args.miss:
            continue
        good = world.approves((x, y), step.action)
        if rng.random() < args.mistake:
            good = not good
        delay = max(args.delay_min, sample(rng))
        # The agent's clock is this machine's monotonic clock (same host).
        with cv:
            heapq.heappush(presses, (step.start_agent_ns + int(delay * 1e9), step.step_id,
                                     1.0 if good else -1.0))
            cv.notify()
        sent += 1
        if time.monotonic() > stop_at:
            break
    # Let the last presses happen, then deliver everything.
    deadline = time.monotonic() + 5
    while time.monotonic() < deadline:
        with cv:
            if not presses:
                break
        time.sleep(0.05)  # waiting out the last reaction delays
    done.set()
    with cv:
        cv.notify_all()
    stream.close(10)
    print(f"trainer: judged {sent} steps; {stream.acked} feedback acknowledged, "
          f"{len(stream.rejected)} rejected", file=sys.stderr)
    return 0 if not stream.rejected else 1


if __name__ == "__main__":
    sys.exit(main())
