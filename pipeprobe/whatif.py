"""What-if scenarios: how much faster would this run be if ...?

:func:`whatif` checks a scenario (stages made faster, more workers, a
deeper prefetch, more cores, a stage moved to the accelerator side),
replays the recorded run under it (:mod:`pipeprobe.replay`) and returns a
:class:`Prediction`. :func:`parse_factors` reads the ``STAGE=FACTOR``
pairs of the command line.

The replay of the unchanged configuration is the yardstick: the predicted
wall time is the measured wall time times the ratio of the two replays, so
a small bias of the model in the recorded configuration cancels out.
"""

from __future__ import annotations

import math
import numbers
import os
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Any, Iterable, Mapping

from .errors import ScenarioError
from .replay import POLICIES, PSEUDO_STAGES, Replay, ReplayPlan, build_plan, replay

if TYPE_CHECKING:  # pragma: no cover
    from .load import Run

__all__ = ["Prediction", "whatif", "sweep", "parse_factors", "format_prediction", "check_scenario", "JSON_KEYS"]

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
)


@dataclass(frozen=True)
class Prediction:
    """What a scenario is predicted to do to the run.

    Attributes
    ----------
    scenario : dict
        The scenario, as checked (``faster``, ``offload``, ``workers``,
        ``prefetch``, ``cores``, ``policy``; ``None`` = as recorded).
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
        Configuration of the recorded run as the replay saw it.
    notes : list of str
        Assumptions the replay had to make.
    """

    scenario: dict[str, Any]
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
    replay: Replay | None = field(default=None, repr=False, compare=False)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict with the keys :data:`JSON_KEYS` (``inf`` written as the string "inf")."""
        d = asdict(self)
        d.pop("replay", None)
        return _jsonable(d)

    @property
    def bottleneck(self) -> str:
        """The stage with the largest share of the predicted critical path."""
        return max(self.critical_path, key=self.critical_path.__getitem__) if self.critical_path else ""


def _jsonable(x: Any) -> Any:
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, float) and math.isinf(x):
        return "inf" if x > 0 else "-inf"
    if isinstance(x, numbers.Integral) and not isinstance(x, bool):
        return int(x)
    if isinstance(x, numbers.Real) and not isinstance(x, bool):
        return float(x)
    return x


def _factor(stage: str, value: Any, what: str) -> float:
    if isinstance(value, str):
        text = value.strip().lower()
        try:
            value = math.inf if text in ("inf", "free") else float(text)
        except ValueError:
            raise ScenarioError(
                f"{what} {stage}={value!r}: the factor must be a number > 0 (2 = twice as fast, inf = free)"
            ) from None
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or math.isnan(float(value)):
        raise ScenarioError(
            f"{what} {stage}={value!r}: the factor must be a number > 0 (2 = twice as fast, inf = free)"
        )
    value = float(value)
    if value <= 0:
        raise ScenarioError(
            f"{what} {stage}={value:g}: the factor must be > 0 (2 = twice as fast, 0.5 = twice as slow, inf = free)"
        )
    return value


def _count(name: str, value: Any, minimum: int, allow_inf: bool = False) -> float | int | None:
    if value is None:
        return None
    if allow_inf and isinstance(value, (float, str)) and str(value).strip().lower() == "inf":
        return math.inf
    if isinstance(value, str):
        try:
            value = int(value)
        except ValueError:
            raise ScenarioError(f"{name}={value!r}: give a whole number >= {minimum}") from None
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or int(value) < minimum:
        inf_hint = " or inf" if allow_inf else ""
        raise ScenarioError(f"{name}={value!r}: give a whole number >= {minimum}{inf_hint}")
    return int(value)


def _cores(value: Any) -> float | None:
    """Cores the work shares: a number > 0 (fractions for CPU quotas), or inf."""
    if value is None:
        return None
    try:
        number = float(value) if isinstance(value, (str, numbers.Real)) and not isinstance(value, bool) else None
    except ValueError:
        number = None
    if number is None or math.isnan(number) or number <= 0:
        raise ScenarioError(f"cores={value!r}: give a number of cores > 0 (e.g. 4, or 1.5 for a CPU quota) or inf")
    return number


def check_scenario(
    plan: ReplayPlan,
    *,
    faster: Mapping[str, Any] | None = None,
    workers: Any = None,
    prefetch: Any = None,
    cores: Any = None,
    offload: Mapping[str, Any] | None = None,
    policy: str | None = None,
    in_order: bool = True,
) -> dict[str, Any]:
    """Check a scenario against a plan and return it normalised.

    Raises
    ------
    ScenarioError
        Unknown stage names, factors that are not numbers > 0, counts out
        of range, an unknown policy; the message says what to give instead.
    """
    known = plan.loader_stages + [s for s in plan.consumer_stages if s not in plan.loader_stages]
    known = [s for s in known if s not in PSEUDO_STAGES]
    out_faster: dict[str, float] = {}
    for stage, value in dict(faster or {}).items():
        if stage not in known:
            raise ScenarioError(
                f"faster: unknown stage {stage!r}; this run's stages are {', '.join(known)}"
            )
        out_faster[stage] = _factor(stage, value, "faster")
    out_offload: dict[str, float] = {}
    for stage, value in dict(offload or {}).items():
        if stage not in plan.loader_stages:
            raise ScenarioError(
                f"offload: {stage!r} is not a loader stage of this run; choose from {', '.join(plan.loader_stages)}"
            )
        out_offload[stage] = _factor(stage, value, "offload")
    if policy is not None and policy not in POLICIES:
        raise ScenarioError(f"policy {policy!r} is unknown; choose {' or '.join(POLICIES)}")
    if not isinstance(in_order, bool):
        raise ScenarioError(f"in_order must be True or False, got {in_order!r}")
    return {
        "faster": out_faster,
        "offload": out_offload,
        "workers": _count("workers", workers, 0),
        "prefetch": _count("prefetch", prefetch, 1),
        "cores": _cores(cores),
        "policy": policy,
        "in_order": in_order,
    }


def _plan_of(run: Run | str | os.PathLike | ReplayPlan, recorded_workers: int | None,
             recorded_prefetch: int | None, recorded_policy: str | None) -> ReplayPlan:
    if isinstance(run, ReplayPlan):
        return run
    if isinstance(run, (str, os.PathLike)):
        from .load import load

        run = load(run)
    rw = _count("recorded_workers", recorded_workers, 0)
    rp = _count("recorded_prefetch", recorded_prefetch, 1)
    return build_plan(run, workers=rw, prefetch=rp, policy=recorded_policy)


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
) -> Prediction:
    """Predict the run's wall time under a changed configuration.

    Parameters
    ----------
    run : Run, path or ReplayPlan
        The recorded run (a loaded :class:`~pipeprobe.load.Run`, its folder,
        or a plan from :func:`pipeprobe.replay.build_plan` to reuse).
    faster : mapping of str to float, optional
        Stage name to speed-up factor: ``{"decode": 2}`` halves decode's
        time, ``math.inf`` (or ``"inf"``) makes it free. ``"step"`` is a stage.
    workers, prefetch : int, optional
        Loader workers (0: load in the training loop) and batches in flight.
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

    Returns
    -------
    Prediction

    Raises
    ------
    ScenarioError
        An unknown stage name, a factor that is not a number > 0, a count
        out of range, or a run without batches.

    Examples
    --------
    >>> import pipeprobe, tempfile, time
    >>> d = tempfile.mkdtemp()
    >>> def batches():
    ...     for i in range(4):
    ...         with pipeprobe.stage("decode", sample=i):
    ...             time.sleep(0.004)
    ...         yield [i]
    >>> with pipeprobe.Probe(d, report=False) as probe:
    ...     for batch in probe.watch(batches()):
    ...         with probe.step():
    ...             time.sleep(0.002)
    >>> p = pipeprobe.whatif(d, faster={"decode": 2})
    >>> 1.0 < p.predicted_speedup < 2.0
    True

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
    .. [2] G. M. Amdahl, "Validity of the single processor approach to
       achieving large scale computing capabilities", AFIPS 1967 (the
       classical bound the replay refines; see :mod:`pipeprobe.ceilings`).
    """
    plan = _plan_of(run, recorded_workers, recorded_prefetch, recorded_policy)
    return _predict(plan, replay(plan), faster=faster, workers=workers, prefetch=prefetch, cores=cores,
                    offload=offload, policy=policy, in_order=in_order)


def _predict(plan: ReplayPlan, base: Replay, **scenario: Any) -> Prediction:
    sc = check_scenario(plan, **scenario)
    rep = replay(plan, workers=sc["workers"], prefetch=sc["prefetch"], cores=sc["cores"], policy=sc["policy"],
                 in_order=sc["in_order"], faster=sc["faster"], offload=sc["offload"])
    measured = plan.measured_wall_s
    if base.wall_s > 0:
        predicted = measured * rep.wall_s / base.wall_s if measured > 0 else rep.wall_s
    else:
        predicted = rep.wall_s
    return Prediction(
        scenario=sc,
        measured_wall_s=measured,
        baseline_replay_wall_s=base.wall_s,
        replayed_wall_s=rep.wall_s,
        predicted_wall_s=predicted,
        predicted_speedup=measured / predicted if predicted > 0 else math.inf,
        measured_stall_fraction=plan.measured_stall_s / measured if measured > 0 else 0.0,
        predicted_stall_fraction=rep.stall_fraction,
        critical_path=rep.critical_path_shares,
        recorded={"workers": plan.workers, "prefetch": plan.prefetch, "cores": plan.cores, "policy": plan.policy,
                  "epoch_barrier": plan.epoch_barrier, "batches": plan.batches, "spans": plan.spans},
        notes=list(plan.notes),
        replay=rep,
    )


def sweep(
    run: Run | str | os.PathLike | ReplayPlan,
    scenarios: Iterable[Mapping[str, Any]],
    *,
    recorded_workers: int | None = None,
    recorded_prefetch: int | None = None,
    recorded_policy: str | None = None,
) -> list[Prediction]:
    """Predict several scenarios of one run, building its plan and baseline replay once.

    Parameters
    ----------
    run : Run, path or ReplayPlan
    scenarios : iterable of dict
        Keyword arguments of :func:`whatif` (``faster``, ``workers``, ...).

    Returns
    -------
    list of Prediction

    Examples
    --------
    >>> import pipeprobe, tempfile, time
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False) as probe:
    ...     for batch in probe.watch([[0], [1]]):
    ...         with probe.step():
    ...             time.sleep(0.002)
    >>> [round(p.predicted_speedup, 1) for p in pipeprobe.whatif_sweep(d, [{}, {}])]
    [1.0, 1.0]

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
    """
    plan = _plan_of(run, recorded_workers, recorded_prefetch, recorded_policy)
    base = replay(plan)
    return [_predict(plan, base, **dict(s)) for s in scenarios]


def parse_factors(pairs: Iterable[str], what: str) -> dict[str, float]:
    """Parse ``["decode=2", "augment=inf"]`` into ``{"decode": 2.0, "augment": inf}``.

    Raises
    ------
    ScenarioError
        A pair without ``=``, an empty stage name, or a bad factor.

    Examples
    --------
    >>> parse_factors(["decode=2", "augment=inf"], "faster")
    {'decode': 2.0, 'augment': inf}
    """
    out: dict[str, float] = {}
    for pair in pairs:
        stage, sep, value = str(pair).partition("=")
        if not sep or not stage.strip():
            raise ScenarioError(f"--{what} {pair!r}: write STAGE=FACTOR, e.g. decode=2 (inf = free)")
        out[stage.strip()] = _factor(stage.strip(), value, what)
    return out


def format_prediction(p: Prediction) -> str:
    """Plain-text summary of a prediction, as ``pipeprobe whatif`` prints it.

    Examples
    --------
    >>> p = Prediction({"faster": {"decode": 2.0}}, 10.0, 9.9, 7.92, 8.0, 1.25, 0.4, 0.25, {"step": 0.6}, {})
    >>> print(format_prediction(p).splitlines()[1])
      measured wall     10.000 s   stall 40.0 %
    """
    sc = p.scenario
    parts = []
    for key in ("faster", "offload"):
        for stage, k in (sc.get(key) or {}).items():
            parts.append(f"{key} {stage}={'inf' if math.isinf(k) else f'{k:g}'}")
    for key in ("workers", "prefetch", "cores", "policy"):
        if sc.get(key) is not None:
            v = sc[key]
            parts.append(f"{key}={'inf' if isinstance(v, float) and math.isinf(v) else v}")
    if sc.get("in_order") is False:
        parts.append("any order")
    lines = [
        f"what if: {', '.join(parts) or 'nothing changes'}",
        f"  measured wall  {p.measured_wall_s:9.3f} s   stall {100 * p.measured_stall_fraction:.1f} %",
        f"  predicted wall {p.predicted_wall_s:9.3f} s   stall {100 * p.predicted_stall_fraction:.1f} %   "
        f"speed-up {p.predicted_speedup:.2f}x",
        f"  (replay of the recorded configuration: {p.baseline_replay_wall_s:.3f} s)",
        "  predicted critical path:",
    ]
    for name, share in sorted(p.critical_path.items(), key=lambda kv: -kv[1]):
        if share >= 0.005:
            lines.append(f"    {name[:30]:<30} {100 * share:5.1f} %")
    for note in p.notes:
        lines.append(f"  note: {note}")
    return "\n".join(lines)


def add_arguments(parser: Any) -> None:
    """Add the ``pipeprobe whatif`` options to an argparse parser."""
    parser.add_argument("run_dir", metavar="RUN_DIR", help="recorded run folder")
    parser.add_argument("--faster", nargs="+", default=[], metavar="STAGE=K",
                        help="stage made K times faster (inf = free), e.g. decode=2 augment=1.5")
    parser.add_argument("--offload", nargs="+", default=[], metavar="STAGE=K",
                        help="move a loader stage to the accelerator side of the step, K times faster there")
    parser.add_argument("--workers", metavar="N", help="loader workers (0 = load in the training loop)")
    parser.add_argument("--prefetch", metavar="N", help="batches in flight")
    parser.add_argument("--cores", metavar="N", help="CPU cores the work shares (inf = no contention)")
    parser.add_argument("--policy", choices=POLICIES, help="how the loader hands batches to workers")
    parser.add_argument("--any-order", action="store_true", help="the loader delivers batches as they finish")
    parser.add_argument("--recorded-workers", metavar="N", help="workers of the recorded run (default: counted)")
    parser.add_argument("--recorded-prefetch", metavar="N",
                        help="prefetch depth of the recorded run (default: the smallest the trace allows)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def run_command(args: Any) -> int:
    """Run ``pipeprobe whatif`` with parsed arguments; return the exit code (errors raise ScenarioError)."""
    import json

    from .load import load

    faster = parse_factors(args.faster, "faster")
    offload = parse_factors(args.offload, "offload")
    plan = _plan_of(load(args.run_dir), args.recorded_workers, args.recorded_prefetch, None)
    p = _predict(plan, replay(plan), faster=faster, offload=offload, workers=args.workers,
                 prefetch=args.prefetch, cores=args.cores, policy=args.policy, in_order=not args.any_order)
    if args.json:
        print(json.dumps(p.to_dict(), allow_nan=False))
    else:
        print(format_prediction(p))
    return 0
