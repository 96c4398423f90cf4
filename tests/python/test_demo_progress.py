"""The demo's progress line: live on a terminal, one line per episode anywhere else.

Regression: the learner rewrote its progress line with carriage returns even
when stderr was a file or a pipe, so a log held one endless line.
"""

from __future__ import annotations

import io
import os
import pty
import select
import time

from tickmark.demo.learner import episode_line
from tickmark.demo.progress import ProgressLine, is_terminal


def _lines(n):
    return [episode_line(e, 10 * e, 8 * e, [True, False][: 1 + e % 2], 0.5, 0.75)
            for e in range(1, n + 1)]


def test_progress_to_a_pipe_is_one_line_per_episode_without_carriage_returns():
    read_fd, write_fd = os.pipe()
    with os.fdopen(read_fd, "r", newline="") as reader:  # newline="": keep any '\r' as is
        with os.fdopen(write_fd, "w") as writer:
            progress = ProgressLine(writer)  # detects the stream, as the learner does
            assert not progress.live
            for text in _lines(3):
                progress.show(text)
            progress.finish()
        out = reader.read()
    assert "\r" not in out
    assert out.splitlines() == _lines(3)
    assert out.endswith("\n")


def test_progress_to_a_string_buffer_is_plain_lines():
    buffer = io.StringIO()
    progress = ProgressLine(buffer)
    for text in _lines(2):
        progress.show(text)
    progress.finish()
    assert buffer.getvalue() == "".join(t + "\n" for t in _lines(2))


def _read_until_newline(fd, timeout=10.0):
    """Reads a pty's master side until the output ends a line (a pty may hand it over in parts)."""
    out = b""
    deadline = time.monotonic() + timeout
    while not out.endswith(b"\n"):
        left = deadline - time.monotonic()
        assert left > 0, f"no end of line from the pty; got {out!r}"
        ready, _, _ = select.select([fd], [], [], left)
        if ready:
            out += os.read(fd, 4096)
    return out.decode()


def test_progress_on_a_terminal_rewrites_one_line_and_ends_it():
    master, slave = pty.openpty()
    try:
        with os.fdopen(slave, "w", closefd=False) as tty:
            assert is_terminal(tty)
            progress = ProgressLine(tty)
            assert progress.live
            progress.show("episode   1 | a longer first line")
            progress.show("episode   2 | short")
            progress.finish()
        out = _read_until_newline(master)
    finally:
        os.close(master)
        os.close(slave)
    assert out.count("\r") >= 2
    # The shorter second line is padded over the first one's tail.
    assert "\repisode   2 | short" + " " * (len("a longer first line") - len("short")) in out
    assert out.rstrip(" ").endswith("\n")


def test_streams_without_a_usable_isatty_count_as_not_a_terminal():
    class NoIsatty:
        def write(self, _):
            pass

        def flush(self):
            pass

    closed = io.StringIO()
    closed.close()
    assert not is_terminal(NoIsatty())
    assert not is_terminal(closed)
