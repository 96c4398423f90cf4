"""Versions (issue 18, part 1): every program answers --version with the
release in CMakeLists.txt's project() and the wire-contract revision; the
server states both in its Welcome and in SessionSummary, and `tickmark
session show` prints them."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

import tickmark
from conftest import tm
from packaging_util import BIN, built_programs, clean_env, installed_programs, version_line, versions
from tickmark.v1 import admin_pb2

PYTHON_PROGRAMS = ["tickmark.demo.calibrate", "tickmark.demo.compare", "tickmark.demo.learner",
                   "tickmark.demo.trainer"]


def test_every_built_program_is_installed():
    listed = installed_programs()
    assert sorted(listed["server"] + listed["tools"]) == built_programs()


@pytest.mark.parametrize("program", sorted(sum(installed_programs().values(), [])))
def test_program_version(program):
    p = subprocess.run([os.path.join(BIN, program), "--version"], capture_output=True, text=True,
                       timeout=30)
    assert p.returncode == 0, p.stderr
    assert p.stdout == version_line(program) + "\n"
    # --help lists it (CLI11's layout through tickmark::ConfigureApp).
    h = subprocess.run([os.path.join(BIN, program), "--help"], capture_output=True, text=True,
                       timeout=30)
    assert h.returncode == 0 and "--version" in h.stdout


@pytest.mark.parametrize("module", PYTHON_PROGRAMS)
def test_python_program_version(module):
    p = subprocess.run([sys.executable, "-m", module, "--version"], capture_output=True, text=True,
                       timeout=60, env=clean_env(PYTHONPATH=os.path.dirname(os.path.dirname(
                           tickmark.__file__))))
    assert p.returncode == 0, p.stderr
    assert p.stdout == version_line(f"python3 -m {module}") + "\n"


def test_package_version():
    release, contract = versions()
    assert tickmark.__version__ == release
    assert tickmark.CONTRACT_VERSION == contract


def test_server_states_its_versions(server):
    release, contract = versions()
    session, admin = server.session()
    token = server.token(session, admin, "agent", "rover-v")
    with tickmark.Agent(server.address, token=token) as agent:  # Welcome, fields 10-11
        assert (agent.server_version, agent.contract_version) == (release, contract)
    summary = server.admin.GetSession(admin_pb2.GetSessionRequest(session_id=session),
                                      metadata=server.md(admin))  # SessionSummary, fields 14-15
    assert (summary.server_version, summary.contract_version) == (release, contract)
    shown = tm(server, "session", "show", session).stdout
    assert f"server     {release} (wire contract {contract})\n" in shown
