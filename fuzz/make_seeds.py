#!/usr/bin/python3
"""Writes the seed corpora in fuzz/corpus/ that are not plain text.

Run from the repository root after a build (it imports the Python stubs from
build/python, and Debian's python3 for its protobuf module):
  /usr/bin/python3 fuzz/make_seeds.py [BUILD_DIR]
The text seeds
(profile_toml, delay_kernel) are kept by hand. Targets that read their input
through libFuzzer's FuzzedDataProvider take integers from the END of the
input and byte strings from the front; FdpInput mirrors that so each seed
drives its target down a real path.
"""
import hashlib
import hmac
import os
import struct
import sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
CORPUS = os.path.join(ROOT, "fuzz", "corpus")


class FdpInput:
    """Builds an input that FuzzedDataProvider reads back as given."""

    def __init__(self):
        self.front = b""
        self.back = []  # bytes in the order the provider consumes them

    def int_in_range(self, lo, hi, value):
        assert lo <= value <= hi
        span, raw, n = hi - lo, value - lo, 0
        while n < 8 and (span >> (8 * n)) > 0:
            n += 1
        self.back += list(raw.to_bytes(n, "big")) if n else []
        return self

    def i64(self, v):
        return self.int_in_range(-(1 << 63), (1 << 63) - 1, v)

    def i32(self, v):
        return self.int_in_range(-(1 << 31), (1 << 31) - 1, v)

    def u64(self, v):
        return self.int_in_range(0, (1 << 64) - 1, v)

    def u16(self, v):
        return self.int_in_range(0, (1 << 16) - 1, v)

    def boolean(self, b):
        return self.int_in_range(0, 255, 1 if b else 0)

    def data(self, b):
        self.front += b
        return self

    def bytes(self):
        return self.front + bytes(reversed(self.back))


def write(target, name, content):
    os.makedirs(os.path.join(CORPUS, target), exist_ok=True)
    with open(os.path.join(CORPUS, target, name), "wb") as f:
        f.write(content)


# --- evdev: struct input_event on 64-bit Linux (include/uapi/linux/input.h).
EV_SYN, EV_KEY, SYN_REPORT, SYN_DROPPED = 0, 1, 0, 3
KEY_F, KEY_J, KEY_PAGEDOWN = 33, 36, 109


def rec(sec, usec, type_, code, value):
    return struct.pack("<qqHHi", sec, usec, type_, code, value)


def evdev_read(fdp, chunk):
    fdp.int_in_range(0, 15, 3).int_in_range(0, 72, len(chunk)).data(chunk)


press = rec(1000, 5, EV_KEY, KEY_F, 1) + rec(1000, 5, EV_SYN, SYN_REPORT, 0)
release = rec(1000, 90005, EV_KEY, KEY_F, 0) + rec(1000, 90005, EV_SYN, SYN_REPORT, 0)
repeat = rec(1000, 60000, EV_KEY, KEY_F, 2) + rec(1000, 60000, EV_SYN, SYN_REPORT, 0)
fdp = FdpInput()
for chunk in (press, repeat, release):
    evdev_read(fdp, chunk)
write("evdev", "press-repeat-release", fdp.bytes())
fdp = FdpInput()
both = press + release
evdev_read(fdp, both[:10])
evdev_read(fdp, both[10:48])
evdev_read(fdp, both[48:72])
evdev_read(fdp, both[72:])
write("evdev", "split-reads", fdp.bytes())
fdp = FdpInput()
evdev_read(fdp, rec(7, 1, EV_KEY, KEY_J, 1) + rec(7, 1, EV_SYN, SYN_DROPPED, 0))
evdev_read(fdp, rec(7, 2, EV_KEY, KEY_PAGEDOWN, 1) + rec(7, 3, EV_SYN, SYN_REPORT, 0))
fdp.int_in_range(0, 15, 2)  # TakeResyncRequest
fdp.int_in_range(0, 15, 0).int_in_range(0, 4, 1).u16(KEY_PAGEDOWN)  # Resync
evdev_read(fdp, rec(7, 4, EV_KEY, KEY_PAGEDOWN, 0) + rec(7, 4, EV_SYN, SYN_REPORT, 0))
write("evdev", "dropped-then-resync", fdp.bytes())

# --- serial_protocol: LineProtocol / RawProtocol reads.


def serial(reads, stale_ns=1_000_000_000, host0=5_000_000_000):
    fdp = FdpInput().int_in_range(1, 10_000_000_000, stale_ns)
    fdp.int_in_range(0, 1 << 62, host0)
    for delta, raw, chunk in reads:
        fdp.int_in_range(0, 5_000_000_000, delta).boolean(raw)
        fdp.int_in_range(0, 300, len(chunk)).data(chunk)
    return fdp.bytes()


write("serial_protocol", "lines", serial([(1000, False, b"B1 down 123456\nB1 up 123789\n"),
                                          (2_000_000, False, b"B2 down 130000\r\nB2 up\n")]))
write("serial_protocol", "cut-line", serial([(1000, False, b"B1 do"),
                                             (2_000_000_000, False, b"B1 down 5\n")]))
write("serial_protocol", "raw", serial([(1000, True, b"12"), (500, True, b"\x01\xff")]))
write("serial_protocol", "garbage", serial([(1, False, b"B1 sideways 5\n" + b"x" * 140 + b"\n")]))

# --- probe_datagram: magic "TMU1", kind, 3 zero bytes, tag, id, times, HMAC.


def datagram(key, kind, tag, ident, *times):
    body = b"TMU1" + bytes([kind, 0, 0, 0]) + struct.pack(">QQ", tag, ident)
    body += b"".join(struct.pack(">q", t) for t in times)
    return body + hmac.new(key, body, hashlib.sha256).digest()


key = b"\x5a" * 32
write("probe_datagram", "request", datagram(key, 1, 77, 1))
write("probe_datagram", "challenge", datagram(key, 2, 77, 1, 1_700_000_000_000_000_000))
write("probe_datagram", "answer", datagram(key, 3, 77, 1, 1_700_000_000_000_000_000,
                                           5_000_000_000, 5_000_040_000))
write("probe_datagram", "bad-mac", datagram(b"\xa5" * 32, 1, 77, 2))

# --- udp_probe_table: requests and their answers on streams 1 and 2.
fdp = FdpInput().int_in_range(0, 1 << 62, 1_700_000_000_000_000_000)
for tag, ident in ((1, 1), (2, 1), (1, 2)):
    fdp.int_in_range(0, 3, tag).int_in_range(0, 7, 4).int_in_range(0, 40, ident)
    fdp.int_in_range(0, 3, 3).int_in_range(0, 7, 3).i32(250_000)  # session clock moves
    fdp.int_in_range(0, 3, tag).int_in_range(0, 7, 6).boolean(True).int_in_range(0, 40, ident)
    fdp.boolean(True).i64(5_000_000_000 + ident).i64(5_000_040_000 + ident)
fdp.int_in_range(0, 3, 1).int_in_range(0, 7, 6).boolean(True).int_in_range(0, 40, 1)
fdp.boolean(True).i64(5_000_000_001).i64(5_000_040_001)  # a replay
write("udp_probe_table", "exchanges", fdp.bytes())
fdp = FdpInput().int_in_range(0, 1 << 62, 0)
fdp.int_in_range(0, 3, 1).int_in_range(0, 7, 0).int_in_range(0, 100, 32).data(b"TMU1" + bytes(28))
fdp.int_in_range(0, 3, 1).int_in_range(0, 7, 2)  # stream removed
fdp.int_in_range(0, 3, 1).int_in_range(0, 7, 4).int_in_range(0, 40, 3)
fdp.int_in_range(0, 3, 1).int_in_range(0, 7, 1)  # and added again
fdp.int_in_range(0, 3, 1).int_in_range(0, 7, 4).int_in_range(0, 40, 3)
write("udp_probe_table", "remove-add", fdp.bytes())

# --- clock_model: plausible probe sequences and event times.


def probes(n, offset, drift_ppm, stages=8, events=3):
    fdp = FdpInput().int_in_range(1, 16, stages).int_in_range(0, 1 << 62, 10**15)
    for i in range(n):
        fdp.int_in_range(0, 3, 1).boolean(False)
        fdp.int_in_range(0, 1_000_000_000, 500_000_000)
        off = offset + int(drift_ppm * 1e-6 * i * 5e8)
        fdp.int_in_range(-10**12, 10**12, off)
        fdp.int_in_range(-1_000_000, 50_000_000, 200_000 + 1000 * (i % 7))
        fdp.int_in_range(-1_000, 5_000_000, 20_000)
        fdp.int_in_range(-1_000_000, 100_000_000, 450_000 + 3000 * (i % 5))
    for j in range(events):
        fdp.int_in_range(0, 3, 0).boolean(False).i32(-1_000_000 * j)
    return fdp.bytes()


write("clock_model", "steady", probes(12, 3_000_000, 0))
write("clock_model", "drifting", probes(40, -250_000_000, 80))
write("clock_model", "few", probes(2, 0, 0, stages=1, events=1))

# --- retime: plausible probe sequences (optionally a clock jump) with events.


def retime(n, offset, jump_at=None, jump=0, every=3):
    fdp = FdpInput().int_in_range(1, 120_000, 30_000).int_in_range(1, 32, 16)
    fdp.int_in_range(1, 8, 3).int_in_range(0, 1 << 62, 10**18)
    fdp.int_in_range(-(1 << 61), 1 << 61, offset)
    for i in range(n):
        fdp.int_in_range(0, 2, 1).int_in_range(0, 7, 1)  # a plausible probe
        fdp.int_in_range(0, 2_000_000_000, 1_000_000_000)
        if i == jump_at:
            fdp.int_in_range(0, 15, 0).int_in_range(-5_000_000_000, 5_000_000_000, jump)
        else:
            fdp.int_in_range(0, 15, 1)
        fdp.int_in_range(-1_000_000, 50_000_000, 20_000_000 + 100_000 * (i % 7))
        fdp.int_in_range(0, 5_000_000, 50_000)
        fdp.int_in_range(-1_000_000, 50_000_000, 20_000_000 + 70_000 * (i % 5))
        fdp.int_in_range(0, 15, 1).int_in_range(0, 15, 1)  # no restart or candidate mark
        if i % every == every - 1:  # an event a little before this probe
            fdp.int_in_range(0, 2, 0).boolean(False).i32(-300_000_000)
            fdp.i64(10**18 + (i + 1) * 10**9 - 300_000_000)
            fdp.int_in_range(0, (1 << 63) - 1, 20_000_000)
            fdp.boolean(True).boolean(False).i32(10_000_000)
    return fdp.bytes()


write("retime", "steady", retime(40, 3_200_000_000))
write("retime", "jump", retime(60, -7_000_000_000, jump_at=30, jump=2_000_000_000))
write("retime", "few", retime(3, 0, every=1))

# --- jsonl: real Records (protobuf wire format).
sys.path.insert(0, os.path.join(sys.argv[1] if len(sys.argv) > 1 else "build", "python"))
from tickmark.v1 import records_pb2 as r  # noqa: E402


def record(seq, **body):
    rec_ = r.Record(session_id="s-1a2b3c", sequence=seq, written_session_ns=10**18 + seq,
                    hash=hashlib.sha256(bytes([seq])).digest(), **body)
    return rec_.SerializeToString()


write("jsonl", "session-opened", record(1, session_event=r.SessionEvent(
    event=r.SessionEvent.KIND_OPENED, detail="opened by \"operator\"\n")))
write("jsonl", "feedback", record(2, feedback=r.Feedback(
    client_id="dock:ana:tickmark-keys:pts-3", client_sequence=4, trainer="trainer-ana",
    value=-0.5, event_source_ns=5_000_000_000, arrival_session_ns=10**18,
    event_session_ns=10**18 - 300_000_000)))
write("jsonl", "step", record(3, step=r.Step(client_id="rover", client_sequence=1, agent="rover-1",
                                             step_id=9, episode=2, start_agent_ns=1,
                                             end_agent_ns=0)))
write("jsonl", "probe", record(4, probe=r.Probe(client_id="c", probe_id=3, t1_session_ns=1,
                                                t2_client_ns=2, t3_client_ns=3, t4_session_ns=4,
                                                accepted=False, reject_reason="reversed")))
write("jsonl", "label", record(5, label=r.Label(step_sequence=3, agent="rover-1", step_id=9,
                                                value=0.25, weight=0.8, settled=True,
                                                parts=[r.LabelPart(trainer="ü", value=1,
                                                                   weight=0.1)])))

# --- live_validation: trainer and agent messages as they come off the stream,
# with the server's side (arrival, hello offset, uncertainty, tolerance) in
# the integers; default limits. Layout: see fuzz/live_validation_fuzz.cc.
from tickmark.v1 import stream_pb2 as st  # noqa: E402

ARRIVAL = 10**18


def live(kind, first, second=b"", arrival=ARRIVAL, hello_offset=0, uncertainty=2_000_000,
         tolerance=0, has_probe=True):
    fdp = FdpInput().int_in_range(0, 2, kind).boolean(False).i64(arrival).i64(hello_offset)
    fdp.int_in_range(0, (1 << 63) - 1, uncertainty).int_in_range(0, (1 << 63) - 1, tolerance)
    fdp.boolean(has_probe).int_in_range(0, 1 << 16, len(first))
    return fdp.data(first + second).bytes()


TRAINER, AGENT, RESEND = 0, 1, 2
hello = st.Hello(token="tm_3f9c", client_id="dock:ana:tickmark-keys:pts-3",
                 source_description="keyboard /dev/pts/3", software="tickmark-keys 0.1",
                 sent_client_ns=5_000_000_000)
write("live_validation", "trainer-hello",
      live(TRAINER, st.TrainerMessage(hello=hello).SerializeToString(), b"tm_3f9c"))
write("live_validation", "agent-hello-token-differs",
      live(AGENT, st.AgentMessage(hello=hello).SerializeToString(), b"tm_other"))
# The event 300 ms before its arrival once mapped through the hello offset.
feedback = st.FeedbackMessage(client_sequence=4, value=-0.5, event_source_ns=5_000_000_000,
                              input="KEY_F")
write("live_validation", "trainer-feedback",
      live(TRAINER, st.TrainerMessage(feedback=feedback).SerializeToString(),
           hello_offset=5_000_000_000 - (ARRIVAL - 300_000_000)))
# One second in the future before the first probe: clamped to its arrival.
write("live_validation", "trainer-feedback-future-clamped",
      live(TRAINER, st.TrainerMessage(feedback=feedback).SerializeToString(),
           hello_offset=5_000_000_000 - (ARRIVAL + 1_000_000_000), has_probe=False))
# Disciplined clocks: a synchronised real-time reading with a 1 ms bound, the
# server's bound (from the tolerance) 1 ms, a 20 ms round trip, the routes
# 1 ms apart (the hello offset): mapped through real time.
rt_feedback = st.FeedbackMessage(client_sequence=5, value=1.0, event_source_ns=5_000_000_000,
                                 event_realtime_ns=ARRIVAL - 300_000_000,
                                 realtime_bound_ns=1_000_000, realtime_synced=True)
write("live_validation", "trainer-feedback-realtime",
      live(TRAINER, st.TrainerMessage(feedback=rt_feedback).SerializeToString(),
           hello_offset=1_000_000, uncertainty=20_000_000, tolerance=1_000_000))
rt_step = st.StepMessage(client_sequence=2, step_id=10, start_agent_ns=7_100_000_000,
                         end_agent_ns=7_200_000_000, action="left",
                         start_realtime_ns=ARRIVAL - 100_000_000, realtime_bound_ns=1_000_000,
                         realtime_synced=True)
write("live_validation", "agent-step-realtime",
      live(AGENT, st.AgentMessage(step=rt_step).SerializeToString(),
           hello_offset=1_000_000, uncertainty=20_000_000, tolerance=1_000_000))
reply = st.ProbeReply(probe_id=3, t1_session_ns=ARRIVAL - 2_000_000,
                      t2_client_ns=5_000_000_000, t3_client_ns=5_000_050_000)
write("live_validation", "trainer-probe-reply",
      live(TRAINER, st.TrainerMessage(probe_reply=reply).SerializeToString()))
step = st.StepMessage(client_sequence=1, step_id=9, episode=2, start_agent_ns=7_000_000_000,
                      end_agent_ns=7_100_000_000, action="left", state=b"\x01\x02",
                      features=[0.5, -1.0])
write("live_validation", "agent-step",
      live(AGENT, st.AgentMessage(step=step).SerializeToString(),
           hello_offset=7_000_000_000 - (ARRIVAL - 50_000_000)))
stored_fb = r.Record(session_id="s-1a2b3c", sequence=2, feedback=r.Feedback(
    client_id="dock:ana", client_sequence=4, trainer="trainer-ana", value=-0.5,
    event_source_ns=5_000_000_000, input="KEY_F")).SerializeToString()
resent_fb = r.Record(feedback=r.Feedback(client_id="dock:ana", client_sequence=4, value=0.5,
                                         event_source_ns=5_000_000_000,
                                         input="KEY_F")).SerializeToString()
write("live_validation", "resend-feedback-differs", live(RESEND, stored_fb, resent_fb))
stored_step = r.Record(session_id="s-1a2b3c", sequence=3, step=r.Step(
    client_id="rover", client_sequence=1, agent="rover-1", step_id=9, episode=2,
    start_agent_ns=7_000_000_000, action="left", features=[0.5, -1.0])).SerializeToString()
write("live_validation", "resend-step-same", live(RESEND, stored_step, stored_step))

# --- wav: RIFF WAVE headers (the canonical 44-byte one, an extensible float
# one with a LIST chunk first, a stream with an unknown data size), followed
# by a little audio; wav_fuzz also reads the bytes as samples for the onset
# search.
def riff(fmt_tag, channels, rate, bits, data, extra=b"", cb=b"", data_size=None):
    fmt = struct.pack("<HHIIHH", fmt_tag, channels, rate, rate * channels * bits // 8,
                      channels * bits // 8, bits) + cb
    body = (b"WAVE" + extra + b"fmt " + struct.pack("<I", len(fmt)) + fmt + b"data" +
            struct.pack("<I", len(data) if data_size is None else data_size) + data)
    return b"RIFF" + struct.pack("<I", len(body)) + body


tone = b"".join(struct.pack("<h", int(8000 * ((i // 20) % 2 * 2 - 1)) if i > 400 else 0)
                for i in range(1200))
write("wav", "pcm16-mono", riff(1, 1, 16000, 16, tone))
ext = struct.pack("<HHI", 22, 32, 3) + struct.pack("<H", 3) + bytes(14)
write("wav", "float-stereo-extensible",
      riff(0xFFFE, 2, 16000, 32, struct.pack("<8f", 0.5, -0.5, 1.0, 1.0, 0, 0, -1, 2),
           extra=b"LIST" + struct.pack("<I", 3) + b"abc\0", cb=ext))
write("wav", "pcm24-stream", riff(1, 1, 16000, 24, bytes(range(60)), data_size=0xFFFFFFFF))
print("seeds written under", CORPUS)
