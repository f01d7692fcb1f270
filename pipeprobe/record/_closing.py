"""Closing worker processes that outlive the probe: the close request and its answers.

Persistent loader workers and open pools keep recording after the probe's
``close()`` began. The probe leaves a request file in the run folder; each
worker's flush thread looks for it between flushes, flushes, answers with
a file of its own and stops recording.
"""

from __future__ import annotations

import os
from pathlib import Path
from time import monotonic_ns, sleep

CLOSE_POLL_S = 0.2  # worker wake-ups per second stay few: each needs the GIL


def close_request_name(rank: int) -> str:
    return f"close-r{rank}.request"


def close_ack_name(rank: int, pid: int) -> str:
    return f"close-r{rank}-p{pid}.done"


def touch(path: Path) -> None:
    try:
        with open(path, "ab"):
            pass
    except OSError:
        pass


def _live_worker_pids(run_dir: Path, rank: int, me: int) -> tuple[set[int], set[int]]:
    """``(registered, unregistered)`` live child processes that may hold records of this rank."""
    import multiprocessing

    import psutil

    prefix = f"spans-r{rank}-p"
    registered = set()
    for name in os.listdir(run_dir):
        if name.startswith(prefix) and name.endswith(".json") and name[len(prefix):-5].isdigit():
            pid = int(name[len(prefix):-5])
            if pid != me:
                registered.add(pid)
    children = {p.pid for p in multiprocessing.active_children() if p.pid is not None}

    def alive(pid: int) -> bool:
        try:
            proc = psutil.Process(pid)
            return proc.status() != psutil.STATUS_ZOMBIE and (pid in children or proc.ppid() == me)
        except (psutil.Error, OSError):
            return False

    live = {pid for pid in registered | children if alive(pid)}
    return live & registered, live - registered


def close_workers(run_dir: Path, rank: int, timeout_s: float = 3.0) -> list[int]:
    """Ask this rank's live worker processes to flush and stop; wait for their answers.

    Worker processes that outlive the probe (persistent loader workers, a
    pool still open) otherwise write their last records only at their next
    flush or on exit. Returns the pids that did not answer within
    ``timeout_s``.
    """
    me = os.getpid()
    registered, unregistered = _live_worker_pids(run_dir, rank, me)
    if not registered and not unregistered:
        return []
    touch(run_dir / close_request_name(rank))

    def answered(pid: int) -> bool:
        return (run_dir / close_ack_name(rank, pid)).exists()

    start = monotonic_ns()
    deadline = start + int(timeout_s * 1e9)
    # A child that recorded its first spans in the last tick registers itself
    # (writes its process header) within one more tick.
    settle = start + int(3 * CLOSE_POLL_S * 1e9)
    while True:
        pending = {p for p in registered if not answered(p)}
        now = monotonic_ns()
        if (not pending and (not unregistered or now >= settle)) or now >= deadline:
            break
        sleep(0.01)
        # Re-scan: children that registered meanwhile join, dead ones (they
        # flushed on exit, or were killed) leave.
        live, unregistered = _live_worker_pids(run_dir, rank, me)
        registered = {p for p in registered | live if p in live or answered(p)}
    for pid in registered:
        try:
            os.unlink(run_dir / close_ack_name(rank, pid))
        except OSError:
            pass
    return sorted(pending)
