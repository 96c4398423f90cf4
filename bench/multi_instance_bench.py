#!/usr/bin/python3
"""Ingest through one and three tickmarkd instances on one PostgreSQL ledger,
against one tickmarkd on its SQLite ledger, measured in the same run
(docs/architecture.md §11; DEVELOPERS.md, "Benchmarks").

Feedback acknowledged per second over many sessions: each session has one
trainer stream (the Python package's reconnecting stream, pipelining up to
--window unacknowledged feedback), connected to the instance that owns the
session (sessions are created round-robin on the instances, so each owns
its share). An ack means the record is committed. PostgreSQL runs here too,
with fsync on (synchronous_commit on, its default). Clients, servers and the
database share this machine's cores, so the ratios are what to read; on
one host three instances cannot beat one by much, the point of several is
surviving the loss of one.

Prints; never asserts (tests/python/test_multi_instance_bench.py runs a smoke
of it). Needs the built binaries (TICKMARK_BIN) and build/python on
PYTHONPATH:

  PYTHONPATH=build/python TICKMARK_BIN=build/bin /usr/bin/python3 bench/multi_instance_bench.py
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import threading
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "tests", "python"))

from conftest import Server  # noqa: E402
from pg_fixture import PgServer, Unavailable, free_port  # noqa: E402
from tickmark._connect import open_channel  # noqa: E402
from tickmark._stream import ReconnectingStream  # noqa: E402
from tickmark.v1 import records_pb2, stream_pb2  # noqa: E402


def start(kind, tmp, url=None, n=1):
    out = []
    for k in range(n):
        d = os.path.join(tmp, f"{kind}-{k}")
        os.makedirs(d, exist_ok=True)
        extra = ["--feedback-rate", "0", "--max-in-flight-per-stream", "1024"]
        listen = "127.0.0.1:0"
        if url:
            port = free_port()
            listen = f"127.0.0.1:{port}"
            extra += ["--advertise", listen, "--ledger", url, "--instance-id", f"bench-{k}"]
        out.append(Server(d, extra=extra, listen=listen))
    return out


def measure(instances, sessions, seconds, window):
    streams = []
    for i in range(sessions):
        home = instances[i % len(instances)]
        sid, admin = home.session(title=f"bench-{i}")
        token = home.token(sid, admin, "trainer", f"t{i}")
        acked = [0]

        def on_ack(ack, acked=acked):
            if ack.code == 0:
                acked[0] += 1

        s = ReconnectingStream(open_channel(home.address), "train", token, f"bench:{i}",
                               records_pb2.SOURCE_KIND_SCRIPT, "bench", "bench", on_ack=on_ack,
                               send_realtime=False)
        assert s.wait_connected(20)
        streams.append((s, acked))
    stop = threading.Event()

    def pump(s):
        while not stop.is_set():
            if s.pending < window:
                s.send(stream_pb2.FeedbackMessage(value=1.0, event_source_ns=time.monotonic_ns(),
                                                  input="bench"))
            else:
                time.sleep(0.0005)

    threads = [threading.Thread(target=pump, args=(s,), daemon=True) for s, _ in streams]
    for t in threads:
        t.start()
    time.sleep(min(1.0, seconds / 3))  # warm-up
    base = sum(a[0] for _, a in streams)
    t0 = time.monotonic()
    time.sleep(seconds)
    done = sum(a[0] for _, a in streams) - base
    elapsed = time.monotonic() - t0
    stop.set()
    for t in threads:
        t.join(5)
    for s, _ in streams:
        s.close(10)
    return done / elapsed


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--seconds", type=float, default=5.0, help="measuring time per row")
    ap.add_argument("--sessions", type=int, default=12, help="sessions (one trainer stream each)")
    ap.add_argument("--window", type=int, default=64, help="unacknowledged feedback per stream")
    args = ap.parse_args()
    if args.seconds <= 0 or args.sessions < 1 or args.window < 1:
        ap.error("--seconds, --sessions and --window must be positive")
    rows = []
    with tempfile.TemporaryDirectory(prefix="tm-mibench-") as tmp:
        inst = start("sqlite", tmp)
        try:
            rows.append(("sqlite, 1 instance", measure(inst, args.sessions, args.seconds, args.window)))
        finally:
            for i in inst:
                i.stop()
        try:
            pg = PgServer(fsync=True)
        except Unavailable as e:
            print(f"PostgreSQL rows skipped: {e}")
            pg = None
        if pg is not None:
            try:
                for n in (1, 3):
                    inst = start("pg", tmp, pg.new_database(), n)
                    try:
                        rows.append((f"postgresql, {n} instance{'s' if n > 1 else ''}",
                                     measure(inst, args.sessions, args.seconds, args.window)))
                    finally:
                        for i in inst:
                            i.stop()
            finally:
                pg.stop()
    base = rows[0][1]
    print(f"ingest over {args.sessions} sessions, window {args.window}, {args.seconds:g} s per row")
    print(f"{'setup':<26} {'acked/s':>10} {'vs sqlite x1':>13}")
    for name, rate in rows:
        print(f"{name:<26} {rate:>10.0f} {rate / base if base else 0:>12.2f}x")
    rates = dict(rows)
    # Targets (ours, no outside source): one PostgreSQL instance keeps at
    # least a third of the embedded ledger's rate (a network database with
    # a WAL flush per commit against SQLite's unsynced WAL); three instances
    # on one host lose no more than 30 % against one (the leases and the
    # fencing check cost little).
    targets = []
    if "postgresql, 1 instance" in rates:
        targets.append(("postgresql x1 >= 0.33 x sqlite x1", rates["postgresql, 1 instance"] >= base / 3))
    if "postgresql, 3 instances" in rates and "postgresql, 1 instance" in rates:
        targets.append(("postgresql x3 >= 0.7 x postgresql x1",
                        rates["postgresql, 3 instances"] >= 0.7 * rates["postgresql, 1 instance"]))
    for what, met in targets:
        print(f"target {what}: {'met' if met else 'NOT met'}")


if __name__ == "__main__":
    main()
