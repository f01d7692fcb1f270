"""The report's verdict: what sets the pace of this run, and what a change would buy.

:func:`judge` answers two questions from the run's own analysis:

1. **What is at stake.** The run is replayed (a discrete-event simulation
   of the recorded pipeline, :func:`pipeprobe.whatif`) twice: once with
   every input-side stage free, once with the step side free (the step
   and the stages the training loop runs after a batch arrives). Each gives
   the speed-up of the whole run. Beside each stands Amdahl's ceiling
   ``1 / (1 - p)`` from that side's share ``p`` of the observed critical
   path: what freeing it could give if nothing else moved.
2. **What sets the pace.** A side sets the pace when it holds enough of
   the observed critical path that Amdahl's ceiling reaches
   :data:`~pipeprobe.critical.PACE_SPEEDUP` (1.05x), *and* freeing it buys
   at least that much in the replay: the smaller of the two decides. Input
   only: the input pipeline sets the pace; step only: the step; both: the
   two take turns (each holds part of the critical path, as in a loop that
   loads and then trains); neither: the two sides overlap and keep level,
   so only making both faster helps. When the replay cannot run, Amdahl's
   ceilings decide alone (and the verdict says so).

References
----------
.. [1] J. E. Kelley and M. R. Walker, 1959 (critical path method).
.. [2] G. M. Amdahl, AFIPS 1967 (the ceiling).
.. [3] Discrete-event simulation of the recorded pipeline (the replay).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from .critical import PACE_SPEEDUP
from .errors import PipeprobeError
from .whatif import whatif
from .whatif.laws import amdahl_ceiling

if TYPE_CHECKING:  # pragma: no cover
    from .analysis import Analysis

__all__ = ["Verdict", "judge", "PACE_INPUT", "PACE_STEP", "PACE_TURNS", "PACE_LEVEL", "PACE_NONE", "HEADINGS"]

PACE_INPUT = "input"
PACE_STEP = "step"
PACE_TURNS = "in turn"
PACE_LEVEL = "level"
PACE_NONE = "none"

#: The verdict's heading per outcome (our words; lower case by design).
HEADINGS = {
    PACE_INPUT: "the input pipeline sets the pace",
    PACE_STEP: "the training step sets the pace",
    PACE_TURNS: "input and step set the pace in turn",
    PACE_LEVEL: "input and step keep level; neither alone sets the pace",
    PACE_NONE: "no batch reached the training loop",
}


@dataclass(frozen=True)
class Verdict:
    """What sets the pace of a run, and the speed-up at stake on each side.

    Attributes
    ----------
    pace : str
        'input', 'step', 'in turn', 'level' or 'none' (no batches).
    heading : str
        The outcome in words (see :data:`HEADINGS`).
    input_share, step_share : float
        Shares of the observed critical path on the input side (loader
        stages and delivery) and on the step side (the step and the stages
        after a batch arrives).
    input_free_speedup, step_free_speedup : float
        Replayed speed-up of the whole run with that side free (NaN when
        the replay could not run).
    input_ceiling, step_ceiling : float
        Amdahl's ceiling ``1 / (1 - share)`` of each side.
    replayed_batches : int
        Batches the replay covered (0 when it did not run).
    note : str
        What the verdict had to fall back on, or ``""``.
    """

    pace: str
    heading: str
    input_share: float
    step_share: float
    input_free_speedup: float
    step_free_speedup: float
    input_ceiling: float
    step_ceiling: float
    replayed_batches: int = 0
    note: str = ""


def _free_speedups(plan: Any) -> tuple[float, float]:
    """Replayed speed-ups with the input side free and with the step side free."""
    inputs = {s: math.inf for s in plan.loader_stages}
    steps = {s: math.inf for s in plan.consumer_stages}
    s_in = whatif(plan, faster=inputs).predicted_speedup if inputs else 1.0
    s_step = whatif(plan, faster=steps).predicted_speedup if steps else 1.0
    return float(s_in), float(s_step)


def _pace(at_input: bool, at_step: bool) -> str:
    if at_input and at_step:
        return PACE_TURNS
    if at_input:
        return PACE_INPUT
    return PACE_STEP if at_step else PACE_LEVEL


def judge(analysis: Analysis, plan: Any = None) -> Verdict:
    """The verdict of a run: which side sets the pace and the speed-up at stake on each side.

    Parameters
    ----------
    analysis : Analysis
    plan : ReplayPlan, optional
        The replay plan to use (the report passes one, capped to its first
        batches); built from ``analysis.run`` by default.

    Returns
    -------
    Verdict

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=6, decode_ms=6, step_ms=2)
    >>> v = judge(pipeprobe.analyze(d))
    >>> v.pace, round(v.input_free_speedup, 6), round(v.step_free_speedup, 6)
    ('in turn', 4.0, 1.333333)

    References
    ----------
    Amdahl, G. M. (1967). Validity of the single processor approach to
    achieving large scale computing capabilities. AFIPS Conference
    Proceedings 30, 483-485. Kelley, J. E. and Walker, M. R. (1959).
    Critical-path planning and scheduling.
    """
    cp = analysis.critical
    p_in, p_step = cp.input_share, cp.step_share
    ceil_in, ceil_step = amdahl_ceiling(min(p_in, 1.0)), amdahl_ceiling(min(p_step, 1.0))
    if analysis.batches == 0:
        return Verdict(PACE_NONE, HEADINGS[PACE_NONE], p_in, p_step, math.nan, math.nan, ceil_in, ceil_step)
    note = ""
    try:
        if plan is None:
            from .whatif.plan import build_plan

            plan = build_plan(analysis.run)
        s_in, s_step = _free_speedups(plan)
        batches = int(plan.batches)
    except PipeprobeError as exc:
        s_in, s_step, batches = math.nan, math.nan, 0
        note = f"no replay ({exc}); Amdahl's ceilings from the observed critical path decide"
    judge_in = ceil_in if math.isnan(s_in) else min(s_in, ceil_in)
    judge_step = ceil_step if math.isnan(s_step) else min(s_step, ceil_step)
    pace = _pace(judge_in >= PACE_SPEEDUP, judge_step >= PACE_SPEEDUP)
    return Verdict(pace, HEADINGS[pace], p_in, p_step, s_in, s_step, ceil_in, ceil_step, batches, note)
