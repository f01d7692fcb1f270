"""One entry point for the analysis: :func:`analyze` a run into an :class:`Analysis`.

The :class:`Analysis` collects the dependency timeline, the critical path
and its attribution, the stalls, the per-stage statistics and the
suggested actions. The verdict (what sets the pace, what a change would
buy) needs the replay and is made one layer up, in :mod:`pipeprobe.pace`. The report, the what-if replay and the plots read
from it; nothing in it is recomputed by them.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from ._progress import progress, step
from .critical import DELIVERY, GAP, PACE_SPEEDUP, CriticalPath
from .load import Run, load
from .stagestats import StageStats, stage_stats
from .stalls import Stalls, stall_summary
from .stretches import condense, timeline_and_path
from .threads import ThreadCheck, check_threads
from .timeline import Timeline

__all__ = ["Analysis", "Action", "analyze", "suggest_actions", "thread_actions"]

# Thresholds for suggesting an action (shares of wall time; our choices).
_DELIVERY_WORTH = 0.05
_GAP_WORTH = 0.10
_TAIL_WORTH = 0.10  # slowest samples' share of a stage must exceed this ...
_TAIL_OVER = 3.0  # ... and be this many times their share of the samples
#: A side whose share of the critical path gives an Amdahl ceiling under PACE_SPEEDUP is not worth an action.
_SIDE_WORTH = 1.0 - 1.0 / PACE_SPEEDUP


@dataclass(frozen=True)
class Action:
    """A suggested change, with the time it is about.

    Attributes
    ----------
    kind : str
        'stage', 'step', 'workers', 'tail', 'delivery', 'gap', 'warmup' or 'threads'.
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
    actions : tuple of Action
        Suggested changes, largest time at stake first (the report shows three).
    """

    run: Run
    timeline: Timeline
    critical: CriticalPath
    stalls: Stalls
    stages: StageStats
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
        return (f"<pipeprobe.Analysis {str(self.run.run_dir)!r}: {self.batches} batches, "
                f"stall {100 * self.stalls.fraction:.1f} %, {self.wall_s:.3f} s>")


def analyze(run: Run | str | os.PathLike, *, warmup_batches: int | None = None) -> Analysis:
    """Analyse a run: timeline, critical path, stalls, stage statistics, actions.

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
    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=4, decode_ms=6, step_ms=2)
    >>> a = pipeprobe.analyze(d)
    >>> round(a.critical.input_share, 6), round(a.critical.step_share, 6)
    (0.75, 0.25)
    >>> {k: round(v, 6) for k, v in a.stage_shares().items()}
    {'decode': 0.75, 'step': 0.25}

    References
    ----------
    Kelley, J. E. and Walker, M. R. (1959). Critical-path planning and
    scheduling (critical path method). Amdahl, G. M. (1967). Validity of
    the single processor approach to achieving large scale computing
    capabilities (the share of time a change touches bounds its gain).
    """
    with progress("analysis"):  # one line on stderr when this takes more than a couple of seconds
        if not isinstance(run, Run):
            run = load(run)
        run = condense(run)  # a windowed run: its stretches end to end (stretches.py)
        step("timeline and critical path")
        timeline, critical = timeline_and_path(run)
        step("stalls")
        stalls = stall_summary(run, critical, warmup_batches=warmup_batches)
        step("stage table")
        stages = stage_stats(run, critical, stalls, input_on_path=critical.input_share >= _SIDE_WORTH)
        actions = suggest_actions(critical, stalls, stages, workers_restart=workers_restarted(run),
                                  threads=check_threads(run))
    return Analysis(run=run, timeline=timeline, critical=critical, stalls=stalls, stages=stages,
                    actions=tuple(actions))


def _pct(x: float) -> str:
    return f"{100 * x:.0f} %"


def workers_restarted(run: Run) -> bool:
    """True when a later epoch's loader work ran in worker processes no earlier epoch used."""
    sp = run.spans
    if sp.empty or "role" not in sp:
        return False
    epoch = sp["epoch"].to_numpy(np.int64)
    w = np.flatnonzero((sp["role"] == "worker").to_numpy() & (epoch >= 0))
    if not len(w):
        return False
    epoch = epoch[w]
    pid, pids = pd.factorize(sp["pid"].to_numpy(np.int64)[w])
    first = np.full(len(pids), np.iinfo(np.int64).max)
    np.minimum.at(first, pid, epoch)  # each worker process's first epoch
    return bool((first > epoch.min()).any())  # a process whose first epoch came after the run's first


def suggest_actions(critical: CriticalPath, stalls: Stalls, stages: StageStats, *,
                    workers_restart: bool = False, threads: ThreadCheck | None = None) -> list[Action]:
    """Candidate actions, largest time at stake first.

    An input-side action needs the input side to hold enough of the
    critical path that freeing it could buy :data:`~pipeprobe.critical.PACE_SPEEDUP`
    by Amdahl's law, and the loop to have waited; a step action likewise
    for the step side.

    Parameters
    ----------
    critical, stalls, stages
        The parts of an :class:`Analysis`.
    workers_restart : bool, default False
        Loader workers were started again for a later epoch (the warm-up
        action is given only then).
    threads : ThreadCheck, optional
        The thread check (:func:`pipeprobe.threads.check_threads`); when it
        found the cores oversubscribed, its fix is an action (:func:`thread_actions`).

    Returns
    -------
    list of Action

    Examples
    --------
    >>> import pipeprobe, tempfile, time
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for batch in probe.watch([[0]]):
    ...         with probe.step():
    ...             time.sleep(0.02)  # a step far longer than handing over the batch, even on a busy machine
    >>> a = pipeprobe.analyze(d)
    >>> a.actions[0].kind
    'step'

    References
    ----------
    Amdahl, G. M. (1967). Validity of the single processor approach to
    achieving large scale computing capabilities. AFIPS Conference
    Proceedings 30, 483-485 (time at stake = the share a change touches).
    """
    wall = critical.wall_s
    if len(stalls.per_batch) == 0:
        return [Action("gap", "No batch reached a watched loop: wrap the loader with probe.watch() and the "
                       "step with probe.step() to see stalls and the critical path", wall)]
    input_on = critical.input_share >= _SIDE_WORTH and stalls.total_s > 0
    step_on = critical.step_share >= _SIDE_WORTH
    out = _input_actions(critical, stalls, stages, input_on, step_on)
    out += _step_actions(critical, input_on, step_on)
    out += _path_actions(critical)
    if workers_restart:
        out += _warmup_actions(stalls, wall)
    return list(thread_actions(out, threads))


def thread_actions(actions: list[Action] | tuple[Action, ...], threads: ThreadCheck | None) -> tuple[Action, ...]:
    """``actions`` with the thread check's fix in place of any earlier one, largest time at stake first.

    When the check found the step's math-library threads and the loader
    workers wanting more CPU than the cores (``threads.oversubscribed``),
    the action is its fix in concrete terms (``threads.advice``: how many
    step threads, how many workers on this machine), at stake the time the
    steps lost beside busy workers (``threads.cost_s``). Without thread
    facts, or when the threads fit, no thread action.

    Parameters
    ----------
    actions : sequence of Action
    threads : ThreadCheck or None

    Returns
    -------
    tuple of Action

    Examples
    --------
    >>> from pipeprobe.threads import ThreadCheck
    >>> check = ThreadCheck(None, cores=2, step_threads=2, workers=1, oversubscribed=True, cost_s=0.06,
    ...                     slowdown=2.0, advice="give the step 1 thread beside 1 worker on 2 cores")
    >>> [(a.kind, a.seconds) for a in thread_actions([Action("step", "Make the step faster", 0.1)], check)]
    [('step', 0.1), ('threads', 0.06)]

    References
    ----------
    L. Kleinrock, *Queueing Systems, Volume 2*, Wiley, 1976, ch. 4 (processor sharing: the cost measured).
    """
    out = [a for a in actions if a.kind != "threads"]
    fits = threads is None or threads.skipped is not None or not threads.oversubscribed or not threads.advice
    if not fits and threads.workers == 0:  # beside other processes: the step's own action carries the fix
        fix = (f"; first fit its {threads.step_threads} math-library threads to the cores other processes left: "
               f"{threads.advice}")
        out = [replace(a, text=a.text + fix) if a.kind == "step" else a for a in out]
    elif not fits:
        slower = (f"; steps ran {threads.slowdown:.2f}x slower beside busy workers"
                  if math.isfinite(threads.slowdown) and threads.slowdown > 1.0 else "")
        out.append(Action("threads", f"Fit the threads to the {threads.cores} cores: the step's math-library "
                                     f"threads ({threads.step_threads}) and {threads.workers} loader worker(s) "
                                     f"wanted more{slower}: {threads.advice}", float(threads.cost_s)))
    out.sort(key=lambda a: -a.seconds)
    return tuple(out)


def _input_actions(critical: CriticalPath, stalls: Stalls, stages: StageStats, input_on: bool,
                   step_on: bool) -> list[Action]:
    """The leading input stage, its slowest samples, and the worker advice."""
    out: list[Action] = []
    sh = critical.shares
    inp = sh[(sh["side"] == "input") & (sh["kind"] == "stage")]
    if input_on and len(inp):
        top = inp.iloc[0]
        row = stages.table[stages.table["label"] == top["label"]]
        mean = f", {1e3 * float(row['own_s'].iloc[0] / row['count'].iloc[0]):.2f} ms per span" if len(row) else ""
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
    if input_on and stages.more_workers == "yes" and stalls.steady_s > 0:
        out.append(Action("workers", f"Add loader workers: {stages.more_workers_reason}", stalls.steady_s))
    elif input_on and not step_on and stages.more_workers == "no":
        out.append(Action("workers", f"Do not add workers: {stages.more_workers_reason}", 0.0))
    return out


def _step_actions(critical: CriticalPath, input_on: bool, step_on: bool) -> list[Action]:
    sh = critical.shares
    secs = float(sh.loc[sh["side"] == "consumer", "seconds"].sum())
    if secs <= 0 or not (step_on or not input_on):
        return []
    share = secs / critical.wall_s if critical.wall_s else 0.0
    tail = "and the input keeps up" if not input_on else "taking turns with the input"
    return [Action("step", f"Make the step faster: the step side holds {_pct(share)} of the critical path "
                           f"{tail}", secs)]


def _path_actions(critical: CriticalPath) -> list[Action]:
    """Deliveries and unexplained gaps that hold a large share of the path."""
    out: list[Action] = []
    sh = critical.shares
    wall = critical.wall_s
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
    return out


def _warmup_actions(stalls: Stalls, wall: float) -> list[Action]:
    """Keep workers alive: only for runs whose workers start again each epoch."""
    extra = stalls.warmup_extra_s
    if wall <= 0 or extra / wall < 0.05:
        return []
    return [Action("warmup", f"Warm-up costs {extra:.3f} s of extra stall (first {stalls.warmup_batches} "
                             "batch(es) of each epoch) and the loader starts new workers each epoch: keep them "
                             "alive across epochs (e.g. persistent workers)", extra)]
