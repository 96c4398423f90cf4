"""Reading a session's records in sequence order, resuming after failures."""

from __future__ import annotations

import random
import threading
import time
from typing import Iterable, Iterator, Optional

import grpc

from tickmark._connect import SESSION_METADATA, owner_of
from tickmark.v1 import records_pb2, stream_pb2, stream_pb2_grpc

_RETRY = {grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.INTERNAL, grpc.StatusCode.UNKNOWN,
          grpc.StatusCode.DEADLINE_EXCEEDED, grpc.StatusCode.RESOURCE_EXHAUSTED}

# Record kinds by name, for filters: "feedback", "step", "credit", "label", ...
KINDS = {
    name[len("RECORD_KIND_"):].lower(): value
    for name, value in records_pb2.RecordKind.items()
    if name != "RECORD_KIND_UNSPECIFIED"
}


class Subscription:
    """Iterates over a session's records from `from_sequence` on.

    Replays what the server's ledger holds, then follows live records (unless
    follow=False). If the connection breaks it reconnects and resumes right
    after the last record it yielded, so the caller sees every record exactly
    once, in order. `position` is the sequence of the last record yielded:
    persist it and pass position + 1 as from_sequence to resume later.
    """

    def __init__(self, channel: grpc.Channel, token: str, session_id: str,
                 from_sequence: int = 1, kinds: Iterable[str] = (), follow: bool = True,
                 channel_for=None):
        self._home = stream_pb2_grpc.LiveStub(channel)
        self._stub = self._home
        # Opens a channel to the instance that owns the session, when a
        # server names another one (None: not followed).
        self._channel_for = channel_for
        self._redirect = None
        self._token = token
        self._session_id = session_id
        self._kinds = []
        for k in kinds:
            if k not in KINDS:
                raise ValueError(f"unknown record kind {k!r}; one of {sorted(KINDS)}")
            self._kinds.append(KINDS[k])
        self._follow = follow
        self.position = max(0, from_sequence - 1)
        self._call = None
        self._closed = threading.Event()

    def close(self) -> None:
        """Ends the iteration (from any thread)."""
        self._closed.set()
        call = self._call
        if call is not None:
            call.cancel()

    def __enter__(self) -> "Subscription":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __iter__(self) -> Iterator[records_pb2.Record]:
        backoff = 0.1
        # SubscribeBatches (contract 1.1): several records to a message, far
        # fewer messages for Python to unpack in a burst; Subscribe on an
        # older server, which answers UNIMPLEMENTED.
        batches = True
        while not self._closed.is_set():
            request = stream_pb2.SubscribeRequest(
                session_id=self._session_id, from_sequence=self.position + 1,
                kinds=self._kinds, stop_at_end=not self._follow)
            metadata = (("authorization", "Bearer " + self._token),
                        (SESSION_METADATA, self._session_id))
            if batches:
                self._call = self._stub.SubscribeBatches(request, metadata=metadata)
                records = (r for batch in self._call for r in batch.records)
            else:
                self._call = self._stub.Subscribe(request, metadata=metadata)
                records = self._call
            try:
                for record in records:
                    if record.sequence <= self.position:
                        continue  # never twice, even across a resume
                    self.position = record.sequence
                    backoff = 0.1
                    yield record
                return  # the server ended the stream: nothing more to come
            except grpc.RpcError as e:
                if self._closed.is_set() or e.code() == grpc.StatusCode.CANCELLED:
                    return
                if batches and e.code() == grpc.StatusCode.UNIMPLEMENTED:
                    batches = False
                    continue
                if e.code() not in _RETRY:
                    raise
                owner = owner_of(e)
                if owner and self._channel_for is not None:
                    if self._redirect is not None:
                        self._redirect.close()
                    self._redirect = self._channel_for(owner)
                    self._stub = stream_pb2_grpc.LiveStub(self._redirect)
                elif self._redirect is not None:
                    self._redirect.close()
                    self._redirect = None
                    self._stub = self._home
            time.sleep(backoff * random.uniform(0.8, 1.2))
            backoff = min(backoff * 2, 5.0)
