"""Cross-rank view of a data-parallel run: who arrived last at each gradient synchronisation, and why.

In data-parallel training every rank's step ends with a gradient
synchronisation (an all-reduce): no rank gets past it before the last one
arrives, so the slowest rank of each step sets the pace of all. With batch
``k`` of every rank belonging to the same synchronisation (ranks step in
lockstep), this module lines the ranks' batches up and, per step, finds

* the rank that arrived last, and by how much after the first (``late_s``);
* why: its own **input** stall (it waited longer for its batch than the
  first rank did), its own **step** work (it started its step late for
  other reasons: work between steps, a late previous step), or the
  **network** (everybody arrived together, but the synchronisation took
  longer than usual).

Arrival is estimated as the start of the rank's timed step plus a
compute time taken equal on all ranks (same model, same batch size). A
rank whose compute alone is slower, but which starts together with the
others, cannot be told apart from spans that only cover whole steps: all
ranks then end together, and that time shows up as a longer step for all.

The job-wide cost of stragglers is the time the fastest rank waited for
the last one, summed over steps (``straggler_cost_s``, wall seconds), and
the same summed over every rank (``idle_rank_s``, rank-seconds).

Analysing a run with many ranks reads the ranks in parallel (a process
pool) and reports progress when the work takes long.
"""

from __future__ import annotations

import os
import sys
import time
import warnings
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

from .load import Run, load

__all__ = ["RankView", "rank_view", "format_rank_view", "rank_count", "rank_view_dict"]

#: Read ranks in a process pool from this many ranks on (when ``processes`` is not given).
POOL_FROM_RANKS = 8
#: Report progress when the work has taken this long.
PROGRESS_AFTER_S = 2.0

_BATCH_COLS = ["rank", "batch_id", "wait_start_s", "ready_s", "wait_s", "step_start_s", "step_end_s"]


@dataclass(frozen=True)
class RankView:
    """What the ranks of a data-parallel run cost each other.

    Attributes
    ----------
    steps : DataFrame
        One row per synchronised step: ``batch_id``, ``last_rank``,
        ``first_rank``, ``late_s`` (last arrival minus first), ``input_s``,
        ``own_s`` and ``network_s`` (the parts of the lateness, and the
        synchronisation's excess over its median), ``cause`` ("input",
        "step", "network" or "none").
    ranks : DataFrame
        One row per rank: ``rank``, ``steps``, ``last_steps`` (steps it
        arrived last in), ``caused_s`` (lateness it caused), ``waited_s``
        (time it waited for later ranks), ``stall_s`` (its input stalls),
        ``active_s``, ``stall_fraction``.
    straggler_rank : int or None
        The rank that caused the most lateness (None: no straggler).
    straggler_cause : str or None
        Its most common cause, by lateness.
    straggler_stage : str or None
        The loader stage that takes it the most extra time per batch,
        compared with the median of the other ranks.
    straggler_stall_fraction : float
        The straggler's input stall over its active time.
    straggler_cost_s : float
        Job-wide cost: wall seconds the fastest rank waited, over all steps.
    idle_rank_s : float
        Rank-seconds all ranks waited for the last arrival, over all steps.
    missing_ranks : list of int
        Ranks the world size announces but that left no files.
    """

    steps: pd.DataFrame
    ranks: pd.DataFrame
    straggler_rank: int | None
    straggler_cause: str | None
    straggler_stage: str | None
    straggler_stall_fraction: float
    straggler_cost_s: float
    idle_rank_s: float
    missing_ranks: list[int] = field(default_factory=list)


def _summarise(run: Run, rank: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Batches and per-stage totals of one rank (the part the pool computes)."""
    b = run.batches[run.batches["rank"] == rank][_BATCH_COLS].reset_index(drop=True)
    sp = run.spans
    sp = sp[(sp["rank"] == rank) & (sp["batch_id"] >= 0) & ~sp["stage"].isin(["wait", "step"])]
    if len(sp):
        st = sp.groupby("stage", observed=True)["dur_s"].agg(total_s="sum", mean_s="mean").reset_index()
        st["stage"] = st["stage"].astype(str)
    else:
        st = pd.DataFrame({"stage": pd.Series([], dtype=str), "total_s": [], "mean_s": []})
    st["rank"] = rank
    st["batches"] = max(1, len(b))
    return b, st


def _summarise_file(run_dir: str, rank: int) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run = load(run_dir, ranks=[rank])
    b, st = _summarise(run, rank)
    return b, st, list(run.problems)


def _progress_printer() -> Callable[[int, int], None]:
    start = time.monotonic()
    last = [0.0]

    def report(done: int, total: int) -> None:
        now = time.monotonic() - start
        if now >= PROGRESS_AFTER_S and (now - last[0] >= 1.0 or done == total):
            last[0] = now
            print(f"pipeprobe: read {done} of {total} ranks ({now:.0f} s)", file=sys.stderr, flush=True)

    return report


def _collect(run: Run | str | os.PathLike, processes: int | None,
             progress: Callable[[int, int], None] | bool | None) -> tuple[pd.DataFrame, pd.DataFrame, dict[str, Any]]:
    if isinstance(run, Run):
        ranks = sorted(int(r) for r in run.batches["rank"].unique())
        parts = [_summarise(run, r) for r in ranks]
        header = run.header
    else:
        root = Path(run)
        from . import tracefile as tf
        from .load import _RUN_HEADER  # the run-header name pattern

        if not root.is_dir():
            return _collect(load(root), processes, progress)  # load raises the right error
        names = sorted(n for n in os.listdir(root) if _RUN_HEADER.match(n))
        ranks = sorted(int(_RUN_HEADER.match(n).group(1)) for n in names)
        use_pool = (processes or 0) > 1 or (processes is None and len(ranks) >= POOL_FROM_RANKS)
        if not use_pool or len(ranks) < 2:
            return _collect(load(root), processes, progress)
        header = tf.read_json(root / names[0]) if names else {}
        report = _progress_printer() if progress in (None, True) else (progress or None)
        problems: list[str] = []
        results: dict[int, tuple[pd.DataFrame, pd.DataFrame]] = {}
        import multiprocessing as mp

        workers = min(len(ranks), processes or os.cpu_count() or 1)
        with ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context("spawn")) as pool:
            futures = {pool.submit(_summarise_file, str(root), r): r for r in ranks}
            for i, fut in enumerate(as_completed(futures), 1):
                b, st, probs = fut.result()
                results[futures[fut]] = (b, st)
                problems.extend(p for p in probs if p not in problems)
                if report:
                    report(i, len(ranks))
        for p in problems:
            warnings.warn(p, stacklevel=3)
        parts = [results[r] for r in ranks]
    batches = pd.concat([p[0] for p in parts], ignore_index=True) if parts else pd.DataFrame(columns=_BATCH_COLS)
    stages = pd.concat([p[1] for p in parts], ignore_index=True) if parts else pd.DataFrame()
    return batches, stages, header


def rank_view(
    run: Run | str | os.PathLike,
    *,
    processes: int | None = None,
    progress: Callable[[int, int], None] | bool | None = None,
) -> RankView:
    """Find the straggler ranks of a data-parallel run and what they cost.

    Parameters
    ----------
    run : Run or path-like
        A loaded run, or a run folder (then ranks are read in parallel
        when there are many; see ``processes``).
    processes : int, optional
        Processes reading ranks; default: a pool of one per core from
        :data:`POOL_FROM_RANKS` ranks on, else none. ``1`` reads in this
        process.
    progress : callable or bool, optional
        ``progress(done, total)`` after each rank read by the pool; by
        default a line on stderr once the work has taken over 2 s;
        ``False`` for silence.

    Returns
    -------
    RankView

    Examples
    --------
    >>> import tempfile
    >>> from pipeprobe._example_runs import write_example_ranks
    >>> d = write_example_ranks(tempfile.mkdtemp(), late_ms={1: 30.0}, steps=4)
    >>> view = rank_view(d)
    >>> view.straggler_rank, round(view.straggler_cost_s, 3)
    (1, 0.12)

    References
    ----------
    Critical path method (Kelley and Walker, 1959): each synchronised step
    is a join whose start is set by its latest predecessor; the lateness of
    that predecessor over the earliest is the slack the other ranks lose.
    """
    batches, stages, header = _collect(run, processes, progress)
    world = int(header.get("world_size", 1) or 1) if isinstance(header, dict) else 1
    present = sorted(int(r) for r in batches["rank"].unique()) if len(batches) else []
    missing = [r for r in range(world) if r not in present]
    empty_steps = pd.DataFrame(
        {c: [] for c in ["batch_id", "last_rank", "first_rank", "late_s", "input_s", "own_s", "network_s", "cause"]}
    )
    if len(present) < 2:
        return RankView(empty_steps, _rank_table(batches, None, None), None, None, None, 0.0, 0.0, 0.0, missing)
    S = batches.pivot_table(index="batch_id", columns="rank", values="step_start_s", aggfunc="first")
    E = batches.pivot_table(index="batch_id", columns="rank", values="step_end_s", aggfunc="first")
    W = batches.pivot_table(index="batch_id", columns="rank", values="wait_s", aggfunc="first")
    keep = S.notna().all(axis=1) & E.notna().all(axis=1)
    S, E, W = S[keep], E[keep], W.reindex(S.index)[keep].fillna(0.0)
    s, e, w = S.to_numpy(), E.to_numpy(), W.to_numpy()
    cols = np.asarray(S.columns, dtype=np.int64)
    idx = np.arange(len(s))
    last, first = s.argmax(axis=1), s.argmin(axis=1)
    late = s[idx, last] - s[idx, first]
    input_s = np.clip(w[idx, last] - w[idx, first], 0.0, late)
    own = late - input_s
    sync = e.min(axis=1) - s[idx, last]
    network = np.maximum(0.0, sync - (np.median(sync) if len(sync) else 0.0))
    step_med = float(np.median(e - s)) if len(s) else 0.0
    tol = max(1e-3, 0.05 * step_med)
    cause = np.where(
        (late < tol) & (network < tol), "none",
        np.where(network > late, "network", np.where(input_s >= own, "input", "step")),
    )
    steps = pd.DataFrame(
        {
            "batch_id": S.index.to_numpy(np.int64),
            "last_rank": cols[last],
            "first_rank": cols[first],
            "late_s": late,
            "input_s": input_s,
            "own_s": own,
            "network_s": network,
            "cause": cause,
        }
    )
    waited = (s[idx, last][:, None] - s)  # per step and rank
    straggling = steps[steps["cause"].isin(["input", "step"])]
    caused = straggling.groupby("last_rank")["late_s"].sum()
    straggler = int(caused.idxmax()) if len(caused) and caused.max() > 0 else None
    cause_of = None
    if straggler is not None:
        mine = straggling[straggling["last_rank"] == straggler]
        cause_of = str(mine.groupby("cause")["late_s"].sum().idxmax())
    ranks = _rank_table(batches, pd.Series(waited.sum(axis=0), index=cols), steps)
    frac = float(ranks.set_index("rank").loc[straggler, "stall_fraction"]) if straggler is not None else 0.0
    return RankView(
        steps=steps,
        ranks=ranks,
        straggler_rank=straggler,
        straggler_cause=cause_of,
        straggler_stage=_straggler_stage(stages, straggler),
        straggler_stall_fraction=frac,
        straggler_cost_s=float(late[cause != "none"].sum()) if len(late) else 0.0,
        idle_rank_s=float(waited[cause != "none"].sum()) if len(late) else 0.0,
        missing_ranks=missing,
    )


def _rank_table(batches: pd.DataFrame, waited: pd.Series | None, steps: pd.DataFrame | None) -> pd.DataFrame:
    if not len(batches):
        return pd.DataFrame(
            {c: [] for c in ["rank", "steps", "last_steps", "caused_s", "waited_s", "stall_s", "active_s",
                             "stall_fraction"]}
        )
    g = batches.groupby("rank")
    t = pd.DataFrame(
        {
            "steps": g["step_start_s"].count(),
            "stall_s": g["wait_s"].sum(),
            "active_s": g["step_end_s"].max().fillna(g["ready_s"].max()) - g["wait_start_s"].min(),
        }
    )
    if steps is not None and len(steps):
        late = steps[steps["cause"].isin(["input", "step"])]
        t["last_steps"] = late.groupby("last_rank").size().reindex(t.index).fillna(0).astype(np.int64)
        t["caused_s"] = late.groupby("last_rank")["late_s"].sum().reindex(t.index).fillna(0.0)
    else:
        t["last_steps"] = 0
        t["caused_s"] = 0.0
    t["waited_s"] = waited.reindex(t.index).fillna(0.0) if waited is not None else 0.0
    t["stall_fraction"] = np.where(t["active_s"] > 0, t["stall_s"] / t["active_s"], 0.0)
    t = t.reset_index()
    return t[["rank", "steps", "last_steps", "caused_s", "waited_s", "stall_s", "active_s", "stall_fraction"]]


def _straggler_stage(stages: pd.DataFrame, straggler: int | None) -> str | None:
    """The stage with the most extra time per batch on the straggler; nested stages: the innermost."""
    if straggler is None or not len(stages):
        return None
    per = stages.assign(per_batch_s=stages["total_s"] / stages["batches"])
    table = per.pivot_table(index="stage", columns="rank", values="per_batch_s", aggfunc="sum").fillna(0.0)
    if straggler not in table.columns:
        return None
    others = table.drop(columns=[straggler])
    base = others.median(axis=1) if others.shape[1] else 0.0
    excess = table[straggler] - base
    if not len(excess) or excess.max() <= 0:
        return None
    near = excess[excess >= 0.9 * excess.max()].index
    mean = per[(per["rank"] == straggler) & per["stage"].isin(near)].set_index("stage")["mean_s"]
    return str(mean.idxmin())


def rank_count(run: Run) -> int:
    """Ranks of a run: those that left files, or the world size the header announces when larger.

    Examples
    --------
    >>> import tempfile
    >>> from pipeprobe._example_runs import write_example_ranks
    >>> rank_count(load(write_example_ranks(tempfile.mkdtemp(), late_ms={}, ranks=3, steps=2)))
    3
    """
    present = set(run.spans["rank"].unique().tolist()) | set(run.batches["rank"].unique().tolist())
    world = run.header.get("world_size", 1)
    world = world if isinstance(world, int) and not isinstance(world, bool) and world > 0 else 1
    return max(len(present), world, 1)


def rank_view_dict(view: RankView) -> dict[str, Any]:
    """The view as JSON-ready keys: the straggler, its cause, stage, stall share and cost, the per-rank table.

    Examples
    --------
    >>> import tempfile
    >>> from pipeprobe._example_runs import write_example_ranks
    >>> d = rank_view_dict(rank_view(write_example_ranks(tempfile.mkdtemp(), late_ms={1: 30.0}, steps=4)))
    >>> d["straggler_rank"], d["straggler_cause"], [r["rank"] for r in d["per_rank"]]
    (1, 'input', [0, 1])
    """
    return {
        "straggler_rank": view.straggler_rank,
        "straggler_cause": view.straggler_cause,
        "straggler_stage": view.straggler_stage,
        "straggler_stall_fraction": float(view.straggler_stall_fraction),
        "straggler_cost_s": float(view.straggler_cost_s),
        "idle_rank_s": float(view.idle_rank_s),
        "missing_ranks": [int(r) for r in view.missing_ranks],
        "per_rank": [
            {"rank": int(r.rank), "steps": int(r.steps), "last_steps": int(r.last_steps), "caused_s": float(r.caused_s),
             "waited_s": float(r.waited_s), "stall_s": float(r.stall_s), "active_s": float(r.active_s),
             "stall_fraction": float(r.stall_fraction)}
            for r in view.ranks.itertuples(index=False)
        ],
    }


def format_rank_view(view: RankView) -> str:
    """Plain-text summary of a :class:`RankView` (a few lines)."""
    lines = ["ranks at the gradient synchronisation"]
    if view.missing_ranks:
        lines.append(f"  ranks missing: {', '.join(str(r) for r in view.missing_ranks)}")
    if view.straggler_rank is None:
        lines.append("  no straggler: the ranks arrived together")
    else:
        stage = f", stage {view.straggler_stage!r}" if view.straggler_stage else ""
        lines.append(
            f"  straggler: rank {view.straggler_rank} (cause: {view.straggler_cause}{stage}); "
            f"its input stall is {100 * view.straggler_stall_fraction:.1f} % of its time"
        )
        lines.append(
            f"  cost: the fastest rank waited {view.straggler_cost_s:.3f} s in all; "
            f"all ranks together {view.idle_rank_s:.3f} rank-seconds"
        )
    for row in view.ranks.itertuples(index=False):
        lines.append(
            f"  rank {row.rank:>4}: last in {row.last_steps:>5} steps, caused {row.caused_s:8.3f} s, "
            f"waited {row.waited_s:8.3f} s, stall {100 * row.stall_fraction:5.1f} %"
        )
    return "\n".join(lines)
