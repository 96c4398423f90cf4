"""What the install, wheel, package and version tests share: where the
checkout and the build are, the versions CMakeLists.txt declares, the
programs cmake/install.cmake installs, and an environment free of the
build tree's Python path."""

from __future__ import annotations

import os
import re

ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", ".."))
BIN = os.path.abspath(os.environ.get("TICKMARK_BIN", os.path.join(ROOT, "build", "bin")))
BUILD = os.path.dirname(BIN)


def _read(*parts: str) -> str:
    with open(os.path.join(ROOT, *parts), encoding="utf-8") as f:
        return f.read()


def versions() -> tuple[str, str]:
    """(release, wire-contract revision) as CMakeLists.txt declares them."""
    text = _read("CMakeLists.txt")
    release = re.search(r"project\(tickmark VERSION ([0-9.]+)", text).group(1)
    contract = re.search(r"set\(TICKMARK_CONTRACT_VERSION ([0-9.]+)\)", text).group(1)
    return release, contract


def version_line(program: str) -> str:
    release, contract = versions()
    return f"{program} {release} (wire contract tickmark.v1 {contract})"


def installed_programs() -> dict[str, list[str]]:
    """{"server": [...], "tools": [...]}: the program lists in cmake/install.cmake."""
    text = _read("cmake", "install.cmake")
    out = {}
    for component, var in (("server", "TICKMARK_SERVER_PROGRAMS"), ("tools", "TICKMARK_TOOL_PROGRAMS")):
        body = re.search(r"set\(" + var + r"\s+([^)]*)\)", text).group(1)
        out[component] = body.split()
    return out


def built_programs() -> list[str]:
    """Every add_executable(tickmark...) outside tests/, bench/ and fuzz/."""
    names = []
    for top in ("server", "clients", "tools"):
        for dirpath, _, files in os.walk(os.path.join(ROOT, top)):
            if "CMakeLists.txt" in files:
                with open(os.path.join(dirpath, "CMakeLists.txt"), encoding="utf-8") as f:
                    names += re.findall(r"add_executable\((tickmark[\w-]*)", f.read())
    return sorted(names)


def clean_env(**extra: str) -> dict:
    """os.environ without the build tree's Python path or tickmark settings."""
    env = {k: v for k, v in os.environ.items()
           if k not in ("PYTHONPATH", "PYTHONHOME", "TICKMARK_TOKEN", "VIRTUAL_ENV")}
    env.update(extra)
    return env
