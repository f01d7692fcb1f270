"""One entry point for the analysis: :func:`analyze` a run into an :class:`Analysis`.

The :class:`Analysis` collects the dependency timeline, the critical path
and its attribution, the stalls, the per-stage statistics, the verdict and
the suggested actions. The report, the what-if replay and the plots read
from it; nothing in it is recomputed by them.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

from .critical import DELIVERY, GAP, CriticalPath, critical_path
from .load import Run, load
from .stagestats import StageStats, stage_stats
from .stalls import INPUT_BOUND, NO_BATCHES, STEP_BOUND, Stalls, Verdict, stall_summary, verdict
from .timeline import Timeline, build_timeline

__all__ = ["Analysis", "Action", "analyze"]

# Thresholds for suggesting an action (shares of wall time; our choices).
_DELIVERY_WORTH = 0.05
_GAP_WORTH = 0.10
_TAIL_WORTH = 0.10  # slowest samples' share of a stage must exceed this ...
_TAIL_OVER = 3.0  # ... and be this many times their share of the samples


@dataclass(frozen=True)
class Action:
    """A suggested change, with the time it is about.

    Attributes
    ----------
    kind : str
        'stage', 'step', 'workers', 'tail', 'delivery', 'gap' or 'warmup'.
    text : str
        What to do and why, in one sentence.
    seconds : float
        Wall time at stake: the critical-path or stall time the action
        addresses. An upper bound on what it can save, not a prediction.
    """

    kind: str
    text: str
    seconds: float


@dataclass(frozen=True)
class Analysis:
    """Everything pipeprobe found out about one run.

    Attributes
    ----------
    run : Run
        The loaded run.
    timeline : Timeline
        Dependency graph; ``timeline.nodes`` has the lanes (``lane``,
        ``pid``, ``tid``) of every node.
    critical : CriticalPath
        Critical path (``critical.path``: its nodes in time order) and the
        attribution of wall time (``critical.shares``, ``critical.segments``).
    stalls : Stalls
        Stall totals and fractions, per epoch and per batch
        (``stalls.per_batch`` has each stall's interval ``wait_start_s`` to
        ``ready_s`` and its blame).
    stages : StageStats
        Per-stage statistics, slowest samples and the CPU view.
    verdict : Verdict
        Input-bound, step-bound or balanced, with the numbers behind it.
    actions : tuple of Action
        Suggested changes, largest time at stake first (the report shows three).
    """

    run: Run
    timeline: Timeline
    critical: CriticalPath
    stalls: Stalls
    stages: StageStats
    verdict: Verdict
    actions: tuple[Action, ...]

    @property
    def wall_s(self) -> float:
        """Wall time of the run (what the attribution adds up to)."""
        return self.critical.wall_s

    @property
    def batches(self) -> int:
        """Batches delivered to the training loop."""
        return int(len(self.run.batches))

    def stage_shares(self) -> dict[str, float]:
        """Critical-path share of wall time per label (stages, 'step', 'delivery', 'unexplained gap')."""
        sh = self.critical.shares
        return {str(k): float(v) for k, v in zip(sh["label"], sh["share"], strict=True)}

    def __repr__(self) -> str:
        return (f"<pipeprobe.Analysis {str(self.run.run_dir)!r}: {self.verdict.word}, "
                f"stall {100 * self.stalls.fraction:.1f} %, {self.wall_s:.3f} s>")


def analyze(run: Run | str | os.PathLike, *, warmup_batches: int | None = None) -> Analysis:
    """Analyse a run: timeline, critical path, stalls, stage statistics, verdict, actions.

    Parameters
    ----------
    run : Run or path-like
        A loaded run, or a run directory to :func:`pipeprobe.load`.
    warmup_batches : int, optional
        Warm-up batches per epoch, left out of the steady-state stall
        fraction (default: one per loader worker process, at least 1).

    Returns
    -------
    Analysis

    Raises
    ------
    RunNotFoundError, TraceFormatError
        When given a path that :func:`pipeprobe.load` cannot read.

    Examples
    --------
    >>> import pipeprobe, tempfile, time
    >>> d = tempfile.mkdtemp()
    >>> def batches():
    ...     for b in range(4):
    ...         with pipeprobe.stage("decode", sample=b):
    ...             time.sleep(0.006)
    ...         yield [b]
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for batch in probe.watch(batches()):
    ...         with probe.step():
    ...             time.sleep(0.002)
    >>> a = pipeprobe.analyze(d)
    >>> a.verdict.word
    'input-bound'
    >>> abs(sum(a.stage_shares().values()) - 1.0) < 1e-9
    True

    References
    ----------
    Kelley, J. E. and Walker, M. R. (1959). Critical-path planning and
    scheduling (critical path method). Amdahl, G. M. (1967). Validity of
    the single processor approach to achieving large scale computing
    capabilities (the share of time a change touches bounds its gain).
    """
    if not isinstance(run, Run):
        run = load(run)
    timeline = build_timeline(run)
    critical = critical_path(timeline)
    stalls = stall_summary(run, critical, warmup_batches=warmup_batches)
    v = verdict(stalls, critical)
    stages = stage_stats(run, critical, stalls, v.word)
    actions = suggest_actions(critical, stalls, stages, v)
    return Analysis(run=run, timeline=timeline, critical=critical, stalls=stalls, stages=stages, verdict=v,
                    actions=tuple(actions))


def _pct(x: float) -> str:
    return f"{100 * x:.0f} %"


def suggest_actions(critical: CriticalPath, stalls: Stalls, stages: StageStats, v: Verdict) -> list[Action]:
    """Candidate actions, largest time at stake first.

    Parameters
    ----------
    critical, stalls, stages, v
        The parts of an :class:`Analysis`.

    Returns
    -------
    list of Action

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for batch in probe.watch([[0]]):
    ...         with probe.step():
    ...             total = sum(range(100000))
    >>> a = pipeprobe.analyze(d)
    >>> a.actions[0].kind
    'step'

    References
    ----------
    Amdahl, G. M. (1967). Validity of the single processor approach to
    achieving large scale computing capabilities. AFIPS Conference
    Proceedings 30, 483-485 (time at stake = the share a change touches).
    """
    out: list[Action] = []
    sh = critical.shares
    wall = critical.wall_s
    if v.word == NO_BATCHES:
        return [Action("gap", "No batch reached a watched loop: wrap the loader with probe.watch() and the "
                       "step with probe.step() to see stalls and the critical path", wall)]
    inp = sh[(sh["side"] == "input") & (sh["kind"] == "stage")]
    step_like = sh[sh["side"] == "consumer"]
    if v.word != STEP_BOUND and len(inp):
        top = inp.iloc[0]
        row = stages.table[stages.table["stage"] == top["label"]]
        mean = f", {1e3 * float(row['mean_s'].iloc[0]):.2f} ms per span" if len(row) else ""
        out.append(Action("stage", f"Make '{top['label']}' cheaper: it holds {_pct(top['share'])} of the "
                                   f"critical path{mean}", float(top["seconds"])))
        tail = stages.tail_of(str(top["label"]))
        if tail is not None:
            count_share = tail["samples"] / max(1, tail["of_samples"])
            if tail["share"] >= _TAIL_WORTH and tail["share"] >= _TAIL_OVER * count_share:
                ids = ", ".join(str(i) for i in tail["sample_ids"][:5]) + (", ..." if tail["samples"] > 5 else "")
                out.append(Action("tail", f"Look at the {tail['samples']} slowest samples of '{top['label']}' "
                                          f"(ids {ids}): they cost {_pct(tail['share'])} of its time",
                                  float(top["seconds"]) * float(tail["share"])))
    if v.word != STEP_BOUND and stages.more_workers == "yes":
        out.append(Action("workers", f"Add loader workers: {stages.more_workers_reason}", stalls.steady_s))
    elif v.word == INPUT_BOUND and stages.more_workers == "no":
        out.append(Action("workers", f"Do not add workers: {stages.more_workers_reason}", 0.0))
    if len(step_like) and (v.word != INPUT_BOUND or not len(inp)):
        secs = float(step_like["seconds"].sum())
        out.append(Action("step", f"Make the step faster: the step side holds {_pct(secs / wall if wall else 0)} "
                                  "of the critical path and the input keeps up", secs))
    deliv = float(sh.loc[sh["label"] == DELIVERY, "seconds"].sum())
    if wall > 0 and deliv / wall >= _DELIVERY_WORTH:
        out.append(Action("delivery", f"Batches spend {_pct(deliv / wall)} of the critical path between being "
                                      "ready and reaching the loop: make them smaller to pass between processes, "
                                      "or raise prefetch so they wait in the queue instead", deliv))
    gap = float(sh.loc[sh["label"] == GAP, "seconds"].sum())
    if wall > 0 and gap / wall >= _GAP_WORTH:
        ends = critical.head_s + critical.tail_s
        where = (f" ({critical.head_s:.3f} s before the first span, {critical.tail_s:.3f} s after the last step)"
                 if ends > 0.01 * wall else "")
        out.append(Action("gap", f"{_pct(gap / wall)} of the critical path is time when nothing recorded ran"
                                 f"{where}: time more of the run with pipeprobe.stage() to see what it is", gap))
    pb = stalls.per_batch
    if len(pb):
        warm = pb["warmup"].to_numpy(bool)
        steady_mean = float(pb.loc[~warm, "wait_s"].mean()) if (~warm).any() else 0.0
        extra = stalls.warmup_s - int(warm.sum()) * steady_mean  # beyond what those batches would wait anyway
        if wall > 0 and extra / wall >= 0.05:
            out.append(Action("warmup", f"Warm-up costs {extra:.3f} s of extra stall (first "
                                        f"{stalls.warmup_batches} batch(es) of each epoch): keep workers alive "
                                        "across epochs or start them before the loop", extra))
    out.sort(key=lambda a: -a.seconds)
    return out

