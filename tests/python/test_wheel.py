"""The Python package (issue 18, part 3): a wheel built from clients/python
with Debian's setuptools (pip wheel, no build isolation, no index), installed
into a fresh venv made from Debian's python3 with --system-site-packages (for
Debian's grpcio and protobuf), then a small agent run from outside the source
tree against a real server."""

from __future__ import annotations

import glob
import os
import shutil
import subprocess
import textwrap

import pytest

from packaging_util import ROOT, clean_env, versions

DEBIAN_PYTHON = "/usr/bin/python3"

AGENT = textwrap.dedent("""\
    import sys
    import tickmark
    from tickmark.v1 import stream_pb2

    server, token_file = sys.argv[1], sys.argv[2]
    print("module", tickmark.__file__)
    print("version", tickmark.__version__, tickmark.CONTRACT_VERSION)
    with tickmark.Agent(server, token_file=token_file) as agent:
        for i in range(10):
            agent.step(["north", "east"][i % 2], state=f"{i},0".encode(), features=[i])
        assert agent.flush(30)
        steps = [r.step for r in agent.records(("step",), follow=False)]
        print("server", agent.server_version, agent.contract_version)
        print("steps", len(steps), [s.step_id for s in steps] == list(range(1, 11)))
    """)


def run(*cmd, **kwargs):
    p = subprocess.run(cmd, capture_output=True, text=True, timeout=600, **kwargs)
    assert p.returncode == 0, f"{' '.join(cmd)}\n{p.stdout}\n{p.stderr}"
    return p


@pytest.mark.skipif(not os.path.exists(DEBIAN_PYTHON), reason="needs Debian's python3")
def test_wheel_in_a_fresh_venv(server, tmp_path):
    env = clean_env()
    # A copy of what the build reads (the package, the contract, the version),
    # so building writes nothing into the checkout.
    src = tmp_path / "src"
    shutil.copytree(os.path.join(ROOT, "clients", "python"), src / "clients" / "python",
                    ignore=shutil.ignore_patterns("build", "*.egg-info", "__pycache__"))
    shutil.copytree(os.path.join(ROOT, "proto"), src / "proto")
    (src / "cmake").mkdir()
    shutil.copy(os.path.join(ROOT, "cmake", "_version.py.in"), src / "cmake")
    shutil.copy(os.path.join(ROOT, "CMakeLists.txt"), src)
    wheels = tmp_path / "wheels"
    run(DEBIAN_PYTHON, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "--no-index",
        "-w", str(wheels), str(src / "clients" / "python"), env=env, cwd=str(tmp_path))
    release, contract = versions()
    [wheel] = glob.glob(str(wheels / "tickmark-*.whl"))
    assert os.path.basename(wheel) == f"tickmark-{release}-py3-none-any.whl"

    venv = tmp_path / "venv"
    # Without its own pip (faster): Debian's pip, seen through the system
    # site-packages, installs into the venv it runs in.
    run(DEBIAN_PYTHON, "-m", "venv", "--system-site-packages", "--without-pip", str(venv), env=env)
    # Dependencies (grpcio, protobuf) resolve to Debian's, offline.
    run(str(venv / "bin" / "python"), "-m", "pip", "install", "--no-index", wheel, env=env,
        cwd=str(tmp_path))

    session, admin = server.session()
    token = tmp_path / "agent.token"
    token.write_text(server.token(session, admin, "agent", "wheel-rover") + "\n")
    token.chmod(0o600)
    work = tmp_path / "elsewhere"
    work.mkdir()
    (work / "agent.py").write_text(AGENT)
    out = run(str(venv / "bin" / "python"), "agent.py", server.address, str(token), env=env,
              cwd=str(work)).stdout
    lines = dict(line.split(" ", 1) for line in out.splitlines())
    assert lines["module"].startswith(str(venv)), lines["module"]  # not the checkout's
    assert lines["version"] == f"{release} {contract}"
    assert lines["server"] == f"{release} {contract}"
    assert lines["steps"] == "10 True"
    demo = run(str(venv / "bin" / "python"), "-m", "tickmark.demo.learner", "--version", env=env,
               cwd=str(work)).stdout
    assert demo.startswith(f"python3 -m tickmark.demo.learner {release} ")
