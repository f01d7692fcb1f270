"""A range instead of one number, where the step's threads slowed down in ways processor sharing misses (private).

The replay shares the cores between the step's threads and the loader
workers under processor sharing (:mod:`pipeprobe.whatif._cores`). Pools of
threads that meet at barriers (BLAS, OpenMP) fare worse than that when
the cores are oversubscribed: a thread that waits for a descheduled
partner spins or sleeps, and the step takes as long as its slowest thread.
:func:`wall_range` gives a prediction a range when

* the recording shows a slow-down of the step beside busy workers beyond
  what processor sharing explains (:attr:`ThreadCheck.is_unexplained`), or
* the step runs on a pool of threads and the scenario oversubscribes the
  cores more than the recording did, so the recording cannot show how the
  pool behaves there.

The low end is the processor-sharing replay, and, where part of the
recorded slow-down is unexplained, the replay without that part. The high
end replays the step as a pool that loses its speed-up whenever the cores
are oversubscribed (its threads wait for a descheduled partner at each
barrier, so its CPU seconds run as if on one thread), or, where the
recording shows more, the unexplained slow-down grown in proportion to the
threads beyond the cores.

References
----------
.. [1] L. Kleinrock, *Queueing Systems, Volume 2*, Wiley, 1976, ch. 4 (processor sharing).
.. [2] J. K. Ousterhout, "Scheduling techniques for concurrent systems",
   ICDCS 1982 (threads that synchronise need to run together).
"""

from __future__ import annotations

from dataclasses import replace
from typing import TYPE_CHECKING

from .engine import replay
from .scenario import Scenario

if TYPE_CHECKING:  # pragma: no cover
    from ..threads import ThreadCheck
    from .plan import ReplayPlan

__all__ = ["wall_range", "range_reason"]


def _excess(check: ThreadCheck, workers: int, cores: float) -> float:
    """Threads wanting CPU beyond ``cores``: the step's pool and ``workers`` workers as busy as recorded."""
    per_worker = check.worker_load / max(1, check.workers)
    return max(0.0, check.step_threads + per_worker * workers - cores)


def range_reason(plan: ReplayPlan, scenario: Scenario) -> str:
    """Why the prediction of ``scenario`` needs a range ("" when one number holds).

    Examples
    --------
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> range_reason(plan_from_durations([0.03] * 4, [0.01] * 4), Scenario(workers=2))
    ''
    """
    check = plan.threads
    if check is None or check.skipped is not None:
        return ""
    workers = plan.workers if scenario.workers is None else scenario.workers
    cores = float(plan.cores_left if scenario.cores is None else scenario.cores)
    recorded = _excess(check, check.workers, float(check.cores))
    if check.is_unexplained:
        return (f"the step ran {check.slowdown:.2f}x slower beside busy workers where processor sharing explains "
                f"{check.explained_slowdown:.2f}x")
    if check.step_threads > 1 and workers > 0 and _excess(check, workers, cores) > recorded + 0.25:
        return (f"{check.step_threads} step threads and {workers} workers oversubscribe {cores:.3g} cores more than "
                "the recorded run did")
    return ""


def wall_range(plan: ReplayPlan, base_wall_s: float, scenario: Scenario, predicted_s: float) -> tuple[float, float]:
    """``(low, high)`` predicted wall seconds of ``scenario`` (see the module docstring).

    ``base_wall_s`` is the replay of the recorded configuration,
    ``predicted_s`` the processor-sharing prediction; the range holds it.

    Examples
    --------
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> plan = plan_from_durations([0.03] * 4, [0.01] * 4)
    >>> wall_range(plan, 0.13, Scenario(), 0.13)  # no thread facts: the one number
    (0.13, 0.13)

    References
    ----------
    .. [1] L. Kleinrock, *Queueing Systems, Volume 2*, Wiley, 1976, ch. 4 (processor sharing).
    """
    check = plan.threads
    if not range_reason(plan, scenario):
        return predicted_s, predicted_s
    measured = plan.measured_wall_s
    scale = measured / base_wall_s if measured > 0 and base_wall_s > 0 else 1.0
    step = scenario.faster.get("step", 1.0)
    x = max(1.0, check.unexplained) if check.unexplained == check.unexplained else 1.0
    busy = check.busy_steps / max(1, check.busy_steps + check.idle_steps)
    recorded_mix = 1.0 - busy + x * busy  # the unexplained part the plan's steps hold on average
    workers = plan.workers if scenario.workers is None else scenario.workers
    cores = float(plan.cores_left if scenario.cores is None else scenario.cores)
    rec_excess = _excess(check, check.workers, float(check.cores))
    new_excess = _excess(check, workers, cores)
    grown = 1.0 + (x - 1.0) * (new_excess / rec_excess if rec_excess > 0 else 1.0)
    low = predicted_s
    if x > 1.0:
        relieved = replace(scenario, faster={**scenario.faster, "step": step * recorded_mix})
        low = min(low, replay(plan, relieved).wall_s * scale)
    lockstep = max(float(check.step_threads), grown)  # a pool of k threads gains at most k-fold
    high = max(predicted_s,
               replay(replace(plan, step_lockstep=lockstep, step_together=1.0), scenario).wall_s * scale)
    return low, high
