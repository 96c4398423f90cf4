"""deploy/tickmarkd.service checked by systemd's own `systemd-analyze verify`
(Debian's systemd package), which needs ExecStart's program to exist: the test
verifies a copy whose ExecStart points at the built tickmarkd (the only line
changed). Also prints the `systemd-analyze security` exposure score (shown,
not asserted: the score's scale changes between systemd versions).

What this does not show: that tickmarkd runs inside the sandbox (that needs
systemd as PID 1, which a test machine or container may not have); see
docs/operations.md for how to check it on the target host.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import tempfile


from conftest import BIN

ROOT = os.path.join(os.path.dirname(__file__), "..", "..")
UNIT = os.path.join(ROOT, "deploy", "tickmarkd.service")
INSTALLED = "/usr/local/bin/tickmarkd"

# The sandboxing the unit promises (docs/operations.md, "The systemd unit").
REQUIRED = {
    "NoNewPrivileges": "yes", "ProtectSystem": "strict", "ProtectHome": "yes",
    "PrivateTmp": "yes", "PrivateDevices": "yes", "ProtectKernelTunables": "yes",
    "ProtectKernelModules": "yes", "ProtectKernelLogs": "yes", "ProtectControlGroups": "yes",
    "RestrictNamespaces": "yes", "LockPersonality": "yes", "MemoryDenyWriteExecute": "yes",
    "RestrictRealtime": "yes", "RestrictSUIDSGID": "yes", "CapabilityBoundingSet": "",
    "StateDirectory": "tickmark", "ReadWritePaths": "/var/lib/tickmark",
    "SystemCallArchitectures": "native",
}


def _analyze():
    path = shutil.which("systemd-analyze")
    assert path, "systemd-analyze missing: install Debian's systemd package (./run does)"
    return path


def _unit_for_test(folder, text=None):
    """A copy of the unit with ExecStart on the built binary."""
    text = text if text is not None else open(UNIT).read()
    binary = os.path.abspath(os.path.join(BIN, "tickmarkd"))
    assert INSTALLED in text
    path = os.path.join(folder, "tickmarkd.service")
    with open(path, "w") as f:
        f.write(text.replace(INSTALLED, binary))
    return path


def _verify(path):
    return subprocess.run([_analyze(), "verify", path], capture_output=True, text=True,
                          timeout=60)


def _settings(text):
    """{key: [values]} of the [Service] section."""
    out, section = {}, None
    for line in text.splitlines():
        line = line.strip()
        if not line or line.startswith(("#", ";")):
            continue
        if line.startswith("["):
            section = line
            continue
        if section == "[Service]" and "=" in line:
            k, v = line.split("=", 1)
            out.setdefault(k.strip(), []).append(v.strip())
    return out


def test_unit_passes_systemd_analyze_verify():
    with tempfile.TemporaryDirectory(prefix="tickmark-unit-") as d:
        p = _verify(_unit_for_test(d))
        # verify exits 0 on unknown keys but names them: no output at all.
        assert p.returncode == 0 and not (p.stdout + p.stderr).strip(), p.stdout + p.stderr
        s = subprocess.run([_analyze(), "security", "--offline=yes",
                            os.path.join(d, "tickmarkd.service")],
                           capture_output=True, text=True, timeout=60)
        score = re.search(r"Overall exposure level for \S+: (.*)", s.stdout)
        print("systemd-analyze security:", score.group(1) if score else s.stdout[-300:])


def test_verify_catches_a_misspelt_option():
    """The checker itself: a misspelt key and a missing program are reported
    (so a clean run above means something)."""
    text = open(UNIT).read().replace("LockPersonality=yes", "LockPersonalty=yes")
    with tempfile.TemporaryDirectory(prefix="tickmark-unit-") as d:
        p = _verify(_unit_for_test(d, text))
        assert "LockPersonalty" in p.stdout + p.stderr
    with tempfile.TemporaryDirectory(prefix="tickmark-unit-") as d:
        path = os.path.join(d, "tickmarkd.service")
        with open(path, "w") as f:
            f.write(open(UNIT).read().replace(INSTALLED, os.path.join(d, "absent")))
        assert _verify(path).returncode != 0


def test_unit_has_the_promised_sandboxing():
    settings = _settings(open(UNIT).read())
    for key, value in REQUIRED.items():
        assert value in settings.get(key, []), f"{key}={value} missing"
    families = " ".join(settings["RestrictAddressFamilies"]).split()
    assert sorted(families) == ["AF_INET", "AF_INET6", "AF_UNIX"]
    filters = " ".join(settings["SystemCallFilter"]).split()
    assert "@system-service" in filters
    # The server reads its clock's discipline with adjtimex (modes 0):
    # allowed, and ProtectClock (which would deny it) is off.
    assert "adjtimex" in filters and "ProtectClock" not in settings
