"""Tiny exact run folders for the docstring examples, written from plain numbers.

A recorded run carries the jitter of the machine it ran on, so an example
built on one can only assert loose things. :func:`write_example_run`
writes the run a reader can work out by hand instead: one process that,
for each batch, decodes its one sample while the consumer waits for it,
then steps on it, nothing overlapping. :func:`write_example_ranks` writes
a data-parallel job of that shape, one such process per rank, with one
rank late by a given time. :func:`write_span_file` writes one process's
span file and header (the test fixtures use it too).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from . import tracefile as tf

T0_NS = 1_000_000_000_000  # monotonic clock at the start of an example run
WALL_NS = 1_700_000_000_000_000_000  # wall clock at the same moment
_PID = 100


def write_span_file(root: Path, rank: int, recs: np.ndarray, header: tf.ProcessHeader) -> None:
    """Write ``spans-rR-pP.bin`` (preamble, then ``recs``) and its process header into ``root``.

    Parameters
    ----------
    root : Path
        The run folder; it must exist.
    rank : int
        The rank in the file names.
    recs : numpy.ndarray
        Records of dtype :data:`pipeprobe.tracefile.SPAN_RECORD`.
    header : ProcessHeader
        Its ``pid`` names the files.

    Examples
    --------
    >>> import tempfile
    >>> root = Path(tempfile.mkdtemp())
    >>> write_span_file(root, 0, np.zeros(2, tf.SPAN_RECORD), tf.ProcessHeader(pid=7, role="main"))
    >>> len(tf.read_records(root / "spans-r0-p7.bin", tf.CONTENT_SPANS))
    2
    """
    stem = root / f"spans-r{rank}-p{header.pid}"
    tf.write_json_atomic(stem.with_suffix(".json"), header.to_json())
    with open(stem.with_suffix(".bin"), "wb") as fh:
        fh.write(tf.preamble(tf.CONTENT_SPANS))
        fh.write(recs.tobytes())


def _example_records(batches: int, decode_ns: int, step_ns: int) -> np.ndarray:
    """Per batch: a decode span (if ``decode_ns``) and the wait over it, the membership, then the step."""
    per = 4 if decode_ns else 3
    recs = np.zeros(batches * per, dtype=tf.SPAN_RECORD)
    recs["cpu_ns"], recs["epoch"], recs["tid"] = -1, 0, _PID
    cycle = decode_ns + step_ns
    for b in range(batches):
        t = T0_NS + b * cycle
        ready = t + decode_ns
        rows = [(t, ready, -1, b, 0, tf.KIND_WAIT), (ready, ready, b, b, 0, tf.KIND_MEMBER),
                (ready, ready + step_ns, -1, b, 1, tf.KIND_STEP)]
        if decode_ns:
            rows.insert(0, (t, ready, b, -1, 2, tf.KIND_STAGE))
        for i, (start, end, sample, batch, stage, kind) in enumerate(rows):
            r = recs[b * per + i]
            r["start_ns"], r["end_ns"], r["sample_id"], r["batch_id"], r["stage"], r["kind"] = (
                start, end, sample, batch, stage, kind)
    return recs


def write_example_run(run_dir: str | os.PathLike, batches: int = 4, decode_ms: float = 4.0,
                      step_ms: float = 2.0) -> Path:
    """Write a one-process run whose every time follows from three numbers.

    Batch ``b`` (sample ``b``) is decoded in ``[b * c, b * c + decode_ms]``
    with ``c = decode_ms + step_ms``; the consumer waits for it over that
    whole span, then steps on it for ``step_ms``. The run lasts
    ``batches * c`` ms, its stall share is ``decode_ms / c``, and the
    critical path alternates decode and step. ``decode_ms = 0`` writes no
    decode spans: every wait is then empty.

    Parameters
    ----------
    run_dir : str or os.PathLike
        The folder to write (created if missing).
    batches : int
        Batches (and samples, one per batch).
    decode_ms, step_ms : float
        Durations, in milliseconds, rounded to whole nanoseconds.

    Returns
    -------
    Path
        ``run_dir``, ready for :func:`pipeprobe.load`.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> run = pipeprobe.load(write_example_run(tempfile.mkdtemp(), batches=3, decode_ms=4, step_ms=2))
    >>> round(run.wall_s, 6), sorted(set(run.spans["stage"]))
    (0.018, ['decode', 'step', 'wait'])
    """
    root = Path(run_dir)
    root.mkdir(parents=True, exist_ok=True)
    decode_ns, step_ns = round(decode_ms * 1e6), round(step_ms * 1e6)
    stages = ("wait", "step", "decode") if decode_ns else ("wait", "step")
    write_span_file(root, 0, _example_records(batches, decode_ns, step_ns), tf.ProcessHeader(
        pid=_PID, ppid=1, rank=0, world_size=1, role="main", host="example", anchor_mono_ns=T0_NS,
        anchor_wall_ns=WALL_NS, stages=stages, run_id="example"))
    header = tf.RunHeader(
        run_id="example", host="example", cores=2, anchor_wall_ns=WALL_NS, anchor_mono_ns=T0_NS,
        end_mono_ns=T0_NS + batches * (decode_ns + step_ns), pipeprobe_version="example",
        python_version="3", platform="example", pid=_PID, rank=0, world_size=1,
        sample_interval_s=0.0, flush_interval_s=1.0, closed=True, batches=batches)
    tf.write_json_atomic(root / "run-r0.json", header.to_json())
    return root


def _rank_records(rank: int, ready_ns: list[dict[int, int]], starts_ns: list[int], compute_ns: int) -> np.ndarray:
    """One rank's decode, wait, membership and step per step ``k``; every step ends at the last ready time
    plus ``compute_ns`` (the gradient synchronisation)."""
    ranks = len(ready_ns[0])
    recs = np.zeros(4 * len(starts_ns), dtype=tf.SPAN_RECORD)
    recs["cpu_ns"], recs["epoch"], recs["tid"] = -1, 0, _PID + rank
    for k, t in enumerate(starts_ns):
        ready, end, sample = ready_ns[k][rank], max(ready_ns[k].values()) + compute_ns, k * ranks + rank
        rows = [(t, ready, sample, -1, 2, tf.KIND_STAGE), (t, ready, -1, k, 0, tf.KIND_WAIT),
                (ready, ready, sample, k, 0, tf.KIND_MEMBER), (ready, end, -1, k, 1, tf.KIND_STEP)]
        for i, (start, stop, sid, batch, stage, kind) in enumerate(rows):
            r = recs[4 * k + i]
            r["start_ns"], r["end_ns"], r["sample_id"], r["batch_id"], r["stage"], r["kind"] = (
                start, stop, sid, batch, stage, kind)
    return recs


def write_example_ranks(run_dir: str | os.PathLike, late_ms: dict[int, float], ranks: int = 2,
                        steps: int = 4, wait_ms: float = 5.0, compute_ms: float = 10.0) -> Path:
    """Write a data-parallel job whose every time follows from a few numbers.

    Each step, rank ``r`` decodes its one sample for ``wait_ms`` plus
    ``late_ms[r]`` while it waits for it; the gradient synchronisation
    makes every rank's step end at the last rank's ready time plus
    ``compute_ms``. So each step the other ranks wait ``max(late_ms)``
    for the late one, and the job lasts ``steps * (wait_ms +
    max(late_ms) + compute_ms)`` ms.

    Parameters
    ----------
    run_dir : str or os.PathLike
        The folder to write (created if missing).
    late_ms : dict
        Rank -> extra milliseconds of input work per step (others: 0).
    ranks, steps : int
        Ranks (one process each, pid ``100 + rank``) and steps.
    wait_ms, compute_ms : float
        Every rank's input work and the step's compute, in milliseconds.

    Returns
    -------
    Path
        ``run_dir``, ready for :func:`pipeprobe.load`.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> run = pipeprobe.load(write_example_ranks(tempfile.mkdtemp(), late_ms={1: 30.0}, steps=2))
    >>> round(run.wall_s, 6), sorted(set(run.spans["rank"]))
    (0.09, [0, 1])
    """
    root = Path(run_dir)
    root.mkdir(parents=True, exist_ok=True)
    wait_ns, compute_ns = round(wait_ms * 1e6), round(compute_ms * 1e6)
    starts, ready, t = [], [], T0_NS
    for _ in range(steps):
        starts.append(t)
        ready.append({r: t + wait_ns + round(late_ms.get(r, 0.0) * 1e6) for r in range(ranks)})
        t = max(ready[-1].values()) + compute_ns
    for r in range(ranks):
        pid = _PID + r
        write_span_file(root, r, _rank_records(r, ready, starts, compute_ns), tf.ProcessHeader(
            pid=pid, ppid=1, rank=r, world_size=ranks, role="main", host="example", anchor_mono_ns=T0_NS,
            anchor_wall_ns=WALL_NS, stages=("wait", "step", "decode"), run_id="example-job"))
        header = tf.RunHeader(
            run_id="example-job", host="example", cores=2, anchor_wall_ns=WALL_NS, anchor_mono_ns=T0_NS,
            end_mono_ns=t, pipeprobe_version="example", python_version="3", platform="example", pid=pid,
            rank=r, world_size=ranks, sample_interval_s=0.0, flush_interval_s=1.0, closed=True, batches=steps)
        tf.write_json_atomic(root / f"run-r{r}.json", header.to_json())
    return root
