"""A reconnecting trainer or agent stream (not part of the API; see Agent).

Every message is delivered exactly once in effect: it stays in an
unacknowledged queue until the server acknowledges it, is resent in order
after a reconnect, and the server deduplicates by (client id, client
sequence). The server's clock probes are answered at once from the same
clock that stamps the messages.
"""

from __future__ import annotations

import collections
import queue
import random
import threading
import time
from typing import Callable, Dict, Optional

import grpc

from tickmark import _discipline
from tickmark._connect import SESSION_METADATA, owner_of
from tickmark.v1 import records_pb2, stream_pb2, stream_pb2_grpc

# Codes after which reconnecting cannot help.
_PERMANENT = {
    grpc.StatusCode.UNAUTHENTICATED,
    grpc.StatusCode.PERMISSION_DENIED,
    grpc.StatusCode.NOT_FOUND,
    grpc.StatusCode.FAILED_PRECONDITION,
    grpc.StatusCode.INVALID_ARGUMENT,
}


class StreamError(RuntimeError):
    """The stream stopped for good (bad token, closed session, ...)."""

    def __init__(self, code: grpc.StatusCode, details: str):
        super().__init__(f"{code.name}: {details}")
        self.code = code
        self.details = details


class Rejected(RuntimeError):
    """The server refused one message (its Ack carried an error code)."""


class ReconnectingStream:
    """One Train or Act stream, kept up in a background thread."""

    def __init__(self, channel: grpc.Channel, kind: str, token: str, client_id: str,
                 source_kind: int, description: str, software: str,
                 clock: Callable[[], int] = time.monotonic_ns,
                 on_ack: Optional[Callable[[stream_pb2.Ack], None]] = None,
                 on_calibration: Optional[Callable[[records_pb2.Calibration], None]] = None,
                 send_realtime: bool = True,
                 discipline: Optional[Callable[[], "_discipline.DisciplineState"]] = None,
                 realtime: Optional[Callable[[], int]] = None,
                 channel_for: Optional[Callable[[str], grpc.Channel]] = None):
        self._kind = kind
        self._home = channel
        # Opens a channel to another instance that owns the session (None:
        # redirects are not followed).
        self._channel_for = channel_for
        self._redirect: Optional[tuple] = None  # (target, channel) while redirected
        self._call = self._call_on(channel)
        self._message = stream_pb2.TrainerMessage if kind == "train" else stream_pb2.AgentMessage
        self._field = "feedback" if kind == "train" else "step"
        self._hello = stream_pb2.Hello(token=token, client_id=client_id, source_kind=source_kind,
                                       source_description=description, software=software)
        self._clock = clock
        # Disciplined clocks: see _add_realtime (None: the running kernel,
        # looked up at each message).
        self._send_realtime = send_realtime
        self._discipline = discipline
        self._realtime = realtime
        self._on_ack = on_ack
        self._on_calibration = on_calibration
        self._lock = threading.Condition()
        self._pending: "collections.OrderedDict[int, object]" = collections.OrderedDict()
        self._storage_backoff = False  # the last call ended on an UNAVAILABLE ack
        self._unnumbered: collections.deque = collections.deque()
        self._next_seq: Optional[int] = None  # known after the first Welcome
        self._outbox: Optional[queue.Queue] = None
        self._closing = False
        self._error: Optional[StreamError] = None
        self.session_id = ""
        self.subject = ""
        self.server_version = ""  # from the Welcome: the server's release
        self.contract_version = ""  # and the wire-contract revision it speaks
        self.acked = 0
        self.rejected: Dict[int, str] = {}
        self.reconnects = 0
        self.redirects = 0
        self._thread = threading.Thread(target=self._run, name=f"tickmark-{kind}", daemon=True)
        self._connected = threading.Event()
        self._thread.start()

    # -- public -----------------------------------------------------------
    def send(self, payload) -> None:
        """Queues a FeedbackMessage or StepMessage (or, on a Train stream, a
        CalibrationMessage); its client_sequence is set here, and its
        real-time reading (see _add_realtime)."""
        self._add_realtime(payload)
        with self._lock:
            if self._error:
                raise self._error
            if self._closing:
                raise RuntimeError("stream is closed")
            if self._next_seq is None:
                self._unnumbered.append(payload)
                return
            self._number_and_queue(payload)

    def flush(self, timeout: Optional[float] = None) -> bool:
        """Waits until everything sent is acknowledged (or rejected)."""
        deadline = None if timeout is None else time.monotonic() + timeout
        with self._lock:
            while self._pending or self._unnumbered:
                if self._error:
                    raise self._error
                left = None if deadline is None else deadline - time.monotonic()
                if left is not None and left <= 0:
                    return False
                self._lock.wait(left if left is not None else 0.5)
            return True

    def wait_connected(self, timeout: Optional[float] = None) -> bool:
        return self._connected.wait(timeout)

    @property
    def error(self) -> Optional[StreamError]:
        """Why the stream stopped for good; None while it is up or retrying."""
        with self._lock:
            return self._error

    @property
    def pending(self) -> int:
        with self._lock:
            return len(self._pending) + len(self._unnumbered)

    def close(self, timeout: float = 10.0) -> None:
        try:
            self.flush(timeout)
        finally:
            with self._lock:
                self._closing = True
                if self._outbox is not None:
                    self._outbox.put(None)
                self._lock.notify_all()
            self._thread.join(timeout)

    # -- internals --------------------------------------------------------
    def _call_on(self, channel: grpc.Channel):
        stub = stream_pb2_grpc.LiveStub(channel)
        return stub.Train if self._kind == "train" else stub.Act

    def _follow(self, error, welcomed: bool) -> None:
        """After a call ended: go to the owner it named, or back home when a
        redirect target did not welcome us (the owner died)."""
        owner = owner_of(error) if error is not None else None
        if owner and self._channel_for is not None:
            if self._redirect is None or self._redirect[0] != owner:
                self._drop_redirect()
                channel = self._channel_for(owner)
                self._redirect = (owner, channel)
                self._call = self._call_on(channel)
                self.redirects += 1
            return
        if self._redirect is not None and not welcomed:
            self._drop_redirect()

    def _drop_redirect(self) -> None:
        if self._redirect is not None:
            self._redirect[1].close()
            self._redirect = None
        self._call = self._call_on(self._home)

    def _add_realtime(self, payload) -> None:
        """While the kernel says this host's clock is synchronised (NTP/PTP),
        a feedback or step also carries its CLOCK_REALTIME at the event and
        the kernel's bound, so the server may map it through real time
        (docs/time-model.md, "Disciplined clocks"). Read at sending, close to
        the event; never over a reading the caller set; never with
        send_realtime=False."""
        if not self._send_realtime:
            return
        if isinstance(payload, stream_pb2.FeedbackMessage):
            event, field = payload.event_source_ns, "event_realtime_ns"
        elif isinstance(payload, stream_pb2.StepMessage):
            event, field = payload.start_agent_ns, "start_realtime_ns"
        else:
            return
        if getattr(payload, field):
            return
        reading = _discipline.reading_at(event, self._clock,
                                         self._discipline or _discipline.read_kernel,
                                         self._realtime or _discipline.realtime_now)
        if reading is None:
            return
        setattr(payload, field, reading[0])
        payload.realtime_bound_ns = reading[1]
        payload.realtime_synced = True

    def _number_and_queue(self, payload) -> None:
        payload.client_sequence = self._next_seq
        self._next_seq += 1
        self._pending[payload.client_sequence] = payload
        if self._outbox is not None:
            self._outbox.put(self._wrap(payload))

    def _wrap(self, payload):
        """The stream message carrying `payload` (feedback, step or calibration)."""
        if isinstance(payload, stream_pb2.CalibrationMessage):
            return self._message(calibration=payload)
        return self._message(**{self._field: payload})

    def _requests(self, outbox: queue.Queue):
        hello = stream_pb2.Hello()
        hello.CopyFrom(self._hello)
        hello.sent_client_ns = self._clock()
        yield self._message(hello=hello)
        while True:
            item = outbox.get()
            if item is None:
                return
            if isinstance(item, tuple):  # a probe answer: stamp T3 as late as possible
                probe_id, t1, t2 = item
                yield self._message(probe_reply=stream_pb2.ProbeReply(
                    probe_id=probe_id, t1_session_ns=t1, t2_client_ns=t2,
                    t3_client_ns=self._clock()))
            else:
                yield item

    def _run(self) -> None:
        backoff = 0.1
        while True:
            with self._lock:
                if self._closing or self._error:
                    return
            outbox: queue.Queue = queue.Queue()
            metadata = ((SESSION_METADATA, self.session_id),) if self.session_id else None
            call = self._call(self._requests(outbox), metadata=metadata)
            welcomed = False
            retry_later = False
            ended = None
            try:
                for reply in call:
                    if reply.HasField("probe"):
                        outbox.put((reply.probe.probe_id, reply.probe.t1_session_ns, self._clock()))
                    elif reply.HasField("welcome"):
                        welcomed = True
                        if not self._storage_backoff:
                            backoff = 0.1
                        self._on_welcome(reply.welcome, outbox)
                    elif reply.HasField("calibration"):
                        # A finished calibration run's result, just before its Ack.
                        if self._on_calibration is not None:
                            self._on_calibration(reply.calibration)
                    elif reply.HasField("ack"):
                        if not self._on_ack_message(reply.ack):
                            # The server could not store it now (disk full):
                            # end this call; the reconnect sends it again.
                            retry_later = True
                            call.cancel()
                with self._lock:
                    if self._closing:
                        return
            except grpc.RpcError as e:
                ended = e
                code = e.code()
                with self._lock:
                    if self._closing and code == grpc.StatusCode.CANCELLED:
                        return
                    if code in _PERMANENT and (code != grpc.StatusCode.INVALID_ARGUMENT or not welcomed):
                        self._error = StreamError(code, e.details() or "")
                        self._lock.notify_all()
                        return
            finally:
                with self._lock:
                    self._outbox = None
                outbox.put(None)  # ends this connection's request generator
                self._connected.clear()
            self.reconnects += 1
            self._follow(ended, welcomed)
            # A server that could not store keeps the backoff growing.
            self._storage_backoff = retry_later
            time.sleep(backoff * random.uniform(0.8, 1.2))  # backoff before reconnecting
            backoff = min(backoff * 2, 5.0)

    def _on_welcome(self, welcome: stream_pb2.Welcome, outbox: queue.Queue) -> None:
        with self._lock:
            self.session_id = welcome.session_id
            self.subject = welcome.subject
            self.server_version = welcome.server_version
            self.contract_version = welcome.contract_version
            if self._next_seq is None:
                self._next_seq = welcome.last_client_sequence + 1
            for payload in self._pending.values():  # resend in order
                outbox.put(self._wrap(payload))
            self._outbox = outbox
            while self._unnumbered:
                self._number_and_queue(self._unnumbered.popleft())
        self._connected.set()

    def _on_ack_message(self, ack: stream_pb2.Ack) -> bool:
        """Applies one Ack; False when the server could not store the message
        now (UNAVAILABLE), which stays pending to be sent again."""
        with self._lock:
            if ack.code == grpc.StatusCode.UNAVAILABLE.value[0] and ack.client_sequence in self._pending:
                return False
            payload = self._pending.pop(ack.client_sequence, None)
            if payload is None:
                return True
            self._storage_backoff = False
            if ack.code == 0:
                self.acked += 1
            else:
                self.rejected[ack.client_sequence] = ack.message
            self._lock.notify_all()
        if self._on_ack is not None:
            self._on_ack(ack)
        return True
