"""Fixtures: a real tickmarkd (and link emulators) as child processes on loopback."""

from __future__ import annotations

import os
import re
import signal
import subprocess
import tempfile
import time

import grpc
import pytest

BIN = os.environ.get("TICKMARK_BIN", os.path.join(os.path.dirname(__file__), "../../build/bin"))

from tickmark.v1 import admin_pb2, admin_pb2_grpc, records_pb2  # noqa: E402



def tm(server, *args, token_file=None, check=True, timeout=120):
    """Runs the tickmark CLI against `server` (operator token unless token_file);
    the finished process. With check, a non-zero exit fails the test."""
    cmd = [os.path.join(BIN, "tickmark"), "--server", server.address,
           "--token-file", token_file or os.path.join(server.data_dir, "operator.token"), *args]
    p = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    if check:
        assert p.returncode == 0, p.stderr
    return p

def _wait_line(proc, pattern, timeout=15.0):
    """Reads proc's stdout until a line matches; returns the match."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        line = proc.stdout.readline()
        if not line:
            if proc.poll() is not None:
                raise RuntimeError(f"{proc.args[0]} exited with {proc.returncode}")
            continue
        m = re.search(pattern, line)
        if m:
            return m
    raise TimeoutError(f"no line matching {pattern!r}")


class Server:
    def __init__(self, data_dir, extra=(), listen="127.0.0.1:0"):
        self.data_dir = data_dir
        self.proc = subprocess.Popen(
            [os.path.join(BIN, "tickmarkd"), "--data-dir", data_dir, "--listen", listen,
             "--log-level", "warning", *extra],
            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
        self.port = int(_wait_line(self.proc, r"listening port=(\d+)").group(1))
        self.address = f"127.0.0.1:{self.port}"
        with open(os.path.join(data_dir, "operator.token")) as f:
            self.operator = f.read().strip()
        self.channel = grpc.insecure_channel(self.address)
        self.admin = admin_pb2_grpc.SessionAdminStub(self.channel)

    def md(self, token):
        return (("authorization", "Bearer " + token),)

    def session(self, kernel="", title="pytest"):
        """Creates a session; returns (session id, admin token)."""
        r = self.admin.CreateSession(admin_pb2.CreateSessionRequest(title=title, default_kernel=kernel),
                                     metadata=self.md(self.operator))
        return r.session.id, r.admin_secret

    def token(self, session, admin, role, subject=""):
        roles = {"trainer": records_pb2.ROLE_TRAINER, "agent": records_pb2.ROLE_AGENT,
                 "observer": records_pb2.ROLE_OBSERVER, "admin": records_pb2.ROLE_ADMIN}
        r = self.admin.IssueToken(admin_pb2.IssueTokenRequest(
            session_id=session, role=roles[role], subject=subject), metadata=self.md(admin))
        return r.secret

    def close_session(self, session, admin):
        self.admin.CloseSession(admin_pb2.CloseSessionRequest(session_id=session),
                                metadata=self.md(admin))

    def stop(self):
        self.channel.close()
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()


class Link:
    """tickmark-linkemu in front of a target; can be killed and restarted on its port."""

    def __init__(self, target, port=0, delay_ms=0, jitter_ms=0):
        self.target, self.delay_ms, self.jitter_ms = target, delay_ms, jitter_ms
        self.start(port)

    def start(self, port=0):
        self.proc = subprocess.Popen(
            [os.path.join(BIN, "tickmark-linkemu"), "--listen", f"127.0.0.1:{port}",
             "--target", self.target, "--forward-delay-ms", str(self.delay_ms),
             "--backward-delay-ms", str(self.delay_ms), "--jitter-ms", str(self.jitter_ms)],
            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
        self.address = _wait_line(self.proc, r"^listening (\S+)").group(1)
        self.port = int(self.address.rsplit(":", 1)[1])

    def kill(self):
        self.proc.kill()
        self.proc.wait()

    def stop(self):
        if self.proc.poll() is None:
            self.proc.terminate()
            self.proc.wait(5)


def wait_until(pred, timeout, what):
    """Polls pred() every 50 ms; AssertionError naming `what` after `timeout` s."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if pred():
            return
        time.sleep(0.05)
    raise AssertionError(f"timed out waiting for {what}")


def first_ack(server, token, client_id, message):
    """Sends a hello and one TrainerMessage over a raw Train stream; the first Ack."""
    from tickmark.v1 import stream_pb2, stream_pb2_grpc
    stub = stream_pb2_grpc.LiveStub(grpc.insecure_channel(server.address))

    def messages():
        yield stream_pb2.TrainerMessage(hello=stream_pb2.Hello(
            token=token, client_id=client_id, sent_client_ns=time.monotonic_ns()))
        yield message

    call = stub.Train(messages(), timeout=20)
    try:
        for m in call:
            if m.HasField("ack"):
                return m.ack
    finally:
        call.cancel()
    raise AssertionError("the stream ended without an Ack")


@pytest.fixture
def server():
    with tempfile.TemporaryDirectory(prefix="tickmark-pytest-") as d:
        s = Server(d)
        try:
            yield s
        finally:
            s.stop()


@pytest.fixture
def links():
    made = []

    def make(*args, **kwargs):
        link = Link(*args, **kwargs)
        made.append(link)
        return link

    yield make
    for link in made:
        link.stop()
