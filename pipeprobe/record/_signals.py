"""SIGTERM and SIGINT: write what is recorded, then hand the signal to what was there before.

A signal that lands while this thread is writing records (a flush or a
buffer spill) is held back until the write is done (``_Recorder.in_flush``);
the write then takes the whole signal path.
"""

from __future__ import annotations

import os
import signal
import threading
from typing import Any

from . import _recorder

_PREVIOUS_HANDLERS: dict[int, Any] = {}


def _on_signal(signum: int, frame: Any) -> None:
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
