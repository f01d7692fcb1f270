"""Stalls: how long the training loop waited for its batches, and why.

A *stall* is the time the consumer spent waiting for its next batch (the
``wait_s`` of :attr:`Run.batches`). :func:`stall_summary` gives the total,
its fraction of wall time, the steady-state fraction without the warm-up
batches (stated separately), per-epoch and per-batch figures, and blames
each stall on what ran on the critical path while it lasted.
The report's verdict (what sets the pace) is made one layer up, in
:mod:`pipeprobe.pace`, from the critical path and the replay.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd

from .critical import DELIVERY, GAP, CriticalPath
from .load import Run
from .stretches import epoch_start_recorded

__all__ = [
    "Stalls",
    "stall_summary",
    "sample_words",
    "STALL_BATCH_COLUMNS",
]

#: Columns of :attr:`Stalls.per_batch` beyond those of ``Run.batches``.
STALL_BATCH_COLUMNS = {
    "cycle_s": "from asking for this batch to asking for the next (last batch: to the end of its step)",
    "warmup": "True for the warm-up batches at the start of each epoch",
    "blame": "what ran on the critical path longest during the stall: a stage, 'delivery' or "
             "'unexplained gap' ('' when the batch did not stall)",
    "blame_lane": "thread that ran it ('' for gaps)",
    "blame_s": "seconds of the stall it covered",
    "blame_sample_ids": "the first sample ids (up to 8, in the order it worked on them) during the stall; "
                        "none for per-batch stages such as collate",
    "blame_sample_count": "how many samples it worked on during the stall",
    "blame_text": "the blame in words, e.g. 'decode on worker 1, samples 480, 17, 233, 5 and 28 more'",
}


@dataclass(frozen=True)
class Stalls:
    """Stall figures of a run.

    Attributes
    ----------
    total_s : float
        Sum of all waits (over ranks).
    fraction : float
        ``total_s / (wall_s * ranks)``.
    steady_s, steady_fraction : float
        Stall time and its share of the consumer's time, warm-up batches excluded.
    warmup_s : float
        Stall time of the warm-up batches.
    warmup_batches : int
        Warm-up batches per epoch (the first ones of each epoch on each rank).
    per_epoch : DataFrame
        ``epoch, batches, stall_s, cycle_s, stall_fraction, warmup_stall_s``.
    per_batch : DataFrame
        ``Run.batches`` plus :data:`STALL_BATCH_COLUMNS`.
    wall_s : float
        Wall time the fractions are taken of.
    ranks : int
        Ranks that delivered batches (at least 1).
    """

    total_s: float
    fraction: float
    steady_s: float
    steady_fraction: float
    warmup_s: float
    warmup_batches: int
    per_epoch: pd.DataFrame
    per_batch: pd.DataFrame
    wall_s: float
    ranks: int

    @property
    def warmup_extra_s(self) -> float:
        """Stall of the warm-up batches beyond what as many steady-state batches waited on average.

        The one warm-up figure the report shows (text, JSON and HTML).
        """
        pb = self.per_batch
        if pb.empty:
            return 0.0
        warm = pb["warmup"].to_numpy(bool)
        steady_mean = float(pb.loc[~warm, "wait_s"].mean()) if (~warm).any() else 0.0
        return max(0.0, self.warmup_s - int(warm.sum()) * steady_mean)


def _default_warmup(run: Run) -> int:
    # a loader slot, not a process: workers started anew each epoch fill the same slots
    column = "slot" if "slot" in run.processes else "pid"
    workers = run.processes.loc[run.processes["role"] == "worker", column].nunique() if len(run.processes) else 0
    return max(1, int(workers))


def stall_summary(run: Run, critical: CriticalPath | None = None, *, warmup_batches: int | None = None,
                  wall_s: float | None = None) -> Stalls:
    """Sum up the stalls of a run and blame each on the critical path.

    Parameters
    ----------
    run : Run
        From :func:`pipeprobe.load`.
    critical : CriticalPath, optional
        From :func:`pipeprobe.critical.critical_path`; without it no blame is given.
    warmup_batches : int, optional
        Batches at the start of each epoch counted as warm-up. Default: one
        per loader worker slot (at least 1), the batches a fresh pool
        delivers before it runs at its steady rate.
    wall_s : float, optional
        Wall time for the fractions; default the critical path's (else ``run.wall_s``).

    Returns
    -------
    Stalls

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=4, decode_ms=2, step_ms=6)
    >>> s = stall_summary(pipeprobe.load(d))
    >>> round(s.fraction, 6)
    0.25

    References
    ----------
    Denning, P. J. and Buzen, J. P. (1978). The operational analysis of
    queueing network models. ACM Computing Surveys 10(3), 225-261 (busy
    and idle time measured over an observation period).
    """
    if wall_s is None:
        wall_s = critical.wall_s if critical is not None else run.wall_s
    seg = critical.segments if critical is not None else None
    pairs = None if seg is None or not len(seg) else (lambda b, stalled: _stall_pairs(b, seg, stalled))
    return summarise_stalls(run, wall_s, pairs, warmup_batches=warmup_batches)


#: Per stalled batch, the critical path's pieces inside its stall (:func:`_stall_pairs`), from the
#: batches sorted by rank and start of wait and the rows of those stalled.
PairsOf = Callable[[pd.DataFrame, np.ndarray], pd.DataFrame]


def summarise_stalls(run: Run, wall_s: float, pairs: PairsOf | None, *, warmup_batches: int | None = None) -> Stalls:
    """:func:`stall_summary` with the critical path given as the pairs of its pieces and the stalls (None: no
    blame); for a path read piece by piece from disk (:mod:`pipeprobe.sliced`)."""
    if warmup_batches is None:
        warmup_batches = _default_warmup(run)
    if warmup_batches < 0:
        raise ValueError(f"warmup_batches must be >= 0, got {warmup_batches}")
    b = run.batches.copy()
    ranks = max(1, int(b["rank"].nunique())) if len(b) else 1
    b = b.sort_values(["rank", "wait_start_s"], kind="stable").reset_index(drop=True)
    cycle_keys = ["rank", "stretch"] if "stretch" in b else "rank"  # no cycle across a window's gap (stretches.py)
    nxt = b.groupby(cycle_keys, sort=False)["wait_start_s"].shift(-1).to_numpy(np.float64)
    last_end = np.fmax(b["step_end_s"].to_numpy(np.float64), b["ready_s"].to_numpy(np.float64))
    b["cycle_s"] = np.where(np.isnan(nxt), last_end, nxt) - b["wait_start_s"].to_numpy(np.float64)
    pos = b.groupby(["rank", "epoch"], sort=False).cumcount().to_numpy()
    b["warmup"] = (pos < warmup_batches) & epoch_start_recorded(b)  # a window may begin mid-epoch
    wait = b["wait_s"].to_numpy(np.float64)
    total = float(wait.sum())
    warm = b["warmup"].to_numpy(bool)
    steady_s = float(wait[~warm].sum())
    steady_cycle = float(b["cycle_s"].to_numpy(np.float64)[~warm].sum())
    if steady_cycle > 0:
        steady_fraction = steady_s / steady_cycle
    else:  # every batch is warm-up: there is no steady state to speak of
        cyc = float(b["cycle_s"].sum())
        steady_fraction = total / cyc if cyc > 0 else 0.0
    per_epoch = (
        b.assign(warm_wait=np.where(warm, wait, 0.0))
        .groupby("epoch", sort=True)
        .agg(batches=("batch_id", "size"), stall_s=("wait_s", "sum"), cycle_s=("cycle_s", "sum"),
             warmup_stall_s=("warm_wait", "sum"))
        .reset_index()
    )
    per_epoch["stall_fraction"] = np.where(per_epoch["cycle_s"] > 0,
                                           per_epoch["stall_s"] / per_epoch["cycle_s"].where(per_epoch["cycle_s"] > 0),
                                           0.0)
    per_epoch = per_epoch[["epoch", "batches", "stall_s", "cycle_s", "stall_fraction", "warmup_stall_s"]]
    b = _blame(b, pairs, _per_batch_stages(run))
    b = b.sort_values(["rank", "batch_id"], kind="stable").reset_index(drop=True)
    return Stalls(
        total_s=total,
        fraction=total / (wall_s * ranks) if wall_s > 0 else 0.0,
        steady_s=steady_s,
        steady_fraction=float(steady_fraction),
        warmup_s=float(wait[warm].sum()),
        warmup_batches=int(warmup_batches),
        per_epoch=per_epoch,
        per_batch=b,
        wall_s=float(wall_s),
        ranks=ranks,
    )


def _per_batch_stages(run: Run) -> set[str]:
    """Stages timed once per batch (e.g. collate) in a run whose batches hold several samples."""
    if run.spans.empty or len(run.samples) == 0:
        return set()
    sp = run.spans[["stage", "rank", "batch_id", "sample_id"]]
    sp = sp[(sp["batch_id"].to_numpy() >= 0) & (sp["sample_id"].to_numpy() >= 0)]
    if run.samples.groupby(["rank", "batch_id"]).size().median() <= 1:
        return set()
    repeated = {str(x) for x in sp.loc[sp.duplicated(["stage", "rank", "batch_id"]), "stage"].unique()}
    return {str(x) for x in sp["stage"].unique()} - repeated


def _stall_pairs(b: pd.DataFrame, seg: pd.DataFrame, stalled: np.ndarray) -> pd.DataFrame:
    """One row per (stalled batch, critical-path piece inside its stall): row, label, lane, sec, sample, order."""
    ws = b["wait_start_s"].to_numpy(np.float64)
    we = b["ready_s"].to_numpy(np.float64)
    s0 = seg["start_s"].to_numpy(np.float64)
    s1 = seg["end_s"].to_numpy(np.float64)
    lo = np.searchsorted(s1, ws[stalled], side="right")
    hi = np.searchsorted(s0, we[stalled], side="left")
    count = np.maximum(hi - lo, 0)
    rows = np.repeat(stalled, count)
    first = np.repeat(lo, count)
    offset = np.arange(count.sum()) - np.repeat(np.cumsum(count) - count, count)
    si = first + offset
    overlap = np.minimum(s1[si], we[rows]) - np.maximum(s0[si], ws[rows])
    pairs = pd.DataFrame({
        "row": rows, "label": seg["label"].to_numpy(object)[si], "lane": seg["lane"].to_numpy(object)[si],
        "sec": overlap, "sample": seg["sample_id"].to_numpy(np.int64)[si], "order": si,
    })
    return pairs[pairs["sec"] > 0]


#: Sample ids kept per blamed stall (the text names the first few and a count).
BLAME_IDS = 8


def _blame(b: pd.DataFrame, pairs_of: PairsOf | None, per_batch: set[str] = frozenset()) -> pd.DataFrame:
    """Add the blame columns: what the critical path ran longest inside each stall, and on which samples."""
    n = len(b)
    blame = np.full(n, "", object)
    lane = np.full(n, "", object)
    secs = np.zeros(n)
    ids: list[list[int]] = [[] for _ in range(n)]
    counts = np.zeros(n, np.int64)
    text = np.full(n, "", object)
    stalled = np.flatnonzero(b["ready_s"].to_numpy(np.float64) > b["wait_start_s"].to_numpy(np.float64))
    if pairs_of is not None and len(stalled):
        pairs = pairs_of(b, stalled)
        g = pairs.groupby(["row", "label", "lane"], sort=False)["sec"].sum().reset_index()
        g = g.sort_values(["row", "sec", "label"], ascending=[True, False, True], kind="stable")
        top = g.drop_duplicates("row", keep="first")
        r = top["row"].to_numpy(np.int64)
        blame[r] = top["label"].to_numpy(object)
        lane[r] = top["lane"].to_numpy(object)
        secs[r] = top["sec"].to_numpy(np.float64)
        _blamed_samples(pairs, top, per_batch, ids, counts)
        for row in r:  # one per stalled batch, not per span
            text[row] = _blame_words(blame[row], lane[row], ids[row], int(counts[row]))
    out = b.assign(blame=blame, blame_lane=lane, blame_s=secs, blame_sample_count=counts, blame_text=text)
    out["blame_sample_ids"] = pd.Series(ids, index=out.index, dtype=object)
    return out


def _blamed_samples(pairs: pd.DataFrame, top: pd.DataFrame, per_batch: set[str], ids: list[list[int]],
                    counts: np.ndarray) -> None:
    """Fill ``ids`` (first :data:`BLAME_IDS` per stalled batch, in the order worked on) and ``counts``.

    ``pairs`` may carry a column ``more``: samples of the pair's group not among its rows (the sliced analysis
    keeps the first :data:`BLAME_IDS` of each group and counts the rest)."""
    named = pairs.merge(top[["row", "label", "lane"]], on=["row", "label", "lane"])
    named = named[~named["label"].isin(list(per_batch))]
    if "more" in named and named["more"].any():
        more = named.groupby("row", sort=True)["more"].sum()
        counts[more.index.to_numpy(np.int64)] += more.to_numpy(np.int64)
    named = named[named["sample"] >= 0]
    named = named.sort_values(["row", "order"], kind="stable").drop_duplicates(["row", "sample"])
    if named.empty:
        return
    row = named["row"].to_numpy(np.int64)
    sample = named["sample"].to_numpy(np.int64)
    starts = np.flatnonzero(np.r_[True, row[1:] != row[:-1]])
    ends = np.r_[starts[1:], len(row)]
    counts[row[starts]] += ends - starts
    for a, b in zip(starts.tolist(), ends.tolist(), strict=True):  # one per stalled batch, not per span
        ids[int(row[a])] = sample[a:min(b, a + BLAME_IDS)].tolist()


def sample_words(ids: list[int], total: int, first: int = 4) -> str:
    """Name samples: the first few ids and a count, never a range they need not fill.

    Examples
    --------
    >>> sample_words([380, 9, 17], 3), sample_words([1, 2, 3, 4, 5, 6], 32)
    ('samples 380, 9, 17', 'samples 1, 2, 3, 4 and 28 more')
    """
    if total <= 0:
        return ""
    if total == 1:
        return f"sample {ids[0]}"
    shown = ", ".join(str(i) for i in ids[:first])
    more = total - min(first, len(ids))
    return f"samples {shown}" + (f" and {more} more" if more > 0 else "")


def _blame_words(label: str, lane: str, ids: list[int], count: int) -> str:
    if label == GAP:
        return "unexplained gap (nothing recorded ran)"
    if label == DELIVERY:
        return "delivery (the batch was ready, on its way to the consumer)"
    where = f" on {lane}" if lane else ""
    samples = sample_words(ids, count)
    return f"{label}{where}, {samples}" if samples else f"{label}{where}"
