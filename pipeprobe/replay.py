"""Discrete-event replay of a recorded input pipeline, under a changed configuration.

:func:`build_plan` turns a loaded :class:`~pipeprobe.load.Run` into a
:class:`ReplayPlan`: per batch, the work its loader task did (per stage,
split into CPU time and time spent off the CPU) and the work the consumer
did with it (the training step, consumer-side stages, loop overhead), plus
a few constants of the loader measured from the trace (how long an idle
worker takes to pick up a request, the gap between two tasks of a busy
worker, how long a finished batch takes to reach the consumer).
:func:`replay` runs that plan through a discrete-event model of the
pipeline:

* a pool of ``workers`` loader workers; each batch is one task run start to
  end by one worker (as in the demo and in common loaders: the samples of a
  batch are loaded one after the other by the same worker), so events are
  per batch, not per span;
* at most ``prefetch`` batches requested and not yet handed to the
  consumer; a request is made when the consumer takes a batch, and at the
  start of an epoch (the loader does not look past the end of an epoch
  when the recorded one did not);
* assignment of requests to workers: ``"round-robin"`` (request ``i`` of
  an epoch goes to worker ``i mod workers``, in order, as common loaders
  do) or ``"first-free"`` (a shared queue, the first idle worker takes the
  next request, as a process pool does);
* in-order delivery (the consumer takes batch ``k`` only after batch
  ``k - 1``) or, with ``in_order=False``, whichever batch is ready first;
* ``cores`` CPU cores shared by every running task (processor sharing):
  a task wants ``u`` of a core (its CPU seconds over its contention-free
  duration); when the running tasks want more than there are cores, the
  CPU parts of all of them run at one common speed, the one at which the
  CPU they use fills the cores exactly; their off-CPU parts (sleeping,
  reading, waiting on a device) keep full speed.

Recorded durations already contain the CPU contention of the recorded run.
:func:`build_plan` removes it: with the recorded overlap of tasks it
computes how much each task was slowed by sharing the recorded cores, and
keeps the CPU time the task's thread actually used (``cpu_s``) plus the
rest of its wall time as off-CPU time. Replaying the unchanged
configuration puts the same contention back.

References
----------
.. [1] G. S. Fishman, *Discrete-Event Simulation: Modeling, Programming,
   and Analysis*, Springer, 2001 (event-scheduling simulation).
.. [2] L. Kleinrock, *Queueing Systems, Volume 2: Computer Applications*,
   Wiley, 1976, ch. 4 (processor sharing).
.. [3] J. E. Kelley and M. R. Walker, "Critical-path planning and
   scheduling", 1959 (the critical path of the replayed run).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Mapping

import numpy as np
import pandas as pd

from ._replay_loop import CONSUMER_OVERHEAD, PSEUDO_STAGES, UNSTAGED, WORKER_OVERHEAD, simulate
from .errors import ScenarioError

if TYPE_CHECKING:  # pragma: no cover
    from .load import Run

__all__ = ["ReplayPlan", "Replay", "build_plan", "plan_from_durations", "replay", "POLICIES", "PSEUDO_STAGES"]

#: Ways a loader hands requests to its workers.
POLICIES = ("round-robin", "first-free")


@dataclass(frozen=True)
class _Work:
    """Per-batch work of one side, per stage: off-CPU seconds and CPU seconds (contention removed)."""

    names: tuple[str, ...]
    io_s: np.ndarray  # (batches, stages)
    cpu_s: np.ndarray  # (batches, stages)

    def scaled(self, factors: Mapping[str, float]) -> _Work:
        f = np.array([1.0 / factors.get(n, 1.0) for n in self.names])
        return _Work(self.names, self.io_s * f, self.cpu_s * f)


@dataclass(frozen=True)
class ReplayPlan:
    """Everything :func:`replay` needs, taken from one recorded run.

    Attributes
    ----------
    batch_id : ndarray
        Batch ids in consumer order.
    epoch : ndarray
        Epoch of each batch.
    loader : _Work
        Loader task of each batch, per loader stage (plus worker overhead).
    consumer : _Work
        Consumer work of each batch after it arrives: step, consumer-side
        stages, loop overhead up to the next wait.
    start_up_s : float
        From the run start to the first wait of the consumer.
    tail_s : float
        From the end of the last batch's consumer work to the end of the run.
    handoff_s, latency_s, dispatch_s, worker_gap_s : float
        Consumer cost of taking a ready batch; finished task to batch
        available to the consumer; request to start on an idle worker;
        end of one task to the start of the next on a busy worker.
    epoch_dispatch_s : ndarray
        Request-to-start delay of the first task of each epoch (worker start-up).
    workers, prefetch, cores : int
        Recorded configuration (``workers == 0``: loading ran in the consumer).
    policy : str
        Recorded assignment policy (detected).
    epoch_barrier : bool
        The loader did not request batches of the next epoch before the
        consumer started it.
    measured_wall_s : float
    measured_stall_s : float
    spans : int
        Spans the plan was built from.
    notes : list of str
        What the plan had to assume.
    background_cores : float
        CPU the machine's other processes used during the run (cores; from
        the resource samples, 0 without them). The run had the other
        ``cores - background_cores`` cores, and so has its replay unless a
        scenario sets ``cores``. (Schedulers share a busy machine between
        control groups or users, not per thread, so other work tends to
        keep its share however many threads this run adds.)
    """

    batch_id: np.ndarray
    epoch: np.ndarray
    loader: _Work
    consumer: _Work
    start_up_s: float
    tail_s: float
    handoff_s: float
    latency_s: float
    dispatch_s: float
    worker_gap_s: float
    epoch_dispatch_s: np.ndarray
    workers: int
    prefetch: int
    cores: int
    policy: str
    epoch_barrier: bool
    measured_wall_s: float
    measured_stall_s: float
    spans: int
    notes: list[str] = field(default_factory=list)
    background_cores: float = 0.0

    @property
    def batches(self) -> int:
        """Number of batches in the plan."""
        return len(self.batch_id)

    @property
    def loader_stages(self) -> list[str]:
        """User stages of the loader task."""
        return [n for n in self.loader.names if n not in PSEUDO_STAGES]

    @property
    def consumer_stages(self) -> list[str]:
        """User stages and the step on the consumer side."""
        return [n for n in self.consumer.names if n not in PSEUDO_STAGES]


@dataclass(frozen=True)
class Replay:
    """A replayed run: per-batch times and what held it up.

    Attributes
    ----------
    wall_s : float
        Replayed wall time.
    stall_s : float
        Time the consumer spent waiting for batches.
    batch_id : ndarray
        Batch ids in the order the consumer took them.
    request_s, start_s, end_s, available_s, wait_start_s, ready_s, done_s : ndarray
        Per batch (indexed like ``plan.batch_id``): request made, loader task
        started and ended, batch available to the consumer, consumer began
        to wait for it, consumer took it, consumer finished with it.
    worker : ndarray
        Worker that ran each batch's task (-1: the consumer loaded it).
    critical_path : dict
        Seconds of the replayed wall time on the critical path, per stage
        (user stages, ``step`` and the pseudo stages in :data:`PSEUDO_STAGES`).
    config : dict
        Configuration replayed.
    """

    wall_s: float
    stall_s: float
    batch_id: np.ndarray
    request_s: np.ndarray
    start_s: np.ndarray
    end_s: np.ndarray
    available_s: np.ndarray
    wait_start_s: np.ndarray
    ready_s: np.ndarray
    done_s: np.ndarray
    worker: np.ndarray
    critical_path: dict[str, float]
    config: dict[str, Any]

    @property
    def stall_fraction(self) -> float:
        """Share of the wall time the consumer waited for batches."""
        return self.stall_s / self.wall_s if self.wall_s > 0 else 0.0

    @property
    def critical_path_shares(self) -> dict[str, float]:
        """:attr:`critical_path` as shares of the wall time (they sum to 1)."""
        return {k: v / self.wall_s for k, v in self.critical_path.items()} if self.wall_s > 0 else {}


# --------------------------------------------------------------------------------------------
# Building a plan from a run
# --------------------------------------------------------------------------------------------


def _segments_mean_slowdown(starts: np.ndarray, ends: np.ndarray, weights: np.ndarray, cores: float) -> np.ndarray:
    """Mean of ``max(1, n(t) / cores)`` over each interval, ``n(t)`` the weighted count of open intervals."""
    if len(starts) == 0:
        return np.ones(0)
    t = np.concatenate([starts, ends])
    d = np.concatenate([weights, -weights])
    order = np.argsort(t, kind="stable")
    t, d = t[order], d[order]
    n = np.cumsum(d)  # load on [t[i], t[i+1])
    slow = np.maximum(1.0, n / cores)
    seg = np.diff(t)
    integral = np.concatenate([[0.0], np.cumsum(slow[:-1] * seg)])
    i0 = np.searchsorted(t, starts, side="left")
    i1 = np.searchsorted(t, ends, side="left")
    dur = ends - starts
    with np.errstate(invalid="ignore", divide="ignore"):
        out = (integral[i1] - integral[i0]) / dur
    return np.where(dur > 0, out, 1.0)


def _remove_contention(
    tasks: list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]], cores: float
) -> list[np.ndarray]:
    """Per task, the mean CPU slowdown it suffered from sharing ``cores`` with the other tasks.

    ``tasks`` holds ``(start_s, end_s, wall_s, cpu_s)`` arrays per task kind.
    Tasks with CPU time are first assumed to want a whole core; the off-CPU
    time left over after the contention is taken out lowers that, twice.
    The CPU part of a task is slowed by the load ``n(t) / cores`` when that
    exceeds 1; its off-CPU part is not.
    """
    starts = np.concatenate([t[0] for t in tasks])
    ends = np.concatenate([t[1] for t in tasks])
    wall = np.concatenate([t[2] for t in tasks])
    cpu = np.concatenate([t[3] for t in tasks])
    u = np.where(cpu > 0, 1.0, 0.0)
    slow = np.ones(len(starts))
    for _ in range(3):
        slow = _segments_mean_slowdown(starts, ends, u, float(cores))
        cpu_free = np.minimum(cpu, wall / slow)
        nominal = wall - cpu_free * (slow - 1.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            u = np.where(nominal > 0, cpu_free / nominal, 0.0)
    out, i = [], 0
    for t in tasks:
        out.append(slow[i:i + len(t[0])])
        i += len(t[0])
    return out


def _split(dur: np.ndarray, cpu: np.ndarray, slow: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Split per-stage wall time into off-CPU and contention-free CPU seconds (CPU parts were slowed)."""
    s = slow[:, None]
    cpu_free = np.minimum(cpu, dur / s)
    return np.maximum(0.0, dur - cpu_free * s), cpu_free


def _matrix(k: np.ndarray, code: np.ndarray, values: np.ndarray, rows: int, cols: int) -> np.ndarray:
    flat = np.bincount(k * cols + code, weights=values, minlength=rows * cols)
    return flat.astype(float).reshape(rows, cols)  # bincount of nothing is int


def build_plan(
    run: Run,
    *,
    workers: int | None = None,
    prefetch: int | None = None,
    policy: str | None = None,
    rank: int | None = None,
) -> ReplayPlan:
    """Extract a :class:`ReplayPlan` from a recorded run.

    Parameters
    ----------
    run : Run
        A loaded run (:func:`pipeprobe.load`).
    workers : int, optional
        Loader workers of the recorded run; counted from the trace by default.
    prefetch : int, optional
        Batches the recorded loader kept in flight; by default the smallest
        depth consistent with the trace (batches that started while earlier
        ones were still undelivered). Give it when you know it.
    policy : {"round-robin", "first-free"}, optional
        Recorded assignment policy; detected from which worker ran which batch.
    rank : int, optional
        Rank to replay; the lowest by default.

    Returns
    -------
    ReplayPlan

    Raises
    ------
    ScenarioError
        The run has no batches (the training loop was not wrapped in
        ``probe.watch``), or an argument is out of range.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe.replay import build_plan
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False) as probe:
    ...     for batch in probe.watch([[0, 1], [2, 3]]):
    ...         with probe.step():
    ...             pass
    >>> build_plan(pipeprobe.load(d)).batches
    2

    References
    ----------
    .. [1] L. Kleinrock, *Queueing Systems, Volume 2*, 1976 (processor sharing).
    """
    notes: list[str] = []
    allb = run.batches
    if len(allb) == 0:
        raise ScenarioError(
            f"run {str(run.run_dir)!r} has no batches to replay; record the training loop with "
            "probe.watch(loader) and probe.step()"
        )
    if rank is None:
        rank = int(allb["rank"].min())
    if policy is not None and policy not in POLICIES:
        raise ScenarioError(f"policy must be one of {', '.join(POLICIES)}, got {policy!r}")
    b = allb[allb["rank"] == rank].sort_values("batch_id").reset_index(drop=True)
    if allb["rank"].nunique() > 1:
        notes.append(f"the run has {allb['rank'].nunique()} ranks; replaying rank {rank} only")
    nb = len(b)
    bid = b["batch_id"].to_numpy(np.int64)
    epoch = b["epoch"].to_numpy(np.int64)
    wait0 = b["wait_start_s"].to_numpy(float)
    ready = b["ready_s"].to_numpy(float)
    wait_s = b["wait_s"].to_numpy(float)
    step_start = b["step_start_s"].to_numpy(float)
    step_end = b["step_end_s"].to_numpy(float)
    no_step = np.isnan(step_end)
    step_start = np.where(no_step, ready, step_start)
    step_end = np.where(no_step, ready, step_end)
    wall = float(run.wall_s)
    cores = int(run.header.get("cores") or 1)

    sp = run.spans
    sp = sp[sp["rank"] == rank]
    waits = sp[sp["stage"] == "wait"]
    if len(waits):
        ck = waits[["pid", "tid"]].value_counts().index[0]
        cons_pid, cons_tid = int(ck[0]), int(ck[1])
    else:  # pragma: no cover - batches come from wait rows
        cons_pid = cons_tid = -1
    pos = pd.Series(np.arange(nb), index=bid)
    is_user = ~sp["stage"].isin(["wait", "step"]) & (sp["batch_id"] >= 0)
    user = sp[is_user & sp["batch_id"].isin(bid)]
    k_all = pos.reindex(user["batch_id"].to_numpy()).to_numpy(np.int64)
    in_cons = ((user["pid"] == cons_pid) & (user["tid"] == cons_tid)).to_numpy()
    ustart = user["start_s"].to_numpy(float)
    uend = user["end_s"].to_numpy(float)
    # consumer-thread spans inside the wait for their batch are loading done by the consumer
    in_wait = in_cons & (ustart >= wait0[k_all] - 1e-9) & (uend <= ready[k_all] + 1e-9)
    nested_in_step = in_cons & ~no_step[k_all] & (ustart >= step_start[k_all]) & (uend <= step_end[k_all])
    cons_side = in_cons & ~in_wait & ~nested_in_step
    worker_side = ~in_cons
    if worker_side.any():
        inline = False
        load_mask = worker_side
        if in_wait.any():
            notes.append("spans in the consumer thread during its waits were folded into the handoff")
    else:
        inline = True
        load_mask = in_wait
    cpu_col = user["cpu_s"].to_numpy(float)
    cpu_known = bool(np.isfinite(cpu_col).any()) if len(cpu_col) else False
    cpu_col = np.nan_to_num(cpu_col, nan=0.0)
    if not cpu_known:
        notes.append("no CPU times in the trace (cpu_time=False): stages are replayed without CPU contention")
    dur_col = (uend - ustart)
    stage_codes = user["stage"].astype(str).to_numpy()

    # ---- loader tasks: per batch, per stage ----
    lk = k_all[load_mask]
    lnames_all = stage_codes[load_mask]
    lstages = list(dict.fromkeys(lnames_all))
    if not lstages:
        lstages = [UNSTAGED]
    lcode = pd.Index(lstages).get_indexer(lnames_all) if len(lnames_all) else np.zeros(0, np.int64)
    S = len(lstages)
    ld = _matrix(lk, lcode, dur_col[load_mask], nb, S)
    lc = _matrix(lk, lcode, cpu_col[load_mask], nb, S)
    first = np.full(nb, np.nan)
    last = np.full(nb, np.nan)
    if len(lk):
        g = pd.DataFrame({"k": lk, "s": ustart[load_mask], "e": uend[load_mask]}).groupby("k")
        first[g["s"].min().index.to_numpy()] = g["s"].min().to_numpy()
        last[g["e"].max().index.to_numpy()] = g["e"].max().to_numpy()
    if inline:
        # the consumer ran the task inside its wait: the whole wait is the task
        has = ~np.isnan(first)
        if not has.any():
            ld[:, 0] = wait_s
            notes.append("no stage spans were recorded: each wait is replayed as unstaged loading in the consumer")
        first = wait0.copy()
        last = ready.copy()
    missing = np.isnan(first)
    if missing.any():
        notes.append(f"{int(missing.sum())} batches have no loader spans; replayed as free loader tasks")
        first = np.where(missing, ready, first)
        last = np.where(missing, ready, last)
    task_wall = np.maximum(0.0, last - first)
    gap = np.maximum(0.0, task_wall - ld.sum(1))
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(ld.sum(1) > 0, lc.sum(1) / ld.sum(1), 0.0)
    ld = np.column_stack([ld, gap])
    lc = np.column_stack([lc, gap * frac])
    lnames = tuple(lstages) + (WORKER_OVERHEAD,)

    # which worker ran each batch
    wk = np.full(nb, -1, np.int64)
    nworkers_seen = 0
    if not inline and worker_side.any():
        wkey = (user["pid"].to_numpy(np.int64)[load_mask] << 32) + user["tid"].to_numpy(np.int64)[load_mask]
        codes, uniq = pd.factorize(wkey)
        nworkers_seen = len(uniq)
        firsts = pd.DataFrame({"k": lk, "w": codes, "s": ustart[load_mask]}).sort_values("s").drop_duplicates("k")
        wk[firsts["k"].to_numpy()] = firsts["w"].to_numpy()
        spread = pd.DataFrame({"k": lk, "w": codes}).groupby("k")["w"].nunique()
        if (spread > 1).any():
            notes.append(
                f"{int((spread > 1).sum())} batches were loaded by more than one worker; each is replayed "
                "as one task (exact only when a batch's samples run one after the other on one worker)"
            )

    # ---- consumer work: from the batch's arrival to the next wait ----
    nxt_wait = np.append(wait0[1:], np.nan)
    cons_end = np.where(np.isnan(nxt_wait), step_end, nxt_wait)
    cons_end = np.maximum(cons_end, ready)
    ck_ = k_all[cons_side]
    cnames_all = stage_codes[cons_side]
    cstages = ["step"] + list(dict.fromkeys(cnames_all))
    ccode = pd.Index(cstages).get_indexer(cnames_all) if len(cnames_all) else np.zeros(0, np.int64)
    C = len(cstages)
    cd = _matrix(ck_, ccode, dur_col[cons_side], nb, C)
    cc = _matrix(ck_, ccode, cpu_col[cons_side], nb, C)
    steps = sp[(sp["stage"] == "step") & sp["batch_id"].isin(bid)]
    sk = pos.reindex(steps["batch_id"].to_numpy()).to_numpy(np.int64)
    cd[:, 0] = np.bincount(sk, weights=steps["dur_s"].to_numpy(float), minlength=nb)
    step_cpu = np.nan_to_num(steps["cpu_s"].to_numpy(float), nan=0.0)
    cc[:, 0] = np.bincount(sk, weights=step_cpu, minlength=nb)
    cwall = cons_end - ready
    cgap = np.maximum(0.0, cwall - cd.sum(1))
    with np.errstate(invalid="ignore", divide="ignore"):
        cfrac = np.where(cd.sum(1) > 0, cc.sum(1) / cd.sum(1), 0.0)
    cd = np.column_stack([cd, cgap])
    cc = np.column_stack([cc, cgap * cfrac])
    cnames = tuple(cstages) + (CONSUMER_OVERHEAD,)
    start_up = float(wait0[0])
    tail = max(0.0, wall - float(cons_end[-1]))

    # ---- contention of the recorded run, taken out ----
    background = _background_cores(run, rank, cores) if cpu_known else 0.0
    lslow, cslow = _remove_contention(
        [(first, first + task_wall, ld.sum(1), lc.sum(1)), (ready, ready + cd.sum(1), cd.sum(1), cc.sum(1))],
        _cores_left(cores, background),
    )
    lio, lcpu = _split(ld, lc, lslow)
    cio, ccpu = _split(cd, cc, cslow)

    # ---- loader configuration and constants ----
    ep_first = np.r_[True, epoch[1:] != epoch[:-1]]
    ep_start_idx = np.maximum.accumulate(np.where(ep_first, np.arange(nb), 0))
    if inline:
        rec_workers = 0
        barrier = True
    else:
        rec_workers = workers if workers is not None else max(1, nworkers_seen)
        # did any task of an epoch start before the consumer began that epoch?
        starts_early = np.zeros(nb, bool)
        if ep_first[1:].any():
            ep_begin = wait0[ep_start_idx]
            starts_early = (first < ep_begin - 1e-6) & (ep_start_idx > 0)
        barrier = not bool(starts_early.any())
    if workers is not None and workers < 0:
        raise ScenarioError(f"workers must be >= 0, got {workers}")
    # smallest prefetch depth consistent with the trace
    if inline:
        rec_prefetch = 1
    elif prefetch is not None:
        if prefetch < 1:
            raise ScenarioError(f"prefetch must be >= 1, got {prefetch}")
        rec_prefetch = int(prefetch)
    else:
        delivered_before = np.searchsorted(ready, first, side="right")
        lo = ep_start_idx if barrier else np.zeros(nb, np.int64)
        undelivered = np.arange(nb) - np.maximum(delivered_before, lo)
        conc = _max_overlap(first, last)
        rec_prefetch = int(max(1, undelivered.max() + 1, conc))
        notes.append(f"recorded prefetch depth inferred as {rec_prefetch} (the smallest the trace allows)")
    if policy is None:
        policy = "first-free"
        if rec_workers >= 2:
            idx_in = np.arange(nb) - (ep_start_idx if barrier else 0)
            pairs = (idx_in >= rec_workers) & (wk >= 0)
            prev = np.roll(wk, rec_workers)
            if pairs.sum() >= 3 and float((wk[pairs] == prev[pairs]).mean()) >= 0.9:
                policy = "round-robin"
    # request times of the recorded run
    P = rec_prefetch
    req = np.full(nb, np.nan)
    if not inline:
        idx_in = np.arange(nb) - (ep_start_idx if barrier else 0)
        from_start = idx_in < P
        base = wait0[ep_start_idx] if barrier else np.full(nb, wait0[0])
        req[from_start] = base[from_start]
        prev_i = np.arange(nb) - P
        ok = ~from_start & (prev_i >= 0)
        req[ok] = ready[prev_i[ok]]
    dispatch, worker_gap, latency, handoff = 0.0, 0.0, 0.0, 0.0
    epoch_dispatch = np.zeros(int(ep_first.sum()))
    if not inline and nworkers_seen:
        order = np.lexsort((first, wk))
        w_sorted, k_sorted = wk[order], order
        same = np.r_[False, w_sorted[1:] == w_sorted[:-1]]
        prev_end = np.full(nb, np.nan)
        prev_end[k_sorted[same]] = last[k_sorted[np.flatnonzero(same) - 1]]
        delay = first - req
        busy = np.isfinite(prev_end) & (req < prev_end)
        idle = ~busy & ~ep_first & np.isfinite(delay)
        # means, not medians: the replay must add up to the recorded wall time, jitter included
        if idle.any():
            dispatch = float(np.mean(np.maximum(0.0, delay[idle])))
        if busy.any():
            worker_gap = float(np.mean(np.maximum(0.0, (first - prev_end)[busy])))
        else:
            worker_gap = dispatch
        # epoch start: the first of the tasks requested when the epoch started (worker start-up)
        ep_ids = np.cumsum(ep_first) - 1
        at_start = (idx_in < P) if barrier else (np.arange(nb) < P)
        d_start = pd.Series(np.where(at_start, np.maximum(0.0, delay), np.nan))
        epoch_dispatch = d_start.groupby(ep_ids).min().reindex(range(len(epoch_dispatch))).fillna(dispatch)
        epoch_dispatch = epoch_dispatch.to_numpy(float)
        # arrival of a finished batch at a waiting consumer
        prev_ready = np.r_[-np.inf, ready[:-1]]
        blocking = (wait0 < last) & (prev_ready < last) & ~missing
        if blocking.any():
            latency = float(np.mean(np.maximum(0.0, (ready - last)[blocking])))
        early = (last + latency < wait0)
        # consumer cost of taking a batch that was already there (0 when no batch ever was)
        handoff = float(np.median(wait_s[early])) if early.any() else 0.0

    return ReplayPlan(
        batch_id=bid,
        epoch=epoch,
        loader=_Work(lnames, lio, lcpu),
        consumer=_Work(cnames, cio, ccpu),
        start_up_s=start_up,
        tail_s=tail,
        handoff_s=handoff,
        latency_s=latency,
        dispatch_s=dispatch,
        worker_gap_s=worker_gap,
        epoch_dispatch_s=epoch_dispatch,
        workers=int(rec_workers),
        prefetch=int(rec_prefetch),
        cores=cores,
        policy=policy,
        epoch_barrier=bool(barrier),
        measured_wall_s=wall,
        measured_stall_s=float(wait_s.sum()),
        spans=int(len(sp)),
        notes=notes,
        background_cores=background,
    )


def _cores_left(cores: float, background: float) -> float:
    """Cores left to the run when other processes used ``background`` of them (at least a quarter core)."""
    return max(0.25, float(cores) - float(background))


def _background_cores(run: Run, rank: int, cores: int) -> float:
    """Cores the machine's other processes kept busy: system-wide busy cores minus this run's processes.

    The median over the resource samples, the first one (no interval yet) left out.
    """
    res = run.resources
    if res is None or len(res) == 0:
        return 0.0
    res = res[res["rank"] == rank]
    times = np.unique(res["t_s"].to_numpy())
    if len(times) < 3:
        return 0.0
    res = res[res["t_s"] > times[0]]
    system = res[(res["pid"] == 0) & (res["core"] >= 0)].groupby("t_s")["cpu_pct"].sum() / 100.0
    ours = res[(res["pid"] > 0) & (res["core"] < 0)].groupby("t_s")["cpu_pct"].sum() / 100.0
    both = pd.concat([system.rename("system"), ours.rename("ours")], axis=1).dropna()
    if both.empty:
        return 0.0
    return float(np.clip(np.median(both["system"] - both["ours"]), 0.0, cores))


def plan_from_durations(
    task_s: Any,
    step_s: Any,
    *,
    stages: Mapping[str, Any] | None = None,
    task_cpu_s: Any = None,
    step_cpu_s: Any = None,
    epoch: Any = None,
    workers: int = 1,
    prefetch: int = 1,
    cores: int = 1,
    policy: str = "first-free",
    epoch_barrier: bool = True,
) -> ReplayPlan:
    """Build a :class:`ReplayPlan` from per-batch durations instead of a trace.

    For pipelines that were not recorded (planning, tests): each batch's
    loader task takes ``task_s[i]`` seconds (or the sum of ``stages[name][i]``),
    its consumer work ``step_s[i]``; the loader constants are zero.

    Parameters
    ----------
    task_s : array-like
        Loader task seconds per batch; ignored when ``stages`` is given.
    step_s : array-like
        Consumer seconds per batch (the step).
    stages : mapping of str to array-like, optional
        Per-stage loader seconds per batch.
    task_cpu_s, step_cpu_s : array-like, optional
        The CPU part of each (default: none, so no CPU contention).
    epoch : array-like, optional
        Epoch of each batch (default: one epoch).
    workers, prefetch, cores, policy, epoch_barrier
        The configuration the plan calls "recorded".

    Returns
    -------
    ReplayPlan

    Examples
    --------
    >>> plan = plan_from_durations([0.03] * 10, [0.01] * 10, workers=3, prefetch=3, cores=4)
    >>> round(replay(plan).wall_s, 3)
    0.13

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
    """
    step = np.asarray(step_s, float)
    nb = len(step)
    if stages:
        names = tuple(stages)
        dur = np.column_stack([np.asarray(stages[n], float) for n in names])
    else:
        names = ("task",)
        dur = np.asarray(task_s, float).reshape(nb, 1)
    if dur.shape[0] != nb or (dur < 0).any() or (step < 0).any():
        raise ScenarioError("give one non-negative duration per batch for the tasks and the steps")
    cpu = np.zeros_like(dur)
    if task_cpu_s is not None:
        tc = np.asarray(task_cpu_s, float)
        with np.errstate(invalid="ignore", divide="ignore"):
            cpu = np.where(dur.sum(1, keepdims=True) > 0, dur / dur.sum(1, keepdims=True), 0.0) * tc[:, None]
    scpu = np.zeros(nb) if step_cpu_s is None else np.asarray(step_cpu_s, float)
    ep = np.zeros(nb, np.int64) if epoch is None else np.asarray(epoch, np.int64)
    n_ep = int(np.r_[True, ep[1:] != ep[:-1]].sum()) if nb else 0
    return ReplayPlan(
        batch_id=np.arange(nb),
        epoch=ep,
        loader=_Work(names + (WORKER_OVERHEAD,), np.column_stack([dur - cpu, np.zeros(nb)]),
                     np.column_stack([cpu, np.zeros(nb)])),
        consumer=_Work(("step", CONSUMER_OVERHEAD), np.column_stack([step - scpu, np.zeros(nb)]),
                       np.column_stack([scpu, np.zeros(nb)])),
        start_up_s=0.0, tail_s=0.0, handoff_s=0.0, latency_s=0.0, dispatch_s=0.0, worker_gap_s=0.0,
        epoch_dispatch_s=np.zeros(n_ep), workers=workers, prefetch=prefetch, cores=cores, policy=policy,
        epoch_barrier=epoch_barrier, measured_wall_s=float("nan"), measured_stall_s=float("nan"), spans=0,
    )


def _max_overlap(starts: np.ndarray, ends: np.ndarray) -> int:
    ok = np.isfinite(starts) & np.isfinite(ends)
    if not ok.any():
        return 0
    t = np.concatenate([starts[ok], ends[ok]])
    d = np.concatenate([np.ones(ok.sum()), -np.ones(ok.sum())])
    order = np.lexsort((d, t))  # ends before starts at the same instant
    return int(np.cumsum(d[order]).max())


# --------------------------------------------------------------------------------------------
# The event loop
# --------------------------------------------------------------------------------------------



def replay(
    plan: ReplayPlan,
    *,
    workers: int | None = None,
    prefetch: int | None = None,
    cores: float | None = None,
    policy: str | None = None,
    in_order: bool = True,
    faster: Mapping[str, float] | None = None,
    offload: Mapping[str, float] | None = None,
) -> Replay:
    """Replay ``plan`` under a configuration; arguments left out keep the recorded value.

    Parameters
    ----------
    plan : ReplayPlan
        From :func:`build_plan`.
    workers : int, optional
        Loader workers; 0 loads in the consumer when it asks for a batch.
    prefetch : int, optional
        Most batches requested and not yet taken by the consumer.
    cores : float, optional
        CPU cores the run's tasks share (``math.inf``: no contention). By
        default the recorded machine's cores less the CPU its other
        processes used (:attr:`ReplayPlan.background_cores`).
    policy : {"round-robin", "first-free"}, optional
        How requests are handed to workers.
    in_order : bool, default True
        The consumer takes batches in order.
    faster : mapping of str to float, optional
        Stage name (loader stage, consumer stage or ``"step"``) to speed-up
        factor; ``math.inf`` makes the stage free. Names are not checked
        here (see :func:`pipeprobe.whatif`).
    offload : mapping of str to float, optional
        Loader stage to factor: the stage leaves the loader task and runs
        ``factor`` times faster on the accelerator side of the step (off the CPU).

    Returns
    -------
    Replay

    Examples
    --------
    >>> import pipeprobe, tempfile, time
    >>> from pipeprobe.replay import build_plan, replay
    >>> d = tempfile.mkdtemp()
    >>> def batches():
    ...     for i in range(4):
    ...         with pipeprobe.stage("decode", sample=i):
    ...             time.sleep(0.004)
    ...         yield [i]
    >>> with pipeprobe.Probe(d, report=False) as probe:
    ...     for batch in probe.watch(batches()):
    ...         with probe.step():
    ...             time.sleep(0.002)
    >>> plan = build_plan(pipeprobe.load(d))
    >>> base, free = replay(plan), replay(plan, faster={"decode": float("inf")})
    >>> free.wall_s < base.wall_s
    True

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
    .. [2] L. Kleinrock, *Queueing Systems, Volume 2*, Wiley, 1976 (processor sharing).
    """
    W = plan.workers if workers is None else int(workers)
    P = plan.prefetch if prefetch is None else int(prefetch)
    ncores = float(_cores_left(plan.cores, plan.background_cores) if cores is None else cores)
    pol = plan.policy if policy is None else policy
    faster = dict(faster or {})
    offload = dict(offload or {})
    if W < 0 or P < 1 or not ncores > 0 or pol not in POLICIES:
        raise ScenarioError(
            f"replay needs workers >= 0, prefetch >= 1, cores > 0 and a policy in {POLICIES}; "
            f"got workers={W}, prefetch={P}, cores={ncores}, policy={pol!r}"
        )
    loader = plan.loader.scaled(faster)
    consumer = plan.consumer.scaled(faster)
    if offload:
        names = list(loader.names)
        cols = [names.index(s) for s in offload]
        keep = [i for i in range(len(names)) if i not in cols]
        # the stage leaves the loader task and runs on the accelerator side, off the CPU
        extra = [
            (plan.loader.io_s[:, c] + plan.loader.cpu_s[:, c]) / (faster.get(s, 1.0) * offload[s])
            for s, c in zip(offload, cols, strict=True)
        ]
        loader = _Work(tuple(names[i] for i in keep), loader.io_s[:, keep], loader.cpu_s[:, keep])
        consumer = _Work(
            consumer.names + tuple(f"{s} (offloaded)" for s in offload),
            np.column_stack([consumer.io_s, *extra]),
            np.column_stack([consumer.cpu_s, np.zeros((plan.batches, len(extra)))]),
        )
    out = simulate(plan, loader, consumer, W, P, ncores, pol, in_order)
    out["config"] = {
        "workers": W, "prefetch": P, "cores": ncores, "policy": pol, "in_order": in_order,
        "faster": faster, "offload": offload, "epoch_barrier": plan.epoch_barrier,
    }
    return Replay(**out)
