"""The thread check: did the training step's threads and the loader workers fight for the cores?

The step's math libraries (BLAS, OpenMP, torch's intra-op pool) run their
own threads. When those threads and the busy loader workers want more CPU
than the machine has cores, the step slows down while workers run.
:func:`check_threads` finds out from a recorded run, in named steps:

1. ``_thread_facts``: the cores and the step's thread pools from the run
   header (``threads``, ``step_cpu``; missing in runs recorded before
   0.2.0: the check is then skipped, and says why);
2. ``_steps_under_load``: per step, its wall and CPU seconds and the mean
   CPU load of the loader workers while it ran (the workers' spans, each
   weighted by its CPU share);
3. ``_compare``: the step's median time with busy workers against with
   idle ones, the slow-down processor sharing explains (every runnable
   thread gets an equal share of the cores; Kleinrock's model), and what
   is left unexplained;
4. ``_advice``: how many threads for the step and how many workers on this
   machine.

References
----------
.. [1] L. Kleinrock, *Queueing Systems, Volume 2: Computer Applications*,
   Wiley, 1976, ch. 4 (processor sharing).
.. [2] G. M. Amdahl, "Validity of the single processor approach to
   achieving large scale computing capabilities", AFIPS 1967.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from .nesting import span_pieces
from .tracefile import usable_cores

if TYPE_CHECKING:  # pragma: no cover
    from .load import Run

__all__ = ["ThreadCheck", "check_threads", "step_threads", "ps_step_slowdown"]

#: Mean busy workers (CPU-weighted) at or above which a step counts as "with busy workers" ...
BUSY_LOAD = 0.5
#: ... and at or below which it counts as "with idle workers".
IDLE_LOAD = 0.1
#: Steps needed on each side before the two medians are compared.
MIN_STEPS = 3
#: Observed over explained slow-down above which the recording shows contention the model misses.
UNEXPLAINED_MARGIN = 1.10
#: Spin after a step that counts as a spinning pool, and the share of the waits it must cover (our choices: below
#: them, the CPU of the probe's own threads and of the loader's queue feeders, about 1 % of the waits on our
#: machine).
SPIN_MIN_S = 0.0005
SPIN_MIN_SHARE = 0.1
#: Cores the step keeps however busy the machine was (as the replay's plan does).
MIN_CORES_LEFT = 0.25
#: A run without workers counts as oversubscribed when the step's threads and the other processes' busy
#: cores exceed the cores by more than this (our choice: a quarter core, below it the samples' noise).
BESIDE_OTHERS_MARGIN = 0.25


@dataclass(frozen=True)
class ThreadCheck:
    """What the thread check found (``skipped`` says why it could not run).

    Attributes
    ----------
    skipped : str or None
        Why the check did not run (None: it ran).
    cores : int
        Cores the training process could use.
    step_threads : int
        Threads the step's pools may run: torch's intra-op count where torch
        was imported, else the largest pool; 1 when none.
    step_cores : float
        Cores the step used (process CPU over wall time, median), with
        idle workers where enough steps ran so (else over all steps); in a
        run without workers (the check skipped), over all its steps.
    pools : list of dict
        The pools recorded: ``{"api", "library", "threads"}``, plus torch's
        intra-op pool as ``{"api": "intra-op", "library": "torch", ...}``.
    workers : int
        Loader worker slots of the run.
    worker_load : float
        Mean CPU-weighted busy workers during the steps that ran with busy workers.
    oversubscribed : bool
        ``step_threads + worker_load + background_cores`` exceeds ``cores``
        (threads that want CPU while workers run, or beside other processes).
    busy_steps, idle_steps : int
        Steps with busy and with idle workers.
    busy_step_s, idle_step_s : float
        Median step time of each (NaN when a side has too few steps).
    slowdown : float
        ``busy_step_s / idle_step_s`` (NaN when unknown).
    explained_slowdown : float
        The slow-down processor sharing predicts for the step beside ``worker_load`` workers.
    unexplained : float
        ``slowdown / explained_slowdown`` (1: the model explains it all).
    cost_s : float
        Time the steps lost to busy workers: their time beyond ``idle_step_s``.
    wall_s : float
        Wall time of the run.
    background_cores : float
        Cores other processes kept busy during the run (given by the caller;
        processor sharing explains the step's slow-down on the cores left).
    advice : str
        The fix in concrete terms ("" when none is needed).
    spin_s : float
        CPU seconds each of the step pool's other threads kept running
        after a step, while the loop waited for its next batch (OpenMP
        pools spin before they sleep): the mean over the run's waits; 0
        when none ran.
    spin_share : float
        The share of the loop's waiting those threads ran (their CPU
        seconds over the waits' seconds).
    """

    skipped: str | None
    cores: int = 1
    step_threads: int = 1
    step_cores: float = 1.0
    pools: tuple[dict[str, Any], ...] = ()
    workers: int = 0
    worker_load: float = 0.0
    oversubscribed: bool = False
    busy_steps: int = 0
    idle_steps: int = 0
    busy_step_s: float = math.nan
    idle_step_s: float = math.nan
    slowdown: float = math.nan
    explained_slowdown: float = math.nan
    unexplained: float = math.nan
    cost_s: float = 0.0
    wall_s: float = 0.0
    advice: str = ""
    background_cores: float = 0.0
    spin_s: float = 0.0
    spin_share: float = 0.0

    @property
    def step_width(self) -> float:
        """Threads the replay runs the step on: :attr:`step_cores`, between 1 and :attr:`step_threads`."""
        if not math.isfinite(self.step_cores):  # a skipped check keeps 1.0, but for a run without workers
            return 1.0
        return float(min(max(self.step_cores, 1.0), self.step_threads))

    @property
    def spins(self) -> bool:
        """The step's pool has several threads and they ran on after the steps (:attr:`spin_s`): its
        threads spin at barriers, so they make progress only while all of them have a core."""
        return self.step_threads > 1 and self.spin_s >= SPIN_MIN_S and self.spin_share >= SPIN_MIN_SHARE

    @property
    def is_unexplained(self) -> bool:
        """The recorded slow-down exceeds what processor sharing explains by more than the margin."""
        return bool(self.unexplained > UNEXPLAINED_MARGIN)


def _pool_list(threads: Any) -> list[dict[str, Any]] | None:
    """The recorded pools as clean dicts (None: the header has no readable pool list)."""
    if not isinstance(threads, dict) or threads.get("error"):
        return None
    pools = threads.get("pools")
    out = []
    if isinstance(pools, list):
        for p in pools:
            n = p.get("threads") if isinstance(p, dict) else None
            if isinstance(n, int) and not isinstance(n, bool) and 1 <= n <= 1 << 20:
                out.append({"api": str(p.get("api", ""))[:40], "library": str(p.get("library", ""))[:40],
                            "threads": n})
    torch_n = threads.get("torch_intra_op")
    if isinstance(torch_n, int) and not isinstance(torch_n, bool) and 1 <= torch_n <= 1 << 20:
        out.append({"api": "intra-op", "library": "torch", "threads": torch_n})
    if not isinstance(pools, list) and not out:
        return None
    return out


def _pool_threads(pools: list[dict[str, Any]]) -> int:
    """The step's threads: torch's intra-op count where torch was in use (its ops run on that pool and it
    sets its math libraries to match), else the largest pool; 1 when none."""
    torch_n = [p["threads"] for p in pools if p["library"] == "torch"]
    return torch_n[0] if torch_n else max([p["threads"] for p in pools], default=1)


def step_threads(header: dict[str, Any]) -> int | None:
    """Threads the step's pools may run, from a run header (None: not recorded).

    Examples
    --------
    >>> step_threads({"threads": {"pools": [{"api": "blas", "library": "openblas", "threads": 4}]}})
    4
    >>> step_threads({}) is None
    True
    """
    pools = _pool_list(header.get("threads"))
    if pools is None:
        return None
    return _pool_threads(pools)


def ps_step_slowdown(step_threads: int, step_cores: float, worker_load: float, cores: float) -> float:
    """Slow-down of a step on ``step_threads`` threads beside ``worker_load`` CPU-bound workers, under processor sharing.

    The step's threads each want ``step_cores / step_threads`` of a core;
    the workers are CPU-bound. Every runnable thread gets an equal share
    of the CPU, so the step's CPU part runs at the common speed ``r`` at
    which the CPU used fills the cores; its off-CPU part keeps full speed.

    Examples
    --------
    >>> round(ps_step_slowdown(2, 2.0, 1.0, 2), 9)  # two busy step threads and one worker on two cores
    1.5
    >>> ps_step_slowdown(1, 1.0, 1.0, 2)  # they fit
    1.0

    References
    ----------
    .. [1] L. Kleinrock, *Queueing Systems, Volume 2*, Wiley, 1976, ch. 4 (processor sharing).
    """
    k = max(1, int(step_threads))
    u = min(1.0, max(0.0, step_cores / k))
    r = _common_speed([u] * k + _worker_threads(worker_load), float(cores))
    return 1.0 - u + u / r if r < 1.0 else 1.0


def _worker_threads(load: float) -> list[float]:
    """A mean worker load as CPU-bound threads: whole workers, then the fraction left as one partial thread."""
    whole = int(load)
    rest = load - whole
    return [1.0] * whole + ([rest] if rest > 1e-9 else [])


def _common_speed(us: list[float], cores: float) -> float:
    """The common speed of the CPU parts of threads wanting ``us`` of a core: bisection on the CPU they use.

    The same equation as :func:`pipeprobe.whatif._cores.cpu_speed` (the replay's solver, a layer above
    this one; ``tests/test_threads.py`` checks the two agree).
    """
    if sum(us) <= cores:
        return 1.0
    lo, hi = 1e-9, 1.0
    for _ in range(100):
        r = 0.5 * (lo + hi)
        used = sum(u * r / ((1.0 - u) * r + u) for u in us if u > 0)
        lo, hi = (r, hi) if used < cores else (lo, r)
    return 0.5 * (lo + hi)


def _unread(threads: Any) -> str:
    """Why recorded thread facts give no pools."""
    if not isinstance(threads, dict):
        return "the run header's thread facts are not an object; the check needs a run recorded by pipeprobe 0.2.0+"
    if threads.get("error"):
        return f"the thread pools could not be read when the run was recorded ({str(threads['error'])[:80]})"
    return "threadpoolctl was not installed when the run was recorded, so its thread pools are unknown"


def _thread_facts(run: Run) -> tuple[str | None, int, list[dict[str, Any]]]:
    """Step 1: ``(why skipped or None, usable cores, pools)`` from the run header."""
    h = run.header
    threads = h.get("threads")
    if threads is None:
        return "the run folder has no thread facts (recorded before pipeprobe 0.2.0)", 1, []
    pools = _pool_list(threads)
    if pools is None:
        return _unread(threads), 1, []
    if h.get("step_cpu") != "process":
        return "the steps' CPU time was not recorded (cpu_time=False)", 1, []
    return None, usable_cores(h), pools


def _mean_load(starts: np.ndarray, ends: np.ndarray, weights: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Mean over each ``[a, b)`` of the summed ``weights`` of the intervals ``[starts, ends)`` open at each instant."""
    t = np.concatenate([starts, ends])
    d = np.concatenate([weights, -weights])
    order = np.argsort(t, kind="stable")
    t, d = t[order], d[order]
    load = np.cumsum(d)
    area = np.concatenate([[0.0], np.cumsum(load[:-1] * np.diff(t))])

    def area_at(x: np.ndarray) -> np.ndarray:
        i = np.searchsorted(t, x, side="right") - 1
        ok = i >= 0
        ii = np.clip(i, 0, len(t) - 1)
        return np.where(ok, area[ii] + load[ii] * (x - t[ii]), 0.0)

    dur = b - a
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(dur > 0, (area_at(b) - area_at(a)) / dur, 0.0)


@dataclass(frozen=True)
class _StepLoad:
    """Per step of the lowest rank: wall seconds, process CPU seconds, mean CPU-weighted busy workers."""

    dur_s: np.ndarray
    cpu_s: np.ndarray
    worker_load: np.ndarray
    workers: int


def _worker_pieces(work: pd.DataFrame) -> pd.DataFrame:
    """The workers' stage spans cut into the pieces of the innermost stage running, with their own CPU.

    A worker inside ``fetch`` with ``augment`` inside it is one busy thread, not two: nested spans
    counted once (:func:`pipeprobe.nesting.span_pieces`).
    """
    cols = [c for c in ("stage", "start_s", "end_s", "rank", "pid", "tid", "cpu_s") if c in work]
    return span_pieces(work[cols], columns=cols) if len(work) else work


def _steps_under_load(run: Run) -> _StepLoad:
    """Step 2: the steps of the lowest rank and the loader workers' CPU load while each ran."""
    sp = run.spans
    rank = int(sp["rank"].min()) if len(sp) else 0
    sp = sp[sp["rank"] == rank]
    steps = sp[(sp["stage"] == "step") & (sp["role"] == "main")]
    work = _worker_pieces(sp[(sp["role"] == "worker") & ~sp["stage"].isin(["wait", "step"])])
    procs = run.processes
    procs = procs[(procs["rank"] == rank) & (procs["role"] == "worker")] if len(procs) else procs
    workers = int(procs["slot"].nunique() if "slot" in procs else procs["pid"].nunique()) if len(procs) else 0
    a, b = steps["start_s"].to_numpy(float), steps["end_s"].to_numpy(float)
    if len(work) and len(steps):
        dur = work["dur_s"].to_numpy(float)
        with np.errstate(invalid="ignore", divide="ignore"):
            share = np.where(dur > 0, work["cpu_s"].to_numpy(float) / dur, 0.0)
        share = np.clip(np.nan_to_num(share, nan=1.0), 0.0, 1.0)
        load = _mean_load(work["start_s"].to_numpy(float), work["end_s"].to_numpy(float), share, a, b)
    else:
        load = np.zeros(len(steps))
    return _StepLoad(b - a, steps["cpu_s"].to_numpy(float), load, workers)


def _compare(steps: _StepLoad, cores: int, k: int, background: float) -> dict[str, Any]:
    """Step 3: median step time with busy against idle workers; the part processor sharing explains."""
    busy = steps.worker_load >= BUSY_LOAD
    idle = steps.worker_load <= IDLE_LOAD
    out: dict[str, Any] = {"busy_steps": int(busy.sum()), "idle_steps": int(idle.sum())}
    load = float(np.mean(steps.worker_load[busy])) if busy.any() else 0.0
    out["worker_load"] = load
    # threads wanting CPU while workers ran (or, with none busy, beside the other processes alone)
    out["oversubscribed"] = bool(k + load + background > cores + 1e-9 and (busy.any() or k > 1))
    alone = idle if idle.sum() >= MIN_STEPS else np.ones(len(idle), bool)
    with np.errstate(invalid="ignore", divide="ignore"):
        out["step_cores"] = float(np.nanmedian(steps.cpu_s[alone] / steps.dur_s[alone])) if alone.any() else 1.0
    if busy.sum() < MIN_STEPS or idle.sum() < MIN_STEPS:
        return out
    busy_s, idle_s = float(np.median(steps.dur_s[busy])), float(np.median(steps.dur_s[idle]))
    step_cores = out["step_cores"]
    left = max(MIN_CORES_LEFT, cores - background)
    explained = ps_step_slowdown(k, step_cores if math.isfinite(step_cores) else 1.0, load, left)
    slowdown = busy_s / idle_s if idle_s > 0 else math.nan
    out.update(busy_step_s=busy_s, idle_step_s=idle_s, slowdown=slowdown, explained_slowdown=explained,
               unexplained=slowdown / explained,
               cost_s=float(np.maximum(0.0, steps.dur_s[busy] - idle_s).sum()) if slowdown > 1.0 else 0.0)
    return out


def _cores_alone(steps: _StepLoad) -> float:
    """Cores the step used with no loader workers: the median of its process CPU over its wall time."""
    with np.errstate(invalid="ignore", divide="ignore"):
        used = steps.cpu_s / steps.dur_s
    used = used[np.isfinite(used)]
    return float(np.median(used)) if len(used) else 1.0


def _advice(cores: int, k: int, workers: int, oversubscribed: bool, pools: list[dict[str, Any]]) -> str:
    """Step 4: the fix on this machine: threads for the step, or workers."""
    if not oversubscribed:
        return ""
    if k == 1:  # no pool to fit: how many workers is the worker advice's to say (whatif/advice.py, by replay)
        return ""
    t = max(1, cores - max(1, workers))
    w = max(1, cores - k)
    keep = (f"; or keep {k} step threads and use {w} worker{'s' if w != 1 else ''}" if w < workers else "")
    return (f"give the step {t} thread{'s' if t != 1 else ''} beside {workers} worker{'s' if workers != 1 else ''} "
            f"on {cores} cores {_threads_how(t)}{keep}{_passive_hint(pools)}")


def _advice_beside_others(cores: int, k: int, background: float, pools: list[dict[str, Any]]) -> str:
    """Step 4 for a run without workers: threads for the step on the cores other processes left it.

    Examples
    --------
    >>> _advice_beside_others(2, 2, 1.0, [{"api": "openmp", "library": "openmp", "threads": 2}])[:60]
    'give the step 1 thread while other processes keep 1.0 of the'
    """
    t = max(1, cores - math.ceil(background - BESIDE_OTHERS_MARGIN))
    return (f"give the step {t} thread{'s' if t != 1 else ''} while other processes keep {background:.1f} of the "
            f"{cores} cores busy {_threads_how(t)}{_passive_hint(pools)}")


def _threads_how(t: int) -> str:
    """The three ways to give the step ``t`` threads."""
    return f"(torch.set_num_threads({t}), threadpoolctl.threadpool_limits({t}), or OMP_NUM_THREADS={t} before the start)"


def _passive_hint(pools: list[dict[str, Any]]) -> str:
    """For an OpenMP pool: its waiting threads can sleep instead of spinning (they spin by default)."""
    if not any(p.get("api") == "openmp" for p in pools):
        return ""
    return ("; or OMP_WAIT_POLICY=PASSIVE before the start, so the pool's threads sleep at a barrier instead of "
            "spinning while a partner waits for a core")


def _spin_after_steps(run: Run, k: int) -> tuple[float, float]:
    """CPU seconds each of the step's ``k - 1`` other pool threads ran on after a step (see :attr:`ThreadCheck.spin_s`).

    A wait records the CPU the process's other threads used during it (the
    header's ``wait_cpu``); the mean over the waits that follow a step,
    shared among the pool's other threads, is what the pool spent after a
    step in this run. (Where the pool's spin outlasted the waits, it shows
    only as long as they were: a lower bound of the library's spin. The
    kernel adds a running thread's CPU time to its process's clock at its
    scheduler ticks, so single waits read in steps of a few milliseconds;
    their mean does not.) Returns that mean and the share of the waits' time
    it covers (:attr:`ThreadCheck.spin_share`).

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> _spin_after_steps(pipeprobe.load(write_example_run(tempfile.mkdtemp(), batches=4)), 2)
    (0.0, 0.0)
    """
    b = run.batches
    if "others_cpu_s" not in b or not len(b):
        return 0.0, 0.0
    b = b[b["rank"] == b["rank"].min()]
    others = b["others_cpu_s"].to_numpy(np.float64)[1:] / max(1, k - 1)  # the first wait follows no step
    wait = b["wait_s"].to_numpy(np.float64)[1:]
    ok = np.isfinite(others)
    others, wait = others[ok], wait[ok]
    if not len(others):
        return 0.0, 0.0
    waited = float(wait.sum())
    return float(others.mean()), (float(others.sum()) / waited if waited > 0 else 0.0)


def check_threads(run: Run, background_cores: float = 0.0) -> ThreadCheck:
    """Check whether the step's threads and the loader workers wanted more CPU than the cores.

    Parameters
    ----------
    run : Run
        A loaded run (:func:`pipeprobe.load`).
    background_cores : float, optional
        Cores other processes kept busy (the replay plan's estimate from
        the resource samples); the step shares only the rest.

    Returns
    -------
    ThreadCheck
        ``skipped`` says why when the run lacks what the check needs.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=4, decode_ms=6, step_ms=2)
    >>> check_threads(pipeprobe.load(d)).skipped
    'the run folder has no thread facts (recorded before pipeprobe 0.2.0)'

    References
    ----------
    .. [1] L. Kleinrock, *Queueing Systems, Volume 2*, Wiley, 1976, ch. 4 (processor sharing).
    """
    why, cores, pools = _thread_facts(run)
    if why is not None:
        return ThreadCheck(skipped=why, wall_s=float(run.wall_s))
    k = _pool_threads(pools)
    steps = _steps_under_load(run)
    if not len(steps.dur_s):
        return ThreadCheck(skipped="the run has no training steps (probe.step())", wall_s=float(run.wall_s))
    spin, share = _spin_after_steps(run, k)
    if steps.workers == 0:  # nothing to compare, but the step's cores say how wide a replay with workers runs it
        alone, bg = _cores_alone(steps), float(background_cores)
        if k > 1 and k + bg > cores + BESIDE_OTHERS_MARGIN:  # the step's pool beside other processes' work
            return ThreadCheck(skipped=None, cores=cores, step_threads=k, step_cores=alone, pools=tuple(pools),
                               oversubscribed=True, wall_s=float(run.wall_s), background_cores=bg,
                               advice=_advice_beside_others(cores, k, bg, pools), spin_s=spin, spin_share=share)
        return ThreadCheck(skipped="the loader ran no worker processes", cores=cores, step_threads=k,
                           step_cores=alone, pools=tuple(pools), wall_s=float(run.wall_s), spin_s=spin, spin_share=share)
    found = _compare(steps, cores, k, float(background_cores))
    return ThreadCheck(skipped=None, cores=cores, step_threads=k, pools=tuple(pools), workers=steps.workers,
                       wall_s=float(run.wall_s), **found,
                       advice=_advice(cores, k, steps.workers, found["oversubscribed"], pools),
                       background_cores=float(background_cores), spin_s=spin, spin_share=share)
