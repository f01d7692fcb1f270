"""Write exact, hand-checkable traces for tests, without running a probe.

A trace row is a :class:`Row`, made by :func:`stage`, :func:`wait`,
:func:`step` or :func:`member` (times in milliseconds from the run start);
``write_run(tmp_path, {pid: rows})`` writes them as a run folder in
pipeprobe's own format (headers made by :class:`pipeprobe.tracefile.RunHeader`
and :class:`~pipeprobe.tracefile.ProcessHeader`), so tests can state
expected numbers by hand. Nothing here runs a probe: these fixtures are
exact; the fixtures that record real runs live in ``_recorded.py``.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable

import numpy as np

from pipeprobe import tracefile as tf
from pipeprobe._example_runs import write_span_file

T0_NS = 1_000_000_000_000  # monotonic anchor of synthetic runs
WALL_NS = 1_700_000_000_000_000_000  # wall-clock anchor of synthetic runs
_KINDS = {"stage": tf.KIND_STAGE, "wait": tf.KIND_WAIT, "step": tf.KIND_STEP, "member": tf.KIND_MEMBER}


def ms(x: float) -> int:
    """Milliseconds from the run start as monotonic ns."""
    return T0_NS + int(round(x * 1e6))


@dataclass(frozen=True)
class Row:
    """One synthetic span record. Ids are None where unknown (written as -1); ``tid`` None: the pid."""

    kind: str
    start_ms: float
    end_ms: float
    stage: str
    sample: int | None = None
    batch: int | None = None
    epoch: int | None = None
    tid: int | None = None
    cpu_ms: float | None = None  # CPU time of the span (None: not taken, written as -1)


def stage(name: str, start_ms: float, end_ms: float, *, sample: int | None = None, batch: int | None = None,
          epoch: int | None = None, tid: int | None = None, cpu_ms: float | None = None) -> Row:
    """A user stage span (``cpu_ms``: its CPU time, None: not taken)."""
    return Row("stage", start_ms, end_ms, name, sample, batch, epoch, tid, cpu_ms)


def wait(start_ms: float, end_ms: float, batch: int, *, epoch: int | None = 0, tid: int | None = None,
         cpu_ms: float | None = None) -> Row:
    """The consumer waiting for ``batch``: it was ready at ``end_ms`` (``cpu_ms``: the CPU time the process's
    other threads used meanwhile, None: not taken)."""
    return Row("wait", start_ms, end_ms, "wait", None, batch, epoch, tid, cpu_ms)


def step(start_ms: float, end_ms: float, batch: int, *, epoch: int | None = 0, tid: int | None = None,
         cpu_ms: float | None = None) -> Row:
    """The training step on ``batch`` (``cpu_ms``: its CPU time, None: not taken)."""
    return Row("step", start_ms, end_ms, "step", None, batch, epoch, tid, cpu_ms)


def member(at_ms: float, sample: int, batch: int, *, epoch: int | None = 0) -> Row:
    """Sample ``sample`` went into ``batch``, delivered at ``at_ms``."""
    return Row("member", at_ms, at_ms, "wait", sample, batch, epoch)


def _records(rows: list[Row], pid: int, offset_ns: int) -> tuple[np.ndarray, list[str]]:
    names = ["wait", "step"]
    recs = np.zeros(len(rows), dtype=tf.SPAN_RECORD)
    for i, r in enumerate(rows):
        if r.stage not in names:
            names.append(r.stage)
        ids = [-1 if v is None else v for v in (r.sample, r.batch, r.epoch)]
        cpu = -1 if r.cpu_ms is None else int(round(r.cpu_ms * 1e6))
        recs[i] = (ms(r.start_ms) + offset_ns, ms(r.end_ms) + offset_ns, cpu, *ids,
                   pid if r.tid is None else r.tid, names.index(r.stage), 0, _KINDS[r.kind])
    return recs, names


def write_run(
    run_dir: str | os.PathLike,
    processes: dict[int, Iterable[Row]],
    *,
    end_ms: float | None = None,
    rank: int = 0,
    host: str = "synth",
    cores: int = 2,
    closed: bool = True,
    main_pid: int | None = None,
    world_size: int = 1,
    run_id: str = "synth",
    header_extra: dict | None = None,
    mono_offset_ns: int = 0,
) -> Path:
    """Write a run. ``processes`` maps pid -> rows, each a :class:`Row` (made by stage, wait, step or member).

    The lowest pid (or ``main_pid``) is the main process. ``header_extra``
    adds fields to the run header (e.g. ``clock_sync``); ``mono_offset_ns``
    shifts this rank's monotonic clock (a rank on another host).
    """
    root = Path(run_dir)
    root.mkdir(parents=True, exist_ok=True)
    main = main_pid if main_pid is not None else min(processes)
    last = 0.0
    for pid, rows in processes.items():
        rows = list(rows)
        for r in rows:
            if not isinstance(r, Row):
                msg = f"pid {pid}: {r!r} is not a Row; make rows with stage(), wait(), step() or member()"
                raise TypeError(msg)
        recs, names = _records(rows, pid, mono_offset_ns)
        last = max([last] + [r.end_ms for r in rows])
        write_span_file(root, rank, recs, tf.ProcessHeader(
            pid=pid, ppid=1 if pid == main else main, rank=rank, world_size=world_size,
            role="main" if pid == main else "worker", host=host, anchor_mono_ns=T0_NS + mono_offset_ns,
            anchor_wall_ns=WALL_NS, stages=tuple(names), run_id=run_id,
        ))
    header = tf.RunHeader(
        run_id=run_id, host=host, cores=cores, anchor_wall_ns=WALL_NS, anchor_mono_ns=T0_NS + mono_offset_ns,
        end_mono_ns=ms(end_ms if end_ms is not None else last) + mono_offset_ns, pipeprobe_version="test",
        python_version="3", platform="synth", pid=main, rank=rank, world_size=world_size,
        sample_interval_s=0.0, flush_interval_s=1.0, closed=closed,
    )
    tf.write_json_atomic(root / f"run-r{rank}.json", {**header.to_json(), **(header_extra or {})})
    return root


def simple_pipeline(n_batches: int = 3, samples_per_batch: int = 2, decode_ms: float = 3.0,
                    augment_ms: float = 1.0, step_ms: float = 10.0) -> dict[int, list[Row]]:
    """One in-process producer: per batch, decode+augment each sample in the wait, then the step.

    Batch k's wait lasts samples_per_batch * (decode + augment) ms, then its
    step runs; nothing overlaps, so stall and critical-path shares follow by hand.
    """
    rows: list[Row] = []
    t = 0.0
    sid = 0
    for b in range(n_batches):
        start = t
        for _ in range(samples_per_batch):
            rows.append(stage("decode", t, t + decode_ms, sample=sid, batch=b, epoch=0))
            t += decode_ms
            rows.append(stage("augment", t, t + augment_ms, sample=sid, batch=b, epoch=0))
            t += augment_ms
            sid += 1
        rows.append(wait(start, t, b))
        rows.append(step(t, t + step_ms, b))
        t += step_ms
    return {100: rows}


def three_epoch_rows(persistent: bool) -> dict[int, list[Row]]:
    """3 epochs x 2 batches, 2 loader workers; without persistent workers each epoch has new worker pids.

    Epoch e starts at 20e ms: its workers decode batch 2e in [t, t+4] and batch 2e+1 in [t, t+5]; the
    consumer waits for batch 2e until t+4, steps to t+8, takes batch 2e+1 at once and steps to t+12.
    """
    main: list[Row] = []
    procs: dict[int, list[Row]] = {}
    for e in range(3):
        t = 20.0 * e
        for k in range(2):
            pid = 201 + k if persistent else 201 + 2 * e + k
            procs.setdefault(pid, []).append(stage("decode", t, t + 4 + k, sample=2 * e + k))
        main += [wait(t, t + 4, 2 * e, epoch=e), member(t + 4, 2 * e, 2 * e, epoch=e), step(t + 4, t + 8, 2 * e, epoch=e),
                 wait(t + 8, t + 8, 2 * e + 1, epoch=e), member(t + 8, 2 * e + 1, 2 * e + 1, epoch=e),
                 step(t + 8, t + 12, 2 * e + 1, epoch=e)]
    return {100: main, **procs}


def loader_life_rows(workers: int, epochs: int = 2, batches_per_epoch: int = 2, *, task_ms: float = 20.0,
                     step_ms: float = 2.0, boot_ms: float = 5.0, fork_ms: float = 3.0, stop_ms: float = 4.0,
                     first_extra_ms: float = 0.0, persistent: bool = False,
                     early: bool = False) -> tuple[dict[int, list[Row]], float]:
    """A loader-bound run whose workers start and stop as torch's DataLoader does; ``(rows, end_ms)``.

    Each epoch that starts workers: the loop makes them one after another
    (``fork_ms`` each) before its first ask; worker ``k`` then starts on its
    own and takes its first task ``boot_ms`` after its process was made.
    Batch ``i`` of an epoch goes to worker ``i mod workers``; a worker runs
    its tasks (``task_ms``, the first of an epoch ``first_extra_ms`` longer)
    back to back; the loop takes batches in order and steps ``step_ms``.
    Without ``persistent`` each epoch ends by stopping the workers
    (``stop_ms`` each, in the loop) and new ones start; persistent ones start
    once and take an epoch's first requests at once. ``workers=0``: the loop
    loads each batch itself (``task_ms``) inside its wait. No worker starts
    before the loop's first ask unless ``early``: torch hands out an epoch's
    first indices inside ``iter()``, so one can (pipeprobe's replay starts
    it at the ask).
    """
    main: list[Row] = []
    procs: dict[int, list[Row]] = {}
    t, b, pid = 0.0, 0, 200
    for e in range(epochs):
        starting = workers and (e == 0 or not persistent)
        t += workers * fork_ms if starting else 0.0
        free = [max(-math.inf if early else t, t + boot_ms - (workers - 1 - k) * fork_ms) if starting else t
                for k in range(workers)]
        if starting:
            pid += workers
        for i in range(batches_per_epoch):
            if workers:
                k = i % workers
                extra = first_extra_ms if starting and i < workers else 0.0
                begin, end = free[k], free[k] + task_ms + extra
                free[k] = end
                procs.setdefault(pid - workers + k if not persistent else 201 + k, []).append(
                    stage("load", begin, end, sample=b, epoch=e))
            else:
                end = t + task_ms
                main.append(stage("load", t, end, sample=b, batch=b, epoch=e))
            ready = max(t, end)
            main += [wait(t, ready, b, epoch=e), member(ready, b, b, epoch=e), step(ready, ready + step_ms, b, epoch=e)]
            t, b = ready + step_ms, b + 1
        t += workers * stop_ms if workers and not persistent else 0.0
    return {100: main, **procs}, t


def write_many_spans(run_dir: str | os.PathLike, n_spans: int = 1_000_000, workers: int = 4,
                     batch_size: int = 32, step_ms: float = 1.0, seed: int = 0) -> Path:
    """Write a large run with numpy only: ``workers`` loader processes and one consumer.

    Worker ``w`` builds batches ``w, w + workers, ...``; each sample runs
    read, decode and augment back to back (random, mostly sub-millisecond
    durations), so about ``n_spans`` stage spans are written in total. The
    consumer takes batch ``b`` when it is ready and the previous step has
    ended, then steps for ``step_ms``: its waits are the run's stalls.
    """
    root = Path(run_dir)
    root.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    stages = ["wait", "step", "read", "decode", "augment"]
    n_samples = max(batch_size * workers, n_spans // 3)
    n_batches = n_samples // batch_size
    n_samples = n_batches * batch_size
    scale_ns = np.array([20_000, 250_000, 90_000])  # mean ns per stage
    dur = (rng.exponential(1.0, (n_samples, 3)) * scale_ns).astype(np.int64) + 1_000
    sample = np.arange(n_samples)
    batch = sample // batch_size
    worker = batch % workers
    ready = np.zeros(n_batches, np.int64)
    files = {}
    for w in range(workers):
        mine = np.flatnonzero(worker == w)
        d = dur[mine].ravel()
        ends = T0_NS + np.cumsum(d)
        starts = ends - d
        recs = np.zeros(len(d), dtype=tf.SPAN_RECORD)
        recs["start_ns"], recs["end_ns"], recs["cpu_ns"] = starts, ends, -1
        recs["sample_id"] = np.repeat(sample[mine], 3)
        recs["batch_id"], recs["epoch"] = -1, 0
        recs["tid"] = 1000 + w
        recs["stage"] = np.tile([2, 3, 4], len(mine))
        recs["kind"] = tf.KIND_STAGE
        b_of = np.repeat(batch[mine], 3)
        last = np.append(b_of[1:] != b_of[:-1], True)
        ready[b_of[last]] = ends[last]
        files[1000 + w] = recs
    step_ns = int(step_ms * 1e6)
    k = np.arange(n_batches, dtype=np.int64)
    wait_start = np.empty(n_batches, np.int64)
    step_start = k * step_ns + np.maximum.accumulate(ready - k * step_ns)
    step_end = step_start + step_ns
    wait_start[0] = T0_NS
    wait_start[1:] = step_end[:-1]
    main = np.zeros(3 * n_batches + n_samples, dtype=tf.SPAN_RECORD)
    wait = main[:n_batches]
    wait["start_ns"], wait["end_ns"], wait["batch_id"], wait["stage"], wait["kind"] = (
        wait_start, step_start, k, 0, tf.KIND_WAIT)
    step = main[n_batches:2 * n_batches]
    step["start_ns"], step["end_ns"], step["batch_id"], step["stage"], step["kind"] = (
        step_start, step_end, k, 1, tf.KIND_STEP)
    mem = main[2 * n_batches:2 * n_batches + n_samples]
    mem["start_ns"] = mem["end_ns"] = step_start[batch]
    mem["sample_id"], mem["batch_id"], mem["kind"] = sample, batch, tf.KIND_MEMBER
    main = main[: 2 * n_batches + n_samples]
    main["cpu_ns"] = -1
    main["sample_id"][: 2 * n_batches] = -1
    main["tid"] = 999
    files[999] = main
    for pid, recs in files.items():
        write_span_file(root, 0, recs, tf.ProcessHeader(
            pid=pid, ppid=1 if pid == 999 else 999, rank=0, world_size=1, role="main" if pid == 999 else "worker",
            host="synth", anchor_mono_ns=T0_NS, anchor_wall_ns=WALL_NS, stages=tuple(stages),
        ))
    header = tf.RunHeader(
        run_id="synth-many", host="synth", cores=2, anchor_wall_ns=WALL_NS, anchor_mono_ns=T0_NS,
        end_mono_ns=int(step_end[-1]), pipeprobe_version="test", python_version="3", platform="synth", pid=999,
        rank=0, world_size=1, sample_interval_s=0.0, flush_interval_s=1.0, closed=True,
    )
    tf.write_json_atomic(root / "run-r0.json", header.to_json())
    return root


def ranks_pipeline(late_ms: dict[int, float], ranks: int = 2, steps: int = 4, wait_ms: float = 5.0,
                   compute_ms: float = 10.0) -> dict[int, dict[int, list[Row]]]:
    """Rows of a data-parallel job: rank -> {pid: rows}.

    Every step, each rank waits ``wait_ms`` (+ ``late_ms[rank]``) for its
    batch, timed as one "decode" span of its sample, then steps; the
    gradient synchronisation makes every rank's step end at the last
    ready time + ``compute_ms``. So per step the fastest rank waits
    ``max(late) - min(late)`` ms for the last one.
    """
    out: dict[int, dict[int, list[Row]]] = {r: {100 + r: []} for r in range(ranks)}
    t = 0.0
    for k in range(steps):
        ready = {r: t + wait_ms + late_ms.get(r, 0.0) for r in range(ranks)}
        end = max(ready.values()) + compute_ms
        for r in range(ranks):
            rows = out[r][100 + r]
            sid = k * ranks + r
            rows.append(stage("decode", t, ready[r], sample=sid, batch=k, epoch=0))
            rows.append(wait(t, ready[r], k))
            rows.append(member(ready[r], sid, k))
            rows.append(step(ready[r], end, k))
        t = end
    return out


def write_ranks(run_dir: str | os.PathLike, late_ms: dict[int, float], ranks: int = 2, steps: int = 4,
                skip: tuple[int, ...] = (), **kwargs) -> Path:
    """Write the job of :func:`ranks_pipeline` (ranks in ``skip`` left out); ``kwargs`` go to write_run."""
    rows = ranks_pipeline(late_ms, ranks=ranks, steps=steps)
    run_id = kwargs.pop("run_id", "synth-job")
    for r, procs in rows.items():
        if r not in skip:
            write_run(run_dir, procs, rank=r, world_size=ranks, run_id=run_id, **kwargs)
    return Path(run_dir)


def write_resources(run_dir: str | os.PathLike, rows: Iterable[tuple], rank: int = 0) -> Path:
    """Append resource samples ``(t_ms, pid, core, cpu_pct)`` to a synthetic run (pid 0 = per-core rows)."""
    path = Path(run_dir) / f"res-r{rank}.bin"
    rows = list(rows)
    recs = np.zeros(len(rows), dtype=tf.RESOURCE_RECORD)
    for i, (t, pid, core, pct) in enumerate(rows):
        recs[i] = (ms(t), -1, -1, pct, pid, core)
    with open(path, "wb") as fh:
        fh.write(tf.preamble(tf.CONTENT_RESOURCES))
        fh.write(recs.tobytes())
    return path


def pool_schedule(
    stage_us: list[list[list[int]]],
    step_us: list[int],
    workers: int = 1,
    collate_us: int = 0,
    jitter_us: list[int] | None = None,
    delivery_us: list[int] | None = None,
) -> tuple[dict[int, list[Row]], float]:
    """Simulate a worker-pool pipeline as soon as possible; return (processes, end_ms) for ``write_run``.

    ``stage_us[b][i][k]`` is the duration of stage ``k`` ("s0", "s1", ...) of
    sample ``i`` of batch ``b`` in microseconds. Worker ``b % workers`` (its
    own process, pid 200 + w) builds batch ``b``: each sample's stages back
    to back, then a ``collate`` span (if ``collate_us``) with the batch id.
    Worker spans carry sample ids only; the consumer (pid 100) records the
    membership, so loading links them to batches. The consumer asks for
    batch ``b`` when step ``b-1`` ends, gets it ``delivery_us[b]`` after it
    is both finished and asked for, and steps for ``step_us[b]``.
    ``jitter_us[j]`` (cycled) is idle time before each worker span: time
    nothing recorded runs. With no jitter and no delivery time, every span
    starts exactly when its last dependency ends (an as-soon-as-possible
    schedule, as in the critical path method).
    """
    jit = jitter_us or [0]
    deliv = delivery_us or [0] * len(step_us)
    clock = [0] * workers
    done = []
    procs: dict[int, list[Row]] = {100: []}
    j = 0
    sid = 0
    samples_of = []
    for b, samples in enumerate(stage_us):
        w = b % workers
        rows = procs.setdefault(200 + w, [])
        ids = []
        for durs in samples:
            for k, d in enumerate(durs):
                clock[w] += jit[j % len(jit)]
                j += 1
                rows.append(stage(f"s{k}", clock[w] / 1e3, (clock[w] + d) / 1e3, sample=sid, epoch=0))
                clock[w] += d
            ids.append(sid)
            sid += 1
        if collate_us:
            clock[w] += jit[j % len(jit)]
            j += 1
            rows.append(stage("collate", clock[w] / 1e3, (clock[w] + collate_us) / 1e3, batch=b, epoch=0))
            clock[w] += collate_us
        done.append(clock[w])
        samples_of.append(ids)
    t = 0
    main = procs[100]
    for b, step_len in enumerate(step_us):
        ready = max(done[b], t) + deliv[b]
        main.append(wait(t / 1e3, ready / 1e3, b))
        for s in samples_of[b]:
            main.append(member(ready / 1e3, s, b))
        main.append(step(ready / 1e3, (ready + step_len) / 1e3, b))
        t = ready + step_len
    return procs, t / 1e3


# Moved to _recorded.py (they record real runs); kept importable from here for the tests that still do.
from _recorded import machine_idle_share, record_pool_run, wait_for_quiet_cpu  # noqa: E402, F401


def many_stage_names_run(run_dir: str | os.PathLike, names: int, batches: int = 40) -> Path:
    """A worker that runs ``names / batches`` distinct one-off stages per batch (1 ms in all), a 2 ms step."""
    per_batch = names // batches
    worker, main = [], []
    for b in range(batches):
        t = 3.0 * b
        for i in range(per_batch):
            s = t + i / per_batch
            worker.append(stage(f"s{b * per_batch + i}", s, s + 1 / per_batch, sample=b, batch=b, epoch=0, tid=200))
        main += [wait(t, t + 1, b), step(t + 1, t + 3, b)]
    return write_run(run_dir, {100: main, 200: worker})
