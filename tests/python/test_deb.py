"""The Debian packages (issue 18, part 4): built from the build folder with
CPack's DEB generator (what `./run package` does), inspected with dpkg-deb
--info and --contents, unpacked with dpkg-deb -x into a temporary root, the
programs run from there, and the unit checked with systemd-analyze verify.
TICKMARK_DEB_DIR=DIR inspects packages already built there instead."""

from __future__ import annotations

import glob
import os
import re
import shutil
import subprocess
import tempfile

import pytest

from packaging_util import BUILD, ROOT, installed_programs, version_line, versions

pytestmark = pytest.mark.skipif(shutil.which("dpkg-deb") is None or shutil.which("cpack") is None,
                                reason="needs dpkg-deb and cpack")

PACKAGES = {"server": "tickmarkd", "tools": "tickmark-tools", "dev": "libtickmark-agent-dev"}


def run(*cmd, **kwargs):
    p = subprocess.run(cmd, capture_output=True, text=True, timeout=600, **kwargs)
    assert p.returncode == 0, f"{' '.join(cmd)}\n{p.stdout}\n{p.stderr}"
    return p


@pytest.fixture(scope="module")
def debs():
    with tempfile.TemporaryDirectory(prefix="tickmark-deb-") as d:
        where = os.environ.get("TICKMARK_DEB_DIR")
        if not where:
            where = os.path.join(d, "out")
            run("cpack", "-G", "DEB", "--config", os.path.join(BUILD, "CPackConfig.cmake"),
                "-B", where)
        found = {}
        for component, name in PACKAGES.items():
            [deb] = glob.glob(os.path.join(where, f"{name}_*.deb"))
            found[component] = deb
        root = os.path.join(d, "root")
        for deb in found.values():
            run("dpkg-deb", "-x", deb, root)
        yield found, root


def fields(deb):
    """The control fields of `deb` (dpkg-deb --info), as a dict."""
    info = run("dpkg-deb", "--info", deb).stdout
    return dict(re.findall(r"^ ([A-Z][\w-]*): (.*)$", info, re.M)), info


def contents(deb):
    """The paths in `deb` (dpkg-deb --contents), without the leading '.'."""
    out = run("dpkg-deb", "--contents", deb).stdout
    return {line.split()[5][1:].rstrip("/") for line in out.splitlines()}, out


def files_of(deb):
    """The paths of `deb` that are not folders."""
    out = run("dpkg-deb", "--contents", deb).stdout
    return {line.split()[5][1:] for line in out.splitlines() if not line.startswith("d")}


def test_control_fields(debs):
    found, _ = debs
    release, _ = versions()
    for component, name in PACKAGES.items():
        f, _ = fields(found[component])
        assert f["Package"] == name
        assert f["Version"] == release
        assert f["Architecture"] == run("dpkg", "--print-architecture").stdout.strip()
        # dpkg-shlibdeps found the Debian runtime libraries (gRPC, libc).
        assert "libc6" in f["Depends"], f["Depends"]
        assert re.search(r"libgrpc\+\+\d", f["Depends"]), f["Depends"]
    server, info = fields(found["server"])
    assert "adduser" in server["Depends"]
    assert re.search(r"postinst", info) and re.search(r"conffiles", info)
    tools, _ = fields(found["tools"])
    assert "pocketsphinx-en-us" in tools["Depends"]
    dev, _ = fields(found["dev"])
    assert "libgrpc++-dev" in dev["Depends"]


def test_contents(debs):
    found, _ = debs
    server, _ = contents(found["server"])
    assert {"/usr/bin/tickmarkd", "/usr/lib/systemd/system/tickmarkd.service",
            "/etc/tickmark/tickmarkd.toml", "/var/lib/tickmark",
            "/usr/share/tickmark/examples/tickmarkd.toml"} <= server
    tools, _ = contents(found["tools"])
    assert {f"/usr/bin/{p}" for p in installed_programs()["tools"]} <= tools
    assert "/usr/share/tickmark/profiles/keys/clicker.toml" in tools
    dev, listing = contents(found["dev"])
    assert {"/usr/lib/libtickmark-agent.a", "/usr/lib/libtickmark-agent.so",
            "/usr/include/tickmark/clients/agent/agent.h",
            "/usr/include/tickmark/tickmark/v1/stream.grpc.pb.h",
            "/usr/share/tickmark/proto/tickmark/v1/stream.proto",
            "/usr/lib/cmake/tickmark/tickmarkConfig.cmake",
            "/usr/lib/pkgconfig/tickmark-agent.pc"} <= dev
    # No file in two packages (they install side by side).
    files = [files_of(found[c]) for c in PACKAGES]
    assert not (files[0] & files[1] or files[0] & files[2] or files[1] & files[2])


def test_maintainer_scripts(debs, tmp_path):
    found, _ = debs
    control = tmp_path / "control"
    run("dpkg-deb", "--control", found["server"], str(control))
    postinst = (control / "postinst").read_text()
    # The system user and its data folder, owner and mode.
    assert "adduser --system" in postinst
    assert "chown tickmark:tickmark /var/lib/tickmark" in postinst
    assert "chmod 0750 /var/lib/tickmark" in postinst
    assert (control / "conffiles").read_text().split() == ["/etc/tickmark/tickmarkd.toml"]
    run("sh", "-n", str(control / "postinst"))
    run("sh", "-n", str(control / "prerm"))
    run("sh", "-n", str(control / "postrm"))


def test_unpacked_programs_run(debs):
    _, root = debs
    for program in sum(installed_programs().values(), []):
        path = os.path.join(root, "usr", "bin", program)
        assert run(path, "--version").stdout == version_line(program) + "\n"
        assert "--help" in run(path, "--help").stdout
    # The packaged config is one the packaged server accepts.
    p = run(os.path.join(root, "usr", "bin", "tickmarkd"), "--config",
            os.path.join(root, "etc", "tickmark", "tickmarkd.toml"), "--print-config")
    assert 'listen = "127.0.0.1:7461"' in p.stdout


@pytest.mark.skipif(shutil.which("systemd-analyze") is None, reason="needs systemd-analyze")
def test_unit_verifies(debs):
    _, root = debs
    units = os.path.join(root, "usr", "lib", "systemd", "system")
    with open(os.path.join(units, "tickmarkd.service")) as f:
        assert f.read() == open(os.path.join(ROOT, "deploy", "tickmarkd.service")).read()
    # The targets the unit orders itself after come from the host's systemd;
    # ExecStart (or the package's drop-in) must name the packaged binary.
    for target in glob.glob("/lib/systemd/system/*.target") + glob.glob("/usr/lib/systemd/system/*.target"):
        dest = os.path.join(units, os.path.basename(target))
        if not os.path.lexists(dest):
            shutil.copy(target, dest, follow_symlinks=False)
    run("systemd-analyze", "verify", f"--root={root}", "tickmarkd.service")
