"""A real PostgreSQL 15 for tests, in a temporary folder (the Python twin of
tests/support/pg_server.h).

    with PgServer() as pg:          # raises Unavailable (tests skip) if it cannot run here
        url = pg.new_database()     # postgresql://postgres@127.0.0.1:PORT/tm_1
        pg.psql("tm_1", "SELECT 1")

Debian's server binaries (/usr/lib/postgresql/15/bin, package
postgresql-15). initdb and pg_ctl refuse root, so as root they run as the
`postgres` system user (runuser) in a folder it owns. The server listens on
127.0.0.1 at a free port and on a unix socket in the folder, trusts local
connections (a throw-away cluster), and is stopped with `pg_ctl stop -m
immediate` and removed at exit.
"""

from __future__ import annotations

import hashlib
import os
import pwd
import shutil
import socket
import subprocess
import tempfile

import pytest

BIN_DIR = "/usr/lib/postgresql/15/bin"


class Unavailable(RuntimeError):
    """PostgreSQL cannot be started here (the reason is the message)."""


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class PgServer:
    def __init__(self, fsync: bool = False):
        if not os.path.exists(os.path.join(BIN_DIR, "initdb")):
            raise Unavailable(f"no PostgreSQL 15 server binaries in {BIN_DIR} (Debian package postgresql-15)")
        self._as = []
        uid = gid = None
        if os.geteuid() == 0:
            try:
                pw = pwd.getpwnam("postgres")
            except KeyError:
                raise Unavailable("running as root and there is no 'postgres' user to run "
                                  "initdb and pg_ctl as (they refuse root)") from None
            uid, gid = pw.pw_uid, pw.pw_gid
            self._as = ["runuser", "-u", "postgres", "--"]
        self.dir = tempfile.mkdtemp(prefix="tm-pg-")
        os.chmod(self.dir, 0o700)
        if uid is not None:
            os.chown(self.dir, uid, gid)
        self.port = free_port()
        self._databases = 0
        self._running = False
        data = os.path.join(self.dir, "data")
        self._run("initdb", "-D", data, "-U", "postgres", "-A", "trust", "-E", "UTF8",
                  "--no-sync", "--no-instructions")
        opts = (f"-c listen_addresses=127.0.0.1 -p {self.port} -k {self.dir} "
                f"-c fsync={'on' if fsync else 'off'} -c max_connections=200 -c shared_buffers=32MB")
        self._run("pg_ctl", "-D", data, "-l", os.path.join(self.dir, "server.log"), "-w", "-t", "60",
                  "-o", opts, "start")
        self._running = True

    def _run(self, program, *args):
        p = subprocess.run([*self._as, os.path.join(BIN_DIR, program), *args],
                           capture_output=True, text=True, timeout=120)
        if p.returncode != 0:
            log = ""
            try:
                with open(os.path.join(self.dir, "server.log")) as f:
                    log = f.read()
            except OSError:
                pass
            raise Unavailable(f"{program} failed: {p.stderr.strip()} {log}")

    def url(self, db: str = "postgres") -> str:
        return f"postgresql://postgres@127.0.0.1:{self.port}/{db}"

    def new_database(self) -> str:
        self._databases += 1
        name = f"tm_{self._databases}"
        self.psql("postgres", f"CREATE DATABASE {name}")
        return self.url(name)

    def psql(self, db: str, sql: str) -> str:
        """One SQL command through psql -At (Debian's postgresql-client): its output."""
        p = subprocess.run(["psql", "-X", "-At", "-v", "ON_ERROR_STOP=1", "-h", "127.0.0.1",
                            "-p", str(self.port), "-U", "postgres", "-d", db, "-c", sql],
                           capture_output=True, text=True, timeout=60)
        if p.returncode != 0:
            raise RuntimeError(f"psql: {p.stderr.strip()}")
        return p.stdout.strip()

    def stop(self):
        if self._running:
            self._running = False
            subprocess.run([*self._as, os.path.join(BIN_DIR, "pg_ctl"), "-D",
                            os.path.join(self.dir, "data"), "-m", "immediate", "-w", "stop"],
                           capture_output=True, timeout=60)
        shutil.rmtree(self.dir, ignore_errors=True)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.stop()


def assert_chain(server: "PgServer", db: str, session: str) -> int:
    """Recomputes a session's hash chain from the stored bytes with Python's
    hashlib (the outside SHA-256): hash = SHA-256(previous hash || body), 32
    zero bytes before sequence 1 (DEVELOPERS.md, "The ledger"). Sequences
    must run 1..n without a hole. Returns n."""
    rows = server.psql(db, f"SELECT seq, encode(body, 'hex'), encode(hash, 'hex') FROM record "
                           f"WHERE session_id = '{session}' ORDER BY seq").splitlines()
    prev = bytes(32)
    for i, line in enumerate(rows):
        seq, body, digest = line.split("|")
        assert int(seq) == i + 1, f"a hole in the sequence of {session} at {i + 1}"
        assert hashlib.sha256(prev + bytes.fromhex(body)).hexdigest() == digest, \
            f"the hash chain of {session} does not recompute at {seq}"
        prev = bytes.fromhex(digest)
    return len(rows)


@pytest.fixture(scope="module")
def pg():
    """A PostgreSQL server of the test's own for the module; skipped with the reason if none
    can be started here."""
    try:
        server = PgServer()
    except Unavailable as e:
        pytest.skip(f"PostgreSQL not available: {e}")
    yield server
    server.stop()
