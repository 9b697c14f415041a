"""Progress of long work, shown on a terminal only.

A long job (building the demo, a briefing, adding a large file) calls ``step`` as it goes.
The command line installs a reporter that draws one self-overwriting line on standard
error when it is a terminal and ``-q`` was not given; otherwise nothing is written, so
piped output and logs stay clean. The library never prints by itself.
"""

from __future__ import annotations

import sys
import time
from contextlib import contextmanager

_reporter = None


class TerminalBar:
    """One line on standard error: ``label [#####.....] 3/7 what``, redrawn in place."""

    def __init__(self, stream=None, width: int = 24):
        self.stream = stream or sys.stderr
        self.width = width
        self.started = time.monotonic()
        self.drawn = False

    def __call__(self, label: str, done: int, total: int, what: str = "") -> None:
        filled = int(self.width * done / total) if total else self.width
        bar = "#" * filled + "." * (self.width - filled)
        line = f"{label} [{bar}] {done}/{total} {what}"[:100]
        self.stream.write("\r" + line.ljust(100)[:100])
        self.stream.flush()
        self.drawn = True

    def close(self) -> None:
        if self.drawn:
            self.stream.write("\r" + " " * 100 + "\r")
            self.stream.flush()


def step(label: str, done: int, total: int, what: str = "") -> None:
    """Report that ``done`` of ``total`` parts of ``label`` are finished (no-op without a reporter)."""
    if _reporter is not None:
        _reporter(label, done, total, what)


@contextmanager
def reporting(quiet: bool = False, stream=None):
    """Within the block, ``step`` draws a bar when ``stream`` (default stderr) is a terminal."""
    global _reporter
    stream = stream or sys.stderr
    if quiet or not getattr(stream, "isatty", lambda: False)():
        yield
        return
    bar = TerminalBar(stream)
    previous, _reporter = _reporter, bar
    try:
        yield
    finally:
        _reporter = previous
        bar.close()
