"""tickmarkd on a PostgreSQL ledger killed with SIGKILL while feedback is in
flight, then restarted on the same database: the PostgreSQL half of
tests/e2e/kill9_test.cc (which reads its SQLite ledger with the SQLite C API).

Checked against the database with psql and the chain with coreutils'
sha256sum, outside the server: every acknowledged feedback is stored once
with the sequence its ack named, sequences run 1..n without a hole, and each
hash is SHA-256(previous hash || body) (DEVELOPERS.md, "The ledger").
"""

from __future__ import annotations

import os
import threading
import time


from conftest import Server
from pg_fixture import assert_chain, free_port, pg  # noqa: F401 (pg: the module's PostgreSQL fixture)
from tickmark._connect import open_channel
from tickmark._stream import ReconnectingStream
from tickmark.v1 import records_pb2, stream_pb2

LEASE_MS = 1000


def start(data_dir, url, port, name):
    return Server(data_dir, listen=f"127.0.0.1:{port}", extra=(
        "--advertise", f"127.0.0.1:{port}", "--ledger", url, "--lease-ms", str(LEASE_MS),
        "--instance-id", name, "--feedback-rate", "0"))


def test_kill9_loses_and_doubles_nothing(pg, tmp_path):
    url = pg.new_database()
    db = url.rsplit("/", 1)[1]
    port = free_port()
    data = str(tmp_path / "data")
    os.makedirs(data)
    server = start(data, url, port, "first")
    sid, admin = server.session(title="kill9")
    acked = {}
    lock = threading.Lock()
    streams = []
    for j in range(2):
        token = server.token(sid, admin, "trainer", f"t{j}")

        def on_ack(ack, j=j):
            if ack.code == 0:
                with lock:
                    acked[(f"kill9:{j}", ack.client_sequence)] = ack.sequence

        s = ReconnectingStream(open_channel(server.address), "train", token, f"kill9:{j}",
                               records_pb2.SOURCE_KIND_SCRIPT, "kill9", "pytest", on_ack=on_ack,
                               send_realtime=False, channel_for=open_channel)
        assert s.wait_connected(20)
        streams.append(s)
    stop = threading.Event()

    def pump(s):
        while not stop.is_set():
            if s.pending < 64:  # pipelined, so the kill lands with messages in flight
                s.send(stream_pb2.FeedbackMessage(value=1.0, event_source_ns=time.monotonic_ns(),
                                                  input="kill9"))
            else:
                time.sleep(0.001)

    threads = [threading.Thread(target=pump, args=(s,), daemon=True) for s in streams]
    for t in threads:
        t.start()
    try:
        time.sleep(1.5)
        before = len(acked)
        server.proc.kill()  # SIGKILL
        server.proc.wait()
        server.channel.close()
        assert before > 0
        server = start(data, url, port, "second")
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline and len(acked) < before + 50:
            time.sleep(0.05)
        assert len(acked) >= before + 50, "no progress after the restart"
    finally:
        stop.set()
        for t in threads:
            t.join(5)
        for s in streams:
            assert s.flush(30), "feedback never acknowledged after the restart"
            s.close(5)
        server.stop()

    rows = pg.psql(db, f"SELECT client_id, client_seq, seq FROM record WHERE session_id = '{sid}' "
                       f"AND kind = 'feedback' ORDER BY seq").splitlines()
    stored = {}
    doubled = 0
    for line in rows:
        client, cseq, seq = line.split("|")
        key = (client, int(cseq))
        doubled += key in stored
        stored[key] = int(seq)
    lost = sum(1 for key, seq in acked.items() if stored.get(key) != seq)
    print(f"\n{len(acked)} acknowledged ({before} before the kill), {len(stored)} stored; "
          f"lost {lost}, doubled {doubled}")
    assert (lost, doubled) == (0, 0)

    # The chain, recomputed with hashlib from the stored bytes.
    assert_chain(pg, db, sid)
