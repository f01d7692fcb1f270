"""The worker advice: how many loader workers this run should have, decided once, by replay.

:func:`worker_advice` is the one place that decides whether more loader
workers help. The report's text, its JSON, its HTML page and its action
list all read the :class:`WorkerAdvice` it returns, so they cannot
disagree. Its steps:

1. replay the recorded configuration (the yardstick); steps 2 and 3
   replay the first :data:`SEARCH_BATCHES` batches;
2. with unlimited cores, replay the counts from one upward until
   :data:`SCAN_PATIENCE` counts in a row gain less than
   :data:`SETTLE_TOLERANCE`, and take the fewest workers within it of the
   fastest (not a bisection: workers started at every epoch cost the loop
   their start and stop, so more can be slower even on unlimited cores);
3. on this machine's cores, replay every count up to that one (counts past
   it only add tasks sharing the same cores) and take the fewest within
   :data:`SETTLE_TOLERANCE` of the fastest; replay that count, and step 2's
   with unlimited cores, on the whole plan;
4. decide: "yes" only when that count is more than the recorded one, its
   replay is at least :data:`~pipeprobe.critical.PACE_SPEEDUP` faster *and*
   leaves less stall than the recorded configuration's replay; the stall
   it states is the replay's, beside the replay's stall of the recorded
   configuration, so the advice never promises more stall than there is now.

Prefetch follows the worker count as a loader's per-worker setting does:
the recorded batches in flight per worker (two per worker when the run
loaded in the training loop, torch's default).

References
----------
.. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001 (the replay).
.. [2] P. J. Denning and J. P. Buzen, ACM Computing Surveys, 1978 (the
   bottleneck law: CPU per batch over the cores bounds the time per batch).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, replace
from typing import TYPE_CHECKING, Any, Sequence

from ..analysis import Action
from ..critical import PACE_SPEEDUP
from .engine import Replay, replay
from .limits import MAX_PREFETCH
from .restart import WorkerRestarts, restart_action_text
from .scenario import recorded_prefetch_for

if TYPE_CHECKING:  # pragma: no cover
    from ..analysis import Analysis
    from .plan import ReplayPlan

__all__ = ["WorkerAdvice", "worker_advice", "advised_actions", "advised_analysis", "SETTLE_TOLERANCE", "MAX_ADVISED_WORKERS",
           "MORE_WORKERS"]

#: Counts within this share of the fastest replay count as "as fast" (our choice: below the 5 % a
#: replay of the recorded configuration may miss the measured run by).
SETTLE_TOLERANCE = 0.02
#: Most workers the advice replays.
MAX_ADVISED_WORKERS = 64
#: The count scan of step 2 stops after this many counts in a row that did not make the replay faster
#: by SETTLE_TOLERANCE (our choice: past an uneven split of shards or a start cost that outgrows the gain).
SCAN_PATIENCE = 4
#: The search replays the first this many batches (a few dozen replays stay quick on long runs); the
#: counts it finds are then replayed on the whole plan, and every figure the advice states is from those.
SEARCH_BATCHES = 1000
#: The answers of :attr:`WorkerAdvice.more_workers`.
MORE_WORKERS = ("yes", "no", "unknown")


@dataclass(frozen=True)
class WorkerAdvice:
    """How many loader workers to use, and why: the report's one worker advice.

    Attributes
    ----------
    more_workers : {"yes", "no", "unknown"}
        Whether more workers than recorded make this run faster on this machine.
    recorded_workers : int
    workers : int
        The advised count: the fewest within :data:`SETTLE_TOLERANCE` of the
        fastest replay on this machine's cores ("yes": more than recorded;
        "no": the recorded count, or fewer when fewer replay as fast).
    prefetch : int
        Batches in flight replayed with ``workers``.
    stall_now, stall_left : float
        Replayed stall fraction of the recorded configuration and with
        ``workers`` (``stall_left <= stall_now`` whenever the answer is "yes").
    measured_stall : float
        Stall fraction of the recorded run (NaN when not measured). Workers
        can save at most the time the loop waited, so the answer is "yes"
        only when it is at least ``1 - 1 / PACE_SPEEDUP`` (4.8 %).
    speedup : float
        Replayed wall time of the recorded configuration over that with ``workers``.
    seconds_saved : float
        Measured wall time times ``1 - 1 / speedup``.
    cores : float
        Cores the replay gave the run (the machine's less what other processes used).
    machine_cores : int
        Cores of the recorded machine.
    cores_limit : bool
        With unlimited cores some worker count would replay at least
        :data:`~pipeprobe.critical.PACE_SPEEDUP` faster than ``workers`` here.
    unlimited_workers : int or None
        Fewest workers within :data:`SETTLE_TOLERANCE` of 64 workers' replay
        with unlimited cores (None without a replay).
    unlimited_speedup : float
        Its replayed speed-up over the recorded configuration.
    cores_busy : float
        CPU seconds per batch over the time per batch with ``unlimited_workers``
        and unlimited cores: the cores a run that hides its input keeps busy.
    reason : str
        The advice in one sentence, with its numbers.
    """

    more_workers: str
    recorded_workers: int
    workers: int
    prefetch: int
    stall_now: float
    stall_left: float
    measured_stall: float
    speedup: float
    seconds_saved: float
    cores: float
    machine_cores: int
    cores_limit: bool
    unlimited_workers: int | None
    unlimited_speedup: float
    cores_busy: float
    reason: str

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (infinities as the string "inf")."""
        from .._jsonnum import json_ready

        return json_ready(asdict(self))


def worker_advice(plan: ReplayPlan, base: Replay | None = None) -> WorkerAdvice:
    """Decide how many loader workers the run should have, by replaying worker counts.

    Parameters
    ----------
    plan : ReplayPlan
    base : Replay, optional
        The replay of the recorded configuration, when already made.

    Returns
    -------
    WorkerAdvice

    Examples
    --------
    A loader task of 30 ms behind a 10 ms step needs three workers to keep
    up (the bottleneck law); by hand: 3.01 s with one worker, 30 ms + 100 x 10 ms = 1.03 s with three:

    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> plan = plan_from_durations([0.03] * 100, [0.01] * 100, workers=1, prefetch=2, cores=8)
    >>> a = worker_advice(plan)
    >>> a.more_workers, a.workers, a.prefetch, round(a.speedup, 2)
    ('yes', 3, 6, 2.92)

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
    .. [2] P. J. Denning and J. P. Buzen, ACM Computing Surveys, 1978.
    """
    from .ceilings import _head  # the first batches of a plan (ceilings imports this module)

    base = replay(plan) if base is None else base
    head = _head(plan, SEARCH_BATCHES)
    unlimited = _settled_count(head)
    walls = {plan.workers: replay(head) if head is not plan else base}
    for w in range(1, max(unlimited, 1) + 1):
        if w not in walls:
            walls[w] = _with_workers(head, w)
    fastest = min(r.wall_s for r in walls.values())
    advised = min(w for w, r in walls.items() if r.wall_s <= fastest * (1 + SETTLE_TOLERANCE))
    rep = base if advised == plan.workers else _with_workers(plan, advised)
    unlimited_wall = _with_workers(plan, unlimited, math.inf).wall_s
    return _decide(plan, base, advised, rep, unlimited, unlimited_wall)


def _prefetch_for(plan: ReplayPlan, workers: int) -> int:
    """Batches in flight with ``workers`` workers: the recorded per-worker depth (at least one each)."""
    if plan.workers == 0:
        return recorded_prefetch_for(plan, workers)
    return min(MAX_PREFETCH, max(workers, math.ceil(plan.prefetch * workers / plan.workers)))


def _with_workers(plan: ReplayPlan, workers: int, cores: float | None = None) -> Replay:
    return replay(plan, workers=workers, prefetch=_prefetch_for(plan, workers), cores=cores)


def _settled_count(plan: ReplayPlan) -> int:
    """Step 2: the fewest workers within SETTLE_TOLERANCE of the fastest count at unlimited cores.

    The counts are replayed from one upward. More workers are not always
    faster even on unlimited cores: each one started at every epoch costs
    the loop its start and stop (:mod:`pipeprobe.whatif._lifecycle`), and an
    iterable dataset split by shards loads unevenly on some counts. So the
    scan goes on past a slower count and stops only when
    :data:`SCAN_PATIENCE` counts in a row brought the fastest wall down by
    less than SETTLE_TOLERANCE, or at :data:`MAX_ADVISED_WORKERS`.
    """
    walls: dict[int, float] = {}
    anchor, since = math.inf, 0
    for w in range(1, MAX_ADVISED_WORKERS + 1):
        walls[w] = _with_workers(plan, w, math.inf).wall_s
        if walls[w] < anchor * (1 - SETTLE_TOLERANCE):
            anchor, since = walls[w], 0
        else:
            since += 1
            if since >= SCAN_PATIENCE:
                break
    best = min(walls.values())
    if not math.isfinite(best):
        return MAX_ADVISED_WORKERS
    return min(w for w, wall in walls.items() if wall <= best * (1 + SETTLE_TOLERANCE))


def _decide(plan: ReplayPlan, base: Replay, advised: int, rep: Replay, unlimited: int,
            unlimited_wall: float) -> WorkerAdvice:
    """Step 4: the answer, its numbers and its sentence, consistent by construction."""
    speedup = base.wall_s / rep.wall_s if rep.wall_s > 0 else 1.0
    unlimited_speedup = base.wall_s / unlimited_wall if unlimited_wall > 0 else 1.0
    measured_stall = plan.measured_stall_s / plan.measured_wall_s if plan.measured_wall_s > 0 else math.nan
    waits_enough = not measured_stall < 1.0 - 1.0 / PACE_SPEEDUP  # NaN (not measured): the replay decides
    helps = (advised > plan.workers and speedup >= PACE_SPEEDUP and rep.stall_fraction < base.stall_fraction
             and waits_enough)
    if not helps and advised > plan.workers:
        advised, rep, speedup = plan.workers, base, 1.0
    cpu_per_batch = float(plan.loader.cpu_s.sum() + plan.consumer.cpu_s.sum()) / max(1, plan.batches)
    per_batch = unlimited_wall / max(1, plan.batches)
    measured = plan.measured_wall_s if plan.measured_wall_s > 0 else base.wall_s
    advice = WorkerAdvice(
        more_workers="yes" if helps else "no", recorded_workers=plan.workers, workers=advised,
        prefetch=_prefetch_for(plan, advised) if advised != plan.workers else plan.prefetch,
        stall_now=base.stall_fraction, stall_left=rep.stall_fraction, measured_stall=measured_stall,
        speedup=speedup,
        seconds_saved=measured * (1.0 - 1.0 / speedup) if speedup > 0 else 0.0,
        cores=float(base.config["cores"]), machine_cores=plan.cores, cores_limit=unlimited_speedup >= speedup * PACE_SPEEDUP,
        unlimited_workers=unlimited, unlimited_speedup=unlimited_speedup,
        cores_busy=cpu_per_batch / per_batch if per_batch > 0 else math.inf, reason="",
    )
    return replace(advice, reason=_reason(advice))


def _pct(x: float) -> str:
    return f"{100 * x:.1f} %"


def _workers(n: int) -> str:
    return f"{n} worker{'s' * (n != 1)}" if n else "loading in the training loop"


def _cores(a: WorkerAdvice) -> str:
    if a.cores < a.machine_cores - 0.05:
        return f"the {a.cores:.1f} of {a.machine_cores} cores other processes left this run"
    return f"this machine's {a.cores:g} cores"


def _reason(a: WorkerAdvice) -> str:
    """The advice in one sentence (every number from the replay)."""
    more_cores = (f"; with unlimited cores {_workers(a.unlimited_workers or 0)} would replay "
                  f"{a.unlimited_speedup:.2f}x faster than recorded")
    if a.more_workers == "yes":
        text = (f"{_workers(a.workers)} (prefetch {a.prefetch}) replay {a.speedup:.2f}x faster than the recorded "
                f"{_workers(a.recorded_workers)}, replayed stall {_pct(a.stall_now)} -> {_pct(a.stall_left)}")
        return text + (more_cores + f": {_cores(a)} hold it back" if a.cores_limit else "")
    if a.workers < a.recorded_workers:
        return (f"{_workers(a.workers)} replay as fast as the recorded {a.recorded_workers} "
                f"({a.speedup:.2f}x); more only share {_cores(a)}")
    if a.measured_stall < 1.0 - 1.0 / PACE_SPEEDUP:
        return (f"the loop waited for batches {_pct(a.measured_stall)} of the time, so no worker count can make "
                f"it {_pct(PACE_SPEEDUP - 1)} faster")
    if a.cores_limit:
        return (f"more workers only share {_cores(a)} (no count replays "
                f"{_pct(PACE_SPEEDUP - 1)} faster; it keeps about {a.cores_busy:.1f} cores busy once the input "
                f"is hidden){more_cores}")
    return (f"no worker count replays {_pct(PACE_SPEEDUP - 1)} faster, even with unlimited cores: the stall left "
            f"({_pct(a.stall_now)}) is the step's pace and each epoch's first batches, which more workers "
            "do not shorten")


def advised_actions(actions: Sequence[Action], advice: WorkerAdvice | None) -> tuple[Action, ...]:
    """The action list with its worker action taken from ``advice`` (largest time at stake first).

    Examples
    --------
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> plan = plan_from_durations([0.03] * 100, [0.01] * 100, workers=1, prefetch=2, cores=8)
    >>> [a.kind for a in advised_actions([Action("workers", "old", 9.0)], worker_advice(plan))]
    ['workers']

    References
    ----------
    .. [1] G. M. Amdahl, AFIPS 1967 (the time at stake: what the change can save of the whole run).
    """
    if advice is None:
        return tuple(actions)
    out = [a for a in actions if a.kind != "workers"]
    if advice.more_workers == "yes":
        out.append(Action("workers", f"Add loader workers: {advice.reason}", advice.seconds_saved))
    elif advice.workers < advice.recorded_workers:
        out.append(Action("workers", f"Fewer workers do as well: {advice.reason}", 0.0))
    elif (advice.stall_now if math.isnan(advice.measured_stall) else advice.measured_stall) >= 1 - 1 / PACE_SPEEDUP:
        out.append(Action("workers", f"Do not add workers: {advice.reason}", 0.0))  # the loop waits, yet no count helps
    out.sort(key=lambda a: -a.seconds)
    return tuple(out)


def advised_analysis(analysis: Analysis, advice: WorkerAdvice | None,
                     restarts: WorkerRestarts | None = None) -> Analysis:
    """``analysis`` with its worker and warm-up actions and its CPU line's worker answer read from the replay.

    The report shows this one, so its action list and its CPU line say what
    the advice says (``advice=None``, no replay: the analysis unchanged),
    and the warm-up action is the restart cost of ``restarts`` (none when
    the replay finds keeping the workers saves little).

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> from pipeprobe.whatif.plan import build_plan
    >>> d = write_example_run(tempfile.mkdtemp(), batches=4, decode_ms=6, step_ms=2)
    >>> a = pipeprobe.analyze(d)
    >>> advice = worker_advice(build_plan(a.run))
    >>> advised_analysis(a, advice).stages.more_workers, advice.workers
    ('yes', 3)

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001 (the replays the advice rests on).
    """
    if advice is None:
        return analysis
    stages = replace(analysis.stages, more_workers=advice.more_workers, more_workers_reason=advice.reason)
    actions = advised_actions(analysis.actions, advice)
    if restarts is not None:
        actions = _restart_actions(actions, restarts)
    return replace(analysis, stages=stages, actions=actions)


def _restart_actions(actions: tuple[Action, ...], restarts: WorkerRestarts) -> tuple[Action, ...]:
    """The warm-up action from the restart replay; the unrecorded-gap action says how much of it is workers starting.

    No span covers a worker's start-up, so the critical path counts the
    waits for new workers as time when nothing recorded ran: the gap action
    names them and keeps only the rest at stake.
    """
    out = [a for a in actions if a.kind != "warmup"]
    if restarts.worth_naming:
        out.append(Action("warmup", restart_action_text(restarts), restarts.saved_s))
    starting = restarts.first_start_s + restarts.restart_total_s if restarts.restarts else 0.0
    for i, a in enumerate(out):
        if a.kind == "gap" and starting > 0.0 and "nothing recorded ran" in a.text:
            out[i] = Action("gap", f"{a.text} (of it, {min(starting, a.seconds):.3f} s is loader workers starting "
                                   "at each epoch's start)", max(0.0, a.seconds - starting))
    out.sort(key=lambda a: -a.seconds)
    return tuple(out)
