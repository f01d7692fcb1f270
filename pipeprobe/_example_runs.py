"""Tiny exact run folders for the docstring examples, written from plain numbers.

A recorded run carries the jitter of the machine it ran on, so an example
built on one can only assert loose things. :func:`write_example_run`
writes the run a reader can work out by hand instead: one process that,
for each batch, decodes its one sample while the consumer waits for it,
then steps on it, nothing overlapping. :func:`write_span_file` writes one
process's span file and header (the test fixtures use it too).
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
