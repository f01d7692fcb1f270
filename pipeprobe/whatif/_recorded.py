"""From a recorded run to per-batch work: the steps of :func:`~pipeprobe.whatif.plan.build_plan` (private).

Each step is a function returning a small frozen record; ``build_plan``
calls them in this order:

1. :func:`consumer_batches`: the batches of one rank, in the consumer's order;
2. :func:`user_spans`: the stage and step spans of those batches, cut into the
   pieces of the innermost one running (:func:`pipeprobe.nesting.span_pieces`:
   nested time counts once; a step keeps its time outside the stages inside
   it), each placed on the loader side or the consumer side;
3. :func:`loader_tasks`, :func:`batch_workers` and :func:`consumer_work`:
   per batch and stage, wall and CPU seconds; which worker ran each batch;
4. :func:`without_contention`: the CPU contention of the recorded run taken
   out (:mod:`pipeprobe.whatif._contention`);
5. :func:`loader_config` and :func:`loader_times`: the recorded workers,
   prefetch depth, policy and epoch barrier, and the loader's constants.

References
----------
.. [1] L. Kleinrock, *Queueing Systems, Volume 2*, Wiley, 1976, ch. 4 (processor sharing).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Mapping

import numpy as np
import pandas as pd

from ..errors import ScenarioError
from ..nesting import as_text, pieces_and_inside
from ._contention import max_overlap, remove_contention, split_cpu
from ._replay_path import CONSUMER_OVERHEAD, UNSTAGED, WORKER_OVERHEAD
from .limits import MAX_PLAN_STAGES, OTHER_STAGES

if TYPE_CHECKING:  # pragma: no cover
    from ..load import Run

__all__ = ["Work", "PoolSpin", "consumer_batches", "user_spans", "loader_tasks", "batch_workers", "consumer_work",
           "without_contention", "loader_config", "loader_times"]


@dataclass(frozen=True)
class Work:
    """Per-batch work of one side, per stage: off-CPU seconds and CPU seconds (contention removed)."""

    names: tuple[str, ...]
    io_s: np.ndarray  # (batches, stages)
    cpu_s: np.ndarray  # (batches, stages)

    def scaled(self, factors: Mapping[str, float]) -> Work:
        """The work with each stage ``factors[stage]`` times faster."""
        f = np.array([1.0 / factors.get(n, 1.0) for n in self.names])
        return Work(self.names, self.io_s * f, self.cpu_s * f)

    def head(self, n: int) -> Work:
        """The work of the first ``n`` batches."""
        return Work(self.names, self.io_s[:n], self.cpu_s[:n])


@dataclass(frozen=True)
class _Batches:
    """The consumer's batches of one rank, in batch order, with its wait and step times."""

    rank: int
    batch_id: np.ndarray
    epoch: np.ndarray
    wait_start_s: np.ndarray
    ready_s: np.ndarray
    wait_s: np.ndarray
    step_start_s: np.ndarray  # the ready time where a batch has no step
    step_end_s: np.ndarray
    no_step: np.ndarray
    notes: tuple[str, ...]

    @property
    def n(self) -> int:
        return len(self.batch_id)

    @property
    def epoch_first(self) -> np.ndarray:
        """The batch opens an epoch."""
        return np.r_[True, self.epoch[1:] != self.epoch[:-1]]

    @property
    def epoch_start_index(self) -> np.ndarray:
        """Per batch, the index of the first batch of its epoch."""
        return np.maximum.accumulate(np.where(self.epoch_first, np.arange(self.n), 0))


@dataclass(frozen=True)
class _UserSpans:
    """The stage spans of the plan's batches (not waits, not steps) and the side each ran on."""

    position: np.ndarray  # index of the span's batch in _Batches
    start_s: np.ndarray
    end_s: np.ndarray
    dur_s: np.ndarray
    cpu_s: np.ndarray  # 0 where unknown
    stage: np.ndarray  # stage names (str)
    thread: np.ndarray  # pid << 32 + tid
    in_wait: np.ndarray  # consumer thread, inside the wait for its batch: loading done by the consumer
    consumer_side: np.ndarray
    worker_side: np.ndarray
    cpu_known: bool
    steps: pd.DataFrame  # the steps' pieces of the plan's batches (their own time when stages ran inside)
    spans: int  # spans of the rank
    notes: tuple[str, ...]
    inside: Mapping[str, tuple[str, ...]] = field(default_factory=dict)  # stage -> labels of its time

    @property
    def inline(self) -> bool:
        """No worker ran a stage: the consumer loaded every batch itself."""
        return not self.worker_side.any()

    @property
    def load_side(self) -> np.ndarray:
        """Spans of the loader tasks: the workers', or the consumer's inside its waits when it loaded inline."""
        return self.in_wait if self.inline else self.worker_side


@dataclass(frozen=True)
class _StageSeconds:
    """Per batch and stage: wall seconds and CPU seconds of one side."""

    names: tuple[str, ...]
    dur_s: np.ndarray
    cpu_s: np.ndarray
    notes: tuple[str, ...] = ()
    folded: tuple[str, ...] = ()  # names sharing the OTHER_STAGES column


@dataclass(frozen=True)
class _LoaderTasks:
    """Per batch: the loader task's seconds per stage (plus the worker's own time) and its span."""

    seconds: _StageSeconds
    first_s: np.ndarray  # start of the task
    last_s: np.ndarray  # end of the task
    missing: np.ndarray  # no loader spans: replayed as a free task
    inline: bool
    notes: tuple[str, ...]


@dataclass(frozen=True)
class _BatchWorkers:
    """Which worker ran each batch (-1: none) and how many workers the trace shows."""

    worker: np.ndarray
    seen: int
    notes: tuple[str, ...]


@dataclass(frozen=True)
class _ConsumerWork:
    """Per batch: the consumer's seconds per stage from the batch's arrival to the next wait."""

    seconds: _StageSeconds
    end_s: np.ndarray


@dataclass(frozen=True)
class _LoaderConfig:
    """The recorded loader's workers, prefetch depth, policy and epoch barrier."""

    workers: int
    prefetch: int
    policy: str
    barrier: bool
    prefetch_inferred: bool
    notes: tuple[str, ...]


@dataclass(frozen=True)
class _LoaderTimes:
    """The loader's constants, measured from the trace (means: the replay must add up to the wall time)."""

    dispatch_s: float = 0.0
    worker_gap_s: float = 0.0
    latency_s: float = 0.0
    handoff_s: float = 0.0
    epoch_dispatch_s: np.ndarray = field(default_factory=lambda: np.zeros(0))


def consumer_batches(run: Run, rank: int | None) -> _Batches:
    """Step 1: the batches of ``rank`` (the lowest by default), sorted by id."""
    allb = run.batches
    if len(allb) == 0:
        raise ScenarioError(
            f"run {str(run.run_dir)!r} has no batches to replay; record the training loop with "
            "probe.watch(loader) and probe.step()"
        )
    ranks = sorted(int(r) for r in allb["rank"].unique())
    if rank is None:
        rank = ranks[0]
    elif rank not in ranks:
        raise ScenarioError(f"rank {rank!r} has no batches in this run; choose one of {ranks}")
    notes = (f"the run has {len(ranks)} ranks; replaying rank {rank} only",) if len(ranks) > 1 else ()
    b = allb[allb["rank"] == rank].sort_values("batch_id").reset_index(drop=True)
    ready = b["ready_s"].to_numpy(float)
    step_start = b["step_start_s"].to_numpy(float)
    step_end = b["step_end_s"].to_numpy(float)
    no_step = np.isnan(step_end)
    return _Batches(
        rank=rank, batch_id=b["batch_id"].to_numpy(np.int64), epoch=b["epoch"].to_numpy(np.int64),
        wait_start_s=b["wait_start_s"].to_numpy(float), ready_s=ready, wait_s=b["wait_s"].to_numpy(float),
        step_start_s=np.where(no_step, ready, step_start), step_end_s=np.where(no_step, ready, step_end),
        no_step=no_step, notes=notes,
    )


def _loader_threads(run: Run, user: pd.DataFrame) -> np.ndarray:
    """One key per thread that loads; worker processes of one loader slot share their slot's key.

    A loader without persistent workers starts new worker processes each epoch;
    they fill the same slots (:func:`pipeprobe.load.worker_slots`), so the
    replay sees the loader's worker count, not the count of processes.
    """
    key = (user["pid"].to_numpy(np.int64) << 32) + user["tid"].to_numpy(np.int64)
    procs = run.processes
    if "slot" not in procs or procs.empty:
        return key
    slot_of = procs.set_index(["rank", "pid"])["slot"]
    slot_of = slot_of[~slot_of.index.duplicated()]
    slots = slot_of.reindex(pd.MultiIndex.from_arrays([user["rank"], user["pid"]])).fillna(0).to_numpy(np.int64)
    return np.where(slots > 0, -slots, key)


#: The span columns the plan reads from the stage pieces (fewer columns: less memory on a large run).
_PIECE_INPUT = ("stage", "start_s", "end_s", "rank", "pid", "tid", "batch_id", "cpu_s")


def user_spans(run: Run, batches: _Batches) -> _UserSpans:
    """Step 2: the stage spans of the batches, on the loader side or the consumer side."""
    sp = run.spans
    if (sp["rank"].to_numpy() != batches.rank).any():  # the copy only when there are other ranks
        sp = sp[sp["rank"] == batches.rank]
    ck = sp.loc[(sp["stage"] == "wait").to_numpy(), ["pid", "tid"]].value_counts().index[0]  # the consumer
    bid = batches.batch_id
    pos = pd.Series(np.arange(batches.n), index=bid)
    user, inside = _batch_pieces(sp, bid)
    is_step = (user["stage"] == "step").to_numpy()
    steps = user.loc[is_step, ["batch_id", "dur_s", "cpu_s", "label"]]
    user = user[~is_step]
    k = pos.reindex(user["batch_id"].to_numpy()).to_numpy(np.int64)
    in_cons = ((user["pid"] == int(ck[0])) & (user["tid"] == int(ck[1]))).to_numpy()
    start = user["start_s"].to_numpy(float)
    end = user["end_s"].to_numpy(float)
    # consumer-thread spans inside the wait for their batch are loading done by the consumer
    in_wait = in_cons & (start >= batches.wait_start_s[k] - 1e-9) & (end <= batches.ready_s[k] + 1e-9)
    worker_side = ~in_cons
    notes = []
    if worker_side.any() and in_wait.any():
        notes.append("spans in the consumer thread during its waits were folded into the handoff")
    cpu = user["cpu_s"].to_numpy(float)
    cpu_known = bool(np.isfinite(cpu).any()) if len(cpu) else False
    if not cpu_known:
        notes.append("no CPU times in the trace (cpu_time=False): stages are replayed without CPU contention")
    return _UserSpans(
        position=k, start_s=start, end_s=end, dur_s=end - start, cpu_s=np.nan_to_num(cpu, nan=0.0),
        stage=as_text(user["label"] if "label" in user else user["stage"]),
        thread=_loader_threads(run, user),
        in_wait=in_wait, consumer_side=in_cons & ~in_wait, worker_side=worker_side,
        cpu_known=cpu_known, steps=steps,
        spans=int(len(sp)),
        notes=tuple(notes), inside=inside,
    )


def _batch_pieces(sp: pd.DataFrame, bid: np.ndarray) -> tuple[pd.DataFrame, dict[str, tuple[str, ...]]]:
    """The stage and step pieces of the batches ``bid`` and what each enclosing stage holds (one copy at a time).

    Nested stages count once: the time of the innermost stage running, ids
    taken from the stage around it (:func:`pipeprobe.nesting.span_pieces`).
    A step with stages inside (``forward``) keeps its own time, labelled
    ``step, outside your stages``; the step's CPU beyond its stages' is
    shared among all its pieces by duration (its CPU time is the process's).
    """
    rows = np.flatnonzero((sp["stage"] != "wait").to_numpy())
    pieces, inside = pieces_and_inside(sp, columns=_PIECE_INPUT, rows=rows)  # one cut, no copy of the spans
    if not len(pieces):  # no stage or step spans at all: no pieces, with the columns the plan reads
        return sp.iloc[:0].assign(label=pd.Series(dtype=object)), inside
    of_batches = ((pieces["batch_id"] >= 0) & pieces["batch_id"].isin(bid)).to_numpy()
    return (pieces if of_batches.all() else pieces[of_batches]), inside


def _stage_seconds(position: np.ndarray, stage: np.ndarray, dur_s: np.ndarray, cpu_s: np.ndarray, rows: int,
                   keep: frozenset[str], leading: tuple[str, ...] = ()) -> _StageSeconds:
    """Per batch and stage, the summed wall and CPU seconds of spans, columns in order of first appearance.

    Past :data:`MAX_PLAN_STAGES` names, the ones with the least time (and
    not in ``keep``) share one :data:`OTHER_STAGES` column.
    """
    seen, distinct = pd.factorize(stage, use_na_sentinel=False)  # one pass over the names, in order of first appearance
    names = list(leading) + [n for n in distinct if n not in leading]
    folded: tuple[str, ...] = ()
    if len(names) > MAX_PLAN_STAGES:
        names, folded = _fold_small_stages(names, stage, dur_s, keep, leading)
    index = pd.Index(names)
    code = index.get_indexer(distinct)[seen] if len(stage) else np.zeros(0, np.int64)
    notes: tuple[str, ...] = ()
    if folded:
        code = np.where(code < 0, len(names) - 1, code)
        notes = (f"{len(folded)} of {len(folded) + len(names) - 1} stage names with the least time are replayed "
                 f"together as {OTHER_STAGES!r} (at most {MAX_PLAN_STAGES} columns per side)",)
    return _StageSeconds(tuple(names), _matrix(position, code, dur_s, rows, len(names)),
                         _matrix(position, code, cpu_s, rows, len(names)), notes, folded)


def _fold_small_stages(names: list[str], stage: np.ndarray, dur_s: np.ndarray, keep: frozenset[str],
                       leading: tuple[str, ...]) -> tuple[list[str], tuple[str, ...]]:
    """The columns (the names with most time, ``keep`` and ``leading`` always, then OTHER_STAGES) and the names folded."""
    total = pd.Series(dur_s).groupby(stage).sum()
    must = [n for n in names if n in keep or n in leading]
    room = max(0, MAX_PLAN_STAGES - 1 - len(must))
    biggest = set(total.drop(labels=must, errors="ignore").sort_values(ascending=False, kind="stable").index[:room])
    kept = [n for n in names if n in biggest or n in must]
    kept_set = set(kept)
    return kept + [OTHER_STAGES], tuple(n for n in names if n not in kept_set)


def _matrix(k: np.ndarray, code: np.ndarray, values: np.ndarray, rows: int, cols: int) -> np.ndarray:
    flat = np.bincount(k * cols + code, weights=values, minlength=rows * cols)
    return flat.astype(float).reshape(rows, cols)  # bincount of nothing is int


def loader_tasks(spans: _UserSpans, batches: _Batches, keep: frozenset[str]) -> _LoaderTasks:
    """Step 3a: per batch, the loader task's seconds per stage, plus the worker's time between its spans."""
    nb, side = batches.n, spans.load_side
    k = spans.position[side]
    sec = _stage_seconds(k, spans.stage[side], spans.dur_s[side], spans.cpu_s[side], nb, keep)
    notes = list(sec.notes)
    ld, lc = sec.dur_s, sec.cpu_s
    if not sec.names:
        ld, lc = np.zeros((nb, 1)), np.zeros((nb, 1))
    first, last = np.full(nb, np.nan), np.full(nb, np.nan)
    if len(k):
        g = pd.DataFrame({"k": k, "s": spans.start_s[side], "e": spans.end_s[side]}).groupby("k")
        lo, hi = g["s"].min(), g["e"].max()
        first[lo.index.to_numpy()], last[hi.index.to_numpy()] = lo.to_numpy(), hi.to_numpy()
    if spans.inline:  # the consumer ran the task inside its wait: the whole wait is the task
        if np.isnan(first).all():
            ld[:, 0] = batches.wait_s
            notes.append("no stage spans were recorded: each wait is replayed as unstaged loading in the consumer")
        first, last = batches.wait_start_s.copy(), batches.ready_s.copy()
    missing = np.isnan(first)
    if missing.any():
        notes.append(f"{int(missing.sum())} batches have no loader spans; replayed as free loader tasks")
        first, last = np.where(missing, batches.ready_s, first), np.where(missing, batches.ready_s, last)
    gap = np.maximum(0.0, np.maximum(0.0, last - first) - ld.sum(1))
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(ld.sum(1) > 0, lc.sum(1) / ld.sum(1), 0.0)
    names = (sec.names or (UNSTAGED,)) + (WORKER_OVERHEAD,)
    seconds = _StageSeconds(names, np.column_stack([ld, gap]), np.column_stack([lc, gap * frac]), (), sec.folded)
    return _LoaderTasks(seconds, first, last, missing, spans.inline, tuple(notes))


def batch_workers(spans: _UserSpans, loader: _LoaderTasks) -> _BatchWorkers:
    """Step 3b: the worker (thread) that started each batch's task; how many workers the trace shows."""
    nb = len(loader.first_s)
    wk = np.full(nb, -1, np.int64)
    if loader.inline:
        return _BatchWorkers(wk, 0, ())
    side = spans.worker_side
    k = spans.position[side]
    codes, uniq = pd.factorize(spans.thread[side])
    start = spans.start_s[side]
    # each batch's earliest span (the first in span order among equal starts): no sort of the spans
    earliest = np.full(nb, np.inf)
    np.minimum.at(earliest, k, start)
    at = np.flatnonzero(start == earliest[k])
    at = at[~pd.Index(k[at]).duplicated(keep="first")]
    wk[k[at]] = codes[at]
    pairs = pd.unique(k * max(1, len(uniq)) + codes)  # the distinct (batch, worker) pairs
    spread = np.bincount(pairs // max(1, len(uniq)), minlength=nb)
    notes: tuple[str, ...] = ()
    if (spread > 1).any():
        notes = (
            f"{int((spread > 1).sum())} batches were loaded by more than one worker; each is replayed "
            "as one task (exact only when a batch's samples run one after the other on one worker)",
        )
    return _BatchWorkers(wk, len(uniq), notes)


def consumer_work(spans: _UserSpans, batches: _Batches, keep: frozenset[str]) -> _ConsumerWork:
    """Step 3c: per batch, the step, consumer-side stages and loop overhead from its arrival to the next wait."""
    nb, side = batches.n, spans.consumer_side
    ready = batches.ready_s
    nxt_wait = np.append(batches.wait_start_s[1:], np.nan)
    end = np.maximum(np.where(np.isnan(nxt_wait), batches.step_end_s, nxt_wait), ready)
    steps = spans.steps
    step_label = str(steps["label"].iloc[0]) if len(steps) else "step"  # own_label("step") when stages ran inside
    sec = _stage_seconds(spans.position[side], spans.stage[side], spans.dur_s[side], spans.cpu_s[side], nb, keep,
                         leading=(step_label,))
    cd, cc = sec.dur_s, sec.cpu_s
    pos = pd.Series(np.arange(nb), index=batches.batch_id)
    sk = pos.reindex(steps["batch_id"].to_numpy()).to_numpy(np.int64)
    cd[:, 0] = np.bincount(sk, weights=steps["dur_s"].to_numpy(float), minlength=nb)
    cc[:, 0] = np.bincount(sk, weights=np.nan_to_num(steps["cpu_s"].to_numpy(float), nan=0.0), minlength=nb)
    gap = np.maximum(0.0, (end - ready) - cd.sum(1))
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(cd.sum(1) > 0, cc.sum(1) / cd.sum(1), 0.0)
    seconds = _StageSeconds(sec.names + (CONSUMER_OVERHEAD,), np.column_stack([cd, gap]),
                            np.column_stack([cc, gap * frac]), sec.notes, sec.folded)
    return _ConsumerWork(seconds, end)


@dataclass(frozen=True)
class PoolSpin:
    """The step pool's other threads after each step: CPU seconds each runs on, and how many they are."""

    cpu_s: float = 0.0
    threads: float = 1.0

    def intervals(self, batches: _Batches) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """The recorded spins as a task kind of :func:`remove_contention`: from each wait's start (the step
        before it ended), for the spin or the wait, whichever was shorter (the next step ends it)."""
        start = batches.wait_start_s[1:]
        dur = np.minimum(self.cpu_s, batches.wait_s[1:])
        return start, start + dur, dur, dur


def without_contention(loader: _LoaderTasks, consumer: _ConsumerWork, batches: _Batches,
                        cores: float, step_width: float = 1.0, spin: PoolSpin | None = None,
                        step_together: float = 1.0) -> tuple[Work, Work]:
    """Step 4: both sides' work with the slow-down of sharing the recorded cores taken out of the CPU parts.

    The consumer's work runs on ``step_width`` threads (see :attr:`ReplayPlan.step_width`), ``step_together``
    of them only together (:attr:`ReplayPlan.step_together`); the step pool's threads that spin after each
    step (``spin``) load the cores too.
    """
    ld, lc = loader.seconds.dur_s, loader.seconds.cpu_s
    cd, cc = consumer.seconds.dur_s, consumer.seconds.cpu_s
    first, ready = loader.first_s, batches.ready_s
    task_wall = np.maximum(0.0, loader.last_s - first)
    tasks = [(first, first + task_wall, ld.sum(1), lc.sum(1)), (ready, ready + cd.sum(1), cd.sum(1), cc.sum(1))]
    widths, together = [1.0, step_width], [1.0, step_together]
    if spin is not None and spin.cpu_s > 0:
        tasks.append(spin.intervals(batches))
        widths.append(spin.threads)
        together.append(1.0)
    lslow, cslow = remove_contention(tasks, cores, widths, together)[:2]
    lio, lcpu = split_cpu(ld, lc, lslow)
    cio, ccpu = split_cpu(cd, cc, cslow)
    return Work(loader.seconds.names, lio, lcpu), Work(consumer.seconds.names, cio, ccpu)


def loader_config(batches: _Batches, loader: _LoaderTasks, by_worker: _BatchWorkers, workers: int | None,
                   prefetch: int | None, policy: str | None) -> _LoaderConfig:
    """Step 5a: workers (counted), epoch barrier, prefetch depth (smallest the trace allows) and policy."""
    if loader.inline:
        return _LoaderConfig(0, 1, policy or "first-free", True, False, ())
    nb, first = batches.n, loader.first_s
    start_idx = batches.epoch_start_index
    rec_workers = workers if workers is not None else max(1, by_worker.seen)
    # did any task of an epoch start before the consumer took the last batch of the epoch before? (Not:
    # before the consumer's first ask of its own epoch; torch hands out an epoch's first indices inside
    # iter(), so with several workers the first of them may start before the loop asks.)
    prev_last = batches.ready_s[np.maximum(start_idx - 1, 0)]
    starts_early = (first < prev_last - 1e-6) & (start_idx > 0)
    barrier = not bool(starts_early.any())
    notes: tuple[str, ...] = ()
    if prefetch is not None:
        rec_prefetch = int(prefetch)
    else:
        delivered_before = np.searchsorted(batches.ready_s, first, side="right")
        lo = start_idx if barrier else np.zeros(nb, np.int64)
        undelivered = np.arange(nb) - np.maximum(delivered_before, lo)
        rec_prefetch = int(max(1, undelivered.max() + 1, max_overlap(first, loader.last_s)))
        notes = (f"recorded prefetch depth inferred as {rec_prefetch} (the smallest the trace allows)",)
    if policy is None:
        policy = "first-free"
        if rec_workers >= 2:
            idx_in = np.arange(nb) - (start_idx if barrier else 0)
            wk = by_worker.worker
            pairs = (idx_in >= rec_workers) & (wk >= 0)
            prev = np.roll(wk, rec_workers)
            if pairs.sum() >= 3 and float((wk[pairs] == prev[pairs]).mean()) >= 0.9:
                policy = "round-robin"
    return _LoaderConfig(int(rec_workers), rec_prefetch, policy, barrier, prefetch is None, notes)


def loader_times(batches: _Batches, loader: _LoaderTasks, by_worker: _BatchWorkers,
                  config: _LoaderConfig) -> _LoaderTimes:
    """Step 5b: dispatch delay, busy worker's gap, latency to the consumer, handoff, epoch start-up."""
    epochs = int(batches.epoch_first.sum())
    if loader.inline or not by_worker.seen:
        return _LoaderTimes(epoch_dispatch_s=np.zeros(epochs))
    nb, first, last, wk = batches.n, loader.first_s, loader.last_s, by_worker.worker
    req = _request_times(batches, config)
    order = np.lexsort((first, wk))
    same = np.r_[False, wk[order][1:] == wk[order][:-1]]
    prev_end = np.full(nb, np.nan)
    prev_end[order[same]] = last[order[np.flatnonzero(same) - 1]]
    delay = first - req
    busy = np.isfinite(prev_end) & (req < prev_end)
    idle = ~busy & ~batches.epoch_first & np.isfinite(delay)
    # means, not medians: the replay must add up to the recorded wall time, jitter included
    dispatch = float(np.mean(np.maximum(0.0, delay[idle]))) if idle.any() else 0.0
    gap = float(np.mean(np.maximum(0.0, (first - prev_end)[busy]))) if busy.any() else dispatch
    # epoch start: the first of the tasks requested when the epoch started (worker start-up)
    idx_in = np.arange(nb) - (batches.epoch_start_index if config.barrier else 0)
    at_start = idx_in < config.prefetch
    d_start = pd.Series(np.where(at_start, np.maximum(0.0, delay), np.nan))
    by_epoch = d_start.groupby(np.cumsum(batches.epoch_first) - 1).min()
    epoch_dispatch = by_epoch.reindex(range(epochs)).fillna(dispatch).to_numpy(float)
    # arrival of a finished batch at a waiting consumer
    ready, wait0 = batches.ready_s, batches.wait_start_s
    prev_ready = np.r_[-np.inf, ready[:-1]]
    blocking = (wait0 < last) & (prev_ready < last) & ~loader.missing
    latency = float(np.mean(np.maximum(0.0, (ready - last)[blocking]))) if blocking.any() else 0.0
    early = last + latency < wait0
    # consumer cost of taking a batch that was already there (0 when no batch ever was)
    handoff = float(np.median(batches.wait_s[early])) if early.any() else 0.0
    return _LoaderTimes(dispatch, gap, latency, handoff, epoch_dispatch)


def _request_times(batches: _Batches, config: _LoaderConfig) -> np.ndarray:
    """When the recorded loader asked for each batch: at its epoch's start, or when batch ``i - prefetch`` was taken."""
    nb, P = batches.n, config.prefetch
    start_idx = batches.epoch_start_index
    idx_in = np.arange(nb) - (start_idx if config.barrier else 0)
    from_start = idx_in < P
    base = batches.wait_start_s[start_idx] if config.barrier else np.full(nb, batches.wait_start_s[0])
    req = np.full(nb, np.nan)
    req[from_start] = base[from_start]
    prev_i = np.arange(nb) - P
    ok = ~from_start & (prev_i >= 0)
    req[ok] = batches.ready_s[prev_i[ok]]
    return req
