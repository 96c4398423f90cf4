"""SubscribeBatches (wire contract 1.1) read with Python's grpcio, a client
library that is not ours: the batches carry exactly Subscribe's records, and
the package's Subscription falls back to Subscribe when a server answers
UNIMPLEMENTED, as a server older than 1.1 does (grpcio's own server answers
so for any method its servicer leaves out: grpc.io docs, "Status codes",
UNIMPLEMENTED)."""

from __future__ import annotations

import time
from concurrent import futures

import grpc

import tickmark
from tickmark._connect import open_channel
from tickmark._stream import ReconnectingStream
from tickmark.subscription import Subscription
from tickmark.v1 import records_pb2, stream_pb2, stream_pb2_grpc


def _fill(server):
    """A closed session with steps and credited feedback."""
    session, admin = server.session(kernel="uniform:0.2,4.0")
    agent_token = server.token(session, admin, "agent", "rover-1")
    trainer_token = server.token(session, admin, "trainer", "ava")
    with tickmark.Agent(server.address, token=agent_token, client_id="rover-py") as agent:
        for i in range(30):
            agent.step("north" if i % 2 else "east", state=f"{i},0")
            time.sleep(0.02)  # steps 20 ms apart on the agent's clock
        assert agent.flush(10)
        trainer = ReconnectingStream(open_channel(server.address), "train", trainer_token,
                                     "ava-py", records_pb2.SOURCE_KIND_SCRIPT, "test", "pytest")
        assert trainer.wait_connected(10)
        for i in range(5):
            trainer.send(stream_pb2.FeedbackMessage(value=1.0 if i % 2 else -1.0,
                                                    event_source_ns=time.monotonic_ns()))
        assert trainer.flush(10)
        trainer.close()
    server.close_session(session, admin)
    return session, admin


def test_batches_carry_what_subscribe_carries(server):
    session, admin = _fill(server)
    stub = stream_pb2_grpc.LiveStub(server.channel)
    req = stream_pb2.SubscribeRequest(session_id=session, from_sequence=1, stop_at_end=True)
    one_by_one = list(stub.Subscribe(req, metadata=server.md(admin), timeout=20))
    batches = list(stub.SubscribeBatches(req, metadata=server.md(admin), timeout=20))
    batched = [r for b in batches for r in b.records]
    assert [r.SerializeToString() for r in batched] == [r.SerializeToString() for r in one_by_one]
    assert [r.sequence for r in batched] == list(range(1, len(batched) + 1))
    assert any(r.HasField("credit") for r in batched)
    # A finished session is one replay: far fewer messages than records.
    assert len(batches) < len(batched) / 4, (len(batches), len(batched))
    print(f"{len(batched)} records in {len(batches)} batches "
          f"(largest {max(len(b.records) for b in batches)})")


class _OldLive(stream_pb2_grpc.LiveServicer):
    """A server of contract 1.0: Subscribe only (three records)."""

    def __init__(self):
        self.calls = []

    def Subscribe(self, request, context):
        self.calls.append(("Subscribe", request.from_sequence))
        for seq in range(max(1, request.from_sequence), 4):
            yield records_pb2.Record(session_id=request.session_id, sequence=seq)


def test_subscription_falls_back_to_subscribe_on_an_older_server():
    old = _OldLive()
    grpc_server = grpc.server(futures.ThreadPoolExecutor(max_workers=2))
    stream_pb2_grpc.add_LiveServicer_to_server(old, grpc_server)
    port = grpc_server.add_insecure_port("127.0.0.1:0")
    grpc_server.start()
    try:
        with grpc.insecure_channel(f"127.0.0.1:{port}") as channel:
            sub = Subscription(channel, "tmk_test", "s-old", follow=False)
            assert [r.sequence for r in sub] == [1, 2, 3]
    finally:
        grpc_server.stop(0)
    assert old.calls == [("Subscribe", 1)]
