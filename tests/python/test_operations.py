"""Operations interfaces of a real tickmarkd (issue 17, part 3), checked with
outside tools and standard clients:

- /metrics (web port and --metrics-listen) after real traffic: parsed by
  Prometheus' own `promtool check metrics` (Debian's prometheus package), and
  the counts equal what the test sent;
- the standard gRPC health service (grpc.health.v1.Health) through stubs
  generated from grpc's published health.proto (Debian's grpc-proto package)
  with the system protoc and grpc_python_plugin;
- server reflection (grpc.reflection.v1alpha) the same way: the service list,
  and the file descriptor of tickmark.v1.Live decoded by protobuf's own
  descriptor_pb2.
"""

from __future__ import annotations

import importlib
import os
import subprocess
import sys
import tempfile
import time
import urllib.request

import grpc
import pytest

import tickmark
from conftest import Server, _wait_line, wait_until
from tickmark._connect import open_channel
from tickmark._stream import ReconnectingStream
from tickmark.v1 import records_pb2, stream_pb2

GRPC_PROTO = "/usr/share/grpc-proto/grpc"  # Debian's grpc-proto package
PROMTOOL = "/usr/bin/promtool"  # Debian's prometheus package


@pytest.fixture(scope="module")
def stubs():
    """Python stubs of grpc's health.proto and reflection.proto (v1alpha, what
    Debian's gRPC 1.51 serves), generated into a temporary folder. Each file is
    compiled from its own folder, so the modules are top-level (health_pb2,
    reflection_pb2) and do not clash with the grpcio package's name `grpc`;
    the wire names (grpc.health.v1.Health, ...) come from the .proto files."""
    with tempfile.TemporaryDirectory(prefix="tickmark-stubs-") as out:
        for folder, name in (("health/v1", "health.proto"),
                             ("reflection/v1alpha", "reflection.proto")):
            src = os.path.join(GRPC_PROTO, folder)
            assert os.path.exists(os.path.join(src, name)), \
                f"{src}/{name} missing: install Debian's grpc-proto package (./run does)"
            subprocess.run(["protoc", f"-I{src}", f"--python_out={out}", f"--grpc_python_out={out}",
                            "--plugin=protoc-gen-grpc_python=/usr/bin/grpc_python_plugin", name],
                           check=True)
        sys.path.insert(0, out)
        try:
            yield {m: importlib.import_module(m) for m in
                   ("health_pb2", "health_pb2_grpc", "reflection_pb2", "reflection_pb2_grpc")}
        finally:
            sys.path.remove(out)


@pytest.fixture
def ops_server():
    """tickmarkd with the web port and the metrics-only port, both on loopback."""
    with tempfile.TemporaryDirectory(prefix="tickmark-ops-") as d:
        s = Server(d, extra=("--http-listen", "127.0.0.1:0", "--metrics-listen", "127.0.0.1:0"))
        try:
            s.web_port = int(_wait_line(s.proc, r"web port=(\d+)").group(1))
            s.metrics_port = int(_wait_line(s.proc, r"metrics port=(\d+)").group(1))
            yield s
        finally:
            s.stop()


def _get(port, path="/metrics"):
    with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=10) as r:
        return r.status, r.headers.get("Content-Type"), r.read().decode()


def _samples(text):
    """{'name{labels}': value} from a text exposition (labels as written)."""
    out = {}
    for line in text.splitlines():
        if not line or line.startswith("#"):
            continue
        key, value = line.rsplit(" ", 1)
        out[key] = float(value)
    return out


def _promtool_check(text):
    # Prometheus' own linter and parser for the text format (promtool reads
    # the exposition on stdin); it exits non-zero on a format error and
    # prints lint problems (names, units, HELP) on stdout.
    p = subprocess.run([PROMTOOL, "check", "metrics"], input=text, capture_output=True,
                       text=True, timeout=30)
    return p.returncode, (p.stdout + p.stderr).strip()


def test_metrics_count_the_traffic_and_pass_promtool(ops_server):
    server = ops_server
    session, admin = server.session()
    trainer_token = server.token(session, admin, "trainer", "trainer-a")
    agent_token = server.token(session, admin, "agent", "rover-1")

    status, ctype, before = _get(server.web_port)
    assert status == 200
    # Text format 0.0.4 (Prometheus exposition formats; from memory).
    assert ctype.startswith("text/plain") and "version=0.0.4" in ctype

    steps, good, bad = 5, 7, 3
    with tickmark.Agent(server.address, token=agent_token) as agent:
        for i in range(steps):
            agent.step("east", state=f"{i},0")
        assert agent.flush(10)
        trainer = ReconnectingStream(open_channel(server.address), "train", trainer_token, "t1",
                                     records_pb2.SOURCE_KIND_SCRIPT, "test", "pytest")
        assert trainer.wait_connected(10)
        for _ in range(good):
            trainer.send(stream_pb2.FeedbackMessage(value=1.0, event_source_ns=time.monotonic_ns()))
        # Beyond --max-abs-value (1000 by default): refused, INVALID_ARGUMENT.
        for _ in range(bad):
            trainer.send(stream_pb2.FeedbackMessage(value=5000.0,
                                                    event_source_ns=time.monotonic_ns()))
        assert trainer.flush(10)
        assert len(trainer.rejected) == bad

        _, _, during = _get(server.metrics_port)
        m = _samples(during)
        assert m['tickmark_open_streams{role="trainer"}'] == 1
        assert m['tickmark_open_streams{role="agent"}'] == 1
        trainer.close()

    def text_now():
        return _get(server.metrics_port)[2]

    # Streams close asynchronously after the clients hang up.
    wait_until(lambda: _samples(text_now())['tickmark_open_streams{role="trainer"}'] == 0, 10,
          "the trainer stream to close")
    text = text_now()
    m = _samples(text)
    assert m['tickmark_ingest_stored_total{kind="feedback"}'] == good
    assert m['tickmark_ingest_stored_total{kind="step"}'] == steps
    assert m['tickmark_ingest_rejected_total{kind="feedback",reason="invalid_argument"}'] == bad
    assert m['tickmark_ingest_duplicates_total{kind="feedback"}'] == 0
    # Every stored message has one ack latency and one uncertainty.
    assert m['tickmark_ack_latency_seconds_count{kind="feedback"}'] == good
    assert m['tickmark_ack_latency_seconds_count{kind="step"}'] == steps
    assert m['tickmark_ack_latency_seconds_bucket{kind="step",le="+Inf"}'] == steps
    assert m['tickmark_clock_uncertainty_seconds_count{kind="feedback"}'] == good
    assert m['tickmark_ack_latency_seconds_sum{kind="feedback"}'] > 0
    # Records in the ledger: at least what was stored (plus session, client
    # and clock records the server writes itself).
    assert m["tickmark_ledger_committed_records_total"] >= good + steps
    assert m["tickmark_ledger_commit_seconds_count"] >= 1
    assert m["tickmark_ledger_writable"] == 1
    assert m["tickmark_ledger_disk_full"] == 0
    assert m["tickmark_ledger_queue_depth"] >= 0
    assert any(k.startswith("tickmark_build_info{version=") and v == 1 for k, v in m.items())
    # Histogram buckets are cumulative (non-decreasing) and end at _count.
    buckets = [v for k, v in m.items()
               if k.startswith('tickmark_ack_latency_seconds_bucket{kind="feedback"')]
    assert buckets == sorted(buckets) and buckets[-1] == good

    # The same registry on both ports.
    web = _samples(_get(server.web_port)[2])
    assert web['tickmark_ingest_stored_total{kind="feedback"}'] == good

    rc, out = _promtool_check(text)
    print("promtool check metrics:", out or "no problems")
    assert rc == 0, out
    assert out == "", out  # no lint problems either


def test_metrics_port_serves_only_metrics(ops_server):
    with pytest.raises(urllib.error.HTTPError) as e:
        _get(ops_server.metrics_port, "/")
    assert e.value.code == 404
    req = urllib.request.Request(f"http://127.0.0.1:{ops_server.metrics_port}/metrics",
                                 method="POST", data=b"x")
    with pytest.raises(urllib.error.HTTPError) as e:
        urllib.request.urlopen(req, timeout=10)
    assert e.value.code == 405


def test_metrics_listen_refuses_a_remote_plaintext_address():
    with tempfile.TemporaryDirectory(prefix="tickmark-ops-") as d:
        p = subprocess.run([os.path.join(os.environ.get("TICKMARK_BIN", "../../build/bin"),
                                         "tickmarkd"), "--data-dir", d, "--listen", "127.0.0.1:0",
                            "--metrics-listen", "0.0.0.0:0"],
                           capture_output=True, text=True, timeout=30)
    assert p.returncode != 0
    assert "refusing plaintext metrics" in p.stderr


def test_standard_health_client_sees_serving(ops_server, stubs):
    h, hg = stubs["health_pb2"], stubs["health_pb2_grpc"]
    stub = hg.HealthStub(ops_server.channel)
    # The server as a whole ("") per the gRPC health checking protocol
    # (grpc/doc/health-checking.md).
    r = stub.Check(h.HealthCheckRequest(service=""), timeout=10)
    assert r.status == h.HealthCheckResponse.SERVING
    with pytest.raises(grpc.RpcError) as e:
        stub.Check(h.HealthCheckRequest(service="no.such.Service"), timeout=10)
    assert e.value.code() == grpc.StatusCode.NOT_FOUND  # the protocol's answer for unknown names


def test_reflection_lists_and_describes_the_services(ops_server, stubs):
    from google.protobuf import descriptor_pb2

    r, rg = stubs["reflection_pb2"], stubs["reflection_pb2_grpc"]
    stub = rg.ServerReflectionStub(ops_server.channel)
    requests = [r.ServerReflectionRequest(list_services=""),
                r.ServerReflectionRequest(file_containing_symbol="tickmark.v1.Live")]
    answers = list(stub.ServerReflectionInfo(iter(requests), timeout=10))
    assert len(answers) == 2
    names = {s.name for s in answers[0].list_services_response.service}
    assert {"tickmark.v1.Live", "tickmark.v1.SessionAdmin", "grpc.health.v1.Health"} <= names
    files = [descriptor_pb2.FileDescriptorProto.FromString(b)
             for b in answers[1].file_descriptor_response.file_descriptor_proto]
    live = [s for f in files for s in f.service if f.package == "tickmark.v1" and s.name == "Live"]
    assert len(live) == 1
    assert {"Train", "Act", "Subscribe"} <= {m.name for m in live[0].method}
