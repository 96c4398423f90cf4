"""Disciplined clocks from Python (docs/time-model.md, "Disciplined clocks"):
the package reads the kernel like the C library does, sends its real-time
reading while the kernel says synchronised, and the real server records it.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import tempfile
import time

import grpc
import pytest

import tickmark
from tickmark import _discipline
from tickmark._connect import open_channel
from tickmark._stream import ReconnectingStream
from tickmark.v1 import records_pb2, stream_pb2, stream_pb2_grpc

from conftest import Server, first_ack

SYNCED = _discipline.DisciplineState(synced=True, max_error_ns=1_000_000, est_error_ns=100_000,
                                     status=0x0001, clock_state=0)


class _NtpTimeval(ctypes.Structure):
    """struct ntptimeval (ntp_gettime(3)), with room to spare."""
    _fields_ = [("tv_sec", ctypes.c_long), ("tv_usec", ctypes.c_long),
                ("maxerror", ctypes.c_long), ("esterror", ctypes.c_long),
                ("tai", ctypes.c_long), ("_spare", ctypes.c_char * 128)]


def test_kernel_reader_agrees_with_ntp_gettimex():
    """_discipline.read_kernel (ntp_adjtime, struct timex laid out by hand)
    against glibc's other interface to the same kernel state, ntp_gettimex
    (ntp_gettime(3)): the same bound up to the kernel's own growth between
    the calls (500 µs per second boundary), and TIME_ERROR means not
    synchronised (adjtimex(2), RETURN VALUE)."""
    ours = _discipline.read_kernel()
    libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
    ntv = _NtpTimeval()
    r = libc.ntp_gettimex(ctypes.byref(ntv))
    if r == -1 or ours.clock_state == -1:
        assert not ours.synced  # the safe fallback
        pytest.skip("ntp_adjtime/ntp_gettimex refused here (a sandbox?)")
    assert 0 <= ntv.maxerror * 1000 - ours.max_error_ns <= 1_000_000
    assert abs(ntv.esterror * 1000 - ours.est_error_ns) <= 1_000_000
    if r == _discipline.TIME_ERROR or ours.status & _discipline.STA_UNSYNC:
        assert not ours.synced
    # CLOCK_REALTIME is the Unix epoch clock, agreeing with time.time_ns()
    # (Python's documented wall clock) to well within a second.
    assert abs(_discipline.realtime_now() - time.time_ns()) < 1_000_000_000


def test_reading_is_backdated_to_the_event_and_only_when_synced():
    clock = lambda: 10_000_000_000  # noqa: E731 - the event clock, standing still
    realtime = lambda: 1_700_000_000_000_000_000  # noqa: E731
    at, bound = _discipline.reading_at(9_000_000_000, clock, lambda: SYNCED, realtime)
    assert at == 1_700_000_000_000_000_000 - 1_000_000_000  # 1 s before "now"
    assert bound == 1_000_000
    assert _discipline.reading_at(9_000_000_000, clock, lambda: _discipline.UNSYNCED,
                                  realtime) is None
    assert _discipline.reading_at(0, clock, lambda: SYNCED, realtime) is None
    clamped = _discipline.DisciplineState(synced=True, max_error_ns=16_000_000_000)
    assert _discipline.reading_at(9_000_000_000, clock, lambda: clamped, realtime) is None


def _records(server, session, admin, kind):
    stub = stream_pb2_grpc.LiveStub(server.channel)
    req = stream_pb2.SubscribeRequest(session_id=session, from_sequence=1, stop_at_end=True,
                                      kinds=[kind])
    return list(stub.Subscribe(req, metadata=server.md(admin), timeout=20))


# What this host's real kernel may make of a synchronised client's reading:
# it is not synchronised (most test machines), or it is and then either
# route may win.
SERVER_SIDE_REASONS = {"server_unsynced", "server_bound_missing", "realtime", "not_tighter",
                       "disagrees"}


def test_python_client_sends_its_realtime_reading(server):
    session, admin = server.session()
    trainer_token = server.token(session, admin, "trainer", "p07")
    state = {"now": SYNCED}
    trainer = ReconnectingStream(open_channel(server.address), "train", trainer_token,
                                 "py-realtime", records_pb2.SOURCE_KIND_SCRIPT, "test", "pytest",
                                 discipline=lambda: state["now"])
    assert trainer.wait_connected(10)
    event = time.monotonic_ns()
    before = time.clock_gettime_ns(time.CLOCK_REALTIME) - (time.monotonic_ns() - event)
    trainer.send(stream_pb2.FeedbackMessage(value=1.0, event_source_ns=event, input="key:g"))
    after = time.clock_gettime_ns(time.CLOCK_REALTIME) - (time.monotonic_ns() - event)
    state["now"] = _discipline.UNSYNCED
    trainer.send(stream_pb2.FeedbackMessage(value=-1.0, event_source_ns=time.monotonic_ns()))
    assert trainer.flush(10)
    trainer.close()

    feedback = [r.feedback for r in _records(server, session, admin,
                                             records_pb2.RECORD_KIND_FEEDBACK)]
    assert len(feedback) == 2
    synced, unsynced = sorted(feedback, key=lambda f: f.client_sequence)
    # The reading is CLOCK_REALTIME at the event (backdated on the monotonic
    # clock), bracketed by the test's own backdated readings.
    assert before - 1_000_000 <= synced.event_realtime_ns <= after + 1_000_000
    assert 1_000_000 <= synced.client_realtime_bound_ns < 2_000_000
    assert synced.time_source_reason in SERVER_SIDE_REASONS
    assert synced.round_trip_uncertainty_ns > 0
    assert unsynced.event_realtime_ns == 0
    assert unsynced.client_realtime_bound_ns == 0
    assert unsynced.time_source == records_pb2.TIME_SOURCE_ROUND_TRIP
    assert unsynced.time_source_reason == "no_reading"


def test_agent_sends_its_reading_unless_told_not_to(server, monkeypatch):
    monkeypatch.setattr(_discipline, "read_kernel", lambda: SYNCED)
    session, admin = server.session()
    with tickmark.Agent(server.address, token=server.token(session, admin, "agent", "rover"),
                        client_id="py-rover-rt") as agent:
        agent.step("north", state=b"3,4")
        assert agent.flush(10)
    with tickmark.Agent(server.address, token=server.token(session, admin, "agent", "rover2"),
                        client_id="py-rover-off", send_realtime=False) as agent:
        agent.step("east", state=b"4,4")
        assert agent.flush(10)
    steps = {r.step.client_id: r.step for r in _records(server, session, admin,
                                                        records_pb2.RECORD_KIND_STEP)}
    assert steps["py-rover-rt"].start_realtime_ns > 0
    assert steps["py-rover-rt"].client_realtime_bound_ns >= 1_000_000
    assert steps["py-rover-rt"].time_source_reason in SERVER_SIDE_REASONS
    assert steps["py-rover-off"].start_realtime_ns == 0
    assert steps["py-rover-off"].time_source_reason == "no_reading"


def test_server_with_no_realtime_mapping_keeps_the_round_trip():
    with tempfile.TemporaryDirectory(prefix="tickmark-pytest-") as d:
        server = Server(d, extra=("--no-realtime-mapping",))
        try:
            session, admin = server.session()
            trainer = ReconnectingStream(open_channel(server.address), "train",
                                         server.token(session, admin, "trainer", "p07"),
                                         "py-realtime-off", records_pb2.SOURCE_KIND_SCRIPT,
                                         "test", "pytest", discipline=lambda: SYNCED)
            assert trainer.wait_connected(10)
            trainer.send(stream_pb2.FeedbackMessage(value=1.0,
                                                    event_source_ns=time.monotonic_ns()))
            assert trainer.flush(10)
            trainer.close()
            [record] = _records(server, session, admin, records_pb2.RECORD_KIND_FEEDBACK)
            assert record.feedback.event_realtime_ns > 0  # sent, kept ...
            assert record.feedback.time_source == records_pb2.TIME_SOURCE_ROUND_TRIP
            assert record.feedback.time_source_reason == "disabled"  # ... and not used
        finally:
            server.stop()


def test_a_synced_reading_without_a_bound_is_refused(server):
    """Validation (server/rpc/validation.cc): realtime_synced needs a bound
    in (0, 16 s); the Ack names the field and nothing is stored."""
    session, admin = server.session()
    token = server.token(session, admin, "trainer", "p07")
    ack = first_ack(server, token, "py-raw", stream_pb2.TrainerMessage(
        feedback=stream_pb2.FeedbackMessage(
            client_sequence=1, value=1.0, event_source_ns=time.monotonic_ns(),
            event_realtime_ns=time.time_ns(), realtime_synced=True)))
    assert ack.code == grpc.StatusCode.INVALID_ARGUMENT.value[0]
    assert "realtime_bound_ns" in ack.message
