"""The critical path of a replayed run (private).

Walks the :class:`~pipeprobe.whatif.engine.BatchLog` of a replay back
from its end, along the events that set each time: the consumer's work on
a batch was set by its take; a take by the batch's arrival (then the
loader task before it) or by the consumer's own wait; a loader task by
its worker freeing up (the task before it on that worker) or by its
request (a take, or the wait at an epoch start). Seconds on the path are
summed per stage, the pseudo stages of :data:`PSEUDO_STAGES` for time no
user stage spent.

References
----------
.. [1] J. E. Kelley and M. R. Walker, "Critical-path planning and scheduling", 1959.
"""

from __future__ import annotations

import enum
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    from .engine import BatchLog
    from .plan import Work

__all__ = ["PSEUDO_STAGES", "critical_path"]

#: Names of the parts of a replayed run that are no user stage.
START_UP = "(start-up)"
CONSUMER_OVERHEAD = "(consumer overhead)"
WORKER_OVERHEAD = "(worker overhead)"
DISPATCH = "(loader dispatch)"
HANDOFF = "(loader handoff)"
UNSTAGED = "(unstaged loading)"
PSEUDO_STAGES = (START_UP, CONSUMER_OVERHEAD, WORKER_OVERHEAD, DISPATCH, HANDOFF, UNSTAGED)


class _On(enum.Enum):
    """Where the backward walk stands."""

    CONSUMER_WORK = "the consumer's work on a taken batch"
    TAKE = "the consumer taking a batch"
    WAIT = "the consumer beginning to wait"
    LOADER_TASK = "a batch's loader task"


# The members as module names: an enum member lookup costs several times a global one, and the walk
# tests one at every step (hoisted for speed).
_CONSUMER_WORK, _TAKE, _WAIT, _LOADER_TASK = _On.CONSUMER_WORK, _On.TAKE, _On.WAIT, _On.LOADER_TASK


def critical_path(log: BatchLog, times: dict[str, np.ndarray], *, workers: int, wall: float, tail_s: float,
                  loader: Work, consumer: Work) -> dict[str, float]:
    """Seconds of the replayed wall time on the critical path, per stage.

    ``times`` are :meth:`BatchLog.arrays`; ``wall`` the replayed wall time,
    ``tail_s`` its part after the last batch's work; ``loader`` and
    ``consumer`` the work the replay ran.
    """
    acc: dict[str, float] = {}
    if not log.taken_order:
        _add(acc, START_UP, wall)
        return acc
    _add(acc, CONSUMER_OVERHEAD, tail_s)
    loader_path, consumer_path = _walk_back(workers, log, times, acc)
    _spread(acc, loader, loader_path)
    _spread(acc, consumer, consumer_path)
    return acc


def _add(acc: dict[str, float], name: str, s: float) -> None:
    if s > 0:
        acc[name] = acc.get(name, 0.0) + s


def _walk_back(workers: int, log: BatchLog, times: dict[str, np.ndarray],
               acc: dict[str, float]) -> tuple[list[tuple[int, float]], list[tuple[int, float]]]:
    """Go back from the last batch's work; add the pseudo stages to ``acc``; return the tasks on the path.

    Returns ``(loader, consumer)`` lists of ``(batch, replayed seconds)``.
    """
    req, start, end = times["request_s"], times["start_s"], times["end_s"]
    ready, wstart, done = times["ready_s"], times["wait_start_s"], times["done_s"]
    taken = log.taken_order
    position = {b: k for k, b in enumerate(taken)}
    loader_path: list[tuple[int, float]] = []
    consumer_path: list[tuple[int, float]] = []
    on, x = _CONSUMER_WORK, len(taken) - 1
    for _ in range(8 * len(taken) + 8):  # every batch is visited at most once per kind
        if on is _CONSUMER_WORK:  # x: position in the consumer's order
            b = taken[x]
            consumer_path.append((b, done[b] - ready[b]))
            on, x = _TAKE, b
        elif on is _TAKE:  # x: the batch taken, set by its arrival or by the consumer
            if workers == 0 or log.ready_by_batch[x]:
                if workers > 0:
                    _add(acc, HANDOFF, ready[x] - end[x])
                on = _LOADER_TASK
            else:
                _add(acc, CONSUMER_OVERHEAD, ready[x] - wstart[x])
                on, x = _WAIT, position[x]
        elif on is _WAIT:  # x: position whose wait began
            if x == 0:
                _add(acc, START_UP, wstart[taken[0]])
                break
            on, x = _CONSUMER_WORK, x - 1
        else:  # loader task of batch x
            b = x
            loader_path.append((b, end[b] - start[b]))
            before = log.previous_on_worker[b]
            if workers == 0:
                on, x = _WAIT, position[b]
            elif log.started_by_worker[b] and before >= 0:
                _add(acc, WORKER_OVERHEAD, start[b] - end[before])
                x = before
            else:
                _add(acc, DISPATCH, start[b] - req[b])
                if log.requested_after[b] >= 0:
                    on, x = _TAKE, log.requested_after[b]
                else:
                    on, x = _WAIT, log.requested_at_wait[b]
    return loader_path, consumer_path


def _spread(acc: dict[str, float], work: Work, path: list[tuple[int, float]]) -> None:
    """Split the replayed durations of tasks on the path over their stages (CPU parts slowed)."""
    if not path:
        return
    idx = np.array([p[0] for p in path], np.int64)
    elapsed = np.array([p[1] for p in path], float)
    io = work.io_s[idx]
    cpu = work.cpu_s[idx]
    io_t = io.sum(1)
    cpu_t = cpu.sum(1)
    with np.errstate(invalid="ignore", divide="ignore"):
        dil = np.where(cpu_t > 0, np.maximum(0.0, elapsed - io_t) / cpu_t, 0.0)
    part = io + cpu * dil[:, None]
    tot = part.sum(1)
    with np.errstate(invalid="ignore", divide="ignore"):
        part = np.where(tot[:, None] > 0, part * (elapsed / tot)[:, None], 0.0)
    sums = part.sum(0)
    for name, s in zip(work.names, sums, strict=True):
        if s > 0:
            acc[name] = acc.get(name, 0.0) + float(s)
