"""Background resource sampler: CPU and memory of the run's processes and cores.

Every ``interval_s`` it records, for the main process and each of its
(recursive) child processes, CPU % (100 = one core), RSS and cumulative
bytes read, and the system CPU % of every core. Rows accumulate in memory
between flushes and are written by the recorder's flusher to
``res-rR.bin`` (see ``tracefile.py``).
"""

from __future__ import annotations

import os
import threading
from pathlib import Path
from time import monotonic_ns

import numpy as np
import psutil

from .. import tracefile as tf


class ResourceSampler:
    """Samples resources on a daemon thread; :meth:`write` appends them to disk."""

    RESCAN = 5

    def __init__(self, run_dir: Path, rank: int, interval_s: float) -> None:
        self.path = Path(run_dir) / f"res-r{rank}.bin"
        self.interval_s = interval_s
        self.rows: list[tuple] = []
        self.lock = threading.Lock()
        self.stop_event = threading.Event()
        self.thread: threading.Thread | None = None
        self.procs: dict[int, psutil.Process] = {}
        self.main = psutil.Process(os.getpid())
        self.failed = False
        self.ticks = 0

    def start(self) -> None:
        with open(self.path, "ab") as fh:
            if fh.tell() == 0:
                fh.write(tf.preamble(tf.CONTENT_RESOURCES))
        self.main.cpu_percent(None)
        psutil.cpu_percent(None, percpu=True)
        self.thread = threading.Thread(target=self._loop, name="pipeprobe-sampler", daemon=True)
        self.thread.start()

    def _loop(self) -> None:
        from ._signals import block_signals_in_this_thread

        block_signals_in_this_thread()
        while not self.stop_event.wait(self.interval_s):
            try:
                self.sample()
            except Exception:  # noqa: BLE001 - sampling is best effort; spans go on
                self.failed = True
                return

    def _process(self, proc: psutil.Process) -> tuple | None:
        try:
            with proc.oneshot():
                cpu = proc.cpu_percent(None)
                rss = proc.memory_info().rss
                try:
                    read = proc.io_counters().read_chars
                except (psutil.AccessDenied, AttributeError, NotImplementedError):
                    read = -1
            return (rss, read, cpu, proc.pid)
        except (psutil.NoSuchProcess, psutil.ZombieProcess, psutil.AccessDenied):
            return None

    def sample(self) -> None:
        """Take one sample of every process and core now."""
        t = monotonic_ns()
        rows = []
        # Finding children scans every process on the machine; do it every
        # RESCAN-th sample and keep the known ones in between.
        self.ticks += 1
        if self.ticks % self.RESCAN == 1:
            try:
                children = self.main.children(recursive=True)
            except psutil.Error:
                children = []
        else:
            children = list(self.procs.values())
        alive = {self.main.pid: self.main}
        for child in children:
            known = self.procs.get(child.pid)
            if known is None:
                known = child
                try:
                    known.cpu_percent(None)  # first call only primes the counter
                except psutil.Error:
                    continue
                self.procs[child.pid] = known
                alive[child.pid] = known
                continue
            alive[child.pid] = known
        self.procs = {pid: p for pid, p in alive.items() if pid != self.main.pid}
        for proc in alive.values():
            row = self._process(proc)
            if row is not None:
                rows.append((t, row[0], row[1], row[2], row[3], -1))
        for core, pct in enumerate(psutil.cpu_percent(None, percpu=True)):
            rows.append((t, -1, -1, float(pct), 0, core))
        with self.lock:
            self.rows.extend(rows)

    def write(self, lock_timeout_s: float = -1) -> None:
        """Append the rows gathered since the last call to the resource file.

        ``lock_timeout_s >= 0`` (from a signal handler) gives up instead of
        waiting for a lock the interrupted thread may hold.
        """
        if not self.lock.acquire(timeout=lock_timeout_s):
            return
        try:
            rows, self.rows = self.rows, []
        finally:
            self.lock.release()
        if not rows:
            return
        arr = np.array(rows, dtype=[(n, tf.RESOURCE_RECORD[n]) for n in
                                    ("t_ns", "rss_bytes", "read_bytes", "cpu_pct", "pid", "core")])
        out = np.empty(len(arr), dtype=tf.RESOURCE_RECORD)
        for name in tf.RESOURCE_RECORD.names:
            out[name] = arr[name]
        with open(self.path, "ab") as fh:
            fh.write(out.tobytes())

    def stop(self) -> None:
        self.stop_event.set()
        if self.thread is not None:
            self.thread.join(timeout=5)
        if not self.failed:
            try:
                self.sample()
            except Exception:  # noqa: BLE001
                pass
