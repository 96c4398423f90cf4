"""Fixtures for tickmark-voice's tests: the synthetic corpus (generated once,
cached in the build folder), its detections, and a real tickmarkd (the
fixture of tests/python/conftest.py, loaded from there)."""

from __future__ import annotations

import importlib.util
import os
import sys
import tempfile

import pytest

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.abspath(os.path.join(HERE, "..", "..", ".."))
BIN = os.path.abspath(os.environ.get("TICKMARK_BIN", os.path.join(ROOT, "build", "bin")))
PROFILE = os.path.join(ROOT, "clients", "voice", "profiles", "en-basic.toml")
CACHE = os.path.join(os.path.dirname(BIN), "voice-corpus")
sys.path.insert(0, HERE)

import voice_corpus  # noqa: E402

_spec = importlib.util.spec_from_file_location("tickmark_python_conftest",
                                               os.path.join(ROOT, "tests", "python", "conftest.py"))
_python = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(_python)
Server = _python.Server


@pytest.fixture(scope="session")
def corpus():
    # 20 dB only, where the targets are; bench/voice_bench.py adds 10 dB.
    return voice_corpus.build(CACHE, PROFILE, snrs=(20,), sentence_snrs=(20,), repeats=2)


@pytest.fixture(scope="session")
def detections(corpus):
    return voice_corpus.run_all(BIN, corpus)


@pytest.fixture(scope="session")
def rows(corpus, detections):
    rows = voice_corpus.summarise(corpus, detections)
    print("\n" + voice_corpus.table(rows))
    return rows


@pytest.fixture
def server():
    with tempfile.TemporaryDirectory(prefix="tickmark-voice-") as d:
        s = Server(d)
        try:
            yield s
        finally:
            s.stop()
