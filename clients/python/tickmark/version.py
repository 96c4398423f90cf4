"""The package's version and the wire contract's revision, and --version for
the package's programs (the Python twin of tickmark::AddVersionFlag):

    p = argparse.ArgumentParser(prog="python3 -m tickmark.demo.learner")
    tickmark.version.add_version_argument(p)
"""

from __future__ import annotations

import argparse

from tickmark._version import CONTRACT_PACKAGE, CONTRACT_VERSION, __version__

__all__ = ["CONTRACT_PACKAGE", "CONTRACT_VERSION", "__version__", "add_version_argument",
           "version_line"]


def version_line(program: str) -> str:
    """"PROGRAM 0.1.0 (wire contract tickmark.v1 1.0)", as the C++ programs print it."""
    return f"{program} {__version__} (wire contract {CONTRACT_PACKAGE} {CONTRACT_VERSION})"


def add_version_argument(parser: argparse.ArgumentParser) -> None:
    """Adds --version: prints version_line(parser.prog) and exits 0."""
    parser.add_argument("--version", action="version", version=version_line(parser.prog),
                        help="print the version and exit")
