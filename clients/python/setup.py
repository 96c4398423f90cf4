"""Builds the Python package `tickmark` (metadata in pyproject.toml).

Two things come from the rest of the checkout at build time, so there is one
source for each: the version (CMakeLists.txt's project() and
TICKMARK_CONTRACT_VERSION, written into tickmark/_version.py from
cmake/_version.py.in) and the wire contract's modules (tickmark/v1/*_pb2.py
and *_pb2_grpc.py, compiled from proto/tickmark/v1 with protoc and Debian's
grpc_python_plugin, as the CMake build does for build/python).
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess

from setuptools import setup
from setuptools.command.build_py import build_py

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.environ.get("TICKMARK_SOURCE_DIR", os.path.join(HERE, "..", ".."))
PROTO_DIR = os.path.join(ROOT, "proto")
CONTRACT = ("records", "admin", "stream")


def _read(path: str) -> str:
    try:
        with open(path, encoding="utf-8") as f:
            return f.read()
    except OSError as e:
        raise SystemExit(f"tickmark: building the package needs the whole checkout "
                         f"(set TICKMARK_SOURCE_DIR to it): {e}") from e


def versions() -> tuple[str, str]:
    """(release, contract revision) from the top-level CMakeLists.txt."""
    text = _read(os.path.join(ROOT, "CMakeLists.txt"))
    release = re.search(r"project\(tickmark VERSION ([0-9][0-9.]*)", text)
    contract = re.search(r"set\(TICKMARK_CONTRACT_VERSION ([0-9][0-9.]*)\)", text)
    if not release or not contract:
        raise SystemExit("tickmark: no version in CMakeLists.txt")
    return release.group(1), contract.group(1)


class BuildWithContract(build_py):
    """build_py, plus tickmark/_version.py and the compiled contract."""

    def run(self) -> None:
        super().run()
        release, contract = versions()
        package = os.path.join(self.build_lib, "tickmark")
        template = _read(os.path.join(ROOT, "cmake", "_version.py.in"))
        with open(os.path.join(package, "_version.py"), "w", encoding="utf-8") as f:
            f.write(template.replace("@PROJECT_VERSION@", release)
                    .replace("@TICKMARK_CONTRACT_VERSION@", contract))
        protoc = shutil.which("protoc")
        plugin = shutil.which("grpc_python_plugin")
        if not protoc or not plugin:
            raise SystemExit("tickmark: building the package needs protoc and grpc_python_plugin "
                             "(Debian: protobuf-compiler, protobuf-compiler-grpc)")
        os.makedirs(os.path.join(package, "v1"), exist_ok=True)
        subprocess.run([protoc, f"-I{PROTO_DIR}", f"--python_out={self.build_lib}",
                        f"--grpc_python_out={self.build_lib}",
                        f"--plugin=protoc-gen-grpc_python={plugin}",
                        *[os.path.join(PROTO_DIR, "tickmark", "v1", f"{p}.proto") for p in CONTRACT]],
                       check=True)
        open(os.path.join(package, "v1", "__init__.py"), "w").close()


setup(version=versions()[0], cmdclass={"build_py": BuildWithContract})
