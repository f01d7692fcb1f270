"""SIGTERM and SIGINT: write what is recorded, then hand the signal to what was there before.

A signal that lands while this thread is writing records (a flush or a
buffer spill) is held back until the write is done (``_Recorder.in_flush``);
the write then takes the whole signal path.

A worker (forked, or spawned and joined through the environment) also watches for a SIGTERM its handler never saw
(:func:`watch_for_lost_signals`): Python runs a handler only when the main
thread gets back to Python code, and a signal that lands just before the
main thread blocks (a pool worker waiting for the task queue's lock, which
``Pool.terminate`` holds) leaves it blocked for good, where the default
action would have ended the process. The worker's flush thread sees the
signal on a wakeup pipe; if the handler has not run a tick later, it writes
what is recorded and ends the process itself. It keeps watching after the
worker answered the probe's close request: the pool may terminate the
worker long after the probe closed.
"""

from __future__ import annotations

import os
import signal
import threading
from typing import Any

from . import _recorder

_PREVIOUS_HANDLERS: dict[int, Any] = {}


_HANDLED = [0]  # times _on_signal ran in this process (see watch_for_lost_signals)


def _on_signal(signum: int, frame: Any) -> None:
    _HANDLED[0] += 1
    rec = _recorder.RECORDER
    if getattr(rec.in_flush, "on", False):
        # The interrupted code is writing records: dying or raising now would
        # lose them. The flush delivers the signal as soon as it is done.
        rec.pending_signal = (signum, frame)
        return
    try:
        rec.flush(lock_timeout_s=0.2)
        for hook in list(_SIGNAL_CLOSERS):
            hook()
    except Exception:  # noqa: BLE001 - the signal must still be delivered
        pass
    _deliver(signum, frame)


def _deliver(signum: int, frame: Any) -> None:
    """Hand a signal to the handler that was there before pipeprobe's."""
    rec = _recorder.RECORDER
    previous = _PREVIOUS_HANDLERS.get(signum, signal.SIG_DFL)
    if callable(previous):
        previous(signum, frame)
    elif previous == signal.SIG_IGN:
        return
    else:
        # Not rec.stop(): the interrupted code may hold a lock that stop()
        # takes without a timeout (e.g. inside Event.set() of an exit flush),
        # and the process is about to end anyway. The span file is
        # unbuffered, so what flush() wrote is on disk.
        rec.on = rec.spans_on = False
        signal.signal(signum, signal.SIG_DFL)
        os.kill(os.getpid(), signum)


_SIGNAL_CLOSERS: list[Any] = []


def block_signals_in_this_thread() -> None:
    """Keep SIGTERM and SIGINT away from a pipeprobe thread.

    The kernel may hand a process signal to any thread that does not block
    it. If it lands on one of our background threads while the main thread
    waits in a call that only a signal would interrupt (a lock, a pipe),
    Python's handler, which runs in the main thread, waits with it: a pool
    worker told to terminate would never do so.
    """
    try:
        signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGTERM, signal.SIGINT})
    except (AttributeError, OSError, ValueError):
        pass


def install_signal_hooks() -> None:
    """Flush on SIGTERM and SIGINT, then hand the signal to what was there before."""
    if threading.current_thread() is not threading.main_thread():
        return
    for signum in (signal.SIGTERM, signal.SIGINT):
        try:
            current = signal.getsignal(signum)
            if current is _on_signal:
                continue
            if current is None:  # installed from C; leave it alone
                continue
            _PREVIOUS_HANDLERS[signum] = current
            signal.signal(signum, _on_signal)
        except (ValueError, OSError):
            pass


def restore_signal_hooks() -> None:
    """Put back the handlers that were there before :func:`install_signal_hooks`."""
    if threading.current_thread() is not threading.main_thread():
        return
    for signum, previous in list(_PREVIOUS_HANDLERS.items()):
        try:
            if signal.getsignal(signum) is _on_signal:
                signal.signal(signum, previous)
        except (ValueError, OSError):
            pass
    _PREVIOUS_HANDLERS.clear()


class _LostSignalWatch:
    """A wakeup pipe for SIGTERM in a worker process, read by its flush thread (see the module docstring)."""

    def __init__(self) -> None:
        self.read_fd = -1
        self.seen_at_handled = -1  # _HANDLED when a SIGTERM byte was read and not yet answered

    def arm(self) -> None:
        """Point Python's signal wakeup at a new pipe, unless the process already has a wakeup fd or SIGTERM
        had a handler of the user's before pipeprobe's (theirs decides what SIGTERM does)."""
        if _PREVIOUS_HANDLERS.get(signal.SIGTERM, signal.SIG_DFL) != signal.SIG_DFL:
            return
        try:
            r, w = os.pipe()
            os.set_blocking(r, False)
            os.set_blocking(w, False)
            previous = signal.set_wakeup_fd(w, warn_on_full_buffer=False)
        except (AttributeError, OSError, ValueError):
            return
        if previous != -1:  # someone else's (an event loop): leave it theirs
            signal.set_wakeup_fd(previous)
            os.close(r)
            os.close(w)
            return
        self.read_fd = r

    def check(self) -> None:
        """From the flush thread, each tick: end the process when a SIGTERM went unanswered for a tick."""
        if self.read_fd < 0:
            return
        if self.seen_at_handled >= 0 and _HANDLED[0] == self.seen_at_handled:
            rec = _recorder.RECORDER
            rec.flush(lock_timeout_s=0.2)
            rec.on = rec.spans_on = False
            os.kill(os.getpid(), signal.SIGKILL)  # only the main thread may restore SIGTERM's default action
        self.seen_at_handled = -1
        try:
            data = os.read(self.read_fd, 512)
        except (BlockingIOError, OSError):
            return
        if signal.SIGTERM in data:
            self.seen_at_handled = _HANDLED[0]


LOST_SIGNALS = _LostSignalWatch()
