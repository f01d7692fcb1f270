"""How the replayed tasks share the CPU cores: processor sharing (private).

A task wants ``u`` of a core while it runs (its CPU seconds over its
contention-free duration). When the running tasks want more than there are
cores, the CPU parts of all of them run at one common speed ``r < 1``, the
one at which the CPU they use fills the cores exactly; their off-CPU parts
(sleeping, reading, waiting on a device) keep full speed. A task of
nominal duration ``d`` then advances at ``rho(u, r) = 1 / (1 - u + u / r)``
nominal seconds per second.

A task may run on several threads (a training step whose math library
keeps a pool of them): ``width`` threads, each wanting ``u`` of a core,
progressing together. Every runnable thread gets the same share
(processor sharing per thread, as the operating system's scheduler
shares cores), so such a task wants ``width * u`` cores and runs its CPU
part at the common speed like any other.

:func:`cpu_speed` finds ``r``; :class:`CpuShare` keeps the running tasks
and their finish times as tasks start and stop. The plan side (taking the
recorded contention out of a trace) lives in :mod:`pipeprobe.whatif.plan`.

References
----------
.. [1] L. Kleinrock, *Queueing Systems, Volume 2: Computer Applications*,
   Wiley, 1976, ch. 4 (processor sharing).
"""

from __future__ import annotations

import math

__all__ = ["cpu_speed", "progress_rate", "lockstep_speed", "CpuShare"]

#: Steps at most when solving for the common CPU speed: Newton converges in a handful, bisection
#: (where Newton would leave the bracket) gains a bit per step.
_NEWTON_STEPS = 60
_ALL_OR_NOTHING = {0.0, 1.0}
#: The slowest CPU speed the solver returns: keeps finish times finite when cores are a sliver.
_MIN_SPEED = 1e-9


def progress_rate(u: float, r: float) -> float:
    """Nominal seconds per second of a task wanting ``u`` of a core when CPU parts run at speed ``r``.

    Examples
    --------
    >>> progress_rate(0.5, 0.5)  # half CPU, CPU at half speed: 1 / (0.5 + 1)
    0.6666666666666666
    """
    return 1.0 / (1.0 - u + u / r) if r < 1.0 else 1.0


def lockstep_speed(r: float, k: float, cores: float) -> float:
    """The CPU speed of a pool of ``k`` threads that progress only while all of them hold a core, when the
    runnable threads share ``cores`` cores at speed ``r`` each.

    Threads that spin at barriers behave so (co-scheduling, Ousterhout
    1982): a thread whose partner has no core spins and gets nothing done.
    With ``n = cores / r`` threads wanting the cores, ``cores`` of them run
    at a time; taken at random, all ``k`` of the pool run together with the
    hypergeometric probability ``prod_{i < k} (cores - i) / (n - i)``
    (written with gamma functions, so ``k``, ``n`` and ``cores`` may be
    fractional); a pool at most as wide as the cores, so ``k`` is capped there.

    Examples
    --------
    >>> round(lockstep_speed(2 / 3, 2, 2), 6)  # a 2-thread pool and one busy worker on 2 cores: a third
    0.333333
    >>> round(lockstep_speed(0.5, 2, 2), 6)  # ... and two busy workers: both of the 4 threads run 1 time in 6
    0.166667
    >>> lockstep_speed(1.0, 2, 2)
    1.0
    >>> lockstep_speed(0.5, 2, 0.75)  # fewer cores than one thread of the pool: it runs as one thread
    0.5
    """
    k = min(k, cores)
    if r >= 1.0 or k <= 1.0:
        return r
    n = cores / r
    lg = math.lgamma
    return math.exp(lg(cores + 1.0) - lg(cores - k + 1.0) - lg(n + 1.0) + lg(n - k + 1.0))


def cpu_speed(us: list[float], cores: float, widths: list[float] | None = None) -> float:
    """The common speed ``r`` of the CPU parts of tasks wanting ``us`` of a core each, on ``cores`` cores.

    ``r`` solves ``sum(w u r / ((1 - u) r + u)) == cores`` (the CPU used
    fills the cores exactly), ``w`` the task's threads (``widths``, 1 each
    by default); ``r = 1`` when the tasks fit.

    Examples
    --------
    >>> cpu_speed([1.0, 1.0, 1.0, 1.0], 2)  # four CPU-bound tasks on two cores: half speed
    0.5
    >>> cpu_speed([0.5, 0.5], 1)  # two half-CPU tasks fit on one core
    1.0
    >>> cpu_speed([1.0, 1.0], 2, widths=[2, 1])  # a step on two threads and one worker on two cores
    0.6666666666666666

    References
    ----------
    .. [1] L. Kleinrock, *Queueing Systems, Volume 2*, 1976, ch. 4.
    """
    ws = [1.0] * len(us) if widths is None else widths
    tot = sum(w * u for w, u in zip(ws, us))
    if tot <= cores:
        return 1.0
    r = cores / tot  # exact when every task is all CPU; else an upper bound
    if {*us} <= _ALL_OR_NOTHING:  # every task all CPU or none: r is exact
        return r
    # Newton on a concave increasing function: the first step from above lands below the root (the
    # tangent lies above the curve) and later steps climb to it. A step that would leave the bracket
    # [lo, hi] around the root (below 0 when the first tangent is flat) bisects instead.
    lo, hi = 0.0, r
    for _ in range(_NEWTON_STEPS):
        use = grad = 0.0
        for w, u in zip(ws, us):
            den = (1.0 - u) * r + u
            use += w * u * r / den
            grad += w * u * u / (den * den)
        if use > cores:
            hi = r
        else:
            lo = r
        step = (use - cores) / grad if grad > 0 else 0.0
        if not lo <= r - step <= hi:
            step = r - 0.5 * (lo + hi)
        r -= step
        if abs(step) <= 1e-12 * r:
            break
    return max(r, _MIN_SPEED)


class CpuShare:
    """The running tasks of a replay and when each finishes, under processor sharing.

    Entities (a worker, the consumer) run one task at a time; a task may
    run on ``width`` threads (1 by default; ``extra_threads``: the most
    threads beyond one per entity that tasks will run on). Without
    contention (``cores`` at least the threads of all entities) a task finishes
    its nominal duration after it starts; with it, every start and stop
    advances all running tasks at the old speed and re-rates them.

    Examples
    --------
    >>> cpu = CpuShare(cores=1, entities=2)
    >>> cpu.start(0, batch=7, nominal_s=1.0, u=1.0, now=0.0)
    >>> cpu.start(1, batch=8, nominal_s=1.0, u=1.0, now=0.0)
    >>> cpu.next_finish()  # two CPU-bound 1 s tasks on one core
    (2.0, 0)
    """

    __slots__ = ("cores", "contended", "finish", "batch", "_u", "_rem", "_rho", "_last_t", "_widths", "lockstep",
                 "together")

    def __init__(self, cores: float, entities: int, extra_threads: float = 0.0) -> None:
        self.cores = cores
        self.contended = cores < entities + extra_threads
        #: entity -> threads of its running task, where not 1
        self._widths: dict[int, float] = {}
        #: entity -> how much slower its tasks progress whenever the cores are oversubscribed (a pool that
        #: gains nothing from its threads then; the pessimistic end of a prediction's range)
        self.lockstep: dict[int, float] = {}
        #: entity -> threads that progress only together (:func:`lockstep_speed`) in its tasks that run on
        #: several threads (a pool whose threads spin at barriers)
        self.together: dict[int, float] = {}
        #: entity -> finish time of its running task, in the order the tasks started (ties go to the
        #: earliest start)
        self.finish: dict[int, float] = {}
        #: entity -> batch of its running task
        self.batch: dict[int, int] = {}
        self._u: dict[int, float] = {}
        self._rem: dict[int, float] = {}
        self._rho: dict[int, float] = {}
        self._last_t = 0.0

    def start(self, entity: int, batch: int, nominal_s: float, u: float, now: float, width: float = 1.0) -> None:
        """``entity`` starts a task of ``nominal_s`` contention-free seconds on ``width`` threads wanting ``u`` of a core each."""
        self._u[entity] = u
        if width != 1.0:
            self._widths[entity] = width
        self.batch[entity] = batch
        if self.contended:
            self._advance(now)
            self._rem[entity] = nominal_s
            self._rerate(now)
        else:
            self.finish[entity] = now + nominal_s

    def stop(self, entity: int, now: float) -> int:
        """``entity``'s task ends at ``now``; returns its batch."""
        b = self.batch.pop(entity)
        del self.finish[entity], self._u[entity]
        if self._widths:
            self._widths.pop(entity, None)
        if self.contended:
            self._advance(now)
            del self._rem[entity], self._rho[entity]
            self._rerate(now)
        return b

    def next_finish(self) -> tuple[float, int]:
        """``(time, entity)`` of the next task to finish; ``(inf, -1)`` when none runs."""
        fin = self.finish
        if not fin:
            return math.inf, -1
        e = min(fin, key=fin.__getitem__)
        return fin[e], e

    def _advance(self, now: float) -> None:
        """Progress every running task to ``now`` at the current rates."""
        dt = now - self._last_t
        if dt > 0:
            rem, rho = self._rem, self._rho
            for e in rem:
                rem[e] -= rho[e] * dt
        self._last_t = now

    def _rerate(self, now: float) -> None:
        """New CPU speed for the running set; new finish times."""
        wd = self._widths
        ws = [wd.get(e, 1.0) for e in self._u] if wd else None
        r = cpu_speed(list(self._u.values()), self.cores, ws)
        u, rho, finish = self._u, self._rho, self.finish
        for e, rem in self._rem.items():
            ue = u[e]
            if r < 1.0 and e in self.together and e in wd:
                rr = progress_rate(ue, lockstep_speed(r, self.together[e], self.cores))
            else:
                rr = 1.0 / (1.0 - ue + ue / r) if r < 1.0 else 1.0  # progress_rate(ue, r), inlined for speed
            if r < 1.0 and e in self.lockstep:
                rr /= self.lockstep[e]
            rho[e] = rr
            finish[e] = now + (rem / rr if rem > 0 else 0.0)
