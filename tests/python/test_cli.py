"""The operator CLI as a user runs it, against the real server."""

from __future__ import annotations

import json
import os
import subprocess

from conftest import BIN, tm




def test_session_tokens_kernels_markers_and_export(server, tmp_path):
    out = tm(server, "session", "create", "--title", "cli test", "--kernel", "gamma:2,0.28",
             "--token-out", str(tmp_path / "admin.token")).stdout
    session = out.split()[1]
    admin = str(tmp_path / "admin.token")
    assert oct(os.stat(admin).st_mode & 0o777) == "0o600"
    tm(server, "token", "issue", "--session", session, "--role", "trainer", "--subject", "ava",
       "--out", str(tmp_path / "ava.token"), token_file=admin)
    kernels = tmp_path / "kernels.toml"
    kernels.write_text('[trainers.ava]\nkernel = "uniform:0.2,4.0"\nweight = 2.0\n'
                       '[trainers.ben]\nkernel = "exponential:2.5,0.1"\n')
    loaded = tm(server, "kernel", "load", "--session", session, str(kernels), token_file=admin)
    assert "trainer ava: uniform" in loaded.stdout and "weight 2" in loaded.stdout
    assert "trainer ben: exponential" in loaded.stdout
    bad = tm(server, "kernel", "set", "--session", session, "--trainer", "ava", "gamma:-1,0.2",
             token_file=admin, check=False)
    assert bad.returncode == 1 and "delay kernel" in bad.stderr
    tm(server, "marker", "add", "--session", session, "block 2 starts", token_file=admin)
    listing = tm(server, "token", "list", "--session", session, token_file=admin).stdout
    assert "trainer" in listing and "ava" in listing and "tmk_" not in listing
    lines = tm(server, "export", "--session", session, token_file=admin).stdout.splitlines()
    records = [json.loads(line) for line in lines]
    assert [r["seq"] for r in records] == list(range(1, len(records) + 1))
    assert all(isinstance(r["session_ns"], int) for r in records)
    kinds = [r["kind"] for r in records]
    assert kinds.count("kernel") == 3 and "marker" in kinds
    marker = next(r for r in records if r["kind"] == "marker")
    assert marker["text"] == "block 2 starts"
    shown = tm(server, "session", "show", session, token_file=admin).stdout
    assert "markers    1" in shown
    # The session's kernel and the ledger's write state are shown (issues 9, 10).
    assert "kernel     gamma(shape=2,scale=0.28s" in shown
    assert "ledger     writable" in shown
    listed = tm(server, "session", "list").stdout
    assert "KERNEL" in listed and "gamma(shape=2" in listed


def test_errors_are_clear_and_exit_non_zero(server, tmp_path):
    missing = tm(server, "session", "show", "s-00000000", check=False)
    assert missing.returncode == 1 and "not found" in missing.stderr
    usage = tm(server, "session", "frobnicate", check=False)
    assert usage.returncode == 2 and "unknown command" in usage.stderr
    (tmp_path / "bad.token").write_text("tmk_nope\n")
    denied = tm(server, "session", "list", token_file=str(tmp_path / "bad.token"), check=False)
    assert denied.returncode == 1 and "not authenticated" in denied.stderr
    down = subprocess.run([os.path.join(BIN, "tickmark"), "--server", "127.0.0.1:1",
                           "--token-file", str(tmp_path / "bad.token"), "--timeout", "2",
                           "session", "list"], capture_output=True, text=True, timeout=30)
    assert down.returncode == 1 and "cannot reach tickmarkd" in down.stderr
    helped = subprocess.run([os.path.join(BIN, "tickmark"), "--help"], capture_output=True,
                            text=True)
    assert helped.returncode == 0 and "Safety" in helped.stdout
