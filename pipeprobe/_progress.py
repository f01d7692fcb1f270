"""One progress line on stderr while a long analysis runs.

Work that ends within :data:`SHOW_AFTER_S` prints nothing. Past that, the
line names the step under way and the seconds so far: on a terminal one
line rewritten in place every :data:`REDRAW_S` and wiped at the end; on a
pipe or file one line per step, and a last one with the total time. Steps
are announced with :func:`step` from wherever the work is (loading,
timeline, critical path, ...); they reach the line opened by the
outermost :func:`progress`, and cost nothing when no line is open.

The line is drawn by a small daemon thread, so it appears on time even
while one step runs long; the thread only reads the step name that the
work sets.
"""

from __future__ import annotations

import os
import sys
import threading
import time
from contextlib import contextmanager
from typing import Callable, Iterator, TextIO

__all__ = ["ProgressLine", "progress", "step", "SHOW_AFTER_S"]

#: Work shorter than this shows no line: a quick report stays exactly as it was.
SHOW_AFTER_S = 2.0
#: How often a terminal line is redrawn (the seconds tick).
REDRAW_S = 0.5
#: Set to ``0`` to never show the line (as ``pipeprobe report --quiet`` does).
ENV_OFF = "PIPEPROBE_PROGRESS"

_active: ProgressLine | _Silent | None = None


class ProgressLine:
    """The progress line of one piece of work, e.g. ``pipeprobe report``.

    Parameters
    ----------
    what : str
        The work, first on the line (``"report"``).
    stream : text stream, optional
        Where the line goes (``sys.stderr`` by default).
    clock : callable, optional
        Seconds, for tests (``time.monotonic`` by default).

    Examples
    --------
    >>> import io
    >>> t = iter([0.0, 3.0, 3.5, 3.5])
    >>> out = io.StringIO()
    >>> line = ProgressLine("report", out, clock=lambda: next(t), threaded=False)
    >>> line.step("reading spans")
    >>> line.draw()
    >>> line.finish()
    >>> out.getvalue().splitlines()
    ['pipeprobe report: reading spans (3 s)', 'pipeprobe report: done in 3.5 s']
    """

    def __init__(self, what: str, stream: TextIO | None = None, *, clock: Callable[[], float] = time.monotonic,
                 threaded: bool = True) -> None:
        self.what = what
        self.stream = stream if stream is not None else sys.stderr
        self.clock = clock
        self.t0 = clock()
        self.current = "starting"
        self._drawn = ""  # the step of the last line written on a pipe
        self._width = 0  # characters of the last line drawn on a terminal
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._tty = _is_terminal(self.stream)
        self._thread = threading.Thread(target=self._run, name="pipeprobe-progress", daemon=True) if threaded else None
        if self._thread is not None:
            self._thread.start()

    def step(self, name: str) -> None:
        """The step now under way (drawn by the thread, or by :meth:`draw`)."""
        self.current = name

    def _run(self) -> None:
        while not self._stop.wait(REDRAW_S):
            self.draw()

    def draw(self) -> None:
        """Write the line if the work has run past :data:`SHOW_AFTER_S` (and, on a pipe, the step is new)."""
        elapsed = self.clock() - self.t0
        if elapsed < SHOW_AFTER_S:
            return
        name = self.current
        text = f"pipeprobe {self.what}: {name} ({elapsed:.0f} s)"
        with self._lock:
            if self._tty:
                self._write("\r" + text.ljust(self._width))
                self._width = len(text)
            elif name != self._drawn:
                self._write(text + "\n")
                self._drawn = name

    def finish(self, *, failed: bool = False) -> None:
        """Stop drawing; wipe the terminal line, or end the pipe's lines with the total time.

        ``failed``: the work ended in an error, whose own line follows; no "done" line then.
        """
        self._stop.set()
        if self._thread is not None and self._thread is not threading.current_thread():
            self._thread.join()
        self.draw()  # the last step, when the work ended past the threshold between two redraws
        with self._lock:
            if self._tty and self._width:
                self._write("\r" + " " * self._width + "\r")
            elif self._drawn and not failed:
                self._write(f"pipeprobe {self.what}: done in {self.clock() - self.t0:.1f} s\n")
            self._width, self._drawn = 0, ""

    def _write(self, text: str) -> None:
        try:
            self.stream.write(text)
            self.stream.flush()
        except (OSError, ValueError):  # a closed or broken stderr: the line is a courtesy, never an error
            self._stop.set()


def _is_terminal(stream: TextIO) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError, OSError):
        return False


@contextmanager
def progress(what: str, *, enabled: bool = True, stream: TextIO | None = None) -> Iterator[None]:
    """Show one progress line for the work inside (nested calls share the outermost line).

    Off when ``enabled`` is false or the environment sets ``PIPEPROBE_PROGRESS=0``.

    Examples
    --------
    >>> import io
    >>> out = io.StringIO()
    >>> with progress("report", stream=out):
    ...     step("timeline")
    >>> out.getvalue()  # ended within SHOW_AFTER_S: nothing shown
    ''
    """
    global _active
    if _active is not None:
        yield
        return
    line = ProgressLine(what, stream) if enabled and os.environ.get(ENV_OFF, "") != "0" else _Silent()
    _active = line  # a silent one keeps nested work (analyze inside `report --quiet`) silent too
    failed = True
    try:
        yield
        failed = False
    finally:
        _active = None
        line.finish(failed=failed)


class _Silent:
    """The open line of work that asked for none."""

    def step(self, name: str) -> None:
        pass

    def finish(self, *, failed: bool = False) -> None:
        pass


def step(name: str) -> None:
    """Name the step now under way on the open progress line, if any."""
    line = _active
    if line is not None:
        line.step(name)
