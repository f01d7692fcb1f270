"""Write exact, hand-checkable traces for tests, without running a probe.

``write_run(tmp_path, spans)`` builds a run directory in pipeprobe's own
format from plain tuples, so tests can state expected numbers by hand.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Iterable

import numpy as np

from pipeprobe import tracefile as tf

T0_NS = 1_000_000_000_000  # monotonic anchor of synthetic runs


def ms(x: float) -> int:
    """Milliseconds from the run start as monotonic ns."""
    return T0_NS + int(round(x * 1e6))


def write_run(
    run_dir: str | os.PathLike,
    processes: dict[int, Iterable[tuple]],
    *,
    end_ms: float | None = None,
    rank: int = 0,
    host: str = "synth",
    cores: int = 2,
    closed: bool = True,
    main_pid: int | None = None,
) -> Path:
    """Write a run. ``processes`` maps pid -> rows.

    Each row is ``(kind, stage, start_ms, end_ms, sample_id, batch_id, epoch)``
    or with an eighth element ``tid``; ``kind`` is one of "stage", "wait",
    "step", "member"; ``stage`` is ignored for wait/step/member. The lowest
    pid (or ``main_pid``) is the main process.
    """
    root = Path(run_dir)
    root.mkdir(parents=True, exist_ok=True)
    kinds = {"stage": tf.KIND_STAGE, "wait": tf.KIND_WAIT, "step": tf.KIND_STEP, "member": tf.KIND_MEMBER}
    main = main_pid if main_pid is not None else min(processes)
    last = 0.0
    for pid, rows in processes.items():
        rows = list(rows)
        names = ["wait", "step"]
        recs = np.zeros(len(rows), dtype=tf.SPAN_RECORD)
        for i, row in enumerate(rows):
            kind, stage, start, end, sample, batch, epoch = row[:7]
            tid = row[7] if len(row) > 7 else pid
            if kind == "wait":
                stage = "wait"
            elif kind in ("step", "member"):
                stage = "step" if kind == "step" else "wait"
            if stage not in names:
                names.append(stage)
            recs[i] = (ms(start), ms(end), -1, sample, batch, epoch, tid, names.index(stage), 0, kinds[kind])
            last = max(last, end)
        header = {
            "format": "pipeprobe-process", "format_version": tf.FORMAT_VERSION, "pid": pid,
            "ppid": 1 if pid == main else main, "rank": rank, "world_size": 1,
            "role": "main" if pid == main else "worker", "host": host,
            "anchor_mono_ns": T0_NS, "anchor_wall_ns": 1_700_000_000_000_000_000, "cpu_time": False,
            "stages": names,
        }
        stem = root / f"spans-r{rank}-p{pid}"
        tf.write_json_atomic(stem.with_suffix(".json"), header)
        with open(stem.with_suffix(".bin"), "wb") as fh:
            fh.write(tf.preamble(tf.CONTENT_SPANS))
            fh.write(recs.tobytes())
    run_header = {
        "format": "pipeprobe-run", "format_version": tf.FORMAT_VERSION, "run_id": "synth", "host": host,
        "cores": cores, "anchor_wall_ns": 1_700_000_000_000_000_000, "anchor_mono_ns": T0_NS,
        "end_mono_ns": ms(end_ms if end_ms is not None else last), "pipeprobe_version": "test",
        "python_version": "3", "platform": "synth", "pid": main, "rank": rank, "world_size": 1,
        "cpu_time": False, "sample_interval_s": 0.0, "flush_interval_s": 1.0, "stages": [], "closed": closed,
    }
    tf.write_json_atomic(root / f"run-r{rank}.json", run_header)
    return root


def simple_pipeline(n_batches: int = 3, samples_per_batch: int = 2, decode_ms: float = 3.0,
                    augment_ms: float = 1.0, step_ms: float = 10.0) -> dict[int, list[tuple]]:
    """One in-process producer: per batch, decode+augment each sample in the wait, then the step.

    Batch k's wait lasts samples_per_batch * (decode + augment) ms, then its
    step runs; nothing overlaps, so stall and critical-path shares follow by hand.
    """
    rows: list[tuple] = []
    t = 0.0
    sid = 0
    for b in range(n_batches):
        start = t
        for _ in range(samples_per_batch):
            rows.append(("stage", "decode", t, t + decode_ms, sid, b, 0))
            t += decode_ms
            rows.append(("stage", "augment", t, t + augment_ms, sid, b, 0))
            t += augment_ms
            sid += 1
        rows.append(("wait", "", start, t, -1, b, 0))
        rows.append(("step", "", t, t + step_ms, -1, b, 0))
        t += step_ms
    return {100: rows}
