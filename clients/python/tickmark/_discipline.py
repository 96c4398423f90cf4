"""The host's clock discipline, for real-time readings (not part of the API).

When an NTP or PTP daemon keeps this host's CLOCK_REALTIME on UTC, the
kernel says so: ntp_adjtime() (Linux adjtimex(2)) returns a state other
than TIME_ERROR, STA_UNSYNC is clear, and `maxerror` bounds the clock's
error in microseconds (clamped at 16 s, where the kernel gives up). A stream
then adds to each feedback or step its CLOCK_REALTIME at the event and that
bound, so the server may map the event through real time instead of the
round trip (docs/time-model.md, "Disciplined clocks").

Safe fallback: anywhere the call is missing or fails (another OS, no libc),
the clock counts as unsynchronised and nothing is sent.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import time
from dataclasses import dataclass
from typing import Callable, Optional, Tuple

# adjtimex(2): status bit and return value.
STA_UNSYNC = 0x0040
TIME_ERROR = 5
# The kernel clamps maxerror at 16 s and then calls the clock unsynchronised
# (ntp_gettime(3)).
MAX_BOUND_NS = 16_000_000_000


class _Timex(ctypes.Structure):
    """struct timex of <sys/timex.h> (adjtimex(2)), with room to spare so a
    kernel writing a longer struct cannot run past it."""

    _fields_ = [
        ("modes", ctypes.c_uint),
        ("offset", ctypes.c_long),
        ("freq", ctypes.c_long),
        ("maxerror", ctypes.c_long),
        ("esterror", ctypes.c_long),
        ("status", ctypes.c_int),
        ("constant", ctypes.c_long),
        ("precision", ctypes.c_long),
        ("tolerance", ctypes.c_long),
        ("time_sec", ctypes.c_long),
        ("time_usec", ctypes.c_long),
        ("tick", ctypes.c_long),
        ("ppsfreq", ctypes.c_long),
        ("jitter", ctypes.c_long),
        ("shift", ctypes.c_int),
        ("stabil", ctypes.c_long),
        ("jitcnt", ctypes.c_long),
        ("calcnt", ctypes.c_long),
        ("errcnt", ctypes.c_long),
        ("stbcnt", ctypes.c_long),
        ("tai", ctypes.c_int),
        ("_spare", ctypes.c_char * 256),
    ]


@dataclass(frozen=True)
class DisciplineState:
    """What the kernel says about CLOCK_REALTIME."""

    synced: bool
    max_error_ns: int = 0  # maxerror: the bound on |CLOCK_REALTIME - UTC|
    est_error_ns: int = 0  # esterror: the daemon's estimate (not a bound)
    status: int = 0        # STA_* bits
    clock_state: int = -1  # the call's result; -1: it failed or is missing


UNSYNCED = DisciplineState(synced=False)

_ntp_adjtime = None


def _libc_call():
    global _ntp_adjtime
    if _ntp_adjtime is None:
        try:
            libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
            fn = libc.ntp_adjtime
            fn.argtypes = [ctypes.POINTER(_Timex)]
            fn.restype = ctypes.c_int
            _ntp_adjtime = fn
        except (OSError, AttributeError):
            _ntp_adjtime = False
    return _ntp_adjtime


def read_kernel() -> DisciplineState:
    """The running kernel's state (ntp_adjtime with no mode bits: a read that
    needs no privilege); UNSYNCED if it cannot be read."""
    call = _libc_call()
    if not call:
        return UNSYNCED
    tx = _Timex()
    try:
        r = call(ctypes.byref(tx))
    except OSError:
        return UNSYNCED
    if r == -1:
        return UNSYNCED
    max_ns = tx.maxerror * 1000  # microseconds (adjtimex(2))
    synced = r != TIME_ERROR and not (tx.status & STA_UNSYNC) and 0 < max_ns < MAX_BOUND_NS
    return DisciplineState(synced, max_ns, tx.esterror * 1000, tx.status, r)


def realtime_now() -> int:
    return time.clock_gettime_ns(time.CLOCK_REALTIME)


def reading_at(event_ns: int, clock: Callable[[], int],
               discipline: Callable[[], DisciplineState] = read_kernel,
               realtime: Callable[[], int] = realtime_now) -> Optional[Tuple[int, int]]:
    """(CLOCK_REALTIME at the event, bound in ns) for an event stamped
    `event_ns` on `clock`, or None when the kernel does not say synchronised.

    The event clock and CLOCK_REALTIME advance together (both slewed alike;
    clock_gettime(2)), so the real time at the event is realtime_now minus
    (clock_now - event_ns). clock_now is read between two real-time readings;
    half their spread is added to the bound. The same rule as the C++
    clients' ReadRealtimeAt (server/core/disciplined_clock.h).
    """
    if event_ns <= 0:
        return None
    state = discipline()
    if not state.synced or not 0 < state.max_error_ns < MAX_BOUND_NS:
        return None
    before = realtime()
    now = clock()
    after = realtime()
    spread = after - before
    if spread < 0:
        return None
    at = before + spread // 2 - (now - event_ns)
    bound = state.max_error_ns + (spread - spread // 2)
    if not 0 < at < 2**63 or not 0 < bound < MAX_BOUND_NS:
        return None
    return at, bound
