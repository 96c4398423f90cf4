"""A calibration run from a program: a scripted or simulated trainer.

A calibration measures one trainer's reaction delays (docs/calibration.md):
a mover shows moves, the trainer approves or disapproves each one, and the
server matches every answer to the move it judged, fits delay distributions
to the delays and keeps the best fit as the trainer's calibration. People
run the task with `tickmark-keys --calibrate`; this module is for programs
that play both parts (simulations, tests), or that draw the moves themselves:

    import tickmark
    with tickmark.CalibrationRun("127.0.0.1:7461", token_file="ava.token") as run:
        for _ in range(45):
            n = run.move(approve=True)          # stamp right after drawing the move
            ...                                  # the trainer reacts
            run.answer(approve=True)             # stamp when the trainer acted
        calibration = run.finish()               # a records_pb2.Calibration
    print(calibration.kernel_description)

Times are nanoseconds on the run's clock (time.monotonic_ns unless a
`clock` is given); the server probes that same clock, so pass explicit
times only from it. The token is a trainer token: the calibration belongs to
its pseudonym. The messages ride a reconnecting Train stream, so a dropped
connection loses nothing.
"""

from __future__ import annotations

import threading
import time
import uuid
from typing import Callable, Dict, Optional

import grpc

from tickmark._connect import open_channel, read_token
from tickmark._stream import ReconnectingStream
from tickmark.v1 import records_pb2, stream_pb2


class CalibrationFailed(RuntimeError):
    """The server fitted no calibration (e.g. fewer than 3 valid answers)."""

    def __init__(self, code: int, message: str):
        super().__init__(f"{message} (gRPC code {code})")
        self.code = code
        self.message = message


class CalibrationRun:
    """One calibration run on one Train stream.

    Not thread-safe: call move, answer and finish from one thread (or guard
    them yourself); the stream's own thread does the rest.
    """

    def __init__(self, server: str, token: Optional[str] = None, token_file: Optional[str] = None,
                 client_id: str = "py-calibration", run: Optional[str] = None,
                 description: str = "Python calibration run",
                 source_kind: int = records_pb2.SOURCE_KIND_SCRIPT,
                 clock: Callable[[], int] = time.monotonic_ns,
                 ca_file: Optional[str] = None, insecure: bool = False):
        """Connects to `server` with a trainer token (`token`, `token_file` or
        $TICKMARK_TOKEN). `run` names the run (letters, digits, '-', '_', '.';
        default: a fresh id); `clock` stamps every time sent."""
        self.run = run or "run-" + uuid.uuid4().hex[:12]
        self.clock = clock
        self._moves = 0
        self._lock = threading.Condition()
        self._acks: Dict[int, stream_pb2.Ack] = {}
        self._results: Dict[str, records_pb2.Calibration] = {}
        self._channel = open_channel(server, ca_file=ca_file, insecure=insecure)
        self._stream = ReconnectingStream(
            self._channel, "train", read_token(token, token_file), client_id, source_kind,
            description, "tickmark-python calibration", clock,
            on_ack=self._on_ack, on_calibration=self._on_calibration)

    # -- public -----------------------------------------------------------
    def move(self, approve: bool, shown_ns: Optional[int] = None, practice: bool = False,
             detail: str = "") -> int:
        """Reports a move just shown; returns its number (from 1).

        approve: the shown rule's verdict (True: approving is the right answer).
        shown_ns: when it was shown on the run's clock (default: now; read it
        right after the drawing call returns). practice: a practice move, whose
        answers are never fitted. detail: what was shown ("right").
        """
        self._moves += 1
        self._send(move=stream_pb2.CalibrationMove(
            move=self._moves, shown_source_ns=self.clock() if shown_ns is None else shown_ns,
            approve=approve, practice=practice, detail=detail))
        return self._moves

    def answer(self, approve: bool, at_ns: Optional[int] = None, input: str = "") -> None:
        """Reports the trainer's answer (approve or disapprove) at `at_ns`
        on the run's clock (default: now); `input` names it ("key:g")."""
        self._send(answer=stream_pb2.CalibrationAnswer(
            event_source_ns=self.clock() if at_ns is None else at_ns, approve=approve,
            input=input))

    def finish(self, min_answers: int = 0, display_note: str = "",
               timeout: float = 60.0) -> records_pb2.Calibration:
        """Ends the run and returns the calibration the server fitted.

        min_answers: valid answers wanted (fewer gives a warning; 0 means 40).
        display_note: what the measured delays include that a session's do not
        (e.g. the display's latency), stored with the calibration.
        Raises CalibrationFailed when the server fitted none, TimeoutError
        when no answer came within `timeout` seconds, StreamError when the
        stream stopped for good.
        """
        payload = self._send(finish=stream_pb2.CalibrationFinish(
            min_answers=min_answers, display_note=display_note))
        deadline = time.monotonic() + timeout
        with self._lock:
            while True:
                seq = payload.client_sequence  # numbered once the stream is welcomed
                if seq and seq in self._acks:
                    break
                left = deadline - time.monotonic()
                if left <= 0:
                    raise TimeoutError(f"no result for calibration run {self.run} in {timeout} s")
                self._lock.wait(min(left, 0.5))
                error = self._stream.error
                if error is not None:  # the stream stopped for good
                    raise error
            ack = self._acks[seq]
            if ack.code != 0:
                raise CalibrationFailed(ack.code, ack.message)
            result = self._results.get(self.run)
        if result is None:
            raise CalibrationFailed(grpc.StatusCode.INTERNAL.value[0],
                                    "the server acknowledged the finish without a calibration")
        return result

    @property
    def moves(self) -> int:
        """Moves reported so far."""
        return self._moves

    def close(self, timeout: float = 10.0) -> None:
        """Delivers what is still unacknowledged (up to `timeout` s) and disconnects."""
        try:
            self._stream.close(timeout)
        finally:
            self._channel.close()

    def __enter__(self) -> "CalibrationRun":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # -- internals --------------------------------------------------------
    def _send(self, **body) -> stream_pb2.CalibrationMessage:
        payload = stream_pb2.CalibrationMessage(run=self.run, **body)
        self._stream.send(payload)
        return payload

    def _on_ack(self, ack: stream_pb2.Ack) -> None:
        with self._lock:
            self._acks[ack.client_sequence] = ack
            self._lock.notify_all()

    def _on_calibration(self, calibration: records_pb2.Calibration) -> None:
        with self._lock:
            self._results[calibration.run] = calibration
            self._lock.notify_all()


__all__ = ["CalibrationFailed", "CalibrationRun"]
