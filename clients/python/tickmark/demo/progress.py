"""The demo's progress line: rewritten in place on a terminal, one line per update elsewhere.

A carriage return only makes sense to a terminal; in a file or a pipe it
turns a run into one endless line. So the stream decides: a TTY gets the
live line, anything else gets one plain line per call.

Not thread-safe: one thread writes progress.
"""

from __future__ import annotations

import sys
from typing import Optional, TextIO


def is_terminal(stream: TextIO) -> bool:
    """Whether the stream is a terminal; False for anything without a usable isatty()."""
    isatty = getattr(stream, "isatty", None)
    if isatty is None:
        return False
    try:
        return bool(isatty())
    except (ValueError, OSError):  # closed or detached stream
        return False


class ProgressLine:
    """Shows a status line after every update (e.g. once per episode)."""

    def __init__(self, stream: Optional[TextIO] = None, live: Optional[bool] = None):
        self.stream = stream if stream is not None else sys.stderr
        # live: rewrite one line with '\r'; by default only on a terminal.
        self.live = is_terminal(self.stream) if live is None else live
        self._shown = 0  # length of the live line now on screen (0: none)

    def show(self, text: str) -> None:
        if self.live:
            # Pad to the previous length so a shorter line leaves no tail behind.
            self.stream.write("\r" + text.ljust(self._shown))
            self._shown = max(len(text), 1)
        else:
            self.stream.write(text + "\n")
        self.stream.flush()

    def finish(self) -> None:
        """Ends the live line so that what follows starts on a line of its own."""
        if self._shown:
            self.stream.write("\n")
            self.stream.flush()
            self._shown = 0
