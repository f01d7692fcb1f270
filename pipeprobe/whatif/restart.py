"""Worker restarts: what starting new loader workers at every epoch costs, and what keeping them would buy.

A loader without persistent workers (torch's default
``persistent_workers=False``) starts new worker processes each time the
training loop asks for a new epoch, so each epoch's first batch waits for
them to start. :func:`worker_restarts` measures that wait and replays the
run without it. Its steps:

1. per later epoch, from the recording, two waits: the loop's time
   between the last step of the epoch before and its first ask for a batch
   of this one, beyond the loop's ordinary time between two batches (the
   loader stops the old workers and starts the new ones there, when the
   loop calls ``iter()``); and the time from that ask to the epoch's first
   loader span (the plan's ``epoch_dispatch_s``): the new workers' own
   start-up. Kept workers get an epoch's first requests when the loop calls
   ``iter()``, just before it asks for the first batch, so they start at
   once (in the recordings we made, within a millisecond of the ask or before it). (Work the loop does between epochs outside any
   stage, say an unrecorded validation pass, counts in the first; time it
   with ``pipeprobe.stage`` to keep it apart);
2. whether the workers did restart (a later epoch's loader spans ran in
   processes no earlier epoch used: :func:`pipeprobe.analysis.workers_restarted`,
   the rule the action list uses too);
3. a replay of the run with persistent workers (:func:`with_persistent_workers`):
   the epochs after the first lose both waits (the loop's time between
   epochs is its ordinary time between batches, and their first tasks start
   when the loop asks); everything else, the epoch barrier included (a new
   epoch's batches are still asked for only when the loop starts it), is
   as recorded. The saving is scaled by the measured wall time over the
   replay of the recorded run, as every prediction is.

References
----------
.. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001 (the replay).
.. [2] J. E. Kelley and M. R. Walker, 1959 (critical path method: the
   restart waits lie on the path when the loop waits for them).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace
from typing import TYPE_CHECKING, Any

import numpy as np

from ..analysis import workers_restarted
from ._lifecycle import between_epochs, without_restart_costs
from ._replay_path import CONSUMER_OVERHEAD
from .engine import Replay, replay
from .plan import Work

if TYPE_CHECKING:  # pragma: no cover
    from ..load import Run
    from .plan import ReplayPlan

__all__ = ["WorkerRestarts", "worker_restarts", "with_persistent_workers", "format_restarts", "restart_action_text",
           "RESTART_WORTH"]

#: The report names the restart cost when keeping the workers would save at least this share of the
#: wall time in the replay (our choice: the verdict's 5 % threshold).
RESTART_WORTH = 0.05


@dataclass(frozen=True)
class WorkerRestarts:
    """The cost of starting new loader workers at every epoch.

    Attributes
    ----------
    restarts : bool
        A later epoch's loader work ran in worker processes no earlier epoch used.
    epochs : int
    first_start_s : float
        The first epoch's wait for its workers (persistent workers wait it too).
    restart_s : list of float
        Per later epoch: the loop's extra time between epochs plus the
        first task's wait for the new workers (step 1).
    between_epochs_s : list of float
        The first part of ``restart_s``: the loop's time between epochs
        beyond its ordinary time between batches.
    restart_total_s : float
        Sum of ``restart_s``.
    persistent_wall_s : float
        Predicted wall time with persistent workers (measured wall time
        times the ratio of the two replays).
    saved_s : float
        Measured wall time less ``persistent_wall_s``.
    measured_wall_s : float
    """

    restarts: bool
    epochs: int
    first_start_s: float
    restart_s: list[float]
    between_epochs_s: list[float]
    restart_total_s: float
    persistent_wall_s: float
    saved_s: float
    measured_wall_s: float

    @property
    def worth_naming(self) -> bool:
        """Keeping the workers would save at least :data:`RESTART_WORTH` of the wall time."""
        return self.restarts and self.measured_wall_s > 0 and self.saved_s >= RESTART_WORTH * self.measured_wall_s

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict."""
        from .._jsonnum import json_ready

        return json_ready({**asdict(self), "worth_naming": self.worth_naming})


def with_persistent_workers(plan: ReplayPlan) -> ReplayPlan:
    """``plan`` with workers kept across epochs: no extra wait between epochs, first tasks start when asked for.

    Nor do kept workers stop at the loop's end or start cold after the first
    epoch, where the plan measured those costs
    (:func:`pipeprobe.whatif._lifecycle.without_restart_costs`).

    Examples
    --------
    >>> from dataclasses import replace
    >>> import numpy as np
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> plan = plan_from_durations([1] * 4, [1] * 4, epoch=[0, 0, 1, 1], workers=2, prefetch=4, cores=8)
    >>> plan = replace(plan, epoch_dispatch_s=np.array([3.0, 3.0]))
    >>> with_persistent_workers(plan).epoch_dispatch_s.tolist()
    [3.0, 0.0]

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001 (a scenario as a changed model input).
    """
    plan = without_restart_costs(plan)
    ed = np.array(plan.epoch_dispatch_s, float, copy=True)
    ed[1:] = 0.0
    last, extra, _ = between_epochs(plan)
    c = plan.consumer
    if not len(last) or CONSUMER_OVERHEAD not in c.names:
        return replace(plan, epoch_dispatch_s=ed, workers_kept=True)
    col = c.names.index(CONSUMER_OVERHEAD)
    io, cpu = c.io_s.copy(), c.cpu_s.copy()
    total = io[last, col] + cpu[last, col]
    keep = np.where(total > 0, (total - extra) / np.where(total > 0, total, 1.0), 1.0)
    io[last, col] *= keep
    cpu[last, col] *= keep
    return replace(plan, epoch_dispatch_s=ed, consumer=Work(c.names, io, cpu), workers_kept=True)


def worker_restarts(plan: ReplayPlan, run: Run | None = None, base: Replay | None = None) -> WorkerRestarts:
    """Measure each epoch's wait for new workers and replay the run with persistent workers.

    Parameters
    ----------
    plan : ReplayPlan
    run : Run, optional
        The recorded run, to see whether the workers restarted (without it:
        a later epoch waited longer for its first task than a running worker takes).
    base : Replay, optional
        The replay of the recorded configuration, when already made.

    Returns
    -------
    WorkerRestarts

    Examples
    --------
    Two epochs of two 1 s tasks and 1 s steps on two workers; the second
    epoch's workers take 3 s to start. By hand: epoch 0 runs 3 + 1 + 1 + 1
    = 6 s, epoch 1 the same, 12 s; kept workers: 6 + 3 = 9 s.

    >>> from dataclasses import replace
    >>> import numpy as np
    >>> from pipeprobe.whatif.plan import plan_from_durations
    >>> plan = plan_from_durations([1] * 4, [1] * 4, epoch=[0, 0, 1, 1], workers=2, prefetch=4, cores=8)
    >>> plan = replace(plan, epoch_dispatch_s=np.array([3.0, 3.0]), measured_wall_s=12.0)
    >>> r = worker_restarts(plan)
    >>> r.restart_s, r.persistent_wall_s, r.saved_s
    ([3.0], 9.0, 3.0)

    References
    ----------
    .. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
    """
    base = replay(plan) if base is None else base
    ed = np.asarray(plan.epoch_dispatch_s, float)
    extra = np.maximum(0.0, ed[1:]) if plan.workers else np.zeros(0)
    _, between, _ = between_epochs(plan)
    between = between if plan.workers and len(between) == len(extra) else np.zeros(len(extra))
    restarts = workers_restarted(run) if run is not None else bool(plan.workers and (extra > 0).any())
    measured = plan.measured_wall_s if plan.measured_wall_s > 0 else base.wall_s
    kept = replay(with_persistent_workers(plan)) if restarts else base
    persistent = measured * kept.wall_s / base.wall_s if base.wall_s > 0 else measured
    return WorkerRestarts(
        restarts=restarts, epochs=len(ed), first_start_s=float(ed[0]) if len(ed) else 0.0,
        restart_s=(between + extra).tolist(), between_epochs_s=between.tolist(),
        restart_total_s=float((between + extra).sum()), persistent_wall_s=float(persistent),
        saved_s=float(measured - persistent), measured_wall_s=float(measured),
    )


def format_restarts(r: WorkerRestarts) -> list[str]:
    """The report's lines on worker restarts (none when the workers were kept, or it costs little).

    Examples
    --------
    >>> r = WorkerRestarts(True, 3, 0.4, [0.5, 0.5], [0.2, 0.2], 1.0, 9.1, 0.9, 10.0)
    >>> for line in format_restarts(r):
    ...     print(line)
    worker restarts  each of the 3 epochs started new loader workers
      the loop waited 1.000 s for them after the first epoch
      per later epoch (s): 0.500, 0.500
      keep them, DataLoader(persistent_workers=True): 10.000 s -> 9.100 s predicted, 0.900 s saved
    """
    if not r.worth_naming:
        return []
    each = ", ".join(f"{s:.3f}" for s in r.restart_s[:8]) + (", ..." if len(r.restart_s) > 8 else "")
    return [
        f"worker restarts  each of the {r.epochs} epochs started new loader workers",
        f"  the loop waited {r.restart_total_s:.3f} s for them after the first epoch",
        f"  per later epoch (s): {each}",
        "  keep them, DataLoader(persistent_workers=True): "
        f"{r.measured_wall_s:.3f} s -> {r.persistent_wall_s:.3f} s predicted, {r.saved_s:.3f} s saved",
    ]


def restart_action_text(r: WorkerRestarts) -> str:
    """The action that names the restart cost and its fix (for the report's action list).

    Examples
    --------
    >>> restart_action_text(WorkerRestarts(True, 3, 0.4, [0.5, 0.5], [0.2, 0.2], 1.0, 9.1, 0.9, 10.0))[:60]
    'Keep the loader workers across epochs (persistent_workers=Tr'
    """
    return (f"Keep the loader workers across epochs (persistent_workers=True): starting new ones cost "
            f"{r.restart_total_s:.3f} s of waiting over {r.epochs - 1} later epochs; the replay saves "
            f"{r.saved_s:.3f} s")
