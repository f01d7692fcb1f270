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
    world_size: int = 1,
    run_id: str = "synth",
    header_extra: dict | None = None,
    mono_offset_ns: int = 0,
) -> Path:
    """Write a run. ``processes`` maps pid -> rows.

    Each row is ``(kind, stage, start_ms, end_ms, sample_id, batch_id, epoch)``
    or with an eighth element ``tid``; ``kind`` is one of "stage", "wait",
    "step", "member"; ``stage`` is ignored for wait/step/member. The lowest
    pid (or ``main_pid``) is the main process. ``header_extra`` adds fields
    to the run header (e.g. ``clock_sync``); ``mono_offset_ns`` shifts this
    rank's monotonic clock (a rank on another host).
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
            recs[i] = (ms(start) + mono_offset_ns, ms(end) + mono_offset_ns, -1, sample, batch, epoch, tid,
                       names.index(stage), 0, kinds[kind])
            last = max(last, end)
        header = {
            "format": "pipeprobe-process", "format_version": tf.FORMAT_VERSION, "pid": pid,
            "ppid": 1 if pid == main else main, "rank": rank, "world_size": world_size,
            "role": "main" if pid == main else "worker", "host": host,
            "anchor_mono_ns": T0_NS + mono_offset_ns, "anchor_wall_ns": 1_700_000_000_000_000_000,
            "cpu_time": False, "stages": names, "run_id": run_id,
        }
        stem = root / f"spans-r{rank}-p{pid}"
        tf.write_json_atomic(stem.with_suffix(".json"), header)
        with open(stem.with_suffix(".bin"), "wb") as fh:
            fh.write(tf.preamble(tf.CONTENT_SPANS))
            fh.write(recs.tobytes())
    run_header = {
        "format": "pipeprobe-run", "format_version": tf.FORMAT_VERSION, "run_id": run_id, "host": host,
        "cores": cores, "anchor_wall_ns": 1_700_000_000_000_000_000, "anchor_mono_ns": T0_NS + mono_offset_ns,
        "end_mono_ns": ms(end_ms if end_ms is not None else last) + mono_offset_ns, "pipeprobe_version": "test",
        "python_version": "3", "platform": "synth", "pid": main, "rank": rank, "world_size": world_size,
        "cpu_time": False, "sample_interval_s": 0.0, "flush_interval_s": 1.0, "stages": [], "closed": closed,
        **(header_extra or {}),
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
        header = {
            "format": "pipeprobe-process", "format_version": tf.FORMAT_VERSION, "pid": pid,
            "ppid": 1 if pid == 999 else 999, "rank": 0, "world_size": 1,
            "role": "main" if pid == 999 else "worker", "host": "synth",
            "anchor_mono_ns": T0_NS, "anchor_wall_ns": 1_700_000_000_000_000_000, "cpu_time": False,
            "stages": stages,
        }
        stem = root / f"spans-r0-p{pid}"
        tf.write_json_atomic(stem.with_suffix(".json"), header)
        with open(stem.with_suffix(".bin"), "wb") as fh:
            fh.write(tf.preamble(tf.CONTENT_SPANS))
            fh.write(recs.tobytes())
    run_header = {
        "format": "pipeprobe-run", "format_version": tf.FORMAT_VERSION, "run_id": "synth-many", "host": "synth",
        "cores": 2, "anchor_wall_ns": 1_700_000_000_000_000_000, "anchor_mono_ns": T0_NS,
        "end_mono_ns": int(step_end[-1]), "pipeprobe_version": "test", "python_version": "3",
        "platform": "synth", "pid": 999, "rank": 0, "world_size": 1, "cpu_time": False,
        "sample_interval_s": 0.0, "flush_interval_s": 1.0, "stages": [], "closed": True,
    }
    tf.write_json_atomic(root / "run-r0.json", run_header)
    return root


# -- recorded sleep pipelines with a process-pool loader (what-if replay tests) ---------------------

def _whatif_sleep_task(task: tuple) -> tuple:
    """Loader task of :func:`record_pool_run`: sleep per sample and stage, then 'collate'."""
    import time

    import pipeprobe

    batch_id, sample_ids, stage_ms, collate_ms = task
    for sid in sample_ids:
        for name, base_ms in stage_ms:
            with pipeprobe.stage(name, sample=sid):
                time.sleep(base_ms * (1.0 + 0.5 * (sid * 7 % 3)) / 1e3)
    with pipeprobe.stage("collate", batch=batch_id):
        time.sleep(collate_ms / 1e3)
    return batch_id, list(sample_ids)


def record_pool_run(
    out: str | os.PathLike,
    *,
    workers: int = 2,
    prefetch: int = 4,
    epochs: int = 2,
    batches_per_epoch: int = 6,
    batch_size: int = 3,
    stage_ms: tuple = (("read", 1.0), ("decode", 3.0)),
    collate_ms: float = 1.0,
    step_ms: float = 4.0,
    policy: str = "first-free",
) -> Path:
    """Record a real run: a process-pool loader of sleeping stages, in-order delivery, a sleeping step.

    The loader works like the demo's: at most ``prefetch`` batches asked of
    the workers and not yet handed out, nothing requested past the end of an
    epoch. ``policy="first-free"`` uses one pool (the first idle worker takes
    the next batch); ``"round-robin"`` sends batch ``i`` of an epoch to
    worker ``i % workers`` (one single-process pool per worker).
    """
    import multiprocessing
    import time
    from collections import deque

    import pipeprobe

    ctx = multiprocessing.get_context("fork")
    pools: list = []  # started inside the probe, as a loader does, so the workers record

    def epoch_batches(e: int):
        tasks = [
            (e * batches_per_epoch + k,
             tuple(range((e * batches_per_epoch + k) * batch_size, (e * batches_per_epoch + k + 1) * batch_size)),
             tuple(stage_ms), collate_ms)
            for k in range(batches_per_epoch)
        ]
        pending = iter(enumerate(tasks))
        in_flight: deque = deque()

        def submit() -> None:
            nxt = next(pending, None)
            if nxt is not None:
                i, task = nxt
                in_flight.append(pools[i % len(pools)].apply_async(_whatif_sleep_task, (task,)))

        for _ in range(prefetch):
            submit()
        while in_flight:
            result = in_flight.popleft().get()
            submit()
            yield result

    try:
        with pipeprobe.Probe(out, report=False, sample_interval_s=0) as probe:
            pools += [ctx.Pool(workers)] if policy == "first-free" else [ctx.Pool(1) for _ in range(workers)]
            for e in range(epochs):
                for _batch in probe.watch(epoch_batches(e), samples=lambda b: b[1]):
                    with probe.step():
                        time.sleep(step_ms / 1e3)
            for pool in pools:
                pool.close()
                pool.join()
    finally:
        for pool in pools:
            pool.terminate()
    return Path(out)


def ranks_pipeline(late_ms: dict[int, float], ranks: int = 2, steps: int = 4, wait_ms: float = 5.0,
                   compute_ms: float = 10.0) -> dict[int, dict[int, list[tuple]]]:
    """Rows of a data-parallel job: rank -> {pid: rows}.

    Every step, each rank waits ``wait_ms`` (+ ``late_ms[rank]``) for its
    batch, timed as one "decode" span of its sample, then steps; the
    gradient synchronisation makes every rank's step end at the last
    ready time + ``compute_ms``. So per step the fastest rank waits
    ``max(late) - min(late)`` ms for the last one.
    """
    out: dict[int, dict[int, list[tuple]]] = {r: {100 + r: []} for r in range(ranks)}
    t = 0.0
    for k in range(steps):
        ready = {r: t + wait_ms + late_ms.get(r, 0.0) for r in range(ranks)}
        end = max(ready.values()) + compute_ms
        for r in range(ranks):
            rows = out[r][100 + r]
            sid = k * ranks + r
            rows.append(("stage", "decode", t, ready[r], sid, k, 0))
            rows.append(("wait", "", t, ready[r], -1, k, 0))
            rows.append(("member", "", ready[r], ready[r], sid, k, 0))
            rows.append(("step", "", ready[r], end, -1, k, 0))
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


def machine_idle_share(window_s: float = 0.5) -> float:
    """Share of all cores' time that was idle over ``window_s`` (from /proc/stat; 1.0 where unreadable)."""
    import time

    def snap() -> tuple[int, int]:
        with open("/proc/stat", encoding="ascii") as fh:
            fields = [int(x) for x in fh.readline().split()[1:]]
        return sum(fields), fields[3] + (fields[4] if len(fields) > 4 else 0)

    try:
        t0, i0 = snap()
        time.sleep(window_s)
        t1, i1 = snap()
    except (OSError, ValueError):
        return 1.0
    return (i1 - i0) / max(1, t1 - t0)


def wait_for_quiet_cpu(min_idle: float = 0.85, max_wait_s: float = 30.0) -> float:
    """Wait until the machine is mostly idle (other jobs perturb timing runs); return the idle share seen."""
    import time

    deadline = time.monotonic() + max_wait_s
    idle = machine_idle_share()
    while idle < min_idle and time.monotonic() < deadline:
        idle = machine_idle_share()
    return idle


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
) -> tuple[dict[int, list[tuple]], float]:
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
    procs: dict[int, list[tuple]] = {100: []}
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
                rows.append(("stage", f"s{k}", clock[w] / 1e3, (clock[w] + d) / 1e3, sid, -1, 0))
                clock[w] += d
            ids.append(sid)
            sid += 1
        if collate_us:
            clock[w] += jit[j % len(jit)]
            j += 1
            rows.append(("stage", "collate", clock[w] / 1e3, (clock[w] + collate_us) / 1e3, -1, b, 0))
            clock[w] += collate_us
        done.append(clock[w])
        samples_of.append(ids)
    t = 0
    main = procs[100]
    for b, step in enumerate(step_us):
        ready = max(done[b], t) + deliv[b]
        main.append(("wait", "", t / 1e3, ready / 1e3, -1, b, 0))
        for s in samples_of[b]:
            main.append(("member", "", ready / 1e3, ready / 1e3, s, b, 0))
        main.append(("step", "", ready / 1e3, (ready + step) / 1e3, -1, b, 0))
        t = ready + step
    return procs, t / 1e3
