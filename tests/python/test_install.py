"""cmake --install and the package config (issue 18, part 2): the build
installed into a temporary prefix, examples/cpp-agent configured against it
with find_package(tickmark), built (shared and static), and run against a
real tickmarkd started from the prefix; the same object linked through
pkg-config. Reuses the build folder (no rebuild)."""

from __future__ import annotations

import filecmp
import os
import shutil
import stat
import subprocess
import tempfile

import pytest

import conftest
from packaging_util import BUILD, ROOT, clean_env, installed_programs, version_line

pytestmark = pytest.mark.skipif(shutil.which("cmake") is None, reason="needs cmake")


def run(*cmd, **kwargs):
    p = subprocess.run(cmd, capture_output=True, text=True, timeout=600, **kwargs)
    assert p.returncode == 0, f"{' '.join(cmd)}\n{p.stdout}\n{p.stderr}"
    return p


@pytest.fixture(scope="module")
def prefix():
    with tempfile.TemporaryDirectory(prefix="tickmark-install-") as d:
        run("cmake", "--install", BUILD, "--prefix", os.path.join(d, "prefix"))
        yield os.path.join(d, "prefix")


def test_installed_tree(prefix):
    def has(*parts):
        assert os.path.exists(os.path.join(prefix, *parts)), os.path.join(*parts)

    for program in sum(installed_programs().values(), []):
        has("bin", program)
    has("lib", "libtickmark-agent.a")
    has("lib", "libtickmark-agent.so")
    has("lib", "cmake", "tickmark", "tickmarkConfig.cmake")
    has("lib", "cmake", "tickmark", "tickmarkConfigVersion.cmake")
    has("lib", "cmake", "tickmark", "tickmarkTargets.cmake")
    has("lib", "pkgconfig", "tickmark-agent.pc")
    for header in ("clients/agent/agent.h", "clients/common/stream_client.h",
                   "server/core/time.h", "tickmark/version.h", "tickmark/v1/stream.grpc.pb.h",
                   "tickmark/v1/records.pb.h", "tickmark/v1/admin.grpc.pb.h"):
        has("include", "tickmark", *header.split("/"))
    for proto in ("records", "admin", "stream"):
        has("share", "tickmark", "proto", "tickmark", "v1", f"{proto}.proto")
    for profile in ("keys/clicker.toml", "serial/line-box.toml", "voice/en-basic.toml"):
        has("share", "tickmark", "profiles", *profile.split("/"))
    # The unit as it is in deploy/, the packaged config, the data folder.
    unit = os.path.join(prefix, "lib", "systemd", "system", "tickmarkd.service")
    assert filecmp.cmp(unit, os.path.join(ROOT, "deploy", "tickmarkd.service"), shallow=False)
    # The unit starts the installed binary: its own ExecStart, or the drop-in's.
    dropin = unit + ".d/10-install-path.conf"
    starts = open(dropin).read() if os.path.exists(dropin) else open(unit).read()
    assert f"\nExecStart={prefix}/bin/tickmarkd " in starts or \
        f"\nExecStart={os.path.join(prefix, 'bin', 'tickmarkd')} " in starts, starts
    has("etc", "tickmark", "tickmarkd.toml")
    data = os.path.join(prefix, "var", "lib", "tickmark")
    assert stat.S_IMODE(os.stat(data).st_mode) == 0o750
    # The installed server reads the installed config.
    p = run(os.path.join(prefix, "bin", "tickmarkd"), "--config",
            os.path.join(prefix, "etc", "tickmark", "tickmarkd.toml"), "--print-config")
    assert 'listen = "127.0.0.1:7461"' in p.stdout


def test_cpp_agent_example_links_through_find_package(prefix, tmp_path, monkeypatch):
    build = str(tmp_path / "example")
    run("cmake", "-S", os.path.join(ROOT, "examples", "cpp-agent"), "-B", build, "-G", "Ninja",
        "-DCMAKE_BUILD_TYPE=Release", f"-DCMAKE_PREFIX_PATH={prefix}")
    run("cmake", "--build", build)
    shared = os.path.join(build, "cpp-agent")
    static = os.path.join(build, "cpp-agent-static")
    # The shared one loads the installed library; the static one needs none of ours.
    assert os.path.join(prefix, "lib", "libtickmark-agent.so") in run("ldd", shared).stdout
    assert "libtickmark-agent" not in run("ldd", static).stdout

    # pkg-config: the same object, linked by the flags tickmark-agent.pc gives.
    env = clean_env(PKG_CONFIG_PATH=os.path.join(prefix, "lib", "pkgconfig"))
    flags = run("pkg-config", "--cflags", "--libs", "tickmark-agent", env=env).stdout.split()
    assert any(f.startswith("-I") and os.path.realpath(f[2:]) ==
               os.path.realpath(os.path.join(prefix, "include", "tickmark")) for f in flags), flags
    obj = os.path.join(build, "CMakeFiles", "cpp_agent_main.dir", "main.cc.o")
    by_pc = str(tmp_path / "cpp-agent-pc")
    run("g++", obj, "-o", by_pc, *flags, f"-Wl,-rpath,{prefix}/lib")

    # A real server, started from the prefix.
    monkeypatch.setattr(conftest, "BIN", os.path.join(prefix, "bin"))
    with tempfile.TemporaryDirectory(prefix="tickmark-install-server-") as d:
        server = conftest.Server(d)
        try:
            assert server.proc.args[0] == os.path.join(prefix, "bin", "tickmarkd")
            for program in (shared, static, by_pc):
                session, admin = server.session()
                token = tmp_path / "agent.token"
                token.write_text(server.token(session, admin, "agent", "cpp-rover") + "\n")
                token.chmod(0o600)
                p = run(program, "--server", server.address, "--token-file", str(token),
                        "--steps", "5", cwd=str(tmp_path))
                assert f"session {session}: published 5 steps, read back 5" in p.stdout
        finally:
            server.stop()
    assert version_line("tickmarkd") in run(os.path.join(prefix, "bin", "tickmarkd"),
                                            "--version").stdout
