"""The live status line: how the run is going, every few seconds, on stderr.

A daemon thread wakes every ``interval_s`` and reads only what the
recording already produced: the batch counter of the training process and
the span files every process of this rank has written so far (new complete
records since its last visit, by file offset). Nothing on the hot path
changes. Spans reach their files once per flush interval, so stall and
stage figures trail the batch count by up to one flush interval.

Per line: batches so far, batches per second over the last interval, the
stall share over the last interval and over the run, and the input stage
that took the most time over the last interval. On a terminal the line is
rewritten in place; to a file or pipe one line is written per interval.
"""

from __future__ import annotations

import os
import re
import signal
import sys
import threading
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from time import monotonic_ns
from typing import Callable, TextIO

import numpy as np

from . import tracefile as tf

__all__ = ["LiveLine", "Tally", "format_status", "live_interval", "DEFAULT_INTERVAL_S"]

#: Seconds between two status lines unless told otherwise.
DEFAULT_INTERVAL_S = 5.0
FETCH = "fetch"  # the DataLoader hooks' stage around dataset[i] (pipeprobe.record._loaders)
_LOADER_STAGES = {FETCH, "collate"}
_SPAN_FILE = re.compile(r"^spans-r(\d+)-p(\d+)\.bin$")
_RECORD = tf.SPAN_RECORD.itemsize


@dataclass
class _FileCursor:
    """How far one span file has been read, and its stage table."""

    offset: int = tf.PREAMBLE_BYTES
    stages: list[str] = field(default_factory=list)


@dataclass
class Tally:
    """What the new records of one interval add up to."""

    wait_ns: int = 0
    stage_ns: Counter = field(default_factory=Counter)


class _SpanTail:
    """Reads the span records written since the last call, across the rank's span files."""

    def __init__(self, run_dir: Path, rank: int) -> None:
        self.run_dir = run_dir
        self.rank = rank
        self.cursors: dict[str, _FileCursor] = {}

    def read_new(self) -> Tally:
        tally = Tally()
        try:
            names = os.listdir(self.run_dir)
        except OSError:
            return tally
        for name in names:
            m = _SPAN_FILE.match(name)
            if m and int(m.group(1)) == self.rank:
                self._read_file(name, tally)
        return tally

    def _read_file(self, name: str, tally: Tally) -> None:
        cursor = self.cursors.setdefault(name, _FileCursor())
        path = self.run_dir / name
        try:
            with open(path, "rb") as fh:
                fh.seek(cursor.offset)
                body = fh.read()
        except OSError:
            return
        whole = len(body) // _RECORD
        if not whole:
            return
        cursor.offset += whole * _RECORD
        recs = np.frombuffer(body, dtype=tf.SPAN_RECORD, count=whole)
        kind = recs["kind"]
        dur = recs["end_ns"] - recs["start_ns"]
        tally.wait_ns += int(dur[kind == tf.KIND_WAIT].sum())
        is_stage = kind == tf.KIND_STAGE
        if not is_stage.any():
            return
        sums = np.bincount(recs["stage"][is_stage], weights=dur[is_stage])  # O(n): no sort
        if len(sums) > len(cursor.stages):
            cursor.stages = self._stage_table(path)
        for i in np.flatnonzero(sums).tolist():
            tally.stage_ns[cursor.stages[i] if i < len(cursor.stages) else f"stage {i}"] += int(sums[i])

    @staticmethod
    def _stage_table(path: Path) -> list[str]:
        try:
            return [str(s) for s in tf.read_json(path.with_suffix(".json")).get("stages", [])]
        except Exception:  # noqa: BLE001 - a header being rewritten: try again next time
            return []


def format_status(batches: int, interval_s: float, batches_in_interval: int, wait_s: float, total_wait_s: float,
                  elapsed_s: float, stages: Counter) -> str:
    """One status line from the figures of an interval and of the run so far.

    Examples
    --------
    >>> from collections import Counter
    >>> format_status(120, 5.0, 40, 2.0, 6.0, 15.0, Counter({"decode": 3e9, "augment": 1e9}))
    'pipeprobe  120 batches  8.0 batches/s  stall 40 % last 5 s, 40 % whole run  busiest input stage: decode (75 %)'
    """
    rate = batches_in_interval / interval_s if interval_s > 0 else 0.0
    now = min(1.0, wait_s / interval_s) if interval_s > 0 else 0.0
    run = min(1.0, total_wait_s / elapsed_s) if elapsed_s > 0 else 0.0
    line = (f"pipeprobe  {batches} batches  {rate:.1f} batches/s  "
            f"stall {100 * now:.0f} % last {interval_s:.2g} s, {100 * run:.0f} % whole run")
    if set(stages) - _LOADER_STAGES:  # the loader's fetch holds the stages timed inside the dataset: show those
        stages = Counter({k: v for k, v in stages.items() if k != FETCH})
    total = sum(stages.values())
    if total > 0:
        name, ns = max(stages.items(), key=lambda kv: (kv[1], kv[0]))
        line += f"  busiest input stage: {name} ({100 * ns / total:.0f} %)"
    return line


def live_interval(live: bool | float | None) -> float | None:
    """Seconds between status lines for ``Probe(live=...)``: ``True`` is the default, a number its own.

    Raises
    ------
    ValueError
        Not a bool or a positive number.

    Examples
    --------
    >>> live_interval(True), live_interval(False), live_interval(2)
    (5.0, None, 2.0)
    """
    if live is None or live is False:
        return None
    if live is True:
        return DEFAULT_INTERVAL_S
    if isinstance(live, (int, float)) and 0 < live < float("inf"):
        return float(live)
    raise ValueError(f"live must be True, False or seconds between status lines (> 0), got {live!r}")


class LiveLine:
    """A daemon thread printing the status line every ``interval_s`` until :meth:`stop`.

    Parameters
    ----------
    run_dir : path-like
        The run folder being recorded.
    rank : int
        Rank whose span files to read.
    interval_s : float
        Seconds between lines.
    count_batches : callable
        Returns the batches delivered so far (the recorder's counter).
    stream : text stream, optional
        Default ``sys.stderr``.
    """

    def __init__(self, run_dir: str | os.PathLike, rank: int, interval_s: float, count_batches: Callable[[], int],
                 stream: TextIO | None = None) -> None:
        self.tail = _SpanTail(Path(run_dir), rank)
        self.interval_s = float(interval_s)
        self.count_batches = count_batches
        self.stream = stream
        self.stop_event = threading.Event()
        self.thread: threading.Thread | None = None
        self.start_ns = monotonic_ns()
        self.total_wait_ns = 0
        self.shown = 0  # width of the line on a terminal, 0 when none is shown

    def start(self) -> LiveLine:
        self.start_ns = monotonic_ns()
        self.thread = threading.Thread(target=self._loop, name="pipeprobe-live", daemon=True)
        self.thread.start()
        return self

    def stop(self) -> None:
        """Stop the thread; on a terminal, end the line so what follows starts on its own."""
        self.stop_event.set()
        if self.thread is not None and self.thread is not threading.current_thread():
            self.thread.join(timeout=2.0)
        if self.shown:
            self._write("\n")
            self.shown = 0

    def _loop(self) -> None:
        try:
            signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGTERM, signal.SIGINT})
        except (AttributeError, ValueError, OSError):
            pass
        last_ns, last_batches = monotonic_ns(), 0
        while not self.stop_event.wait(self.interval_s):
            try:
                now, batches = monotonic_ns(), int(self.count_batches())
                self.show(self.line(now, last_ns, batches, last_batches))
                last_ns, last_batches = now, batches
            except Exception:  # noqa: BLE001 - a status line must never disturb training; stop showing it
                return

    def line(self, now_ns: int, last_ns: int, batches: int, last_batches: int) -> str:
        """Read what was written since the last line and format the next one."""
        tally = self.tail.read_new()
        self.total_wait_ns += tally.wait_ns
        return format_status(batches, (now_ns - last_ns) / 1e9, batches - last_batches, tally.wait_ns / 1e9,
                             self.total_wait_ns / 1e9, (now_ns - self.start_ns) / 1e9, tally.stage_ns)

    def show(self, line: str) -> None:
        stream = self.stream or sys.stderr
        if _is_terminal(stream):
            pad = max(0, self.shown - len(line))
            self._write("\r" + line + " " * pad)
            self.shown = len(line)
        else:
            self._write(line + "\n")

    def _write(self, text: str) -> None:
        stream = self.stream or sys.stderr
        stream.write(text)
        stream.flush()


def _is_terminal(stream: TextIO) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):
        return False
