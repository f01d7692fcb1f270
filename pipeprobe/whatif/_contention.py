"""Taking the recorded CPU contention out of a trace (private; the plan side of processor sharing).

A recorded task that shared the cores with others ran its CPU part slower
than it would alone. :func:`remove_contention` estimates, per task, the
mean slow-down it suffered from the overlap of the recorded tasks;
:func:`split_cpu` splits its wall seconds into off-CPU seconds and
contention-free CPU seconds. Replaying the recorded configuration puts the
same contention back (:mod:`pipeprobe.whatif._cores`).

References
----------
.. [1] L. Kleinrock, *Queueing Systems, Volume 2*, Wiley, 1976, ch. 4 (processor sharing).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ._cores import lockstep_speed

__all__ = ["remove_contention", "split_cpu", "cores_left", "background_cores", "max_overlap"]

#: Cores a run keeps however busy the machine was (a quarter core: a process is never starved entirely).
MIN_CORES_LEFT = 0.25


def _segments_mean_slowdown(starts: np.ndarray, ends: np.ndarray, weights: np.ndarray, cores: float,
                            together: np.ndarray | None = None) -> np.ndarray:
    """Mean of ``max(1, n(t) / cores)`` over each interval, ``n(t)`` the weighted count of open intervals.

    A task with ``together`` ``k > 1`` threads (a pool whose threads must run together) is slowed
    ``1 / lockstep_speed(cores / n(t), k, cores)`` wherever ``n(t)`` exceeds the cores, as
    :class:`~pipeprobe.whatif._cores.CpuShare` replays it.
    """
    if len(starts) == 0:
        return np.ones(0)
    t = np.concatenate([starts, ends])
    d = np.concatenate([weights, -weights])
    order = np.argsort(t, kind="stable")
    t, d = t[order], d[order]
    n = np.cumsum(d)  # load on [t[i], t[i+1])
    seg = np.diff(t)
    i0 = np.searchsorted(t, starts, side="left")
    i1 = np.searchsorted(t, ends, side="left")
    dur = ends - starts

    def mean_of(level: np.ndarray) -> np.ndarray:
        integral = np.concatenate([[0.0], np.cumsum(level[:-1] * seg)])
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(dur > 0, (integral[i1] - integral[i0]) / dur, 1.0)

    out = mean_of(np.maximum(1.0, n / cores))
    over = np.flatnonzero(n > cores)  # where the cores are oversubscribed; a pool runs at full speed elsewhere
    for k in np.unique(together[together > 1.0]) if together is not None else ():
        slow = np.ones(len(n))
        slow[over] = [1.0 / lockstep_speed(cores / x, float(k), cores) for x in n[over].tolist()]
        mine = together == k
        out[mine] = mean_of(slow)[mine]
    return out


def remove_contention(
    tasks: list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]], cores: float,
    widths: list[float] | None = None, together: list[float] | None = None,
) -> list[np.ndarray]:
    """Per task, the mean CPU slowdown it suffered from sharing ``cores`` with the other tasks.

    ``tasks`` holds ``(start_s, end_s, wall_s, cpu_s)`` arrays per task kind.
    Tasks with CPU time are first assumed to want a whole core; the off-CPU
    time left over after the contention is taken out lowers that, twice.
    The CPU part of a task is slowed by the load ``n(t) / cores`` when that
    exceeds 1; its off-CPU part is not. ``widths`` gives the threads each
    task kind runs on (1 each by default: a training step on a pool of
    threads loads the cores with each of them); ``together`` the threads of
    a kind's pool that progress only together (1 each by default; see
    :attr:`pipeprobe.whatif.plan.ReplayPlan.step_together`).
    """
    starts = np.concatenate([t[0] for t in tasks])
    ends = np.concatenate([t[1] for t in tasks])
    wall = np.concatenate([t[2] for t in tasks])
    cpu = np.concatenate([t[3] for t in tasks])
    u = np.where(cpu > 0, 1.0, 0.0)
    width = np.concatenate([np.full(len(t[0]), w) for t, w in zip(tasks, widths or [1.0] * len(tasks))])
    lock = np.concatenate([np.full(len(t[0]), x) for t, x in zip(tasks, together or [1.0] * len(tasks))])
    slow = np.ones(len(starts))
    for _ in range(3):
        slow = _segments_mean_slowdown(starts, ends, u * width, float(cores), lock)
        cpu_free = np.minimum(cpu, wall / slow)
        nominal = wall - cpu_free * (slow - 1.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            u = np.where(nominal > 0, cpu_free / nominal, 0.0)
    out, i = [], 0
    for t in tasks:
        out.append(slow[i:i + len(t[0])])
        i += len(t[0])
    return out


def split_cpu(dur: np.ndarray, cpu: np.ndarray, slow: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Split per-stage wall time into off-CPU and contention-free CPU seconds (CPU parts were slowed)."""
    s = slow[:, None]
    cpu_free = np.minimum(cpu, dur / s)
    return np.maximum(0.0, dur - cpu_free * s), cpu_free


def cores_left(cores: float, background: float) -> float:
    """Cores left to the run when other processes used ``background`` of them (at least a quarter core)."""
    return max(MIN_CORES_LEFT, float(cores) - float(background))


def background_cores(resources: Any, rank: int, cores: int, spans: Any = None,
                     core_ids: frozenset[int] | None = None) -> float:
    """Cores the machine's other processes kept busy: system-wide busy cores minus this run's processes.

    ``resources`` is :attr:`pipeprobe.load.Run.resources`. The median over
    the resource samples, the first one (no interval yet) left out. This
    run's share per sample is the larger of what the sampler saw of its
    processes and the CPU time its spans recorded in the interval
    (``spans``, :attr:`pipeprobe.load.Run.spans`, when given): the
    sampler finds new child processes only now and then (loader workers
    started anew each epoch can live and die between two looks), the
    spans' thread CPU clocks miss nothing they timed. With ``core_ids``
    (the cores the run could use), only those cores' busy time counts:
    other processes on other cores took nothing from the run.

    Examples
    --------
    Two samples 1 s apart, both cores busy, the sampler saw only the main
    process at half a core; the spans timed 2 CPU seconds a second (the
    main process and a worker the sampler never saw): no other process was busy.

    >>> import pandas as pd
    >>> res = pd.DataFrame({"t_s": [0.0, 0.0, 0.0, 1.0, 1.0, 1.0, 2.0, 2.0, 2.0], "rank": 0,
    ...                     "pid": [0, 0, 7] * 3, "core": [0, 1, -1] * 3, "cpu_pct": [100.0, 100.0, 50.0] * 3})
    >>> background_cores(res, 0, 2)
    1.5
    >>> sp = pd.DataFrame({"rank": 0, "pid": [7, 8], "tid": [1, 2], "start_s": [0.0, 0.0], "end_s": [2.0, 2.0],
    ...                    "cpu_s": [2.0, 2.0]})
    >>> background_cores(res, 0, 2, sp)
    0.0
    """
    res = resources
    if res is None or len(res) == 0:
        return 0.0
    res = res[res["rank"] == rank]
    times = np.unique(res["t_s"].to_numpy())
    if len(times) < 3:
        return 0.0
    res = res[res["t_s"] > times[0]]
    per_core = res[(res["pid"] == 0) & (res["core"] >= 0)]
    if core_ids is not None:
        per_core = per_core[per_core["core"].isin(core_ids)]
    system = per_core.groupby("t_s")["cpu_pct"].sum() / 100.0
    ours = res[(res["pid"] > 0) & (res["core"] < 0)].groupby("t_s")["cpu_pct"].sum() / 100.0
    both = pd.concat([system.rename("system"), ours.rename("ours")], axis=1).dropna()
    if both.empty:
        return 0.0
    if spans is not None and len(spans):
        t = both.index.to_numpy(np.float64)
        prev = np.concatenate([[times[0]], t[:-1]])
        timed = _span_cpu_between(spans[spans["rank"] == rank], prev, t) / np.maximum(t - prev, 1e-9)
        both["ours"] = np.maximum(both["ours"].to_numpy(), timed)
    return float(np.clip(np.median(both["system"] - both["ours"]), 0.0, cores))


def _span_cpu_between(spans: Any, t0: np.ndarray, t1: np.ndarray) -> np.ndarray:
    """CPU seconds the outermost spans of each thread recorded in each interval ``[t0, t1]`` (a span's CPU
    time spread evenly over its wall time; spans inside another span of their thread are in its CPU time)."""
    sp = spans[np.isfinite(spans["cpu_s"].to_numpy(np.float64))]
    if not len(sp):
        return np.zeros(len(t1))
    sp = sp.sort_values(["pid", "tid", "start_s"], kind="stable")
    start, end = sp["start_s"].to_numpy(np.float64), sp["end_s"].to_numpy(np.float64)
    thread = sp.groupby(["pid", "tid"], sort=False, observed=True).ngroup().to_numpy()
    reach = pd.Series(end).groupby(thread).cummax().groupby(thread).shift(1).to_numpy(np.float64)
    top = ~(start < reach)  # NaN (a thread's first span) compares False: outermost
    start, end, cpu = start[top], end[top], sp["cpu_s"].to_numpy(np.float64)[top]
    dur = end - start
    rate = np.where(dur > 0, cpu / np.where(dur > 0, dur, 1.0), 0.0)
    t = np.concatenate([start, end])
    order = np.argsort(t, kind="stable")
    t, level = t[order], np.cumsum(np.concatenate([rate, -rate])[order])
    done = np.concatenate([[0.0], np.cumsum(level[:-1] * np.diff(t))])  # CPU seconds up to each event

    def upto(x: np.ndarray) -> np.ndarray:
        k = np.searchsorted(t, x, side="right") - 1
        return np.where(k >= 0, done[np.maximum(k, 0)] + level[np.maximum(k, 0)] * (x - t[np.maximum(k, 0)]), 0.0)

    return upto(t1) - upto(t0)


def max_overlap(starts: np.ndarray, ends: np.ndarray) -> int:
    """Most intervals open at one instant (an interval ending when another starts does not overlap it)."""
    ok = np.isfinite(starts) & np.isfinite(ends)
    if not ok.any():
        return 0
    t = np.concatenate([starts[ok], ends[ok]])
    d = np.concatenate([np.ones(ok.sum()), -np.ones(ok.sum())])
    order = np.lexsort((d, t))  # ends before starts at the same instant
    return int(np.cumsum(d[order]).max())
