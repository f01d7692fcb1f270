"""Loader policies of the replay: how requests reach the workers (private).

A policy hears of three things and answers with which worker starts
which batch: a batch is requested (:meth:`request`), a request reaches the
workers (:meth:`dispatchable`: start it on a worker now, or queue it) and a
worker is free for its next task (:meth:`worker_ready`: the batch it takes
next, or none). :class:`FirstFree` is a shared queue (a process pool);
:class:`RoundRobin` sends request ``i`` of an epoch to worker ``i mod
workers`` in order (common data loaders).
"""

from __future__ import annotations

from collections import deque
from typing import Sequence

__all__ = ["POLICIES", "LoaderPolicy", "FirstFree", "RoundRobin", "make_policy"]

#: Ways a loader hands requests to its workers.
POLICIES = ("round-robin", "first-free")


class LoaderPolicy:
    """Which worker runs which requested batch."""

    name = ""
    __slots__ = ()

    def request(self, batch: int) -> None:
        """``batch`` was requested (before its request reaches the workers)."""

    def dispatchable(self, batch: int) -> int | None:
        """The request of ``batch`` reached the workers: the worker to start it on now, or None (queued)."""
        raise NotImplementedError

    def worker_ready(self, worker: int) -> int | None:
        """``worker`` is free: the batch it starts now, or None (it waits idle)."""
        raise NotImplementedError

    def hold(self, worker: int) -> None:
        """``worker`` is starting (a new process): it takes no request until :meth:`worker_ready`."""
        raise NotImplementedError


class FirstFree(LoaderPolicy):
    """A shared queue: the idle worker that waited longest takes the next request.

    Examples
    --------
    >>> p = FirstFree(workers=1)
    >>> p.dispatchable(0), p.dispatchable(1), p.worker_ready(0), p.worker_ready(0)
    (0, None, 1, None)
    """

    name = "first-free"
    __slots__ = ("idle", "queue")

    def __init__(self, workers: int) -> None:
        self.idle: deque[int] = deque(range(workers))
        self.queue: deque[int] = deque()

    def dispatchable(self, batch: int) -> int | None:
        if self.idle:
            return self.idle.popleft()
        self.queue.append(batch)
        return None

    def worker_ready(self, worker: int) -> int | None:
        if self.queue:
            return self.queue.popleft()
        self.idle.append(worker)
        return None

    def hold(self, worker: int) -> None:
        if worker in self.idle:
            self.idle.remove(worker)


class RoundRobin(LoaderPolicy):
    """Request ``i`` (of the epoch, when epochs are barriers) goes to worker ``i mod workers``, in order.

    Examples
    --------
    >>> p = RoundRobin(workers=2, index=[0, 1, 2])
    >>> [p.request(b) for b in range(3)] and [p.dispatchable(b) for b in range(3)]
    [0, 1, None]
    >>> p.worker_ready(0), p.worker_ready(0)
    (2, None)
    """

    name = "round-robin"
    __slots__ = ("workers", "index", "assigned", "idle", "waiting")

    def __init__(self, workers: int, index: Sequence[int]) -> None:
        self.workers = workers
        #: per batch, its position in the order requests are dealt out
        self.index = index
        self.assigned = [-1] * len(index)
        self.idle = set(range(workers))
        self.waiting: list[deque[int]] = [deque() for _ in range(workers)]

    def request(self, batch: int) -> None:
        self.assigned[batch] = self.index[batch] % self.workers

    def dispatchable(self, batch: int) -> int | None:
        w = self.assigned[batch]
        if w in self.idle and not self.waiting[w]:
            self.idle.discard(w)
            return w
        self.waiting[w].append(batch)
        return None

    def worker_ready(self, worker: int) -> int | None:
        if self.waiting[worker]:
            return self.waiting[worker].popleft()
        self.idle.add(worker)
        return None

    def hold(self, worker: int) -> None:
        self.idle.discard(worker)


def make_policy(name: str, workers: int, index: Sequence[int]) -> LoaderPolicy:
    """The policy called ``name`` for ``workers`` workers; ``index`` numbers the requests for round-robin."""
    if name == RoundRobin.name:
        return RoundRobin(workers, index)
    if name == FirstFree.name:
        return FirstFree(workers)
    raise ValueError(f"policy must be one of {', '.join(POLICIES)}, got {name!r}")
