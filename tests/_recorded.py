"""Fixtures that record real runs (real sleeps, real process pools) and wait for a quiet machine.

Their numbers carry the machine's timing noise; the exact, hand-checkable
traces are in ``_synth.py``.
"""

from __future__ import annotations

import os
from pathlib import Path


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


def analysis_load_batch(b: int) -> list[int]:
    """Pool task of the recorded analysis fixture: 4 samples x (3 ms decode + 1 ms augment), 1 ms collate."""
    import time

    import pipeprobe

    ids = list(range(4 * b, 4 * b + 4))
    for i in ids:
        with pipeprobe.stage("decode", sample=i):
            time.sleep(0.003)
        with pipeprobe.stage("augment", sample=i):
            time.sleep(0.001)
    with pipeprobe.stage("collate", batch=b):
        time.sleep(0.001)
    return ids


def record_sleep_run(d: Path) -> Path:
    """Record the sleep pipeline of :func:`analysis_sleep_run` into ``d``.

    The job also times its own sleeps with ``time.perf_counter`` (outside
    pipeprobe) and writes the seconds per stage to :func:`sleep_job_times`'s
    file: a machine may stretch every 2 ms sleep by 7 %, and the hand-worked
    shares then follow the lengths the sleeps really had.
    """
    import json
    import time

    import pipeprobe

    own = {"decode": 0.0, "augment": 0.0, "step": 0.0}

    def timed_sleep(name: str, seconds: float) -> None:
        t0 = time.perf_counter()
        time.sleep(seconds)
        own[name] += time.perf_counter() - t0

    def batches():
        for b in range(6):
            for i in range(4 * b, 4 * b + 4):
                with pipeprobe.stage("decode", sample=i):
                    timed_sleep("decode", 0.006)
                with pipeprobe.stage("augment", sample=i):
                    timed_sleep("augment", 0.002)
            yield b

    with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
        for _ in probe.watch(batches()):
            with probe.step():
                timed_sleep("step", 0.020)
    sleep_job_times_path(d).write_text(json.dumps(own))
    return d


def sleep_job_times_path(d: Path) -> Path:
    """Where :func:`record_sleep_run` leaves the job's own sleep seconds (beside the run folder)."""
    return Path(d).with_name(Path(d).name + "_job_times.json")


def sleep_job_times(d: Path) -> dict:
    """The sleep seconds per stage that the job of :func:`record_sleep_run` measured itself."""
    import json

    return json.loads(sleep_job_times_path(d).read_text())
