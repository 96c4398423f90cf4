"""The demo agent: a dock rover that learns what its trainer approves of.

It drives episodes on the dock-rover floor, publishing every step to
tickmarkd, and reads the session's records back. Once a feedback's steps
have settled (their labels are final), the credit the server gave it
(shares from the trainer's delay kernel, on clock-corrected event time)
trains the rover's approval model; it acts greedily on that model, with some
exploration. Beside it, only for comparison, it trains the same model on
*naive* credit: each feedback wholly on the latest step that started before
the feedback arrived, with no clock correction. Both models are evaluated on
seeded offline episodes as feedback accumulates.

    python3 -m tickmark.demo.learner --server 127.0.0.1:7461 --token-file agent.token
"""

from __future__ import annotations

import argparse
import bisect
import json
import random
import sys
import threading
import time

import tickmark
from tickmark.demo import model, world
from tickmark.demo.progress import ProgressLine
from tickmark.version import add_version_argument


class Observer:
    """Reads the session's records and keeps the models and statistics."""

    def __init__(self):
        self.lock = threading.Lock()
        self.learned = model.ApprovalModel()
        self.naive = model.ApprovalModel()
        self.steps = {}          # step record sequence -> (position, action, step id, start, end)
        self.step_starts = []    # (start_session_ns, sequence), sorted
        self.feedback = {}       # feedback sequence -> (judged step id, value, event, arrival)
        self.naive_step = {}     # feedback sequence -> step sequence (naive credit)
        self.shares = {}         # feedback sequence -> [(step sequence, credit)]
        self.labelled = set()    # step sequences whose labels are final
        self.used = set()        # feedback already given to the model
        self.credit_total = 0.0
        self.credit_on_target = 0.0
        self.credits = []        # (feedback seq, step seq, credit) for the plot
        self.labels = 0
        self.unmatched = 0
        self.finished = threading.Event()

    def run(self, agent: tickmark.Agent) -> None:
        try:
            for r in agent.records(("step", "feedback", "credit", "label", "unmatched")):
                with self.lock:
                    self._take(r)
        finally:
            self.finished.set()

    def _take(self, r) -> None:
        if r.HasField("step"):
            s = r.step
            x, y = (int(v) for v in s.state.decode().split(","))
            self.steps[r.sequence] = ((x, y), s.action, s.step_id, s.start_session_ns)
            bisect.insort(self.step_starts, (s.start_session_ns, r.sequence))
        elif r.HasField("feedback"):
            f = r.feedback
            judged = int(f.input.split(":")[1]) if f.input.startswith("judged:") else -1
            self.feedback[r.sequence] = (judged, f.value, f.event_session_ns, f.arrival_session_ns)
            # Naive credit: all of it to the latest step started before arrival.
            i = bisect.bisect_right(self.step_starts, (f.arrival_session_ns, 1 << 63)) - 1
            if i >= 0:
                position, action, _, _ = self.steps[self.step_starts[i][1]]
                self.naive.add(f.value, [(model.key_of(position, action), 1.0)])
        elif r.HasField("credit"):
            c = r.credit
            self.credit_total += c.credit
            judged = self.feedback.get(c.feedback_sequence, (-1,))[0]
            if c.step_id == judged:
                self.credit_on_target += c.credit
            self.credits.append((c.feedback_sequence, c.step_sequence, c.credit))
            self.shares.setdefault(c.feedback_sequence, []).append((c.step_sequence, c.credit))
        elif r.HasField("label"):
            l = r.label
            self.labels += 1
            self.labelled.add(l.step_sequence)
        elif r.HasField("unmatched"):
            self.unmatched += 1

    def learn(self) -> None:
        """Gives the model every feedback whose credited steps have all settled."""
        for fseq, shares in self.shares.items():
            if fseq in self.used or not all(s in self.labelled for s, _ in shares):
                continue
            self.used.add(fseq)
            value = self.feedback[fseq][1]
            keys = [(model.key_of(*self.steps[s][:2]), c) for s, c in shares if s in self.steps]
            self.learned.add(value, keys)
        self.learned.fit()
        self.naive.fit()

    def precision(self) -> float:
        return self.credit_on_target / self.credit_total if self.credit_total > 0 else float("nan")


def episode_line(episode: int, feedback: int, labels: int, recent: list, learned: float,
                 precision: float) -> str:
    """The progress text after an episode; `recent` holds the last episodes' docked flags."""
    return (f"episode {episode:3d} | feedback {feedback:4d} | labels {labels:4d} | "
            f"success (last 10) {100 * sum(recent) / len(recent):3.0f}% | "
            f"greedy eval {100 * learned:3.0f}% | credit precision {precision:.2f}")


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python3 -m tickmark.demo.learner", description=__doc__,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    add_version_argument(p)
    p.add_argument("--server", default="127.0.0.1:7461")
    p.add_argument("--token-file", required=True, help="agent token")
    p.add_argument("--seconds", type=float, default=90, help="how long to drive (s)")
    p.add_argument("--rate", type=float, default=4.0, help="steps per second")
    p.add_argument("--epsilon", type=float, default=0.3, help="exploration rate")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--summary", help="write the final figures here (JSON)")
    p.add_argument("--plot", help="write the figure here (PNG or SVG; needs matplotlib)")
    p.add_argument("--wait-final", type=float, default=30.0,
                   help="after driving, wait this long for the session to close (final labels)")
    args = p.parse_args(argv)
    if not 0.5 <= args.rate <= 50:
        p.error("--rate must be in [0.5, 50]")

    rng = random.Random(args.seed)
    env = world.DockRover(seed=args.seed)
    random_rate = model.evaluate(model.random_policy)
    curve = []  # (feedback count, success tickmark, success naive)
    observer = Observer()
    history = []
    progress = ProgressLine(sys.stderr)  # a live line on a terminal, one line per episode otherwise
    with tickmark.Agent(args.server, token_file=args.token_file, client_id="demo-rover") as agent:
        reader = threading.Thread(target=observer.run, args=(agent,), daemon=True)
        reader.start()
        period = 1.0 / args.rate
        next_step = time.monotonic()
        stop_at = time.monotonic() + args.seconds
        episode = 0
        while time.monotonic() < stop_at:
            episode += 1
            position, done, info = env.reset(), False, {}
            while not done and time.monotonic() < stop_at:
                with observer.lock:
                    explore = rng.random() < args.epsilon
                    action = rng.choice(world.ACTIONS) if explore else observer.learned.greedy(
                        position, rng)
                agent.step(action, state=f"{position[0]},{position[1]}",
                           features=[*position, *world.relative(position)], episode=episode)
                position, _, done, info = env.step(action)
                next_step += period
                time.sleep(max(0.0, next_step - time.monotonic()))  # paced for the trainer
            history.append(bool(info.get("docked")))
            with observer.lock:
                observer.learn()
                learned = model.evaluate(lambda s, r: observer.learned.greedy(s, r))
                naive = model.evaluate(lambda s, r: observer.naive.greedy(s, r))
                nfb, precision, labels = len(observer.feedback), observer.precision(), observer.labels
            curve.append((nfb, learned, naive))
            recent = history[-10:]
            progress.show(episode_line(episode, nfb, labels, recent, learned, precision))
        progress.finish()
        agent.flush(10)
        # Final labels arrive once the session closes (the operator closes it).
        observer.finished.wait(args.wait_final)
        for sub in agent._subscriptions:
            sub.close()
    with observer.lock:
        observer.learn()
        learned = model.evaluate(lambda s, r: observer.learned.greedy(s, r))
        naive = model.evaluate(lambda s, r: observer.naive.greedy(s, r))
        summary = {
            "episodes": len(history),
            "steps": len(observer.steps),
            "feedback": len(observer.feedback),
            "labels": observer.labels,
            "unmatched": observer.unmatched,
            "credit_precision": observer.precision(),
            "success_learned": learned,
            "success_naive_credit": naive,
            "success_random": random_rate,
            "session_closed": observer.finished.is_set(),
        }
        curve.append((len(observer.feedback), learned, naive))
    print(json.dumps(summary, indent=2))
    if args.summary:
        with open(args.summary, "w", encoding="utf-8") as f:
            json.dump(summary, f, indent=2)
    if args.plot:
        from tickmark.demo import plot
        with observer.lock:
            plot.draw(args.plot, curve, random_rate, observer)
        print(f"plot written to {args.plot}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
