"""A range instead of one number, where a change frees the cores or loads them (private).

The replay runs each stage at the speed the recording shows once the
slow-down of sharing the recorded cores is taken out (processor sharing,
:mod:`pipeprobe.whatif._cores`). Work shares more than the cores: caches,
memory bandwidth and the clock rate the processor can hold depend on how
many cores are busy. On a real map-style job (``bench/bench_real.py``,
``photos``: PIL ``decode`` and ``augment`` in 2 workers, the step on one
thread, 2 cores) the other stages' *CPU seconds*, not only their wall
time, fell once ``augment`` was left out: ``decode`` by 15-28 %,
``collate`` by about 27 %, ``fetch``'s own time by about half (two pairs of
runs, recorded with and without ``augment``, on a machine that other work
kept 1 to 1.8 cores busy). A recording
made with busy cores cannot show that speed, and one made with idle cores
cannot show the reverse.

So when a scenario moves at least :data:`MOVED_FROM` of the recorded CPU
seconds (:func:`moved_cpu_fraction`: seconds taken off the cores or put on
them, and a loader that moves between the training loop and worker
processes running beside it), :func:`load_range` gives a range. The
processor-sharing prediction is one end. The other is the replay of the
same scenario with every column of work at the speed of its quickest (a
change that frees the cores) or slowest (one that loads them) tenth of
batches in this recording, :data:`SPREAD_QUANTILE`: the fastest and the
slowest the recording shows that work running.

Workers added to a recording without any, beside a step that ran on a
pool of threads (torch's default intra-op threads, BLAS), get a range too,
whatever the CPU seconds moved: the recording cannot show how the pool
fares once the cores are oversubscribed, and its thread check had nothing
to compare. Its high end is also the replay with the step's pool losing
its speed-up whenever the cores are oversubscribed, as the thread range's
(:mod:`pipeprobe.whatif._threadrange`).

References
----------
.. [1] L. Kleinrock, *Queueing Systems, Volume 2*, Wiley, 1976, ch. 4 (processor sharing).
.. [2] P. J. Denning and J. P. Buzen, "The operational analysis of queueing network models",
   ACM Computing Surveys 10(3), 1978 (service demand measured from the system's own record).
"""

from __future__ import annotations

from dataclasses import replace
from typing import TYPE_CHECKING

import numpy as np

from .engine import replay

if TYPE_CHECKING:  # pragma: no cover
    from ._recorded import Work
    from .plan import ReplayPlan
    from .scenario import Scenario

__all__ = ["load_reason", "load_range", "moved_cpu_fraction", "MOVED_FROM", "SPREAD_QUANTILE"]

#: A scenario that moves at least this share of the recorded CPU seconds gets a range.
MOVED_FROM = 0.25
#: The quickest (and slowest) tenth of batches bound how fast each column of work can run.
SPREAD_QUANTILE = 0.10


def moved_cpu_fraction(plan: ReplayPlan, scenario: Scenario) -> tuple[float, bool]:
    """``(share of the recorded CPU seconds the scenario moves, whether it frees the cores)``.

    Moved: the change in the loader's and the consumer's CPU seconds, plus
    all the loader's CPU seconds when the loading moves between the
    training loop (0 workers) and worker processes beside the step.

    Examples
    --------
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> from pipeprobe.whatif.scenario import Scenario
    >>> plan = plan_from_durations([0.03] * 4, [0.01] * 4, task_cpu_s=[0.03] * 4, step_cpu_s=[0.01] * 4)
    >>> moved_cpu_fraction(plan, Scenario(faster={"task": 2}))
    (0.375, True)
    """
    loader, consumer = scenario.work(plan)
    rec_l, rec_c = float(plan.loader.cpu_s.sum()), float(plan.consumer.cpu_s.sum())
    new_l, new_c = float(loader.cpu_s.sum()), float(consumer.cpu_s.sum())
    if rec_l + rec_c <= 0:
        return 0.0, False
    moved = abs(new_l - rec_l) + abs(new_c - rec_c)
    workers = plan.workers if scenario.workers is None else scenario.workers
    to_workers = plan.workers == 0 and workers > 0
    if to_workers or (plan.workers > 0 and workers == 0):
        moved += new_l
    return moved / (rec_l + rec_c), bool(new_l + new_c < rec_l + rec_c and not to_workers)


def _pool_joined(plan: ReplayPlan, scenario: Scenario) -> int:
    """The step's pool size when workers join a step that ran on several threads with the cores to itself
    (a recording without workers: its thread check had nothing to compare), and they do not fit; else 0."""
    check = plan.threads
    workers = plan.workers if scenario.workers is None else scenario.workers
    cores = float(plan.cores_left if scenario.cores is None else scenario.cores)
    if check is None or plan.workers > 0 or workers == 0 or check.step_threads < 2:
        return 0
    return int(check.step_threads) if check.step_threads + workers > cores else 0


def load_reason(plan: ReplayPlan, scenario: Scenario) -> str:
    """Why the prediction of ``scenario`` needs a load range ("" when none).

    Examples
    --------
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> from pipeprobe.whatif.scenario import Scenario
    >>> plan = plan_from_durations([0.03] * 4, [0.01] * 4, task_cpu_s=[0.03] * 4, step_cpu_s=[0.01] * 4)
    >>> load_reason(plan, Scenario(faster={"task": float("inf")}))
    'the change takes 75 % of the recorded CPU seconds off the cores; the recording cannot show how fast the rest runs then'
    """
    share, frees = moved_cpu_fraction(plan, scenario)
    pool = _pool_joined(plan, scenario)
    if pool:
        return (f"workers join a step that ran on {pool} threads with the cores to itself; the recording cannot show "
                "how its pool fares beside them")
    if share < MOVED_FROM:
        return ""
    where = "off the cores" if frees else "onto the cores beside the step"
    return (f"the change takes {100 * share:.0f} % of the recorded CPU seconds {where}; the recording cannot show "
            "how fast the rest runs then")


def _spread_factors(work: Work, quantile: float) -> dict[str, float]:
    """Per column: how many times faster than its mean the column's ``quantile`` batch ran (batches with work)."""
    seconds = work.io_s + work.cpu_s
    out = {}
    for j, name in enumerate(work.names):
        col = seconds[:, j][seconds[:, j] > 0]
        q = float(np.quantile(col, quantile)) if len(col) else 0.0
        if q > 0:
            out[name] = float(col.mean()) / q
    return out


def load_range(plan: ReplayPlan, base_wall_s: float, scenario: Scenario, predicted_s: float) -> tuple[float, float]:
    """``(low, high)`` predicted wall seconds of ``scenario`` (see the module docstring).

    ``base_wall_s`` is the replay of the recorded configuration,
    ``predicted_s`` the processor-sharing prediction: one end of the range.

    Examples
    --------
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> from pipeprobe.whatif.scenario import Scenario
    >>> plan = plan_from_durations([0.03, 0.01] * 2, [0.01] * 4, task_cpu_s=[0.03, 0.01] * 2)
    >>> [round(x, 3) for x in load_range(plan, 0.09, Scenario(faster={"task": 4}), 0.05)]
    [0.044, 0.05]
    """
    _, frees = moved_cpu_fraction(plan, scenario)
    q = SPREAD_QUANTILE if frees else 1.0 - SPREAD_QUANTILE
    spread = replace(plan, loader=plan.loader.scaled(_spread_factors(plan.loader, q)),
                     consumer=plan.consumer.scaled(_spread_factors(plan.consumer, q)))
    measured = plan.measured_wall_s
    scale = measured / base_wall_s if measured > 0 and base_wall_s > 0 else 1.0
    other = replay(spread, scenario).wall_s * scale
    if frees:
        return min(other, predicted_s), predicted_s
    pool = _pool_joined(plan, scenario)
    if pool:  # as the thread range's high end: the pool loses its speed-up whenever the cores are oversubscribed
        other = max(other, replay(replace(plan, step_lockstep=float(pool), step_together=1.0),
                                  scenario).wall_s * scale)
    return predicted_s, max(other, predicted_s)
