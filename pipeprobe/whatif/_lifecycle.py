"""Loader workers' life cycle in the replay: what starting and stopping them costs, per epoch and per worker (private).

torch's ``DataLoader`` with workers starts them inside ``iter(loader)``
(one process after another) and, with ``persistent_workers=False`` (its
default), stops them when an epoch runs out, inside the ``next()`` that
ends it. A recording shows these costs only for the workers it had; a
replay with more or fewer workers must add or take them away. The steps:

1. :func:`measure_lifecycle`, from the recorded run (or, for a run that
   loaded in the training loop, from the worker starts the probe timed
   at close: the run header's ``worker_start``, :mod:`pipeprobe.record._workerstart`):

   * ``boot_s``: per worker, in the order the workers started, the time
     from the loop's first ask of an epoch to that worker's first span
     (the worker's own start, after its process was made);
   * ``stop_s``: the loop's time per worker stopped: the recorded run's
     time after its last step (the last epoch stops its workers there)
     over the workers, at most the loop's time per worker between epochs;
   * ``fork_s``: the loop's time per worker started: its time between two
     epochs beyond its ordinary time between two batches
     (:func:`between_epochs`), over the workers, less ``stop_s``. Workers
     that started once (persistent ones): the spacing of their starts, or,
     with one worker, the loop's time before its first ask, at most the
     worker's own start;
   * ``first_excess_s``: how much longer a worker's first task of an epoch
     took than the median task (cold caches, lazy imports);

2. :func:`with_lifecycle`: the plan for ``workers`` workers. Per worker
   more (or fewer) than recorded, the loop pays ``fork_s`` more at every
   epoch start and ``stop_s`` more at every epoch end (persistent workers:
   once at the start, and no stop inside the loop); worker ``k`` of an
   epoch that starts workers takes its first request ``boot_s[k]`` after
   the loop's first ask (:attr:`~pipeprobe.whatif.plan.ReplayPlan.epoch_worker_start_s`),
   less one ``fork_s`` per worker started after it (the loop makes the
   processes one after another before it asks, so an earlier worker has
   been starting that much longer); a worker the recording did not have
   boots like the last recorded one, and its first task takes
   ``first_excess_s`` longer;
3. :func:`without_restart_costs`: workers kept across epochs (persistent)
   pay no stop at the loop's end and no first-task excess after the first
   epoch (:func:`pipeprobe.whatif.restart.with_persistent_workers` takes
   away the waits between epochs).

The assumption behind step 2 (the processes are made one after another
in the loop, each then starts on its own) is how torch's loader starts
its workers (from its source: ``_MultiProcessingDataLoaderIter.__init__``
starts them in a loop); ``bench/real_restarts.py`` and
``tests/test_lifecycle.py`` check it on real runs.

References
----------
.. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001 (a changed model input).
.. [2] J. E. Kelley and M. R. Walker, 1959 (critical path method: the loop's start and stop costs lie on it).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace
from typing import TYPE_CHECKING, Any

import numpy as np

from ._recorded import Work
from ._replay_path import CONSUMER_OVERHEAD, WORKER_OVERHEAD

if TYPE_CHECKING:  # pragma: no cover
    from .plan import ReplayPlan

__all__ = ["WorkerLifecycle", "measure_lifecycle", "lifecycle_from_header", "with_lifecycle", "between_epochs",
           "without_restart_costs", "UNKNOWN_START_NOTE"]

#: The note a prediction carries when a run that loaded in the training loop is replayed with workers and
#: the probe had no worker start to time (an older run folder, or a loader that is no torch DataLoader).
UNKNOWN_START_NOTE = ("worker start-up cost unknown (the run loaded in the training loop and holds no timed "
                      "worker start): starting and stopping the workers is not in this prediction")


@dataclass(frozen=True)
class WorkerLifecycle:
    """What starting and stopping one loader worker costs, measured from one run.

    Attributes
    ----------
    known : bool
        The costs were measured (False: a run that loaded in the training
        loop without a timed worker start; the replay adds nothing).
    restarts : bool
        The recorded loader started new workers at every epoch.
    boot_s : tuple of float
        Per worker, in start order: the loop's first ask of an epoch to the
        worker's first span (mean over the epochs that started workers).
    epoch_boot_s : tuple of tuple of float
        The same per epoch that started workers (from the first epoch on).
    fork_s, stop_s : float
        The loop's time per worker started and per worker stopped.
    first_excess_s : float
        A worker's first task of an epoch beyond the median task.
    latency_s, handoff_s : float or None
        A batch's way from a worker to the loop, timed at close (None when
        not timed): the worker's collate end to the waiting loop holding
        it, and the loop's ``next()`` for a batch already there. A replay
        that moves the loading out of the loop into workers uses them.
    collate_s : float or None
        The collate in a worker, timed at close (it puts the batch in shared
        memory): such a replay's collate takes this long at least.
    source : str
        ``"recording"``, ``"timed at close"`` or ``"none"``.
    """

    known: bool
    restarts: bool
    boot_s: tuple[float, ...] = ()
    fork_s: float = 0.0
    stop_s: float = 0.0
    first_excess_s: float = 0.0
    source: str = "none"
    latency_s: float | None = None
    handoff_s: float | None = None
    collate_s: float | None = None
    epoch_boot_s: tuple[tuple[float, ...], ...] = ()

    def boots(self, workers: int, epoch: int | None = None) -> list[float]:
        """Per worker of ``workers``, in start order: the loop's first ask to its first task (step 2).

        ``epoch``: as that epoch's workers started (the mean over epochs
        when it started none or is not given).

        Examples
        --------
        >>> WorkerLifecycle(True, True, boot_s=(0.05,), fork_s=0.01).boots(3)
        [0.03, 0.04, 0.05]
        """
        row = self.epoch_boot_s[epoch] if epoch is not None and epoch < len(self.epoch_boot_s) else ()
        row = row or self.boot_s
        if not row or workers <= 0:
            return [0.0] * max(workers, 0)
        rec = list(row[:workers]) + [row[-1]] * max(0, workers - len(row))
        shift = [(workers - 1 - k) * self.fork_s if k >= len(row) - 1 else (workers - len(row))
                 * self.fork_s for k in range(workers)]
        return [round(max(0.0, b - s), 12) for b, s in zip(rec, shift, strict=True)]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict."""
        from .._jsonnum import json_ready

        return json_ready(asdict(self))


def between_epochs(plan: ReplayPlan) -> tuple[np.ndarray, np.ndarray, float]:
    """The last batch of each epoch but the last, the loop's extra time after it, and its ordinary time.

    The loop's time after a batch (its step and stages done, up to its next
    wait) is the plan's consumer overhead; its ordinary value is the median
    over the batches that do not end an epoch.

    Examples
    --------
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> plan = plan_from_durations([1] * 4, [1] * 4, epoch=[0, 0, 1, 1])
    >>> [x.tolist() for x in between_epochs(plan)[:2]]
    [[1], [0.0]]
    """
    ep = plan.epoch
    if plan.batches < 2 or CONSUMER_OVERHEAD not in plan.consumer.names:
        return np.zeros(0, np.int64), np.zeros(0), 0.0
    col = plan.consumer.names.index(CONSUMER_OVERHEAD)
    over = plan.consumer.io_s[:, col] + plan.consumer.cpu_s[:, col]
    ends = np.flatnonzero(ep[1:] != ep[:-1])
    inner = np.setdiff1d(np.arange(plan.batches - 1), ends)
    ordinary = float(np.median(over[inner])) if len(inner) else 0.0
    return ends, np.maximum(0.0, over[ends] - ordinary), ordinary


def measure_lifecycle(plan: ReplayPlan, first_s: np.ndarray, worker: np.ndarray, wait_start_s: np.ndarray,
                      restarts: bool) -> WorkerLifecycle:
    """Step 1: the costs of starting and stopping one worker, from a recorded run with workers.

    Parameters
    ----------
    plan : ReplayPlan
        The recorded run's plan (its epochs, consumer work, tail, workers).
    first_s, worker, wait_start_s : ndarray
        Per batch: start of its loader task, the worker that ran it (-1:
        none), the loop's first clock read of its wait.
    restarts : bool
        The loader started new workers at every epoch.

    Returns
    -------
    WorkerLifecycle
    """
    if plan.workers == 0 or not plan.batches:
        return WorkerLifecycle(known=False, restarts=False)
    W = plan.workers
    rows = _boots(plan, first_s, worker, wait_start_s, restarts)
    n = min((len(r) for r in rows if r), default=0)
    boot = tuple(float(np.mean([r[k] for r in rows if r])) for k in range(n))
    _, extra, _ = between_epochs(plan)
    if restarts and len(extra):
        between = float(np.mean(extra)) / W  # a stop and a start per worker
        stop = min(plan.tail_s / W, between)  # the loop may do more after its last step than stop workers
        fork = max(0.0, between - stop)
    else:
        stop, fork = 0.0, _fork_once(plan, boot)
    return WorkerLifecycle(known=True, restarts=restarts, boot_s=boot, fork_s=fork, stop_s=stop,
                           first_excess_s=_first_excess(plan, first_s, worker, restarts), source="recording",
                           epoch_boot_s=tuple(tuple(r) for r in rows))


def _fork_once(plan: ReplayPlan, boot: tuple[float, ...]) -> float:
    """Step 1c for workers started once: the spacing of their starts (the loop made them one after another),
    or with one worker the loop's time before its first ask, at most the worker's own start (the loop may
    do other work before ``iter()``)."""
    if len(boot) >= 2:
        return float(np.mean(np.diff(boot)))
    return min(plan.start_up_s, boot[0]) if boot else 0.0


def _epoch_index(plan: ReplayPlan) -> tuple[np.ndarray, np.ndarray]:
    """Per batch: its epoch's number from 0, and its position in the epoch."""
    first = np.r_[True, plan.epoch[1:] != plan.epoch[:-1]]
    e = np.cumsum(first) - 1
    return e, np.arange(plan.batches) - np.maximum.accumulate(np.where(first, np.arange(plan.batches), 0))


def _first_of_each_worker(plan: ReplayPlan, first_s: np.ndarray, worker: np.ndarray,
                          restarts: bool) -> np.ndarray:
    """Indices of each worker's first task in each epoch that started workers (every epoch with restarts,
    else the first), in epoch order, then by start time (one sort, not a loop over epochs and workers)."""
    e, _ = _epoch_index(plan)
    ok = np.flatnonzero((worker >= 0) & np.isfinite(first_s) & ((e == 0) | restarts))
    if not len(ok):
        return ok
    order = ok[np.lexsort((first_s[ok], worker[ok], e[ok]))]
    key = e[order] * (int(worker.max()) + 1) + worker[order]
    firsts = order[np.r_[True, key[1:] != key[:-1]]]
    return firsts[np.lexsort((first_s[firsts], e[firsts]))]


def _boots(plan: ReplayPlan, first_s: np.ndarray, worker: np.ndarray, wait_start_s: np.ndarray,
           restarts: bool) -> list[list[float]]:
    """Step 1a: per epoch that started workers, per worker in start order, its first span after the first ask."""
    e, pos = _epoch_index(plan)
    firsts = _first_of_each_worker(plan, first_s, worker, restarts)
    ask = wait_start_s[np.flatnonzero(pos == 0)]  # the loop's first ask of each epoch
    after = np.maximum(0.0, first_s[firsts] - ask[e[firsts]])
    rows: list[list[float]] = [[] for _ in range(len(ask) if restarts else 1)]
    for ep, x in zip(e[firsts].tolist(), after.tolist(), strict=True):
        rows[ep].append(x)  # an epoch whose tasks no worker ran keeps an empty row
    return rows


def _first_excess(plan: ReplayPlan, first_s: np.ndarray, worker: np.ndarray, restarts: bool) -> float:
    """Step 1d: a worker's first task of a starting epoch beyond the median task (0 when none is longer)."""
    task = plan.loader.io_s.sum(1) + plan.loader.cpu_s.sum(1)
    is_first = np.zeros(plan.batches, bool)
    is_first[_first_of_each_worker(plan, first_s, worker, restarts)] = True
    if not is_first.any() or is_first.all():
        return 0.0
    return float(np.mean(np.maximum(0.0, task[is_first] - np.median(task[~is_first]))))


def lifecycle_from_header(header: Any, plan: ReplayPlan) -> WorkerLifecycle:
    """Step 1 for a run that loaded in the training loop: the worker starts timed at close, if any.

    The header's ``worker_start`` holds the median of the timed starts of a
    one-worker copy of the loader: ``iter_s`` (making the worker),
    ``first_batch_s`` (the first ``next()``: the worker's start and its
    first batch) and ``stop_s`` (stopping it). The worker's start is the
    first batch less the median batch the run loaded in the loop, less the
    batch's way to the loop when that was timed too (``collate_s``,
    ``latency_s``, ``handoff_s``; :mod:`pipeprobe.record._workerstart`).

    Examples
    --------
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> plan = plan_from_durations([0.01] * 4, [0.01] * 4, workers=0)
    >>> h = {"worker_start": {"starts": 3, "iter_s": 0.02, "first_batch_s": 0.06, "stop_s": 0.015}}
    >>> lc = lifecycle_from_header(h, plan)
    >>> lc.boot_s, lc.fork_s, lc.stop_s, lc.latency_s
    ((0.05,), 0.02, 0.015, None)
    >>> h["worker_start"].update(latency_s=0.004, handoff_s=0.001, collate_s=0.002)
    >>> lifecycle_from_header(h, plan).boot_s
    (0.046,)
    """
    ws = header.get("worker_start") if hasattr(header, "get") else None
    got = [_seconds(ws, k) for k in ("iter_s", "first_batch_s", "stop_s")] if isinstance(ws, dict) else [None]
    if None in got:  # missing (an older run folder) or not numbers in range: taken as unknown
        return WorkerLifecycle(known=False, restarts=True)
    fork, first, stop = got
    task = float(np.median(plan.loader.io_s.sum(1) + plan.loader.cpu_s.sum(1))) if plan.batches else 0.0
    way = {k: _seconds(ws, k) for k in ("latency_s", "handoff_s", "collate_s")}
    boot = max(0.0, first - task - (way["latency_s"] or 0.0))
    return WorkerLifecycle(known=True, restarts=True, boot_s=(round(boot, 12),), fork_s=fork, stop_s=stop,
                           source="timed at close", **way)


#: Longest time a header's ``worker_start`` may give (seconds): beyond it the field is not taken as data.
MAX_START_S = 3600.0


def _seconds(fields: dict[str, Any], key: str) -> float | None:
    """``fields[key]`` as seconds from 0 to :data:`MAX_START_S`, or None (the wrong type or out of range)."""
    x = fields.get(key)
    if isinstance(x, bool) or not isinstance(x, (int, float)) or not 0.0 <= x <= MAX_START_S:
        return None
    return float(x)


def with_lifecycle(plan: ReplayPlan, workers: int) -> ReplayPlan:
    """Step 2: ``plan`` replayed with ``workers`` workers, their start and stop costs as the recording shows them.

    The plan unchanged when the costs are unknown; with the recorded
    count of workers only their recorded starts (one per worker) change. Epochs start workers when the recorded loader restarted
    them and the plan does not keep them (:attr:`ReplayPlan.workers_kept`).

    Examples
    --------
    A 2-epoch run recorded with 1 worker that boots in 50 ms; the loop
    takes 10 ms per worker made and 20 ms per worker stopped. With 2
    workers the loop pays one more of each at each epoch (and the last
    stop); the first worker made boots 10 ms sooner after the ask:

    >>> from dataclasses import replace
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> plan = plan_from_durations([0.1] * 4, [0.1] * 4, epoch=[0, 0, 1, 1], workers=1)
    >>> lc = WorkerLifecycle(True, True, boot_s=(0.05,), fork_s=0.01, stop_s=0.02)
    >>> two = with_lifecycle(replace(plan, lifecycle=lc), 2)
    >>> round(two.start_up_s, 6), round(two.tail_s, 6), two.epoch_worker_start_s.tolist()
    (0.01, 0.02, [[0.04, 0.05], [0.04, 0.05]])

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
    """
    lc = plan.lifecycle
    if lc is None or not lc.known or not plan.batches or (workers == plan.workers and workers < 2):
        return plan
    dw = workers - plan.workers
    restarting = lc.restarts and not plan.workers_kept
    e, pos = _epoch_index(plan)
    epochs = int(e[-1]) + 1
    start = np.zeros((epochs, max(workers, 1)))
    if workers:
        start[:] = plan.epoch_dispatch_s[:epochs, None]
        for ep in range(epochs if restarting else 1):
            start[ep] = lc.boots(workers, ep)
    consumer = _loop_costs(plan, dw * (lc.fork_s + lc.stop_s) if restarting else 0.0)
    starting = np.isin(e, np.arange(epochs) if restarting else [0])
    lo, hi = sorted((plan.workers, workers))
    way = _way_to_the_loop(plan, lc) if plan.workers == 0 and workers > 0 else {}
    loader = _first_tasks(way.pop("loader", plan.loader), starting & (pos >= lo) & (pos < hi),
                          np.sign(dw) * lc.first_excess_s)
    return replace(plan, consumer=consumer, loader=loader, **way,
                   start_up_s=max(0.0, plan.start_up_s + dw * lc.fork_s),
                   tail_s=max(0.0, plan.tail_s + (dw * lc.stop_s if restarting else 0.0)),
                   epoch_worker_start_s=start if workers else None)


def _way_to_the_loop(plan: ReplayPlan, lc: WorkerLifecycle) -> dict[str, Any]:
    """What a loading moved from the loop into workers pays per batch on its way back, as timed at close:
    the plan's ``latency_s`` and ``handoff_s``, and the loader's ``collate`` at least the worker's (CPU)."""
    way: dict[str, Any] = {k: v for k, v in (("latency_s", lc.latency_s), ("handoff_s", lc.handoff_s))
                           if v is not None}
    ld = plan.loader
    if lc.collate_s is not None and "collate" in ld.names:
        col = ld.names.index("collate")
        cpu = ld.cpu_s.copy()
        cpu[:, col] += np.maximum(0.0, lc.collate_s - (ld.io_s[:, col] + cpu[:, col]))
        way["loader"] = Work(ld.names, ld.io_s, cpu)
    return way


def _loop_costs(plan: ReplayPlan, extra_s: float) -> Work:
    """The consumer's work with ``extra_s`` more loop time after the last batch of each epoch but the last."""
    ends, _, _ = between_epochs(plan)
    c = plan.consumer
    if not extra_s or not len(ends):
        return c
    col = c.names.index(CONSUMER_OVERHEAD)
    io = c.io_s.copy()
    total = io[ends, col] + c.cpu_s[ends, col]
    io[ends, col] = np.maximum(0.0, total + extra_s) - c.cpu_s[ends, col]
    cpu = c.cpu_s.copy()
    short = io[ends, col] < 0  # fewer workers than recorded: the loop's CPU time there shrinks too
    cpu[ends[short], col] += io[ends[short], col]
    io[ends[short], col] = 0.0
    return Work(c.names, io, cpu)


def without_restart_costs(plan: ReplayPlan) -> ReplayPlan:
    """Step 3: ``plan`` with no workers stopped at the loop's end and warm first tasks after the first epoch.

    Unchanged when the recorded loader kept its workers or the costs are unknown.

    Examples
    --------
    >>> from dataclasses import replace
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> plan = plan_from_durations([0.03, 0.02, 0.03, 0.02], [0.01] * 4, epoch=[0, 0, 1, 1], workers=1)
    >>> lc = WorkerLifecycle(True, True, boot_s=(0.05,), stop_s=0.004, first_excess_s=0.01)
    >>> kept = without_restart_costs(replace(plan, lifecycle=lc, tail_s=0.004))
    >>> kept.tail_s, kept.loader.io_s.sum(1).round(6).tolist()
    (0.0, [0.03, 0.02, 0.02, 0.02])
    """
    lc = plan.lifecycle
    if lc is None or not lc.known or not lc.restarts or not plan.workers or not plan.batches:
        return plan
    e, pos = _epoch_index(plan)
    return replace(plan, tail_s=max(0.0, plan.tail_s - plan.workers * lc.stop_s),
                   loader=_first_tasks(plan.loader, (e > 0) & (pos < plan.workers), -lc.first_excess_s))


def _first_tasks(loader: Work, first: np.ndarray, excess_s: float) -> Work:
    """``loader`` with ``excess_s`` more (a worker's cold first task) or less (a warm one) in the tasks ``first``.

    More goes to the worker's own time; less shrinks every stage of the task alike.
    """
    if not excess_s or not first.any():
        return loader
    if excess_s > 0:
        io = loader.io_s.copy()
        io[first, loader.names.index(WORKER_OVERHEAD)] += excess_s
        return Work(loader.names, io, loader.cpu_s)
    task = loader.io_s.sum(1) + loader.cpu_s.sum(1)
    with np.errstate(invalid="ignore", divide="ignore"):
        keep = np.where(first & (task > 0), np.maximum(0.0, task + excess_s) / task, 1.0)
    return Work(loader.names, loader.io_s * keep[:, None], loader.cpu_s * keep[:, None])
