"""The event engine of the what-if replay: a discrete-event model of a loader and its consumer.

:func:`simulate` runs a :class:`~pipeprobe.whatif.plan.ReplayPlan`'s
per-batch work through loader workers, a bounded prefetch, the consumer
and shared cores, under the :class:`Settings` a scenario resolved to (see
:mod:`pipeprobe.whatif.plan` for the model). The parts:

* :class:`EventQueue`: the future events, ``schedule(time, handler, arg)``
  is one ``heappush``; equal times keep the order they were scheduled in;
* one handler per event kind on :class:`_Replayer`: the consumer is ready
  for its next batch (``_on_resume``), a request reaches the workers
  (``_on_dispatchable``), a worker is free (``_on_worker_ready``), a new
  worker process is ready (``_on_worker_started``), a
  finished batch reaches the consumer (``_on_available``), the consumer
  takes a batch (``_on_handoff``), and a task ends on the CPU
  (``_on_task_finished``, from :class:`~pipeprobe.whatif._cores.CpuShare`,
  whose finish times move as tasks start and stop);
* the loader policy (:mod:`pipeprobe.whatif._loader`) and the consumer's
  state (:class:`ConsumerState`);
* :class:`BatchLog`: what happened to each batch, from which
  :mod:`pipeprobe.whatif._replay_path` walks the replayed critical path.

References
----------
.. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001 (event scheduling).
.. [2] L. Kleinrock, *Queueing Systems, Volume 2*, Wiley, 1976, ch. 4 (processor sharing).
"""

from __future__ import annotations

import enum
import heapq
import itertools
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable, Mapping

import numpy as np

from ..errors import ScenarioError
from ._cores import CpuShare
from ._lifecycle import with_lifecycle
from ._loader import make_policy
from ._replay_path import critical_path
from .scenario import Scenario

if TYPE_CHECKING:  # pragma: no cover
    from .plan import ReplayPlan, Work

__all__ = ["Replay", "replay", "Settings", "ConsumerState", "EventQueue", "BatchLog", "simulate"]


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
        (user stages, ``step`` and the pseudo stages in
        :data:`~pipeprobe.whatif.plan.PSEUDO_STAGES`).
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


def replay(
    plan: ReplayPlan,
    scenario: Scenario | None = None,
    *,
    workers: int | None = None,
    prefetch: int | None = None,
    cores: float | None = None,
    policy: str | None = None,
    in_order: bool = True,
    faster: Mapping[str, float] | None = None,
    offload: Mapping[str, float] | None = None,
) -> Replay:
    """Replay ``plan`` under a scenario; what it leaves out keeps the recorded value.

    Parameters
    ----------
    plan : ReplayPlan
        From :func:`~pipeprobe.whatif.plan.build_plan`.
    scenario : Scenario, optional
        The changes, as one object; or give them as the keywords below
        (the fields of :class:`~pipeprobe.whatif.scenario.Scenario`), not both.
    workers, prefetch, cores, policy, in_order, faster, offload
        See :class:`~pipeprobe.whatif.scenario.Scenario`. Stage names are
        not checked against the plan here (see :func:`pipeprobe.whatif`).

    Returns
    -------
    Replay

    Raises
    ------
    ScenarioError
        A value out of range, or both a scenario and keywords.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe.whatif.plan import build_plan
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=4, decode_ms=6, step_ms=2)
    >>> plan = build_plan(pipeprobe.load(d))
    >>> base, free = replay(plan), replay(plan, faster={"decode": float("inf")})
    >>> round(base.wall_s, 6), round(free.wall_s, 6)
    (0.032, 0.008)

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
    .. [2] L. Kleinrock, *Queueing Systems, Volume 2*, Wiley, 1976 (processor sharing).
    """
    changes = Scenario(faster=faster or {}, offload=offload or {}, workers=workers, prefetch=prefetch, cores=cores,
                       policy=policy, in_order=in_order)
    if scenario is None:
        scenario = changes
    elif changes != Scenario():
        raise ScenarioError("give replay() a Scenario or its fields as keywords, not both")
    settings = scenario.settings(plan)
    plan = with_lifecycle(plan, settings.workers)
    loader, consumer = scenario.work(plan)
    out = simulate(plan, loader, consumer, settings)
    config = {"workers": settings.workers, "prefetch": settings.prefetch, "cores": settings.cores,
              "policy": settings.policy, "in_order": settings.in_order, "faster": dict(scenario.faster),
              "offload": dict(scenario.offload), "epoch_barrier": plan.epoch_barrier}
    return Replay(**out, config=config)


@dataclass(frozen=True)
class Settings:
    """The configuration one replay runs: every value concrete (a scenario resolved against a plan).

    Attributes
    ----------
    workers : int
        Loader workers; 0 loads in the consumer when it asks for a batch.
    prefetch : int
        Most batches requested and not yet taken by the consumer.
    cores : float
        CPU cores the tasks share (``math.inf``: no contention).
    policy : str
        ``"round-robin"`` or ``"first-free"``.
    in_order : bool
        The consumer takes batches in order.
    """

    workers: int
    prefetch: int
    cores: float
    policy: str
    in_order: bool


class ConsumerState(enum.Enum):
    """What the training loop is doing between events."""

    BUSY = "working on a batch or taking one"
    WAITING_FOR_BATCH = "waiting for the next batch in order"
    WAITING_FOR_ANY = "waiting for whichever batch is ready first"
    LOADING = "loading its batch itself (no workers)"


# The members as module names: an enum member lookup costs several times a global one, and the
# handlers test the state at every event (hoisted for speed).
_BUSY = ConsumerState.BUSY
_WAITING_FOR_BATCH = ConsumerState.WAITING_FOR_BATCH
_WAITING_FOR_ANY = ConsumerState.WAITING_FOR_ANY
_LOADING = ConsumerState.LOADING


class EventQueue:
    """Future events in time order: ``(time, seq, handler, arg)`` on a heap.

    Examples
    --------
    >>> q, seen = EventQueue(), []
    >>> q.schedule(2.0, lambda t, x: seen.append((t, x)), "b")
    >>> q.schedule(1.0, lambda t, x: seen.append((t, x)), "a")
    >>> q.run_next() or q.run_next() or seen
    [(1.0, 'a'), (2.0, 'b')]
    """

    __slots__ = ("_heap", "_seq")

    def __init__(self) -> None:
        self._heap: list[tuple[float, int, Callable[..., None], int]] = []
        self._seq = itertools.count()  # ties in time go in the order they were scheduled

    def schedule(self, time: float, handler: Callable[..., None], arg: Any) -> None:
        """Call ``handler(time, arg)`` at ``time``, after the events already scheduled for that time."""
        heapq.heappush(self._heap, (time, next(self._seq), handler, arg))

    def next_time(self) -> float:
        """Time of the next event (``inf`` when none is left)."""
        return self._heap[0][0] if self._heap else math.inf

    def run_next(self) -> None:
        """Take the next event off the queue and run its handler."""
        time, _, handler, arg = heapq.heappop(self._heap)
        handler(time, arg)


class BatchLog:
    """Per batch (indexed like ``plan.batch_id``): its times, and which event set each of them.

    The links (``started_by_worker``, ``previous_on_worker``,
    ``requested_after``, ``requested_at_wait``, ``ready_by_batch``) let the
    critical-path walk go back from any time to the event that set it.
    """

    __slots__ = ("request_s", "start_s", "end_s", "available_s", "wait_start_s", "ready_s", "done_s", "worker",
                 "started_by_worker", "previous_on_worker", "requested_after", "requested_at_wait",
                 "ready_by_batch", "taken_order")

    def __init__(self, batches: int) -> None:
        nan = math.nan
        self.request_s = [nan] * batches
        self.start_s = [nan] * batches
        self.end_s = [nan] * batches
        self.available_s = [nan] * batches
        self.wait_start_s = [nan] * batches  # the consumer began to wait for this batch
        self.ready_s = [nan] * batches
        self.done_s = [nan] * batches
        self.worker = [-1] * batches
        #: the task started when its worker freed up (else: when its request arrived)
        self.started_by_worker = [False] * batches
        self.previous_on_worker = [-1] * batches
        #: the request went out when the consumer took this batch (-1: at an epoch start) ...
        self.requested_after = [-1] * batches
        #: ... or at the consumer's wait for this consumed position
        self.requested_at_wait = [-1] * batches
        #: the consumer took the batch the moment it arrived (else the consumer set the time)
        self.ready_by_batch = [False] * batches
        self.taken_order: list[int] = []

    def arrays(self) -> dict[str, np.ndarray]:
        """The seven per-batch times as float arrays."""
        names = ("request_s", "start_s", "end_s", "available_s", "wait_start_s", "ready_s", "done_s")
        return {k: np.array(getattr(self, k), float) for k in names}


def _nominal(work: Work) -> tuple[list[float], list[float]]:
    """Per batch: contention-free seconds of the work, and the share of a core it wants."""
    io = work.io_s.sum(1)
    cpu = work.cpu_s.sum(1)
    with np.errstate(invalid="ignore", divide="ignore"):
        u = np.where(io + cpu > 0, cpu / (io + cpu), 0.0)
    return (io + cpu).tolist(), u.tolist()


class _Replayer:
    """One replay: the state of the loader, the consumer and the cores, and a handler per event kind."""

    __slots__ = ("plan", "n", "workers", "prefetch", "in_order", "barrier", "loader_work", "consumer_work",
                 "task_s", "task_u", "work_s", "work_u", "epoch_first", "epoch_list", "epoch_index", "epoch_stop",
                 "epoch_dispatch", "worker_start", "ready_pending", "ready_skip", "handoff", "latency", "worker_gap", "dispatch",
                 "policy", "queue", "cpu", "log", "consumer", "state", "waiting_for", "wait_began", "ready_pool", "next_request", "last_task_of",
                 "finished_at", "step_width", "spin", "spin_s", "spin_threads")

    def __init__(self, plan: ReplayPlan, loader: Work, consumer: Work, settings: Settings) -> None:
        self.plan = plan
        self.n = nb = plan.batches
        self.workers = W = settings.workers
        self.prefetch = settings.prefetch
        self.in_order = settings.in_order
        self.barrier = plan.epoch_barrier
        self.loader_work, self.consumer_work = loader, consumer
        self.task_s, self.task_u = _nominal(loader)
        self.work_s, self.work_u = _nominal(consumer)
        epoch = plan.epoch
        first = np.r_[True, epoch[1:] != epoch[:-1]] if nb else np.zeros(0, bool)
        starts = np.flatnonzero(first)
        self.epoch_first = first.tolist()
        self.epoch_list = epoch.tolist()
        self.epoch_index = (np.cumsum(first) - 1).tolist()
        self.epoch_stop = np.repeat(np.r_[starts[1:], nb], np.diff(np.r_[starts, nb])).tolist()
        index = np.arange(nb) - np.maximum.accumulate(np.where(first, np.arange(nb), 0)) if self.barrier \
            else np.arange(nb)
        self.epoch_dispatch = plan.epoch_dispatch_s.tolist()
        # per epoch and worker: the first ask to the worker's first task (new worker processes; a barrier only)
        ws = plan.epoch_worker_start_s
        self.worker_start = ws.tolist() if ws is not None and W and self.barrier else None
        # per worker: its "free again" events still in the queue, and how many of them a restart made stale
        self.ready_pending = [0] * max(W, 1)
        self.ready_skip = [0] * max(W, 1)
        self.handoff = plan.handoff_s if W else 0.0
        self.latency = plan.latency_s if W else 0.0
        self.worker_gap, self.dispatch = plan.worker_gap_s, plan.dispatch_s
        self.policy = make_policy(settings.policy, W, index.tolist())
        self.queue = EventQueue()
        # the consumer's work runs on the step's threads (the cores it used alone; see pipeprobe.threads)
        self.step_width = plan.step_width
        # the step pool's other threads spin on after each step (an entity of their own on the cores)
        self.spin, self.spin_s, self.spin_threads = W + 1, plan.spin_s, plan.spin_threads
        spinning = plan.spin_threads if plan.spin_s > 0 else 0.0
        self.cpu = CpuShare(settings.cores, W + 1, extra_threads=plan.step_width - 1.0 + spinning)
        if plan.step_lockstep > 1.0:
            self.cpu.lockstep[W] = plan.step_lockstep
        if plan.step_together > 1.0:
            self.cpu.together[W] = plan.step_together
        self.log = BatchLog(nb)
        self.consumer = W  # the consumer's entity on the cores; workers are 0 .. W - 1
        self.state = _BUSY
        self.waiting_for = -1  # batch the consumer waits for, in order
        self.wait_began = 0.0  # when the consumer began waiting for any batch
        self.ready_pool: list[tuple[float, int]] = []  # out of order: available, not taken
        self.next_request = 0
        self.last_task_of = [-1] * max(W, 1)
        self.finished_at = plan.start_up_s

    def run(self) -> dict[str, Any]:
        """Replay to the end; the fields of :class:`Replay` but ``config``."""
        self.queue.schedule(self.plan.start_up_s, self._on_resume, 0)
        # Inlined for speed (this loop turns a few times per batch): EventQueue.next_time and run_next,
        # and CpuShare.next_finish, reading the heap and the finish times directly.
        heap, finish, pop, inf = self.queue._heap, self.cpu.finish, heapq.heappop, math.inf
        on_task_finished = self._on_task_finished
        while True:
            t_event = heap[0][0] if heap else inf
            if finish:
                entity = min(finish, key=finish.__getitem__)
                t_cpu = finish[entity]
                if t_cpu <= t_event:  # a task ending on the CPU goes before an event at the same time
                    if t_cpu == inf:
                        break
                    on_task_finished(t_cpu, entity)
                    continue
            if t_event == inf:
                break
            time, _, handler, arg = pop(heap)
            handler(time, arg)
        return self._result()

    # ---- event handlers ------------------------------------------------------------------------

    def _on_resume(self, now: float, k: int) -> None:
        """The consumer is ready for its ``k``-th batch."""
        log = self.log
        if self.workers == 0:  # no workers: the consumer loads batch k itself
            log.wait_start_s[k] = log.start_s[k] = log.request_s[k] = now
            self.cpu.start(self.consumer, k, self.task_s[k], self.task_u[k], now)
            self.state = _LOADING
            return
        if (k == 0 or (self.barrier and self.epoch_first[k])) and self.next_request == k:
            self._fill_at_epoch_start(k, now)
        if self.in_order:
            log.wait_start_s[k] = now
            if log.available_s[k] <= now:  # already there (False while NaN: not yet)
                self.queue.schedule(now + self.handoff, self._on_handoff, k)
                self.state = _BUSY
            else:
                self.state, self.waiting_for = _WAITING_FOR_BATCH, k
        elif self.ready_pool:
            _, b = heapq.heappop(self.ready_pool)
            log.wait_start_s[b] = now
            self.queue.schedule(now + self.handoff, self._on_handoff, b)
            self.state = _BUSY
        else:
            self.state, self.wait_began = _WAITING_FOR_ANY, now

    def _on_dispatchable(self, now: float, b: int) -> None:
        """The request for batch ``b`` reached the workers."""
        w = self.policy.dispatchable(b)
        if w is not None:
            self._start_task(w, b, now, by_worker=False)

    def _on_worker_ready(self, now: float, w: int) -> None:
        """Worker ``w`` is free for its next task (unless its process was started again since)."""
        self.ready_pending[w] -= 1
        if self.ready_skip[w]:
            self.ready_skip[w] -= 1
            return
        b = self.policy.worker_ready(w)
        if b is not None:
            self._start_task(w, b, now, by_worker=True)

    def _on_worker_started(self, now: float, w: int) -> None:
        """Worker ``w``'s new process is ready for its first task of the epoch."""
        b = self.policy.worker_ready(w)
        if b is not None:
            self._start_task(w, b, now, by_worker=True)

    def _on_available(self, now: float, b: int) -> None:
        """Batch ``b`` reached the consumer's side."""
        log = self.log
        log.available_s[b] = now
        if self.in_order:
            if self.state is _WAITING_FOR_BATCH and self.waiting_for == b:
                self._hand_over(b, now)
        elif self.state is _WAITING_FOR_ANY:
            log.wait_start_s[b] = self.wait_began
            self._hand_over(b, now)
        else:
            heapq.heappush(self.ready_pool, (now, b))

    def _on_handoff(self, now: float, b: int) -> None:
        """The consumer takes batch ``b``: request the next batch, then start its work on ``b``."""
        log = self.log
        log.ready_s[b] = now
        log.taken_order.append(b)
        nr = self.next_request
        if self.workers and nr < self.n and (not self.barrier or self.epoch_list[nr] == self.epoch_list[b]):
            self.next_request = nr + 1
            self._request(nr, now, after=b, at_wait=-1)
        cpu = self.cpu
        if self.spin in cpu.finish:  # the next step puts the spinning pool to work
            cpu.stop(self.spin, now)
        cpu.start(self.consumer, b, self.work_s[b], self.work_u[b], now, self.step_width)

    def _on_task_finished(self, now: float, entity: int) -> None:
        """A task ends on the CPU: a worker's loader task, the consumer's work, or its own loading."""
        b = self.cpu.stop(entity, now)
        if entity == self.spin:  # the pool's threads went to sleep
            return
        log = self.log
        if entity != self.consumer:
            log.end_s[b] = now
            schedule = self.queue.schedule
            schedule(now + self.latency, self._on_available, b)
            schedule(now + self.worker_gap, self._on_worker_ready, entity)
            self.ready_pending[entity] += 1
        elif self.state is _LOADING:  # loaded in the loop: take it, then work on it
            log.end_s[b] = log.available_s[b] = now
            log.ready_by_batch[b] = True
            self.state = _BUSY
            self._on_handoff(now, b)  # taken at once, no handoff
        else:
            log.done_s[b] = now
            if self.spin_s > 0:
                self.cpu.start(self.spin, -1, self.spin_s, 1.0, now, self.spin_threads)
            k = len(log.taken_order)  # batches taken so far = the position the consumer asks for next
            if k < self.n:
                self.queue.schedule(now, self._on_resume, k)
            else:
                self.finished_at = now

    # ---- steps the handlers share -----------------------------------------------------------------

    def _hand_over(self, b: int, now: float) -> None:
        """The consumer, waiting, gets batch ``b``: after the handoff cost counted from its wait."""
        t = max(now, self.log.wait_start_s[b] + self.handoff)
        self.log.ready_by_batch[b] = t == now
        self.state = _BUSY
        self.queue.schedule(t, self._on_handoff, b)

    def _fill_at_epoch_start(self, k: int, now: float) -> None:
        """At the start of the run (or of an epoch, behind a barrier) request up to ``prefetch`` batches."""
        if self.worker_start is not None:
            self._start_workers(self.worker_start[self.epoch_index[k]], now)
        stop = self.epoch_stop[k] if self.barrier else self.n
        stop = min(stop, k + self.prefetch)
        while self.next_request < stop:
            nr = self.next_request
            self.next_request = nr + 1
            self._request(nr, now, after=-1, at_wait=k)

    def _start_workers(self, start_s: list[float], now: float) -> None:
        """An epoch starts its workers: worker ``w`` takes requests from ``now + start_s[w]`` on.

        A task it then starts waited for the epoch's start, not for the worker's task before it.
        """
        for w in range(self.workers):
            self.policy.hold(w)
            self.ready_skip[w] = self.ready_pending[w]  # the old process's "free again" is not this one's
            self.last_task_of[w] = -1
            self.queue.schedule(now + start_s[w], self._on_worker_started, w)

    def _request(self, b: int, now: float, after: int, at_wait: int) -> None:
        log = self.log
        log.request_s[b] = now
        log.requested_after[b] = after
        log.requested_at_wait[b] = at_wait
        if after >= 0:
            delay = self.dispatch
        elif self.worker_start is not None:  # the workers' start times hold the epoch's start-up
            delay = 0.0
        else:
            delay = self.epoch_dispatch[self.epoch_index[b]]
        self.policy.request(b)
        self.queue.schedule(now + delay, self._on_dispatchable, b)

    def _start_task(self, w: int, b: int, now: float, by_worker: bool) -> None:
        log = self.log
        log.start_s[b] = now
        log.worker[b] = w
        log.started_by_worker[b] = by_worker
        log.previous_on_worker[b] = self.last_task_of[w]
        self.last_task_of[w] = b
        self.cpu.start(w, b, self.task_s[b], self.task_u[b], now)

    def _result(self) -> dict[str, Any]:
        log, plan = self.log, self.plan
        wall = self.finished_at + plan.tail_s
        times = log.arrays()
        path = critical_path(log, times, workers=self.workers, wall=wall, tail_s=plan.tail_s,
                             loader=self.loader_work, consumer=self.consumer_work)
        return dict(wall_s=wall, stall_s=float(np.nansum(times["ready_s"] - times["wait_start_s"])),
                    batch_id=plan.batch_id[np.array(log.taken_order, np.int64)],
                    worker=np.array(log.worker, np.int64), critical_path=path, **times)


def simulate(plan: ReplayPlan, loader: Work, consumer: Work, settings: Settings) -> dict[str, Any]:
    """Replay ``plan`` with the (scenario-scaled) ``loader`` and ``consumer`` work under ``settings``.

    Returns the fields of :class:`Replay` but ``config``; :func:`replay`
    is the public entry.

    Examples
    --------
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> plan = plan_from_durations([0.03] * 4, [0.01] * 4, workers=2, prefetch=2, cores=4)
    >>> s = Settings(workers=2, prefetch=2, cores=4.0, policy="first-free", in_order=True)
    >>> round(simulate(plan, plan.loader, plan.consumer, s)["wall_s"], 3)  # batches ready at 30, 30, 60, 70 ms
    0.08

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
    """
    return _Replayer(plan, loader, consumer, settings).run()
