"""The replay plan: what a recorded run did per batch, in a form the event engine replays.

:func:`build_plan` turns a loaded :class:`~pipeprobe.load.Run` into a
:class:`ReplayPlan`: per batch, the work its loader task did (per stage,
split into CPU time and time spent off the CPU) and the work the consumer
did with it (the training step, consumer-side stages, loop overhead), plus
a few constants of the loader measured from the trace (how long an idle
worker takes to pick up a request, the gap between two tasks of a busy
worker, how long a finished batch takes to reach the consumer). Its steps,
each a function of :mod:`pipeprobe.whatif._recorded` returning a small
frozen record:

1. ``consumer_batches``: the batches of one rank, in the consumer's order;
2. ``user_spans``: the stage spans of those batches, each placed on the
   loader side or the consumer side;
3. ``loader_tasks`` and ``consumer_work``: per batch and stage, wall and
   CPU seconds; ``batch_workers``: which worker ran each batch;
4. ``without_contention``: the CPU contention of the recorded run taken
   out (:mod:`pipeprobe.whatif._contention`);
5. ``loader_config`` and ``loader_times``: the recorded workers,
   prefetch depth, policy and epoch barrier, and the loader's constants;
6. what starting and stopping one loader worker cost
   (:func:`pipeprobe.whatif._lifecycle.measure_lifecycle`).

:func:`pipeprobe.whatif.engine.replay` runs the plan through a
discrete-event model of the pipeline:

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
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any, Iterable, Mapping

import numpy as np

from ..analysis import workers_restarted
from ..errors import ScenarioError
from ..nesting import own_label
from ..threads import check_threads
from ..tracefile import usable_core_ids, usable_cores
from ._contention import background_cores, cores_left
from ._lifecycle import WorkerLifecycle, lifecycle_from_header, measure_lifecycle
from ._loader import POLICIES
from ._recorded import (
    PoolSpin,
    Work,
    batch_workers,
    consumer_batches,
    consumer_work,
    loader_config,
    loader_tasks,
    loader_times,
    user_spans,
    without_contention,
)
from ._replay_path import CONSUMER_OVERHEAD, PSEUDO_STAGES, WORKER_OVERHEAD
from .limits import MAX_PREFETCH, MAX_WORKERS, check_count

if TYPE_CHECKING:  # pragma: no cover
    from ..load import Run

__all__ = ["Work", "ReplayPlan", "build_plan", "plan_from_durations", "POLICIES", "PSEUDO_STAGES"]


@dataclass(frozen=True)
class ReplayPlan:
    """Everything :func:`~pipeprobe.whatif.engine.replay` needs, taken from one recorded run.

    Attributes
    ----------
    batch_id : ndarray
        Batch ids in consumer order.
    epoch : ndarray
        Epoch of each batch.
    loader : Work
        Loader task of each batch, per loader stage (plus worker overhead).
    consumer : Work
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
    prefetch_inferred : bool
        The recorded prefetch depth was inferred from the trace (not given).
    folded_stages : tuple of str
        Stage names replayed together as ``"(other stages)"`` (a side had
        more than :data:`~pipeprobe.whatif.limits.MAX_PLAN_STAGES` of them).
    inside : dict of str to tuple of str
        Per stage that had stages recorded inside it: the columns its time
        was replayed as (its own time, :func:`pipeprobe.nesting.own_label`,
        and the stages inside it). Columns hold each instant once: the
        innermost stage running (:func:`pipeprobe.nesting.span_pieces`).
    step_width : float
        Threads the consumer's work runs on in the replay: the cores the
        step used with idle workers, at most its pools' threads (1 when the
        run has no thread facts; see :mod:`pipeprobe.threads`).
    threads : ThreadCheck or None
        The run's thread check (None for a plan not built from a run).
    step_lockstep : float
        How much slower the consumer's work progresses whenever the cores
        are oversubscribed, beyond processor sharing (1: not at all; the
        high end of a prediction's range sets it, see
        :mod:`pipeprobe.whatif._threadrange`).
    step_together : float
        Threads of the step's pool that progress only while all of them
        hold a core (co-scheduling, Ousterhout 1982;
        :func:`pipeprobe.whatif._cores.lockstep_speed`): ``step_width``
        for a pool whose threads spin
        (:attr:`pipeprobe.threads.ThreadCheck.spins`), else 1.
    lifecycle : WorkerLifecycle or None
        What starting and stopping one loader worker cost in the run
        (:mod:`pipeprobe.whatif._lifecycle`); a replay with another worker
        count adds or takes away those costs. None: not measured.
    workers_kept : bool
        The replay keeps the workers across epochs (persistent workers).
    epoch_worker_start_s : ndarray or None
        Per epoch and worker (in start order): the loop's first ask to the
        worker's first task, when a replay of another worker count set it;
        None: every first request of an epoch waits ``epoch_dispatch_s``.
    spin_s : float
        CPU seconds each of the step pool's other threads runs on after a
        step (:attr:`pipeprobe.threads.ThreadCheck.spin_s`); the replay
        runs them beside the loop until the next step starts or the time
        is spent (0: they sleep at once).
    spin_threads : float
        Threads that spin after a step (the step's pool less the loop's own).
    """

    batch_id: np.ndarray
    epoch: np.ndarray
    loader: Work
    consumer: Work
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
    prefetch_inferred: bool = False
    folded_stages: tuple[str, ...] = ()
    inside: Mapping[str, tuple[str, ...]] = field(default_factory=dict)
    step_width: float = 1.0
    threads: Any = None
    step_lockstep: float = 1.0
    step_together: float = 1.0
    lifecycle: Any = None
    workers_kept: bool = False
    epoch_worker_start_s: np.ndarray | None = None
    spin_s: float = 0.0
    spin_threads: float = 1.0

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

    @property
    def stage_names(self) -> list[str]:
        """Every stage a scenario can name: the columns (loader side first) and the stages with stages inside."""
        cols = self.loader_stages + [s for s in self.consumer_stages if s not in self.loader_stages]
        stage_of_own = {own_label(s): s for s in self.inside}
        # a stage with stages inside comes where its own time does, just before it
        return list(dict.fromkeys([x for c in cols for x in (stage_of_own.get(c), c) if x] + list(self.inside)))

    def columns_of(self, stage: str) -> tuple[str, ...]:
        """The columns holding ``stage``'s time: its own and those of the stages recorded inside it.

        Examples
        --------
        >>> plan = plan_from_durations([0.03] * 2, [0.01] * 2)
        >>> plan.columns_of("task")
        ('task',)
        """
        return tuple(self.inside.get(stage, (stage,)))

    def column_factors(self, factors: Mapping[str, float]) -> dict[str, float]:
        """Per column, how much faster it runs when the named stages get ``factors``.

        A stage's factor applies to its own time and to every stage recorded
        inside it (making ``fetch`` twice as fast halves what runs in it);
        factors of a stage and of one inside it multiply.
        """
        out: dict[str, float] = {}
        for stage, k in factors.items():
            for col in self.columns_of(stage):
                out[col] = out.get(col, 1.0) * k
        return out

    @property
    def cores_left(self) -> float:
        """Cores the replay gives the run by default: the machine's less what other processes used."""
        return cores_left(self.cores, self.background_cores)


def build_plan(
    run: Run,
    *,
    workers: int | None = None,
    prefetch: int | None = None,
    policy: str | None = None,
    rank: int | None = None,
    keep_stages: Iterable[str] = (),
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
    keep_stages : iterable of str, optional
        Stages to keep as their own column when a side has more than
        :data:`~pipeprobe.whatif.limits.MAX_PLAN_STAGES` stage names (the
        ones with the least time are then replayed together as one).

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
    >>> from pipeprobe.whatif.plan import build_plan
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
    workers, prefetch = _check_plan_arguments(workers, prefetch, policy)
    keep = frozenset(keep_stages)
    batches = consumer_batches(run, rank)
    spans = user_spans(run, batches)
    loader = loader_tasks(spans, batches, keep)
    by_worker = batch_workers(spans, loader)
    consumer = consumer_work(spans, batches, keep)
    cores = usable_cores(run.header)
    background = (background_cores(run.resources, batches.rank, cores, run.spans, usable_core_ids(run.header))
                  if spans.cpu_known else 0.0)
    threads = check_threads(run, background)
    spin = PoolSpin(threads.spin_s if threads.spins else 0.0, max(1.0, threads.step_threads - 1.0))
    together = threads.step_width if threads.spins else 1.0  # spinning threads need their partners on a core
    loader_side, consumer_side = without_contention(loader, consumer, batches, cores_left(cores, background),
                                                    threads.step_width, spin, together)
    config = loader_config(batches, loader, by_worker, workers, prefetch, policy)
    times = loader_times(batches, loader, by_worker, config)
    plan = ReplayPlan(
        batch_id=batches.batch_id, epoch=batches.epoch, loader=loader_side, consumer=consumer_side,
        start_up_s=float(batches.wait_start_s[0]),
        tail_s=max(0.0, float(run.wall_s) - float(consumer.end_s[-1])),
        handoff_s=times.handoff_s, latency_s=times.latency_s, dispatch_s=times.dispatch_s,
        worker_gap_s=times.worker_gap_s, epoch_dispatch_s=times.epoch_dispatch_s,
        workers=config.workers, prefetch=config.prefetch, cores=cores, policy=config.policy,
        epoch_barrier=config.barrier, measured_wall_s=float(run.wall_s),
        measured_stall_s=float(batches.wait_s.sum()), spans=spans.spans,
        notes=[*batches.notes, *spans.notes, *loader.notes, *consumer.seconds.notes, *by_worker.notes,
               *config.notes],
        background_cores=background, prefetch_inferred=config.prefetch_inferred,
        folded_stages=loader.seconds.folded + consumer.seconds.folded, inside=spans.inside,
        step_width=threads.step_width, threads=threads, spin_s=spin.cpu_s, spin_threads=spin.threads,
        step_together=together,
    )
    return replace(plan, lifecycle=_lifecycle_of(run, plan, loader.first_s, by_worker.worker, batches.wait_start_s))


def _lifecycle_of(run: Run, plan: ReplayPlan, first_s: np.ndarray, worker: np.ndarray,
                  wait_start_s: np.ndarray) -> WorkerLifecycle:
    """Step 6: what starting and stopping a worker cost (the run header's timed starts for a run without workers)."""
    if plan.workers == 0:
        return lifecycle_from_header(run.header, plan)
    return measure_lifecycle(plan, first_s, worker, wait_start_s, workers_restarted(run))


def _check_plan_arguments(workers: Any, prefetch: Any, policy: Any) -> tuple[int | None, int | None]:
    """The recorded settings a caller gave, checked before anything uses them: ``(workers, prefetch)``."""
    if policy is not None and policy not in POLICIES:
        raise ScenarioError(f"policy must be one of {', '.join(POLICIES)}, got {policy!r}")
    return (check_count("recorded_workers", workers, 0, MAX_WORKERS),
            check_count("recorded_prefetch", prefetch, 1, MAX_PREFETCH))


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
    >>> from pipeprobe.whatif.engine import replay
    >>> plan = plan_from_durations([0.03] * 10, [0.01] * 10, workers=3, prefetch=3, cores=4)
    >>> round(replay(plan).wall_s, 3)
    0.13

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
    """
    _check_plan_arguments(workers, prefetch, policy)
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
        loader=Work(names + (WORKER_OVERHEAD,), np.column_stack([dur - cpu, np.zeros(nb)]),
                    np.column_stack([cpu, np.zeros(nb)])),
        consumer=Work(("step", CONSUMER_OVERHEAD), np.column_stack([step - scpu, np.zeros(nb)]),
                      np.column_stack([scpu, np.zeros(nb)])),
        start_up_s=0.0, tail_s=0.0, handoff_s=0.0, latency_s=0.0, dispatch_s=0.0, worker_gap_s=0.0,
        epoch_dispatch_s=np.zeros(n_ep), workers=workers, prefetch=prefetch, cores=cores, policy=policy,
        epoch_barrier=epoch_barrier, measured_wall_s=float("nan"), measured_stall_s=float("nan"), spans=0,
    )
