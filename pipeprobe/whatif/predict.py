"""Predictions: how much faster would this run be if ...?

:func:`whatif` makes a :class:`~pipeprobe.whatif.scenario.Scenario` of its
keywords (stages made faster, more workers, a deeper prefetch, more cores,
a stage moved to the accelerator side), replays the recorded run under it
(:func:`~pipeprobe.whatif.engine.replay`) and returns a :class:`Prediction`.

The replay of the unchanged configuration is the yardstick: the predicted
wall time is the measured wall time times the ratio of the two replays, so
a small bias of the model in the recorded configuration cancels out.
"""

from __future__ import annotations

import math
import os
import textwrap
from dataclasses import asdict, dataclass, field, replace
from typing import TYPE_CHECKING, Any, Iterable, Mapping

from .._jsonnum import json_ready
from ._lifecycle import UNKNOWN_START_NOTE
from ._loadrange import load_range, load_reason
from ._threadrange import range_reason, wall_range
from .engine import Replay, replay
from .plan import ReplayPlan, build_plan
from .scenario import PREFETCH_PER_WORKER, Scenario

if TYPE_CHECKING:  # pragma: no cover
    from ..load import Run

__all__ = ["Prediction", "ModelCheck", "whatif", "sweep", "check_model", "model_check_text", "format_prediction", "JSON_KEYS",
           "MODEL_MISS_LIMIT"]

#: Keys of :meth:`Prediction.to_dict` (the ``--json`` output of ``pipeprobe whatif``).
JSON_KEYS = (
    "scenario",
    "measured_wall_s",
    "baseline_replay_wall_s",
    "replayed_wall_s",
    "predicted_wall_s",
    "predicted_speedup",
    "measured_stall_fraction",
    "predicted_stall_fraction",
    "critical_path",
    "recorded",
    "notes",
    "model_check",
    "wall_range_s",
    "range_reason",
)

#: The replay of the recorded configuration may miss the measured wall time by this share before every
#: prediction of the run says so (our choice: the misses we saw on quiet machines stayed under 3 %).
MODEL_MISS_LIMIT = 0.05


@dataclass(frozen=True)
class ModelCheck:
    """How well the replay reproduces the recorded run: the model's own check.

    Attributes
    ----------
    miss : float
        ``baseline_replay_wall_s / measured_wall_s - 1`` (NaN when the run
        has no measured wall time, e.g. a plan from durations).
    flagged : bool
        ``abs(miss) > MODEL_MISS_LIMIT``: predictions from this run rest on
        a model that does not reproduce it; they are scaled by the measured
        time all the same, so read them as rough.
    likely_cause : str
        What most likely makes the replay miss (empty when not flagged).
    """

    miss: float
    flagged: bool
    likely_cause: str = ""


def check_model(plan: ReplayPlan, base: Replay) -> ModelCheck:
    """Compare the replay of the recorded configuration with the measured wall time.

    Examples
    --------
    >>> from dataclasses import replace
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> plan = plan_from_durations([0.03] * 10, [0.01] * 10, workers=3, prefetch=3, cores=4)
    >>> check_model(replace(plan, measured_wall_s=0.13), replay(plan)).flagged  # replays to 0.13 s
    False
    """
    measured = plan.measured_wall_s
    if not measured > 0:
        return ModelCheck(math.nan, False)
    miss = base.wall_s / measured - 1.0
    if abs(miss) <= MODEL_MISS_LIMIT:
        return ModelCheck(miss, False)
    return ModelCheck(miss, True, _likely_cause(plan))


def model_check_text(check: ModelCheck, what: str) -> str:
    """The sentence that says a flagged model check, for every output that shows predictions.

    Examples
    --------
    >>> print(model_check_text(ModelCheck(0.12, True, "the recorded prefetch depth was inferred"), "these speed-ups"))
    check: the replay of the recorded configuration is +12.0 % off the measured wall time (more than 5 %), so read these speed-ups as rough; likely cause: the recorded prefetch depth was inferred
    """
    return (f"check: the replay of the recorded configuration is {100 * check.miss:+.1f} % off the measured wall "
            f"time (more than {100 * MODEL_MISS_LIMIT:.0f} %), so read {what} as rough; likely cause: "
            f"{check.likely_cause}")


def _likely_cause(plan: ReplayPlan) -> str:
    """The assumption of the plan most likely to make its replay miss the recorded run."""
    if any("more than one worker" in note for note in plan.notes):
        return "batches were loaded by more than one worker, and the replay runs each batch as one task"
    if plan.workers and plan.prefetch_inferred:
        return (f"the recorded prefetch depth was inferred as {plan.prefetch}; give the real one "
                "(recorded_prefetch=, --recorded-prefetch)")
    if plan.background_cores >= 0.25:
        return (f"other processes used about {plan.background_cores:.1f} of the {plan.cores} cores, and their "
                "load changed during the run")
    if any("no CPU times" in note for note in plan.notes):
        return "no CPU times were recorded (cpu_time=False), so the replay shares no cores between tasks"
    return ("tasks slowed each other through shared hardware (memory bandwidth, caches, a step's own threads) "
            "in a way CPU times do not show")


@dataclass(frozen=True)
class Prediction:
    """What a scenario is predicted to do to the run.

    Attributes
    ----------
    scenario : Scenario
        The scenario, as checked (``faster``, ``offload``, ``workers``,
        ``prefetch``, ``cores``, ``policy``, ``in_order``; ``None`` = as recorded).
    measured_wall_s : float
        Wall time of the recorded run.
    baseline_replay_wall_s : float
        Replay of the recorded configuration (how well the model fits).
    replayed_wall_s : float
        Replay of the scenario.
    predicted_wall_s : float
        ``measured_wall_s * replayed_wall_s / baseline_replay_wall_s``.
    predicted_speedup : float
        ``measured_wall_s / predicted_wall_s``.
    measured_stall_fraction, predicted_stall_fraction : float
        Share of the wall time the training loop waited for batches.
    critical_path : dict
        Share of the predicted run's critical path per stage (user stages,
        ``step`` and parenthesised pseudo stages); the shares sum to 1.
    recorded : dict
        Configuration of the recorded run as the replay saw it: ``workers``,
        ``prefetch`` (and ``prefetch_inferred``), ``cores`` (and
        ``background_cores``, used by other processes), ``policy``,
        ``epoch_barrier``, ``batches``, ``spans``.
    notes : list of str
        Assumptions the replay had to make.
    model_check : ModelCheck or None
        How well the replay reproduces the recorded run (:func:`check_model`).
    wall_range_s : tuple of float or None
        ``(low, high)`` predicted wall seconds where the step's threads
        slowed down in ways processor sharing does not explain (or the
        scenario oversubscribes the cores beyond the recording); None when
        the one number holds.
    range_reason : str
        Why there is a range ("" without one).
    """

    scenario: Scenario
    measured_wall_s: float
    baseline_replay_wall_s: float
    replayed_wall_s: float
    predicted_wall_s: float
    predicted_speedup: float
    measured_stall_fraction: float
    predicted_stall_fraction: float
    critical_path: dict[str, float]
    recorded: dict[str, Any]
    notes: list[str] = field(default_factory=list)
    model_check: ModelCheck | None = None
    wall_range_s: tuple[float, float] | None = None
    range_reason: str = ""
    replay: Replay | None = field(default=None, repr=False, compare=False)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict with the keys :data:`JSON_KEYS` (``inf`` written as the string "inf")."""
        d = asdict(self)
        d.pop("replay", None)
        return json_ready(d)

    @property
    def bottleneck(self) -> str:
        """The stage with the largest share of the predicted critical path."""
        return max(self.critical_path, key=self.critical_path.__getitem__) if self.critical_path else ""


def _plan_of(run: Run | str | os.PathLike | ReplayPlan, keep_stages: Iterable[str], recorded_workers: Any,
             recorded_prefetch: Any, recorded_policy: str | None) -> ReplayPlan:
    """The plan to replay: ``run`` itself when it is one, else built (``keep_stages`` as their own columns)."""
    if isinstance(run, ReplayPlan):
        return run
    if isinstance(run, (str, os.PathLike)):
        from ..load import load

        run = load(run)
    return build_plan(run, workers=recorded_workers, prefetch=recorded_prefetch, policy=recorded_policy,
                      keep_stages=keep_stages)


def whatif(
    run: Run | str | os.PathLike | ReplayPlan,
    *,
    faster: Mapping[str, Any] | None = None,
    workers: int | None = None,
    prefetch: int | None = None,
    cores: int | float | None = None,
    offload: Mapping[str, Any] | None = None,
    policy: str | None = None,
    in_order: bool = True,
    recorded_workers: int | None = None,
    recorded_prefetch: int | None = None,
    recorded_policy: str | None = None,
    persistent_workers: bool = False,
) -> Prediction:
    """Predict the run's wall time under a changed configuration.

    Parameters
    ----------
    run : Run, path or ReplayPlan
        The recorded run (a loaded :class:`~pipeprobe.load.Run`, its folder,
        or a plan from :func:`pipeprobe.whatif.plan.build_plan` to reuse).
    faster : mapping of str to float, optional
        Stage name to speed-up factor: ``{"decode": 2}`` halves decode's
        time, ``math.inf`` (or ``"inf"``) makes it free. ``"step"`` is a stage.
    workers, prefetch : int, optional
        Loader workers (0: load in the training loop) and batches in flight
        (all workers together; torch's ``prefetch_factor`` is per worker, so
        ``prefetch = workers * prefetch_factor``).
    cores : float or math.inf, optional
        CPU cores the work shares (fractions for a CPU quota); by default
        the recorded machine's, less what other processes used during the run.
    offload : mapping of str to float, optional
        Loader stage to factor: move the stage to the accelerator side of
        the step, where it runs ``factor`` times faster off the CPU.
    policy : {"round-robin", "first-free"}, optional
        How the loader hands batches to workers; as detected by default.
    in_order : bool, default True
        The loader delivers batches in order.
    recorded_workers, recorded_prefetch, recorded_policy : optional
        The recorded run's loader settings when you know them (prefetch is
        otherwise inferred as the smallest depth the trace allows).
    persistent_workers : bool, default False
        Keep the loader workers across epochs: the recorded waits for new
        workers at each later epoch are replayed away
        (:func:`~pipeprobe.whatif.restart.with_persistent_workers`); the
        note says so.

    Returns
    -------
    Prediction

    Raises
    ------
    ScenarioError
        An unknown stage name, a factor that is not a number in range, a
        count out of range (:mod:`pipeprobe.whatif.limits`), or a run
        without batches.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=4, decode_ms=6, step_ms=2)
    >>> p = pipeprobe.whatif(d, faster={"decode": 2})
    >>> round(p.predicted_speedup, 6)
    1.6

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
    .. [2] G. M. Amdahl, "Validity of the single processor approach to
       achieving large scale computing capabilities", AFIPS 1967 (the
       classical bound the replay refines; see :mod:`pipeprobe.whatif.ceilings`).
    """
    scenario = Scenario(faster=faster or {}, offload=offload or {}, workers=workers, prefetch=prefetch, cores=cores,
                        policy=policy, in_order=in_order)
    plan = _plan_of(run, scenario.stages, recorded_workers, recorded_prefetch, recorded_policy)
    return predict(plan, replay(plan), scenario, persistent_workers=persistent_workers)


def _lifecycle_notes(plan: ReplayPlan, workers: int) -> list[str]:
    """What the prediction says about starting and stopping workers (:mod:`pipeprobe.whatif._lifecycle`)."""
    lc = plan.lifecycle
    if lc is None or workers == plan.workers:
        return []
    if not lc.known:
        return [UNKNOWN_START_NOTE] if workers > plan.workers else []
    last_s = lc.boots(workers)[-1] if workers else 0.0
    return [f"worker start and stop ({lc.source}): {lc.fork_s * 1e3:.1f} ms in the loop per worker started, "
            f"{lc.stop_s * 1e3:.1f} ms per worker stopped, first task {last_s * 1e3:.1f} ms after the epoch's "
            "first ask for the last worker started"]


def predict(plan: ReplayPlan, base: Replay, scenario: Scenario, *, persistent_workers: bool = False) -> Prediction:
    """The prediction of ``scenario`` for ``plan``, whose unchanged replay is ``base``.

    The predicted wall time is the measured one times the ratio of the two
    replays, so a small bias of the model in the recorded configuration
    cancels out. ``persistent_workers``: replay with the loader workers kept
    across epochs (:func:`~pipeprobe.whatif.restart.with_persistent_workers`).
    """
    notes = list(plan.notes)
    if persistent_workers:
        from .restart import with_persistent_workers

        plan = with_persistent_workers(plan)
        notes.append("persistent workers: no wait for new workers at later epochs")
    rep = replay(plan, scenario.check_stages(plan))
    notes += _lifecycle_notes(plan, rep.config["workers"])
    if plan.workers == 0 and scenario.prefetch is None and rep.config["workers"] > 0:
        notes.append(f"prefetch: {rep.config['prefetch']} batches in flight, {PREFETCH_PER_WORKER} per worker "
                     "(torch's default; the recorded run loaded in the training loop); set it with prefetch=")
    measured = plan.measured_wall_s
    if base.wall_s > 0:
        predicted = measured * rep.wall_s / base.wall_s if measured > 0 else rep.wall_s
    else:
        predicted = rep.wall_s
    return Prediction(
        scenario=scenario,
        measured_wall_s=measured,
        baseline_replay_wall_s=base.wall_s,
        replayed_wall_s=rep.wall_s,
        predicted_wall_s=predicted,
        predicted_speedup=measured / predicted if predicted > 0 else math.inf,
        measured_stall_fraction=plan.measured_stall_s / measured if measured > 0 else 0.0,
        predicted_stall_fraction=rep.stall_fraction,
        critical_path=rep.critical_path_shares,
        recorded=_recorded(plan),
        notes=notes,
        model_check=check_model(plan, base),
        **_ranges(plan, base.wall_s, scenario, predicted),
        replay=rep,
    )


def _thread_range(plan: ReplayPlan, base_wall_s: float, scenario: Scenario, predicted_s: float) -> dict[str, Any]:
    """The ``wall_range_s`` and ``range_reason`` of a prediction (see :mod:`pipeprobe.whatif._threadrange`)."""
    reason = range_reason(plan, scenario)
    if not reason:
        return {}
    return {"wall_range_s": wall_range(plan, base_wall_s, scenario, predicted_s), "range_reason": reason}


def _ranges(plan: ReplayPlan, base_wall_s: float, scenario: Scenario, predicted_s: float) -> dict[str, Any]:
    """The thread range and the load range (:mod:`pipeprobe.whatif._loadrange`) merged: the span of both,
    both reasons."""
    out = _thread_range(plan, base_wall_s, scenario, predicted_s)
    reason = load_reason(plan, scenario)
    if reason:
        low, high = load_range(plan, base_wall_s, scenario, predicted_s)
        if out:
            low, high = min(low, out["wall_range_s"][0]), max(high, out["wall_range_s"][1])
            reason = f"{out['range_reason']}; {reason}"
        out = {"wall_range_s": (low, high), "range_reason": reason}
    return _with_even_share(plan, base_wall_s, scenario, out)


def _with_even_share(plan: ReplayPlan, base_wall_s: float, scenario: Scenario, out: dict[str, Any]) -> dict[str, Any]:
    """A range of a plan whose step pool spins, predicted with its threads together: its low end shares the cores
    evenly (processor sharing), and the reason says why the prediction did not."""
    if not out or plan.step_together <= 1.0:
        return out
    measured = plan.measured_wall_s
    scale = measured / base_wall_s if measured > 0 and base_wall_s > 0 else 1.0
    even = replay(replace(plan, step_together=1.0), scenario).wall_s * scale
    low, high = out["wall_range_s"]
    reason = (f"{out['range_reason']}; the step's pool kept its threads spinning after each step "
              f"({1e3 * plan.spin_s:.1f} ms), so the prediction runs them only together while the cores are "
              "oversubscribed, the low end shares the cores evenly")
    return {"wall_range_s": (min(low, even), max(high, even)), "range_reason": reason}


def _recorded(plan: ReplayPlan) -> dict[str, Any]:
    """The recorded configuration as the replay saw it."""
    return {"workers": plan.workers, "prefetch": plan.prefetch, "prefetch_inferred": plan.prefetch_inferred,
            "cores": plan.cores, "background_cores": plan.background_cores, "policy": plan.policy,
            "epoch_barrier": plan.epoch_barrier, "batches": plan.batches, "spans": plan.spans}


def sweep(
    run: Run | str | os.PathLike | ReplayPlan,
    scenarios: Iterable[Mapping[str, Any] | Scenario],
    *,
    recorded_workers: int | None = None,
    recorded_prefetch: int | None = None,
    recorded_policy: str | None = None,
) -> list[Prediction]:
    """Predict several scenarios of one run, building its plan and baseline replay once.

    Parameters
    ----------
    run : Run, path or ReplayPlan
    scenarios : iterable of dict or Scenario
        Each a :class:`~pipeprobe.whatif.scenario.Scenario` or the keywords
        of one (``faster``, ``workers``, ...), as :func:`whatif` takes them.

    Returns
    -------
    list of Prediction

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=2, decode_ms=6, step_ms=2)
    >>> [round(p.predicted_speedup, 6) for p in pipeprobe.whatif_sweep(d, [{}, {"faster": {"decode": 2}}])]
    [1.0, 1.6]

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
    """
    checked = [s if isinstance(s, Scenario) else Scenario(**dict(s)) for s in scenarios]
    stages = [name for s in checked for name in s.stages]
    plan = _plan_of(run, stages, recorded_workers, recorded_prefetch, recorded_policy)
    base = replay(plan)
    return [predict(plan, base, s) for s in checked]


def format_prediction(p: Prediction) -> str:
    """Plain-text summary of a prediction, as ``pipeprobe whatif`` prints it.

    Examples
    --------
    >>> recorded = {"workers": 2, "prefetch": 4, "prefetch_inferred": True, "cores": 8, "background_cores": 0.0,
    ...             "policy": "first-free"}
    >>> p = Prediction(Scenario(faster={"decode": 2.0}), 10.0, 9.9, 7.92, 8.0, 1.25, 0.4, 0.25, {"step": 0.6},
    ...                recorded)
    >>> print(format_prediction(p).splitlines()[1])
      measured wall     10.000 s   stall 40.0 %
    >>> print(format_prediction(p).splitlines()[3])
      recorded: 2 workers, prefetch 4 batches in flight (inferred), 8 cores, first-free
    """
    lines = [
        f"what if: {p.scenario.describe()}",
        f"  measured wall  {p.measured_wall_s:9.3f} s   stall {100 * p.measured_stall_fraction:.1f} %",
        f"  predicted wall {p.predicted_wall_s:9.3f} s   stall {100 * p.predicted_stall_fraction:.1f} %   "
        f"speed-up {p.predicted_speedup:.2f}x",
        f"  recorded: {_describe_recorded(p.recorded)}",
        f"  (replay of the recorded configuration: {p.baseline_replay_wall_s:.3f} s)",
    ]
    if p.wall_range_s is not None:
        lines += textwrap.wrap(
            f"range: {p.wall_range_s[0]:.3f} s to {p.wall_range_s[1]:.3f} s, not one number: {p.range_reason}",
            width=100, initial_indent="  ", subsequent_indent="    ")
    if p.model_check is not None and p.model_check.flagged:
        lines += textwrap.wrap(model_check_text(p.model_check, "this prediction"), width=100,
                               initial_indent="  ", subsequent_indent="    ")
    if p.predicted_speedup < 0.995:
        lines += textwrap.wrap(f"slower because {_why_slower(p)}", width=100, initial_indent="  ",
                               subsequent_indent="    ")
    lines.append("  predicted critical path:")
    for name, share in sorted(p.critical_path.items(), key=lambda kv: -kv[1]):
        if share >= 0.005:
            lines.append(f"    {name[:30]:<30} {100 * share:5.1f} %")
    for note in p.notes:
        lines.append(f"  note: {note}")
    return "\n".join(lines)


def _why_slower(p: Prediction) -> str:
    """What in the scenario makes the replay slower than the recorded run."""
    sc, rec = p.scenario, p.recorded
    reasons = [f"{stage} is {1 / k:g}x slower" for stage, k in {**sc.faster, **sc.offload}.items() if k < 1]
    workers, recorded_workers = sc.workers, rec.get("workers")
    cores = sc.cores if sc.cores is not None else rec.get("cores")
    if workers is not None and recorded_workers is not None and workers > recorded_workers \
            and cores is not None and workers + 1 > cores:
        reasons.append(f"{workers} workers and the training loop share {cores:g} cores, so every task runs slower")
    elif workers is not None and recorded_workers is not None and workers < recorded_workers:
        reasons.append(f"fewer workers than the recorded {recorded_workers}")
    if sc.prefetch is not None and rec.get("prefetch") is not None and sc.prefetch < rec["prefetch"]:
        reasons.append(f"fewer batches in flight than the recorded {rec['prefetch']}")
    if sc.cores is not None and rec.get("cores") is not None and sc.cores < rec["cores"]:
        reasons.append(f"fewer cores than the recorded {rec['cores']}")
    if sc.policy is not None and sc.policy != rec.get("policy"):
        reasons.append(f"the {sc.policy} policy hands out batches worse for this run's task times")
    return "; ".join(reasons) or "of how this run's batches fall on the workers (the replay shows no single cause)"


def _describe_recorded(rec: Mapping[str, Any]) -> str:
    """The recorded configuration in words: workers, prefetch, cores, policy."""
    if not rec:
        return "unknown"
    workers = rec["workers"]
    loading = "loading in the training loop" if workers == 0 else f"{workers} worker{'s' * (workers != 1)}"
    parts = [loading]
    if workers:
        inferred = " (inferred)" if rec.get("prefetch_inferred") else ""
        parts.append(f"prefetch {rec['prefetch']} batches in flight{inferred}")
    cores = f"{rec['cores']} cores"
    if rec.get("background_cores", 0.0) >= 0.05:
        cores += f" ({rec['background_cores']:.1f} busy with other processes)"
    parts.append(cores)
    if workers:
        parts.append(str(rec["policy"]))
    return ", ".join(parts)
