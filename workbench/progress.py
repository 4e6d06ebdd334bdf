"""A progress display for the long steps of a run (reading, fitting, checks, writing).

One line on standard error per step, rewritten in place while the step runs and ended with
its time: ``reading data ... 1.2 s``. It shows only when standard error is a terminal and
the display is switched on (the command line does so unless ``--quiet`` is given); from
Python, in a pipe, a log file or a test it writes nothing. Steps say what they do, never a
percentage they cannot know.
"""

from __future__ import annotations

import contextlib
import contextvars
import sys
import time
from collections.abc import Iterator
from typing import TextIO


class Display:
    """Writes step lines to ``stream`` when it is a terminal and ``enabled`` is true."""

    def __init__(self, stream: TextIO | None = None, *, enabled: bool = True) -> None:
        self.stream = sys.stderr if stream is None else stream
        is_tty = getattr(self.stream, "isatty", lambda: False)
        self.enabled = bool(enabled) and bool(is_tty())

    def write(self, text: str) -> None:
        if self.enabled:
            try:
                self.stream.write(text)
                self.stream.flush()
            except (OSError, ValueError):  # a closed terminal never stops the run
                self.enabled = False

    @contextlib.contextmanager
    def step(self, what: str) -> Iterator[None]:
        start = time.perf_counter()
        self.write(f"\r{what} ...")
        try:
            yield
        except BaseException:
            self.write(f"\r{what} ... stopped\n")
            raise
        self.write(f"\r{what} ... {time.perf_counter() - start:.1f} s\n")


#: the display of the current command (off unless the command line switches it on)
_CURRENT: contextvars.ContextVar[Display | None] = contextvars.ContextVar("progress",
                                                                         default=None)


@contextlib.contextmanager
def showing(display: Display) -> Iterator[Display]:
    """Within the block, :func:`step` writes to ``display``."""
    token = _CURRENT.set(display)
    try:
        yield display
    finally:
        _CURRENT.reset(token)


@contextlib.contextmanager
def step(what: str) -> Iterator[None]:
    """Show ``what`` while the block runs (nothing when no display is on)."""
    display = _CURRENT.get()
    if display is None:
        yield
        return
    with display.step(what):
        yield


__all__ = ["Display", "showing", "step"]
