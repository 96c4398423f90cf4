"""Three tickmarkd instances on one PostgreSQL database behind nginx
(docs/architecture.md, "More than one machine").

Everything is real and on loopback: PostgreSQL 15 (pg_fixture.py), three
tickmarkd with --ledger postgresql://..., and Debian's nginx with grpc_pass
and `hash $http_tickmark_session consistent`, started with its own prefix
and config in a temporary folder. Trainers (the package's reconnecting
stream) and agents (tickmark.Agent) work on several sessions through nginx;
a subscriber follows each session.

- failover: the owner of one session is killed (SIGKILL) under load; another
  instance takes its lease once it expires and the clients reconnect and
  resend. Counted against the database (psql): acknowledged records lost 0,
  duplicated 0; subscriber gaps 0; the takeover time is printed.
- fencing: an owner stopped (SIGSTOP) past its lease, whose session another
  instance then takes, is continued (SIGCONT) while its clients' messages
  wait in its sockets; none of them is written under its old fencing token
  after the takeover (checked in the database).
"""

from __future__ import annotations

import os
import signal
import subprocess
import threading
import time

import grpc
import pytest

from conftest import BIN, Server
from pg_fixture import assert_chain, free_port, pg  # noqa: F401 (pg: the module's PostgreSQL fixture)
from tickmark import Agent
from tickmark._connect import open_channel
from tickmark._stream import ReconnectingStream
from tickmark.subscription import Subscription
from tickmark.v1 import records_pb2, stream_pb2

LEASE_MS = 1500  # short, to keep the test short; the default is 5000
NGINX = "/usr/sbin/nginx"


class Instance(Server):
    """A tickmarkd on the shared database, at a fixed port (so it can be
    named as an owner and restarted there)."""

    def __init__(self, data_dir, url, name):
        os.makedirs(data_dir, exist_ok=True)
        self.name = name
        port = free_port()
        super().__init__(data_dir, listen=f"127.0.0.1:{port}", extra=(
            "--advertise", f"127.0.0.1:{port}",
            "--ledger", url, "--lease-ms", str(LEASE_MS), "--instance-id", name,
            "--feedback-rate", "0", "--step-rate", "0"))


class Nginx:
    def __init__(self, prefix, upstreams):
        if not os.path.exists(NGINX):
            pytest.skip("no nginx (Debian package nginx)")
        self.prefix = prefix
        self.port = free_port()
        os.makedirs(os.path.join(prefix, "logs"), exist_ok=True)
        servers = "\n".join(f"    server {u} max_fails=1 fail_timeout=1s;" for u in upstreams)
        user = "user root;" if os.geteuid() == 0 else ""
        conf = f"""
{user}
worker_processes 1;
daemon off;
pid {prefix}/nginx.pid;
error_log {prefix}/logs/error.log warn;
events {{ worker_connections 512; }}
http {{
  access_log off;
  client_body_temp_path {prefix}/body;
  proxy_temp_path {prefix}/proxy;
  fastcgi_temp_path {prefix}/fastcgi;
  uwsgi_temp_path {prefix}/uwsgi;
  scgi_temp_path {prefix}/scgi;
  upstream tickmark {{
    hash $http_tickmark_session consistent;
{servers}
  }}
  server {{
    listen 127.0.0.1:{self.port} http2;
    location / {{
      grpc_pass grpc://tickmark;
      grpc_next_upstream error timeout;
      grpc_connect_timeout 1s;
      grpc_read_timeout 1h;
      grpc_send_timeout 1h;
      client_max_body_size 0;
    }}
  }}
}}
"""
        self.conf = os.path.join(prefix, "nginx.conf")
        with open(self.conf, "w") as f:
            f.write(conf)
        # -e: the error log from the start (before the config is read,
        # nginx would open its compiled-in /var/log/nginx/error.log).
        self.proc = subprocess.Popen([NGINX, "-p", prefix, "-c", self.conf,
                                      "-e", os.path.join(prefix, "logs", "error.log")],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline:
            try:
                with __import__("socket").create_connection(("127.0.0.1", self.port), 0.2):
                    break
            except OSError:
                if self.proc.poll() is not None:
                    raise RuntimeError(f"nginx exited: {self.proc.stderr.read()}")
                time.sleep(0.05)
        self.address = f"127.0.0.1:{self.port}"

    def stop(self):
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGQUIT)
            try:
                self.proc.wait(5)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()


class Trainer:
    """A trainer sending feedback at a bounded rate; remembers every ack."""

    def __init__(self, target, token, client_id):
        self.acked = {}  # client sequence -> session sequence
        self.lock = threading.Lock()
        self.stream = ReconnectingStream(
            open_channel(target), "train", token, client_id, records_pb2.SOURCE_KIND_SCRIPT,
            "multi-instance test", "pytest", on_ack=self._ack, send_realtime=False,
            channel_for=open_channel)
        self.stop = threading.Event()
        self.sent = 0
        self.thread = threading.Thread(target=self._run, daemon=True)

    def _ack(self, ack):
        if ack.code == 0:
            with self.lock:
                self.acked[ack.client_sequence] = ack.sequence

    def _run(self):
        while not self.stop.is_set():
            if self.stream.pending < 50:  # bounded load
                self.stream.send(stream_pb2.FeedbackMessage(
                    value=1.0, event_source_ns=time.monotonic_ns(), input="test"))
                self.sent += 1
            time.sleep(0.005)

    def start(self):
        assert self.stream.wait_connected(20), "trainer not connected"
        self.thread.start()
        return self

    def finish(self):
        self.stop.set()
        self.thread.join(5)
        assert self.stream.flush(60), f"{self.stream.pending} feedback never acknowledged"
        self.stream.close(5)


class Follower:
    """A subscriber through nginx, following one session to its end."""

    def __init__(self, target, token, session):
        self.seqs = []
        self.sub = Subscription(open_channel(target), token, session, channel_for=open_channel)
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self):
        try:
            for r in self.sub:
                self.seqs.append(r.sequence)
        except grpc.RpcError:
            pass

    def until(self, last, timeout=30):
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline and (not self.seqs or self.seqs[-1] < last):
            time.sleep(0.05)
        self.sub.close()
        self.thread.join(5)


def retry_unavailable(call, seconds=15):
    """Calls `call` until it stops answering UNAVAILABLE, which tells the caller
    to retry (docs/conventions.md): while a stalled owner still holds the
    session's lease row, an instance that must take the lease answers so after
    its lock timeout, until PostgreSQL ends the stalled transaction."""
    deadline = time.monotonic() + seconds
    while True:
        try:
            return call()
        except grpc.RpcError as e:
            if e.code() != grpc.StatusCode.UNAVAILABLE or time.monotonic() > deadline:
                raise
            time.sleep(0.2)


def owner_of(pg, db, session):
    return pg.psql(db, f"SELECT owner || ' ' || token FROM session_lease WHERE session_id = '{session}'").split()


def check_session(pg, db, session, trainers, follower):
    """Lost, duplicated and gap counts for one session, from the database."""
    lost = dup = 0
    for t in trainers:
        stored = pg.psql(db, f"SELECT client_seq || ' ' || seq FROM record WHERE session_id = '{session}' "
                             f"AND client_id = '{t.stream._hello.client_id}' ORDER BY client_seq")
        rows = [tuple(map(int, line.split())) for line in stored.splitlines() if line]
        by_cseq = {}
        for cseq, seq in rows:
            if cseq in by_cseq:
                dup += 1
            by_cseq[cseq] = seq
        for cseq, seq in t.acked.items():
            if by_cseq.get(cseq) != seq:
                lost += 1
    # One statement, so both are read at one moment.
    count, last = map(int, pg.psql(db, f"SELECT COUNT(*), COALESCE(MAX(seq), 0) FROM record "
                                       f"WHERE session_id = '{session}'").split("|"))
    assert count == last, "the journal has a hole"
    follower.until(last)
    # The journal may grow past `last` after the count (credit updates derived
    # later): those are not this check's, and once counted the record after
    # `last` as a gap.
    seen = [s for s in follower.seqs if s <= last]
    gaps = sum(1 for a, b in zip(seen, seen[1:]) if b != a + 1) + (0 if seen and seen[0] == 1 else 1)
    gaps += 0 if seen and seen[-1] == last else 1
    return lost, dup, gaps, last


def test_failover_and_fencing(pg, tmp_path):
    url = pg.new_database()
    db = url.rsplit("/", 1)[1]
    inst = [Instance(str(tmp_path / f"i{k}"), url, f"i{k}") for k in range(3)]
    lb = Nginx(str(tmp_path / "nginx"), [i.address for i in inst])
    clients = []
    try:
        # Sessions made on different instances (each owns what it made).
        sessions = []
        for k in range(3):
            sid, admin = inst[k].session(title=f"multi-{k}")
            sessions.append((sid, admin, inst[k]))
        work = {}
        for sid, admin, home in sessions:
            trainers = [Trainer(lb.address, home.token(sid, admin, "trainer", f"t{j}"),
                                f"trainer-{j}:{sid}").start() for j in range(2)]
            agent = Agent(lb.address, token=home.token(sid, admin, "agent", "rover"),
                          client_id=f"agent:{sid}", send_realtime=False, connect_timeout=20)
            follower = Follower(lb.address, home.token(sid, admin, "observer", "obs"), sid)
            work[sid] = (trainers, agent, follower)
            clients.append(agent)
        for sid, (trainers, agent, _) in work.items():
            for n in range(5):
                agent.step(f"move-{n}")
        # A C++ client too (the agent library's StreamClient), on the
        # session whose owner will be killed: it must follow the owner and
        # resend as the Python clients do.
        victim_sid, victim_admin, victim_home = sessions[0]
        token_file = tmp_path / "scripted.token"
        token_file.write_text(victim_home.token(victim_sid, victim_admin, "agent", "scripted") + "\n")
        scripted = subprocess.Popen(
            [os.path.join(BIN, "tickmark-scripted-agent"), "--server", lb.address,
             "--token-file", str(token_file), "--client-id", f"scripted:{victim_sid}",
             "--seconds", "12", "--rate", "20", "--no-realtime"],
            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        time.sleep(1.0)

        # -- failover: kill -9 the owner of the first session under load.
        owner, token = owner_of(pg, db, victim_sid)
        victim = next(i for i in inst if i.name == owner)
        acked_before = sum(len(t.acked) for t in work[victim_sid][0])
        killed_at = time.monotonic()
        victim.proc.kill()
        victim.proc.wait()
        # Wait for another instance to take the session and acknowledge on it
        # (acks already on their way from the killed owner do not count: a
        # count alone was once reached before any takeover).
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            if (owner_of(pg, db, victim_sid)[0] != owner and
                    sum(len(t.acked) for t in work[victim_sid][0]) > acked_before + 5):
                break
            time.sleep(0.02)
        takeover = time.monotonic() - killed_at
        new_owner, new_token = owner_of(pg, db, victim_sid)
        assert new_owner != owner and int(new_token) > int(token)
        print(f"\ntakeover of {victim_sid}: {owner} killed, {new_owner} acknowledging after "
              f"{takeover * 1000:.0f} ms (lease {LEASE_MS} ms)")

        # -- fencing: SIGSTOP the owner of another session past its lease.
        fenced_sid = next(s for s, _, i in sessions if s != victim_sid and
                          owner_of(pg, db, s)[0] != owner)
        f_owner, f_token = owner_of(pg, db, fenced_sid)
        paused = next(i for i in inst if i.name == f_owner)
        paused.proc.send_signal(signal.SIGSTOP)
        try:
            time.sleep(LEASE_MS / 1000 * 2.5)
            # Clients of that session now reach another instance (nginx
            # passes the stalled one over after its connect timeout only
            # for new connections; an agent straight to a live instance
            # takes the lease at once).
            other = next(i for i in inst if i.name not in (f_owner, owner))
            sid_admin = next(a for s, a, _ in sessions if s == fenced_sid)
            taker_token = retry_unavailable(
                lambda: other.token(fenced_sid, sid_admin, "agent", "taker"))
            taker = Agent(other.address, token=taker_token,
                          client_id=f"taker:{fenced_sid}", send_realtime=False, connect_timeout=20)
            clients.append(taker)
            taker.step("take")
            t_owner, t_token = owner_of(pg, db, fenced_sid)
            assert t_owner == other.name and int(t_token) > int(f_token)
        finally:
            paused.proc.send_signal(signal.SIGCONT)
        time.sleep(LEASE_MS / 1000 * 2)
        late = int(pg.psql(db, f"SELECT COUNT(*) FROM record WHERE session_id = '{fenced_sid}' "
                               f"AND lease_token = {f_token} AND seq > (SELECT MIN(seq) FROM record "
                               f"WHERE session_id = '{fenced_sid}' AND lease_token = {t_token})"))
        print(f"fenced owner {f_owner} (token {f_token}) wrote {late} records after {other.name} "
              f"took {fenced_sid} (token {t_token})")
        assert late == 0

        # -- wind down (every client, so the sessions stop growing) and count.
        taker.close()
        for sid, (trainers, agent, follower) in work.items():
            for t in trainers:
                t.finish()
            agent.close()
        totals = [0, 0, 0]
        for sid, (trainers, agent, follower) in work.items():
            lost, dup, gaps, last = check_session(pg, db, sid, trainers, follower)
            acked = sum(len(t.acked) for t in trainers)
            print(f"session {sid}: {acked} feedback acknowledged, {last} records; "
                  f"lost {lost}, duplicated {dup}, subscriber gaps {gaps}")
            totals = [totals[0] + lost, totals[1] + dup, totals[2] + gaps]
        assert totals == [0, 0, 0], f"lost, duplicated, gaps: {totals}"
        # The C++ client: it ran to its end (flushed everything), its steps
        # are stored once each, without a hole in its client sequences, and
        # some were written by the instance that took over.
        _, err = scripted.communicate(timeout=60)
        assert scripted.returncode == 0, err
        cseqs = [int(x) for x in pg.psql(db, f"SELECT client_seq FROM record WHERE session_id = "
                                             f"'{victim_sid}' AND client_id = 'scripted:{victim_sid}' "
                                             f"ORDER BY client_seq").split()]
        after = int(pg.psql(db, f"SELECT COUNT(*) FROM record WHERE session_id = '{victim_sid}' AND "
                                f"client_id = 'scripted:{victim_sid}' AND lease_token = {new_token}"))
        print(f"C++ agent on {victim_sid}: {len(cseqs)} steps stored, {after} after the takeover")
        assert cseqs == list(range(1, len(cseqs) + 1)) and after > 0
        # Every chain continues across owners: recomputed from the stored
        # bytes, whichever instance wrote each record.
        for sid in set(work) | {fenced_sid}:
            assert_chain(pg, db, sid)
    finally:
        for c in clients:
            try:
                c.close()
            except Exception:
                pass
        lb.stop()
        for i in inst:
            if i.proc.poll() is None:
                i.proc.send_signal(signal.SIGCONT)
            i.stop()
