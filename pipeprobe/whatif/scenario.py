"""A what-if scenario: what changes against the recorded run, checked once, then carried as one object.

:class:`Scenario` holds the changes (stages made faster or moved to the
accelerator side, workers, prefetch, cores, policy, delivery order);
``None`` means "as recorded". It checks and normalises its values when it
is made (:mod:`pipeprobe.whatif.limits`), checks its stage names against a
plan (:meth:`Scenario.check_stages`), and turns into what the engine runs:
the per-batch work with the factors applied (:meth:`Scenario.work`) and
the concrete :class:`~pipeprobe.whatif.engine.Settings`
(:meth:`Scenario.settings`).

References
----------
.. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001 (scenarios of one model).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Iterable, Mapping

import numpy as np

from ..errors import ScenarioError
from ..nesting import own_label
from ._loader import POLICIES
from ._replay_path import PSEUDO_STAGES
from .limits import MAX_PREFETCH, MAX_WORKERS, check_cores, check_count, check_factor
from .plan import Work

if TYPE_CHECKING:  # pragma: no cover
    from .engine import Settings
    from .plan import ReplayPlan

__all__ = ["Scenario", "check_scenario", "parse_factors", "recorded_prefetch_for", "PREFETCH_PER_WORKER"]

#: Batches in flight per worker when the recorded run had none to copy (it loaded in the training loop):
#: torch's DataLoader default ``prefetch_factor=2`` (from memory; torch.utils.data.DataLoader docs).
PREFETCH_PER_WORKER = 2


def recorded_prefetch_for(plan: ReplayPlan, workers: int) -> int:
    """Prefetch depth a scenario without one replays with ``workers`` workers.

    The recorded depth, except when the recorded run loaded in the training
    loop (``plan.workers == 0``): its depth of one batch says nothing about a
    loader with workers, which keeps :data:`PREFETCH_PER_WORKER` batches per
    worker in flight by default.

    Examples
    --------
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> plan = plan_from_durations([0.006] * 4, [0.002] * 4, workers=0, prefetch=1)
    >>> recorded_prefetch_for(plan, 0), recorded_prefetch_for(plan, 2)
    (1, 4)
    """
    if plan.workers == 0 and workers > 0:
        return PREFETCH_PER_WORKER * workers
    return plan.prefetch


@dataclass(frozen=True)
class Scenario:
    """The changes a what-if replays; every field left at its default keeps the recorded value.

    Making one checks and normalises every value (counts as ``int``,
    factors and cores as ``float``; strings such as ``"4"`` or ``"inf"``
    are read), so a :class:`Scenario` that exists is within the limits of
    :mod:`pipeprobe.whatif.limits`.

    Attributes
    ----------
    faster : dict of str to float
        Stage name (loader stage, consumer stage or ``"step"``) to speed-up
        factor; ``inf`` makes the stage free. A stage recorded inside another
        can be named; the one around it shrinks by the time saved. Naming the
        stage around others speeds up all of its time, theirs included.
    offload : dict of str to float
        Loader stage to factor: the stage leaves the loader task and runs
        ``factor`` times faster on the accelerator side of the step, off the CPU
        (a stage with stages inside moves with them; a nested stage moves alone).
        A stage recorded inside the step (``forward``) runs ``factor`` times
        faster off the CPU where it is; the step shrinks by the time saved.
    workers : int or None
        Loader workers; 0 loads in the consumer when it asks for a batch.
    prefetch : int or None
        Most batches requested and not yet taken by the consumer.
    cores : float or None
        CPU cores the run's tasks share (``inf``: no contention); by default
        the recorded machine's less what its other processes used.
    policy : {"round-robin", "first-free"} or None
        How requests are handed to workers.
    in_order : bool
        The consumer takes batches in order.

    Raises
    ------
    ScenarioError
        A factor that is not a number in range, a count out of range, an
        unknown policy; the message says what to give instead.

    Examples
    --------
    >>> Scenario(faster={"decode": "2"}, workers="4")
    Scenario(faster={'decode': 2.0}, offload={}, workers=4, prefetch=None, cores=None, policy=None, in_order=True)
    """

    faster: Mapping[str, float] = field(default_factory=dict)
    offload: Mapping[str, float] = field(default_factory=dict)
    workers: int | None = None
    prefetch: int | None = None
    cores: float | None = None
    policy: str | None = None
    in_order: bool = True

    def __post_init__(self) -> None:
        checked = {
            "faster": {str(s): check_factor(str(s), k, "faster") for s, k in dict(self.faster or {}).items()},
            "offload": {str(s): check_factor(str(s), k, "offload") for s, k in dict(self.offload or {}).items()},
            "workers": check_count("workers", self.workers, 0, MAX_WORKERS),
            "prefetch": check_count("prefetch", self.prefetch, 1, MAX_PREFETCH),
            "cores": check_cores(self.cores),
        }
        if self.policy is not None and self.policy not in POLICIES:
            raise ScenarioError(f"policy {self.policy!r} is unknown; choose {' or '.join(POLICIES)}")
        if not isinstance(self.in_order, bool):
            raise ScenarioError(f"in_order must be True or False, got {self.in_order!r}")
        for name, value in checked.items():
            object.__setattr__(self, name, value)  # a frozen dataclass normalises its own fields this way

    @property
    def stages(self) -> list[str]:
        """Stage names the scenario mentions."""
        return list(dict.fromkeys([*self.faster, *self.offload]))

    def check_stages(self, plan: ReplayPlan) -> Scenario:
        """Check the stage names against ``plan``; returns ``self``.

        Raises
        ------
        ScenarioError
            A ``faster`` stage the run does not have, or an ``offload``
            stage that is not a loader stage; the message lists the choices.
        """
        known = [s for s in plan.stage_names if s not in PSEUDO_STAGES]
        for stage in self.faster:
            if stage not in known:
                shown = [s for s in known if s not in _own_labels(plan)]
                raise ScenarioError(f"faster: unknown stage {stage!r}; this run's stages are {', '.join(shown)}")
        for stage in self.offload:
            if not set(plan.columns_of(stage)) & set(plan.loader_stages) and stage not in _step_stages(plan):
                raise ScenarioError(f"offload: {stage!r} is not a loader stage of this run, nor one inside the step; "
                                    f"choose from {', '.join(_loader_names(plan) + _step_stages(plan))}")
        return self

    def settings(self, plan: ReplayPlan) -> Settings:
        """The configuration to replay: this scenario's values, the recorded ones where it has none."""
        from .engine import Settings

        workers = plan.workers if self.workers is None else self.workers
        return Settings(
            workers=workers,
            prefetch=self.prefetch if self.prefetch is not None else recorded_prefetch_for(plan, workers),
            cores=float(plan.cores_left if self.cores is None else self.cores),
            policy=plan.policy if self.policy is None else self.policy,
            in_order=self.in_order,
        )

    def work(self, plan: ReplayPlan) -> tuple[Work, Work]:
        """The plan's loader and consumer work with the factors applied and offloaded stages moved.

        A stage with stages recorded inside it speeds up (or moves) with
        them: its factor applies to every column of :meth:`ReplayPlan.columns_of`.
        """
        faster = plan.column_factors(self.faster)
        loader = plan.loader.scaled(faster)
        consumer = _offload_in_step(plan.consumer.scaled(faster), plan, self.offload)
        offload = {s: k for s, k in self.offload.items() if s not in _step_stages(plan)}
        if not offload:
            return loader, consumer
        names = list(loader.names)
        moved = [[names.index(c) for c in plan.columns_of(s) if c in names] for s in offload]
        gone = {c for cols in moved for c in cols}
        keep = [i for i in range(len(names)) if i not in gone]
        # the stage leaves the loader task and runs on the accelerator side, off the CPU
        extra = [
            sum((loader.io_s[:, c] + loader.cpu_s[:, c] for c in cols), np.zeros(plan.batches)) / offload[s]
            for s, cols in zip(offload, moved, strict=True)
        ]
        loader = Work(tuple(names[i] for i in keep), loader.io_s[:, keep], loader.cpu_s[:, keep])
        consumer = Work(
            consumer.names + tuple(f"{s} (offloaded)" for s in offload),
            np.column_stack([consumer.io_s, *extra]),
            np.column_stack([consumer.cpu_s, np.zeros((plan.batches, len(extra)))]),
        )
        return loader, consumer

    def __getitem__(self, key: str) -> Any:
        """A field by name, as in the dict form earlier versions returned (``p.scenario["workers"]``)."""
        if key not in self.__dataclass_fields__:
            raise KeyError(key)
        return getattr(self, key)

    def get(self, key: str, default: Any = None) -> Any:
        """A field by name, or ``default`` for a name that is no field (the dict form's ``get``)."""
        return getattr(self, key) if key in self.__dataclass_fields__ else default

    def to_dict(self) -> dict[str, Any]:
        """The fields as a plain dict (``None``: as recorded)."""
        return {"faster": dict(self.faster), "offload": dict(self.offload), "workers": self.workers,
                "prefetch": self.prefetch, "cores": self.cores, "policy": self.policy, "in_order": self.in_order}

    def describe(self) -> str:
        """One line: what changes (``nothing changes`` for the recorded configuration).

        Examples
        --------
        >>> Scenario(faster={"decode": 2}, cores=float("inf")).describe()
        'faster decode=2, cores=inf'
        """
        parts = []
        for key in ("faster", "offload"):
            for stage, k in getattr(self, key).items():
                parts.append(f"{key} {stage}={_number(k)}")
        for key in ("workers", "prefetch", "cores", "policy"):
            value = getattr(self, key)
            if value is not None:
                parts.append(f"{key}={_number(value) if isinstance(value, float) else value}")
        if not self.in_order:
            parts.append("any order")
        return ", ".join(parts) or "nothing changes"


def _own_labels(plan: ReplayPlan) -> set[str]:
    """Columns that are a stage's own time: accepted, but messages list the stages themselves."""
    return {own_label(s) for s in plan.inside}


def _step_stages(plan: ReplayPlan) -> list[str]:
    """Stages recorded inside the step (``forward`` inside ``probe.step()``): they can be offloaded in place."""
    return [c for c in plan.inside.get("step", ()) if c != own_label("step") and c in plan.consumer.names]


def _offload_in_step(consumer: Work, plan: ReplayPlan, offload: Mapping[str, float]) -> Work:
    """The consumer's work with each offloaded stage inside the step ``k`` times faster and off the CPU, in place
    (it already runs on the step's side of the pipeline)."""
    cols = {plan.consumer.names.index(s): k for s, k in offload.items() if s in _step_stages(plan)}
    if not cols:
        return consumer
    io, cpu = consumer.io_s.copy(), consumer.cpu_s.copy()
    for c, k in cols.items():
        io[:, c], cpu[:, c] = (io[:, c] + cpu[:, c]) / k, 0.0
    return Work(consumer.names, io, cpu)


def _loader_names(plan: ReplayPlan) -> list[str]:
    """Loader stages a scenario can offload: the loader columns and the stages holding them."""
    enclosing = [s for s in plan.inside if set(plan.inside[s]) & set(plan.loader_stages)]
    return list(dict.fromkeys([*enclosing, *(s for s in plan.loader_stages if s not in _own_labels(plan))]))


def _number(x: float) -> str:
    return "inf" if math.isinf(x) else f"{x:g}"


def check_scenario(plan: ReplayPlan, **changes: Any) -> Scenario:
    """A :class:`Scenario` of ``changes`` (the keywords of its fields), checked against ``plan``.

    Raises
    ------
    ScenarioError
        Unknown stage names, factors that are not numbers in range, counts
        out of range, an unknown policy; the message says what to give instead.
    """
    return Scenario(**changes).check_stages(plan)


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
        out[stage.strip()] = check_factor(stage.strip(), value, what)
    return out
