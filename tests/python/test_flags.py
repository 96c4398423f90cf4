"""Every program's command line (CLI11): --help, bad values named by their flag,
and tickmarkd's TOML config file (unknown keys and bad values named by their key,
every flag usable as a key, the shipped example valid)."""

from __future__ import annotations

import os
import re
import signal
import subprocess

import pytest

from conftest import BIN

SOURCE = os.path.join(os.path.dirname(__file__), "..", "..")
PROGRAMS = ["tickmarkd", "tickmark", "tickmark-keys", "tickmark-serial", "tickmark-linkemu",
            "tickmark-scripted-agent", "tickmark-voice"]


def run(program, *args, timeout=30):
    env = {k: v for k, v in os.environ.items() if k not in ("TICKMARK_SERVER", "TICKMARK_TOKEN")}
    return subprocess.run([os.path.join(BIN, program), *args], capture_output=True, text=True,
                          timeout=timeout, env=env, stdin=subprocess.DEVNULL)


@pytest.mark.parametrize("program", PROGRAMS)
def test_help_exits_zero_and_prints_usage(program):
    p = run(program, "--help")
    assert p.returncode == 0, p.stderr
    assert "Usage:" in p.stdout and "--help" in p.stdout, p.stdout


@pytest.mark.parametrize("program", ["tickmarkd", "tickmark", "tickmark-keys", "tickmark-serial",
                                     "tickmark-voice"])
def test_safety_notice_stays_in_help(program):
    assert "not a safety system" in run(program, "--help").stdout


# (program, arguments, the flag the error must name). Each exits 2.
BAD_VALUES = [
    ("tickmarkd", ["--probe-burst", "many"], "--probe-burst"),
    ("tickmarkd", ["--probe-burst=0"], "--probe-burst"),
    ("tickmarkd", ["--durability", "fast"], "--durability"),
    ("tickmarkd", ["--log-level", "loud"], "--log-level"),
    ("tickmarkd", ["--default-kernel", "gamma:-1,0.2"], "--default-kernel"),
    ("tickmarkd", ["--udp-probe-port", "70000"], "--udp-probe-port"),
    ("tickmarkd", ["--allowed-lateness-ms", "-5"], "--allowed-lateness-ms"),
    ("tickmarkd", ["--tls-cert", "/x.crt"], "--tls-key"),
    ("tickmarkd", ["--frobnicate"], "--frobnicate"),
    ("tickmarkd", ["--config", "/nonexistent/tickmarkd.toml"], "--config"),
    ("tickmark", ["--timeout", "0", "session", "list"], "--timeout"),
    ("tickmark", ["session", "list", "--timeout", "soon"], "--timeout"),
    ("tickmark", ["token", "issue", "--session", "s-1", "--role", "king"], "--role"),
    ("tickmark", ["token", "issue", "--role", "trainer"], "--session"),
    ("tickmark", ["export", "--session", "s-1", "--from", "-3"], "--from"),
    ("tickmark", ["session", "list", "--insecure", "--ca-file", "/ca.pem"], "--insecure"),
    ("tickmark-keys", ["--flush-timeout", "nan"], "--flush-timeout"),
    ("tickmark-keys", ["--flush-timeout=-1"], "--flush-timeout"),
    ("tickmark-keys", ["--client-id", "has space"], "--client-id"),
    ("tickmark-keys", ["--grab"], "--grab"),
    ("tickmark-keys", ["--server="], "--server"),
    # tickmark-serial read --flush-timeout with an unchecked atof ("abc" was 0 s).
    ("tickmark-serial", ["--port", "/dev/null", "--profile", "p.toml", "--flush-timeout", "abc"],
     "--flush-timeout"),
    ("tickmark-serial", ["--port", "/dev/null", "--profile", "p.toml", "--flush-timeout", "-2"],
     "--flush-timeout"),
    ("tickmark-serial", ["--port", "/dev/null", "--profile", "p.toml", "--baud", "3"], "--baud"),
    ("tickmark-serial", ["--port", "/dev/null", "--profile", "p.toml", "--parity", "mark"],
     "--parity"),
    ("tickmark-serial", ["--profile", "p.toml"], "--port"),
    ("tickmark-serial", ["--port", "/dev/null", "--profile", "p.toml", "--sync-out", "CTS"],
     "--sync-out"),
    ("tickmark-serial", ["--port", "/dev/null", "--profile", "p.toml", "--sync-in", "DTR"],
     "--sync-in"),
    ("tickmark-serial", ["--port", "/dev/null", "--profile", "p.toml", "--sync-out", "DTR",
                         "--sync-interval", "0"], "--sync-interval"),
    ("tickmark-serial", ["--port", "/dev/null", "--profile", "p.toml", "--sync-simulate"],
     "--sync-simulate"),
    ("tickmark", ["align", "--session-pulses", "x.csv", "--tolerance", "0"], "--tolerance"),
    ("tickmark", ["align", "--session-pulses", "x.csv", "--edge", "up"], "--edge"),
    ("tickmark-linkemu", ["--target", "127.0.0.1:1", "--loss", "2"], "--loss"),
    # linkemu rejected the --flag=value form before.
    ("tickmark-linkemu", ["--target=127.0.0.1:1", "--jitter-ms=-1"], "--jitter-ms"),
    ("tickmark-linkemu", ["--target", "nowhere"], "--target"),
    ("tickmark-linkemu", ["--target", "127.0.0.1:1", "--jitter", "pink"], "--jitter"),
    ("tickmark-linkemu", [], "--target"),
    ("tickmark-voice", ["--profile", "p.toml", "--stop-after", "-1"], "--stop-after"),
    ("tickmark-voice", ["--profile", "p.toml", "--wav", "a.wav", "--audio-start", "soon"],
     "--audio-start"),
    ("tickmark-voice", ["--profile", "p.toml", "--flush-timeout", "abc"], "--flush-timeout"),
    ("tickmark", ["study", "schedule", "y-1", "--design", "magic"], "--design"),
    ("tickmark", ["study", "condition", "y-1", "c", "--allowed-lateness-ms", "-5"],
     "--allowed-lateness-ms"),
    ("tickmark", ["study", "condition", "y-1", "c", "--values", "1,x"], "--values"),
    ("tickmark", ["session", "create", "--title", "t", "--condition", "a"], "--study"),
    ("tickmark", ["export", "--format", "xml", "--session", "s-1"], "--format"),
    ("tickmark", ["export", "--format", "csv", "--session", "s-1"], "--out"),
    ("tickmark", ["report", "--out", "r.html"], "--session"),
    ("tickmark-scripted-agent", ["--rate", "0"], "--rate"),
    ("tickmark-scripted-agent", ["--seconds", "x"], "--seconds"),
]


@pytest.mark.parametrize("program,args,flag", BAD_VALUES,
                         ids=[f"{p}:{' '.join(a)}" for p, a, _ in BAD_VALUES])
def test_bad_value_exits_2_naming_the_flag(program, args, flag):
    p = run(program, *args)
    assert p.returncode == 2, (p.stdout, p.stderr)
    assert flag in p.stderr, p.stderr
    assert p.stderr.startswith(program), p.stderr


def test_flag_value_forms_agree(tmp_path):
    """--flag value and --flag=value mean the same, in every program."""
    for args in (["--probe-burst", "3"], ["--probe-burst=3"]):
        out = run("tickmarkd", *args, "--print-config").stdout
        assert re.search(r"^probe-burst = 3$", out, re.M), out


def test_cli_shared_flags_before_or_after_the_command():
    for args in (["--server", "127.0.0.1:1", "--timeout", "1", "session", "list"],
                 ["session", "list", "--server", "127.0.0.1:1", "--timeout", "1"],
                 ["--server=127.0.0.1:1", "session", "list", "--timeout=1"]):
        p = run("tickmark", *args, "--token", "tmk_x")
        assert p.returncode == 1 and "cannot reach tickmarkd at 127.0.0.1:1" in p.stderr, p.stderr


def test_cli_unknown_and_missing_commands():
    p = run("tickmark", "session", "frobnicate")
    assert p.returncode == 2 and "unknown command 'session frobnicate'" in p.stderr, p.stderr
    p = run("tickmark", "frobnicate")
    assert p.returncode == 2 and "unknown command 'frobnicate'" in p.stderr, p.stderr
    p = run("tickmark", "session")
    assert p.returncode == 2 and "which command" in p.stderr, p.stderr
    p = run("tickmark", "session", "create", "--help")
    assert p.returncode == 0 and "--title" in p.stdout and "--server" in p.stdout, p.stdout


# (config text, what the error must name). Each stops tickmarkd with exit 2.
BAD_CONFIGS = [
    ("frobnicate = 1\n", "unknown key 'frobnicate'"),
    ("data_dir = \"/tmp\"\n", "did you mean 'data-dir'"),
    ("[probes]\nburst = 8\n", "[probes]"),
    ("probe-burst = \"many\"\n", "key 'probe-burst'"),
    ("probe-burst = 0\n", "key 'probe-burst'"),
    ("allowed-lateness-ms = -1\n", "key 'allowed-lateness-ms'"),
    ("durability = \"fast\"\n", "key 'durability'"),
    ("default-kernel = \"gamma:-1,1\"\n", "key 'default-kernel'"),
    ("allow-insecure-remote = \"maybe\"\n", "allow-insecure-remote"),
    ("listen = \n", "tickmarkd.toml:1"),
    ("config = \"other.toml\"\n", "unknown key 'config'"),
]


@pytest.mark.parametrize("text,named", BAD_CONFIGS, ids=[t.split("\n")[0] for t, _ in BAD_CONFIGS])
def test_bad_config_exits_2_naming_the_key(tmp_path, text, named):
    config = tmp_path / "tickmarkd.toml"
    config.write_text(text)
    p = run("tickmarkd", "--config", str(config), "--data-dir", str(tmp_path))
    assert p.returncode == 2, (p.stdout, p.stderr)
    assert named in p.stderr and "tickmarkd.toml" in p.stderr, p.stderr


def settings(*args):
    p = run("tickmarkd", *args, "--print-config")
    assert p.returncode == 0, p.stderr
    return dict(line.split(" = ", 1) for line in p.stdout.splitlines())


def test_every_flag_is_a_config_key(tmp_path):
    """allowed_lateness_ms and allow_insecure_remote were never read from the config."""
    defaults = settings()
    flags = re.findall(r"^\s+--([a-z][a-z0-9-]+)", run("tickmarkd", "--help").stdout, re.M)
    assert set(flags) - {"help", "config", "print-config", "version"} == set(defaults), defaults
    config = tmp_path / "tickmarkd.toml"
    config.write_text("allowed-lateness-ms = 250\nallow-insecure-remote = true\n"
                      "probe-burst = 3\nlisten = \"127.0.0.1:0\"\n")
    got = settings("--config", str(config))
    assert got["allowed-lateness-ms"] == "250"
    assert got["allow-insecure-remote"] in ("true", "1")
    assert got["probe-burst"] == "3"
    # The command line wins over the file.
    assert settings("--config", str(config), "--probe-burst", "5")["probe-burst"] == "5"


def test_shipped_example_config_starts_the_server(tmp_path):
    example = os.path.join(SOURCE, "deploy", "tickmarkd.toml")
    got = settings("--config", example)
    assert got["listen"] == '"0.0.0.0:7461"' and got["probe-burst"] == "8"
    # On loopback and without the example's certificate files, the rest as shipped.
    proc = subprocess.Popen(
        [os.path.join(BIN, "tickmarkd"), "--config", example, "--listen", "127.0.0.1:0",
         "--data-dir", str(tmp_path), "--tls-cert=", "--tls-key=", "--log-level", "warning"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        line = proc.stdout.readline()
        assert "listening port=" in line, proc.stderr.read() if proc.poll() is not None else line
    finally:
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) == 0


def test_empty_value_after_equals_is_empty():
    """CLI11 alone read "--tls-cert= --tls-key=" as --tls-cert with the value "--tls-key="."""
    got = settings("--tls-cert=", "--tls-key=", "--listen=127.0.0.1:0")
    assert got["tls-cert"] == '""' and got["tls-key"] == '""', got
