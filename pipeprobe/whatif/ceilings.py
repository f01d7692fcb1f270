"""Speed-up ceilings per stage: Amdahl's formula next to the replay, and the worker count that hides input.

For every stage of a run, :func:`ceilings` gives

* its share ``p`` of the observed critical path and Amdahl's ceiling
  ``1 / (1 - p)`` (what making the stage free could give if nothing else
  changed);
* the replayed speed-up if the stage cost nothing, and if it got 2x and 4x
  faster (:mod:`pipeprobe.whatif.engine`);
* the stage that leads the replayed critical path once this one is free
  (the path shifts);

plus the worker advice of :func:`pipeprobe.whatif.advice.worker_advice`
(the one function that decides it; the report's other parts read the same).
:func:`format_ceilings` writes the report section, with a note on why the
formula and the replay differ.

References
----------
.. [1] G. M. Amdahl, AFIPS 1967 (the ceiling).
.. [2] P. J. Denning and J. P. Buzen, ACM Computing Surveys, 1978 (CPU
   demand per batch and the cores it needs: the bottleneck law).
.. [3] J. E. Kelley and M. R. Walker, 1959 (critical path method).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, replace
from typing import TYPE_CHECKING, Any

import numpy as np

from ._replay_path import PSEUDO_STAGES
from .advice import WorkerAdvice, worker_advice
from .engine import Replay, replay
from .laws import amdahl_ceiling
from .limits import MAX_PLAN_STAGES, OTHER_STAGES, check_count
from .plan import ReplayPlan, Work, build_plan
from .predict import ModelCheck, check_model, model_check_text

if TYPE_CHECKING:  # pragma: no cover
    from ..analysis import Analysis
    from ..load import Run

__all__ = ["StageCeiling", "Ceilings", "ceilings", "format_ceilings", "MAX_CEILING_STAGES"]

#: Stages :func:`ceilings` replays by default: three replays each, so a run with thousands of stage
#: names still closes in a moment; the largest shares come first and the rest are counted, not lost.
MAX_CEILING_STAGES = 10


@dataclass(frozen=True)
class StageCeiling:
    """Ceilings of one stage.

    Attributes
    ----------
    stage : str
    share : float
        Share ``p`` of the recorded run's critical path.
    amdahl_ceiling : float
        ``1 / (1 - p)``.
    free_speedup, speedup_2x, speedup_4x : float
        Replayed speed-up of the whole run with the stage free, 2x and 4x faster.
    next_critical : str
        Stage leading the replayed critical path once this one is free.
    """

    stage: str
    share: float
    amdahl_ceiling: float
    free_speedup: float
    speedup_2x: float
    speedup_4x: float
    next_critical: str


@dataclass(frozen=True)
class Ceilings:
    """Ceilings of every stage and the worker advice.

    Attributes
    ----------
    stages : list of StageCeiling
        Largest share first.
    baseline_replay_wall_s, measured_wall_s : float
    workers : int
        Recorded loader workers (0: loading in the training loop).
    advice : WorkerAdvice or None
        The worker advice (:func:`~pipeprobe.whatif.advice.worker_advice`;
        :func:`ceilings` always gives one).
    stages_left_out : int
        Stages not replayed one by one (past ``max_stages``, or folded in
        the plan), to keep the computation short.
    left_out_share : float
        Their critical-path shares, summed.
    model_check : ModelCheck or None
        The replay of the recorded configuration against the measured wall
        time (:func:`~pipeprobe.whatif.predict.check_model`); None when the
        replay covers only the first batches of the run, which have no
        measured wall time of their own.
    """

    stages: list[StageCeiling]
    baseline_replay_wall_s: float
    measured_wall_s: float
    workers: int
    advice: WorkerAdvice | None
    stages_left_out: int = 0
    left_out_share: float = 0.0
    model_check: ModelCheck | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (infinities as the string "inf")."""
        from .._jsonnum import json_ready

        return json_ready(asdict(self))


def _leader(cp: dict[str, float], skip: str) -> str:
    real = {k: v for k, v in cp.items() if k not in PSEUDO_STAGES and k != skip and not k.endswith("(offloaded)")}
    return max(real, key=real.__getitem__) if real else ""


def ceilings(run: Run | ReplayPlan, *, analysis: Analysis | None = None,
             shares: dict[str, float] | None = None, max_stages: int | None = MAX_CEILING_STAGES,
             advice: WorkerAdvice | None = None) -> Ceilings:
    """Amdahl ceilings and replayed speed-ups of every stage, and the workers that hide input.

    Parameters
    ----------
    run : Run or ReplayPlan
    analysis : Analysis, optional
        Its observed critical-path shares give ``p``; without it (and
        without ``shares``) the replay's own critical path of the recorded
        configuration does.
    shares : dict, optional
        Critical-path share per stage, to use instead.
    max_stages : int or None, default :data:`MAX_CEILING_STAGES`
        Stages to replay (three replays each): the ones with the largest
        share, then the most work. ``None``: every stage of the plan. The
        others are counted in :attr:`Ceilings.stages_left_out`.
    advice : WorkerAdvice, optional
        The run's worker advice, when already decided (else decided here).

    Returns
    -------
    Ceilings

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe.whatif.ceilings import ceilings
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=4, decode_ms=6, step_ms=2)
    >>> c = ceilings(pipeprobe.load(d)).stages[0]
    >>> c.stage, round(c.amdahl_ceiling, 6), round(c.free_speedup, 6), round(c.speedup_2x, 6)
    ('decode', 4.0, 4.0, 1.6)

    References
    ----------
    .. [1] G. M. Amdahl, AFIPS 1967.
    .. [2] P. J. Denning and J. P. Buzen, ACM Computing Surveys, 1978.
    """
    if max_stages is not None:
        max_stages = check_count("max_stages", max_stages, 1, MAX_PLAN_STAGES)
    plan = run if isinstance(run, ReplayPlan) else build_plan(run)
    base = replay(plan)
    if shares is None and analysis is not None:
        shares = analysis.stage_shares()
    if shares is None:
        shares = base.critical_path_shares
    picked, left_out = _stages_to_replay(plan, shares, max_stages)
    rows = sorted((_stage_ceiling(plan, base, stage, shares) for stage in picked),
                  key=lambda r: (-r.share, -r.free_speedup))
    return Ceilings(
        stages=rows,
        baseline_replay_wall_s=base.wall_s,
        measured_wall_s=plan.measured_wall_s,
        workers=plan.workers,
        advice=worker_advice(plan, base) if advice is None else advice,
        stages_left_out=len(left_out),
        left_out_share=float(sum(_share(shares, n) for n in left_out)),
        model_check=None if _is_head(plan) else check_model(plan, base),
    )


def _share(shares: dict[str, float], stage: str) -> float:
    return min(1.0, max(0.0, float(shares.get(stage, 0.0))))


def _stages_to_replay(plan: ReplayPlan, shares: dict[str, float],
                      max_stages: int | None) -> tuple[list[str], list[str]]:
    """The stages to replay one by one (largest share first, then most work), and the names left out.

    Names the plan folded into :data:`~pipeprobe.whatif.limits.OTHER_STAGES`
    count as left out unless that column is replayed.
    """
    names = list(dict.fromkeys(plan.loader_stages + plan.consumer_stages))
    work = {**_work_by_stage(plan.loader), **_work_by_stage(plan.consumer)}
    ranked = sorted(names, key=lambda n: (-_share(shares, n), -work.get(n, 0.0)))
    picked = ranked if max_stages is None else ranked[:max_stages]
    left = [n for n in ranked[len(picked):] if n != OTHER_STAGES]
    if OTHER_STAGES not in picked:
        left += list(plan.folded_stages)
    return [n for n in names if n in set(picked)], left


def _work_by_stage(work: Work) -> dict[str, float]:
    return dict(zip(work.names, (work.io_s.sum(0) + work.cpu_s.sum(0)).tolist(), strict=True))


def _stage_ceiling(plan: ReplayPlan, base: Replay, stage: str, shares: dict[str, float]) -> StageCeiling:
    """One stage's row: Amdahl's ceiling of its share, and three replays (free, 2x, 4x)."""
    p = _share(shares, stage)
    free = replay(plan, faster={stage: math.inf})
    x2 = replay(plan, faster={stage: 2.0})
    x4 = replay(plan, faster={stage: 4.0})
    return StageCeiling(
        stage=stage,
        share=p,
        amdahl_ceiling=amdahl_ceiling(p),
        free_speedup=base.wall_s / free.wall_s if free.wall_s > 0 else math.inf,
        speedup_2x=base.wall_s / x2.wall_s if x2.wall_s > 0 else math.inf,
        speedup_4x=base.wall_s / x4.wall_s if x4.wall_s > 0 else math.inf,
        next_critical=_leader(free.critical_path, stage),
    )


def _wrap(text: str, width: int) -> list[str]:
    out, cur = [], " "
    for w in text.split():
        if len(cur) + 1 + len(w) > width and cur.strip():
            out.append(cur)
            cur = "   "
        cur += " " + w
    if cur.strip():
        out.append(cur)
    return out


def _x(v: float) -> str:
    if math.isinf(v):
        return "   inf"
    return " >999x" if v >= 999.5 else (f"{v:5.1f}x" if v >= 99.995 else f"{v:5.2f}x")


def format_ceilings(c: Ceilings, width: int = 100) -> list[str]:
    """The report section: one line per stage, the worker advice, and how formula and replay differ.

    Examples
    --------
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> advice = worker_advice(plan_from_durations([0.03] * 4, [0.01] * 4, workers=2, prefetch=4, cores=4))
    >>> c = Ceilings([StageCeiling("decode", 0.5, 2.0, 1.6, 1.3, 1.45, "step")], 1.0, 1.0, 2, advice)
    >>> print(format_ceilings(c)[2])
      decode                      50.0 %   2.00x    1.60x    1.30x    1.45x   step
    """
    lines = [
        "Speed-up ceilings (Amdahl's formula from the critical-path share; replay of the recorded pipeline)",
        f"  {'stage':<26} {'share':>7} {'formula':>7} {'replay free':>11} {'2x':>6} {'4x':>8}   then critical",
    ]
    for r in c.stages:
        lines.append(
            f"  {r.stage[:26]:<26} {100 * r.share:5.1f} % {_x(r.amdahl_ceiling):>7}  {_x(r.free_speedup):>7}  "
            f"{_x(r.speedup_2x):>7}  {_x(r.speedup_4x):>7}   {(r.next_critical or '-')[:26]}"
        )
    a = c.advice
    advice = f"Loader workers: more can help: {a.more_workers} - {a.reason}." if a is not None else ""
    note = (
        "Why they differ: the formula assumes the stage's share of the critical path shrinks and nothing "
        "else moves. The replay re-runs the pipeline: once a stage is cheaper another one (or the step) sets "
        "the pace, work that overlapped the step gains nothing, and workers share the cores. So the replay "
        "is at most the formula when the stage lies on the path, and it can show gains the formula misses "
        "when a stage off the path frees cores for the ones on it."
    )
    if c.stages_left_out:
        lines += _wrap(
            f"{c.stages_left_out} more stage{'s' * (c.stages_left_out != 1)} (together "
            f"{100 * c.left_out_share:.1f} % of the critical path) were not replayed one by one, to keep this "
            "section quick; pipeprobe.ceilings(run, max_stages=N) replays more.", width)
    lines += _wrap(advice, width) + _wrap(note, width)
    if c.model_check is not None and c.model_check.flagged:
        lines += _wrap(model_check_text(c.model_check, "these speed-ups"), width)
    return [ln[:width] for ln in lines]


#: The report replays at most this many batches (the first ones) to keep closing a probe quick.
REPORT_MAX_BATCHES = 5000

#: The note :func:`_head` leaves on a plan it cut (its start; the batch counts follow).
_HEAD_NOTE = "ceilings replay the first "


def _is_head(plan: ReplayPlan) -> bool:
    """Whether :func:`_head` cut the plan (its replay then has no measured wall time to meet)."""
    return any(note.startswith(_HEAD_NOTE) for note in plan.notes)


def _head(plan: ReplayPlan, n: int) -> ReplayPlan:
    """The plan of the first ``n`` batches."""
    if plan.batches <= n:
        return plan
    epochs = int(np.r_[True, plan.epoch[1:n] != plan.epoch[: n - 1]].sum())
    cut = {f: getattr(plan, f)[:n] for f in ("batch_id", "epoch")}
    notes = plan.notes + [f"{_HEAD_NOTE}{n} of {plan.batches} batches"]
    return replace(
        plan, **cut, loader=plan.loader.head(n), consumer=plan.consumer.head(n),
        epoch_dispatch_s=plan.epoch_dispatch_s[:epochs], notes=notes,
    )
