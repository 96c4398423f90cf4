"""A smoke run of bench/multi_instance_bench.py (SQLite x1, PostgreSQL x1 and
x3): it runs to the end and prints its table. Never checks a rate (shared
machines; performance is read from the bench, not asserted)."""

import os
import subprocess

HERE = os.path.dirname(os.path.abspath(__file__))


def test_bench_smoke():
    p = subprocess.run(["/usr/bin/python3", os.path.join(HERE, "..", "..", "bench",
                                                          "multi_instance_bench.py"),
                        "--seconds", "0.5", "--sessions", "2", "--window", "16"],
                       capture_output=True, text=True, timeout=120, env=os.environ)
    assert p.returncode == 0, p.stderr
    assert "sqlite, 1 instance" in p.stdout
    print(p.stdout)
