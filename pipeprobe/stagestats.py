"""Why a run is slow: per-stage time statistics, heavy tails and the CPU view.

:func:`stage_stats` gives, per stage, the count, total, mean and tail
percentiles of span durations, the thread CPU time over wall time (near 1:
the stage computes; low: it waits on I/O or was descheduled), the time it
spent on the critical path, the slowest samples and their share of the
stage's time, and whether the cores were saturated while the training loop
stalled, hence whether more loader workers can help on this machine.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .critical import CriticalPath
from .load import Run
from .nesting import span_pieces
from .stalls import Stalls
from .tracefile import usable_core_ids, usable_cores

__all__ = ["StageStats", "stage_stats", "STAGE_COLUMNS", "SLOWEST_COLUMNS", "SATURATED_FROM", "TAIL_FRACTION"]

#: Columns of :attr:`StageStats.table`, one row per stage ('wait' excluded).
STAGE_COLUMNS = {
    "stage": "stage name ('step' for training steps)",
    "count": "spans",
    "total_s": "sum of span durations, stages recorded inside them included (inclusive time)",
    "own_s": "total_s less the time of stages recorded inside the spans (own time; = total_s when none)",
    "mean_s": "mean duration",
    "p50_s": "median duration",
    "p95_s": "95th percentile",
    "p99_s": "99th percentile",
    "max_s": "longest span",
    "cpu_s": "thread CPU time inside the spans (NaN when CPU time was off)",
    "cpu_ratio": "cpu_s / total_s: near 1 computes, low waits (I/O, locks, descheduled)",
    "critical_s": "time on the critical path (of its own time, when stages ran inside it)",
    "critical_share": "critical_s / wall time",
    "label": "what its own time is called on the critical path, in the slowest samples and the actions: "
             "the stage, or pipeprobe.nesting.own_label(stage) when stages ran inside it",
}

#: Columns of :attr:`StageStats.slowest`, one row per stage that has sample ids.
SLOWEST_COLUMNS = {
    "stage": "stage name, or the own-time label of a stage with stages inside (pipeprobe.nesting.own_label)",
    "samples": "how many slowest samples are listed (TAIL_FRACTION of the stage's samples, 1 to 50)",
    "of_samples": "samples the stage worked on",
    "sample_ids": "their ids, slowest first",
    "seconds": "their total time in the stage",
    "share": "seconds / the stage's time over all samples",
}

#: Fraction of a stage's samples listed as its slowest (1 %; at least one, at most 50).
TAIL_FRACTION = 0.01
_TAIL_MAX = 50
#: Mean busy fraction of all cores during stalls from which the cores count as saturated.
SATURATED_FROM = 0.90


@dataclass(frozen=True)
class StageStats:
    """Per-stage statistics and the CPU view of a run.

    Attributes
    ----------
    table : DataFrame
        See :data:`STAGE_COLUMNS`; largest ``total_s`` first.
    slowest : DataFrame
        See :data:`SLOWEST_COLUMNS`.
    cores : int
        Logical cores of the machine (from the run header).
    core_busy_in_stalls : float
        Mean busy fraction of all cores while the loop stalled, weighted by
        overlap with the stalls; NaN when unknown (no resource samples or no stalls).
    cores_saturated : bool or None
        ``core_busy_in_stalls >= SATURATED_FROM``; None when unknown.
    more_workers : str
        'yes', 'no' or 'unknown': can more loader workers help on this machine?
    more_workers_reason : str
        The plain-words reason.
    """

    table: pd.DataFrame
    slowest: pd.DataFrame
    cores: int
    core_busy_in_stalls: float
    cores_saturated: bool | None
    more_workers: str
    more_workers_reason: str

    def tail_of(self, stage: str) -> dict | None:
        """The slowest-samples row of ``stage`` (a stage or an own-time label) as a dict, or None."""
        hit = self.slowest[self.slowest["stage"] == stage]
        return None if hit.empty else hit.iloc[0].to_dict()



def _stage_pieces(run: Run) -> pd.DataFrame:
    """The stage and step spans (not waits) cut into the pieces of the innermost one running.

    A step with stages inside (``forward``) keeps its own time; a stage around whole steps (an epoch
    timer) counts the steps as its children, as it counts stages inside it.
    """
    sp = run.spans
    return span_pieces(sp, columns=("stage", "sample_id"), rows=np.flatnonzero((sp["stage"] != "wait").to_numpy()))


def _stage_key(sp: pd.DataFrame, leave_out: str) -> pd.Categorical:
    """The stage column as a categorical group key with ``leave_out`` spans missing (no copy of the spans,
    no text per span)."""
    stage = sp["stage"]
    if not isinstance(stage.dtype, pd.CategoricalDtype):
        stage = stage.astype("category")
    cats = [str(c) for c in stage.cat.categories]
    codes = stage.cat.codes.to_numpy()
    if leave_out in cats:
        codes = np.where(codes == cats.index(leave_out), -1, codes)
    return pd.Categorical.from_codes(codes, categories=cats)


def _own_time(pieces: pd.DataFrame) -> pd.DataFrame:
    """Per stage: its own seconds and the label of its own time."""
    if pieces.empty:
        return pd.DataFrame({"own_s": pd.Series(dtype=float), "label": pd.Series(dtype=object)})
    g = pieces.groupby("stage", sort=False, observed=True)
    own = pd.DataFrame({"own_s": g["dur_s"].sum(), "label": g["label"].first().astype(object)})
    return own.set_axis(own.index.astype(str))


def critical_seconds(segments: pd.DataFrame) -> pd.Series | None:
    """Critical-path seconds per label of the stage and step pieces (None without pieces), as the table reads them."""
    if not len(segments):
        return None
    return segments[segments["kind"].isin(["stage", "step"])].groupby("label")["seconds"].sum()


def input_stage_labels(segments: pd.DataFrame) -> set[str]:
    """Labels of the input-side stages on the critical path."""
    # the distinct labels first: iterating the text of every piece costs seconds at millions of pieces
    return set(segments.loc[(segments["side"] == "input") & (segments["kind"] == "stage"), "label"].unique().tolist())


def _table(run: Run, crit: pd.Series | None, wall_s: float, pieces: pd.DataFrame | None,
           own: pd.DataFrame | None = None) -> pd.DataFrame:
    """The stage table; ``crit``: :func:`critical_seconds` of the critical path (None: no time on it); ``own``:
    :func:`_own_time` of ``pieces`` when worked out before (the pieces then freed: None)."""
    sp = run.spans
    key = _stage_key(sp, "wait")
    if not (key.codes >= 0).any():
        return pd.DataFrame({c: pd.Series(dtype=object if c in ("stage", "label") else float) for c in STAGE_COLUMNS})
    g = sp["dur_s"].groupby(key, sort=False, observed=True)
    t = g.agg(count="size", total_s="sum", mean_s="mean", max_s="max")
    q = g.quantile([0.5, 0.95, 0.99]).unstack()
    t["p50_s"], t["p95_s"], t["p99_s"] = q[0.5], q[0.95], q[0.99]
    t["cpu_s"] = sp["cpu_s"].groupby(key, sort=False, observed=True).sum(min_count=1)
    t = t.set_axis(pd.Index(t.index.astype(str), dtype=object))
    return _finish_table(t, crit, wall_s, _own_time(pieces) if own is None else own)


def _finish_table(t: pd.DataFrame, crit: pd.Series | None, wall_s: float, own: pd.DataFrame) -> pd.DataFrame:
    """The stage table from its span numbers ``t`` (count, total_s, mean_s, max_s, p50_s, p95_s, p99_s, cpu_s; one
    row per stage name) and the stages' own time (:func:`_own_time`)."""
    cols = list(STAGE_COLUMNS)
    t["cpu_ratio"] = (t["cpu_s"] / t["total_s"].where(t["total_s"] > 0)).astype(float)
    t["own_s"] = own["own_s"].reindex(t.index).fillna(t["total_s"])
    t["label"] = own["label"].reindex(t.index).fillna(pd.Series(t.index, index=t.index))
    if crit is not None:
        by_label = crit.reindex(t["label"].to_numpy()).fillna(0.0).to_numpy()
        # a stage that encloses others only where the timeline leaves it out (inside a step, around an epoch)
        # is on the path under its own name elsewhere
        by_name = np.where(t["label"].to_numpy() != t.index.to_numpy(), crit.reindex(t.index).fillna(0.0), 0.0)
        t["critical_s"] = by_label + by_name
    else:
        t["critical_s"] = 0.0
    t["critical_share"] = t["critical_s"] / wall_s if wall_s > 0 else 0.0
    t["count"] = t["count"].astype(np.int64)
    t = t.rename_axis("stage").reset_index()
    t["stage"] = t["stage"].astype(object)
    return t.sort_values(["total_s", "stage"], ascending=[False, True], kind="stable")[cols].reset_index(drop=True)


def _label_sample_seconds(pieces: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Seconds per (label, sample) of the pieces with a sample id: ``(label code, sample id, seconds)``.

    The pair travels as one int64 key ``label * samples + sample`` (a sample
    rank when the ids are too large for that), so the sums are one group-by on
    one integer column, in the order the pairs first appear.
    """
    sample = pieces["sample_id"].to_numpy(np.int64)
    has = sample >= 0
    label = pieces["label"].cat.codes.to_numpy(np.int64)[has]
    sample = sample[has]
    values, uniques = sample, None
    if len(sample) and int(sample.max()) + 1 > (1 << 62) // max(1, len(pieces["label"].cat.categories)):
        values, uniques = pd.factorize(sample, sort=True)  # ranks sort as the ids do
        values = values.astype(np.int64)
    span = int(values.max()) + 1 if len(values) else 1
    key, sums = _group_sums(label * span + values, pieces["dur_s"].to_numpy(np.float64)[has])
    ids = key % span if uniques is None else uniques[key % span]
    return key // span, ids, sums


def _group_sums(key: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each distinct key, in order of first appearance, and the sum of its values: the numbers of
    ``pd.Series(values).groupby(key, sort=False).sum()`` (pandas' compensated sum), from one hash pass.

    A key seen once keeps its value (what pandas' sum of one value gives, ``0.0 + value``); only the
    keys seen more than once, or with a value that is not finite, are summed by pandas.
    """
    ordered = np.sort(key)
    once = bool((ordered[1:] != ordered[:-1]).all())
    del ordered
    if once:  # every key seen once (one piece per sample and label): no hash table, each row its own group
        codes, uniques = np.arange(len(key), dtype=np.int64), key
        first = codes
    else:
        codes, uniques = pd.factorize(key)
        first = np.empty(len(uniques), np.int64)
        first[codes[::-1]] = np.arange(len(key) - 1, -1, -1)
    sums = values[first] + 0.0
    again = (np.bincount(codes, minlength=len(uniques)) > 1) | ~np.isfinite(sums)
    if again.any():
        rows = np.flatnonzero(again[codes])
        part = pd.Series(values[rows]).groupby(codes[rows], sort=False).sum()
        sums[part.index.to_numpy(np.int64)] = part.to_numpy(np.float64)
    return np.asarray(uniques, np.int64), sums


def _slowest(pieces: pd.DataFrame) -> pd.DataFrame:
    """Per label, its slowest samples (ids, seconds, share of the label's time); column operations only.

    Time is counted once: a stage with stages inside is judged on its own
    time (its label). One pass over all labels at once, not a Python loop
    per stage: a run with tens of thousands of stage names must not stall the report.
    """
    if not len(pieces) or not (pieces["sample_id"].to_numpy() >= 0).any():
        return pd.DataFrame([], columns=list(SLOWEST_COLUMNS))
    code, sample, dur = _label_sample_seconds(pieces)
    # the label categories are sorted text (nesting.span_pieces), so their codes sort as the names do
    by_code = np.argsort(code.astype(np.uint16) if code.max() < (1 << 16) else code, kind="stable")
    first = np.r_[0, np.flatnonzero(np.diff(code[by_code])) + 1]
    n = np.diff(np.r_[first, len(code)])
    k = np.minimum(_TAIL_MAX, np.maximum(1, np.ceil(TAIL_FRACTION * n))).astype(np.int64)
    desc = dur[by_code]
    for f, m in zip(first.tolist(), n.tolist(), strict=True):  # one sort per label, largest first
        desc[f:f + m] = np.sort(desc[f:f + m])[::-1]
    labels = code[by_code[first]]
    # each label's total summed in that order (as the share has always been worked out)
    total = pd.Series(desc).groupby(np.repeat(np.arange(len(first)), n), sort=True).sum().to_numpy()
    threshold = np.zeros(int(code.max()) + 1)
    threshold[labels] = desc[first + k - 1]  # the k-th largest of each label
    cand = np.flatnonzero(dur >= threshold[code])  # the top k and the ties at the k-th
    cand = cand[np.lexsort((sample[cand], -dur[cand], code[cand]))]  # by label, seconds descending, sample id
    g = np.searchsorted(labels, code[cand])  # the label group of each candidate
    rank = np.arange(len(cand)) - np.searchsorted(code[cand], code[cand], side="left")
    top = cand[rank < k[g]]
    g = np.searchsorted(labels, code[top])
    names = np.array([str(x) for x in pieces["label"].cat.categories], dtype=object)
    return _slowest_frame(pd.DataFrame({"stage": names[code[top]], "sample_id": sample[top], "dur_s": dur[top],
                                        "n": n[g], "k": k[g], "total": total[g]}))


def _slowest_frame(top: pd.DataFrame) -> pd.DataFrame:
    """:data:`SLOWEST_COLUMNS` from each label's slowest samples (``stage, sample_id, dur_s``, slowest first, then
    by sample id) with the label's samples ``n``, listed ``k`` and ``total`` seconds."""
    out = top.groupby("stage", sort=True).agg(
        samples=("k", "first"), of_samples=("n", "first"), sample_ids=("sample_id", list),
        seconds=("dur_s", "sum"), total=("total", "first"))
    out["share"] = np.where(out["total"] > 0, out["seconds"] / out["total"].where(out["total"] > 0, 1.0), 0.0)
    out["sample_ids"] = [[int(x) for x in ids] for ids in out["sample_ids"]]
    out = out.reset_index().astype({"samples": int, "of_samples": int, "seconds": float})
    return out[list(SLOWEST_COLUMNS)]


def _stall_intervals(run: Run) -> tuple[np.ndarray, np.ndarray]:
    b = run.batches
    b = b[(b["rank"] == (b["rank"].min() if len(b) else 0)) & (b["ready_s"] > b["wait_start_s"])]
    b = b.sort_values("wait_start_s")
    return b["wait_start_s"].to_numpy(np.float64), b["ready_s"].to_numpy(np.float64)


def _covered(t: np.ndarray, s0: np.ndarray, s1: np.ndarray) -> np.ndarray:
    """Stall time in ``[-inf, t]`` for sorted, disjoint intervals ``[s0, s1]``."""
    if len(s0) == 0:
        return np.zeros(len(t))
    before = np.concatenate([[0.0], np.cumsum(s1 - s0)])
    i = np.searchsorted(s0, t, side="right") - 1
    inside = np.where(i >= 0, np.clip(t - s0[np.maximum(i, 0)], 0.0, (s1 - s0)[np.maximum(i, 0)]), 0.0)
    return np.where(i >= 0, before[np.maximum(i, 0)] + inside, 0.0)


def core_busy_during_stalls(run: Run) -> float:
    """Mean busy fraction of the cores the run could use while the loop stalled (NaN when unknown).

    Each per-core resource sample covers the time since the previous one;
    samples are weighted by how much of that time the consumer (lowest rank)
    was stalled.

    Parameters
    ----------
    run : Run

    Returns
    -------
    float
        0 (idle) to 1 (every core busy).

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for batch in probe.watch([[0]]):
    ...         pass
    >>> import math; math.isnan(core_busy_during_stalls(pipeprobe.load(d)))
    True

    References
    ----------
    Denning, P. J. and Buzen, J. P. (1978). The operational analysis of
    queueing network models. ACM Computing Surveys 10(3), 225-261
    (utilisation = busy time / observed time).
    """
    res = run.resources
    res = res[(res["pid"] == 0) & (res["core"] >= 0)]
    ids = usable_core_ids(run.header)
    if ids is not None:
        res = res[res["core"].isin(ids)]
    if res.empty:
        return float("nan")
    res = res[res["rank"] == res["rank"].min()]
    busy = (res.groupby("t_s", sort=True)["cpu_pct"].mean() / 100.0).clip(0.0, 1.0)
    t = busy.index.to_numpy(np.float64)
    interval = float(run.header.get("sample_interval_s") or 0.0)
    if len(t) > 1:
        prev = np.concatenate([[t[0] - (interval or (t[1] - t[0]))], t[:-1]])
    else:
        prev = t - (interval or 0.0)
    s0, s1 = _stall_intervals(run)
    w = _covered(t, s0, s1) - _covered(prev, s0, s1)
    if w.sum() <= 0:
        return float("nan")
    return float(np.sum(busy.to_numpy() * w) / w.sum())


def _more_workers(run: Run, stalls: Stalls | None, input_on_path: bool | None, busy: float, cores: int,
                  table: pd.DataFrame, input_labels: set[str] | None) -> tuple[str, str]:
    if input_on_path is False:
        return "no", "the step sets the pace; more workers would wait on it too"
    if stalls is not None and stalls.total_s <= 0:
        return "no", "the loop never waited for a batch"
    if math.isnan(busy):
        return "unknown", "no resource samples cover the stalls (Probe(sample_interval_s=0)?)"
    spare = cores * (1.0 - busy)
    pct = f"{100 * busy:.0f} %"
    if busy >= SATURATED_FROM or spare < 0.5:
        return "no", (f"all {cores} cores were {pct} busy while the loop waited: more workers would share "
                      "the same cores; make the input stages cheaper instead")
    ratio = float("nan")
    if input_labels is not None and len(table):
        t = table[table["stage"].isin(input_labels)]
        if len(t) and t["cpu_s"].notna().any():
            ratio = float(t["cpu_s"].sum() / t["total_s"].sum()) if t["total_s"].sum() > 0 else float("nan")
    if not math.isnan(ratio) and ratio < 0.5:
        return "yes", (f"the cores were {pct} busy while the loop waited and the input stages mostly wait "
                       f"(CPU/wall {ratio:.2f}): more workers can overlap that waiting")
    return "yes", f"the cores were only {pct} busy while the loop waited ({spare:.1f} of {cores} cores spare)"


def stage_stats(run: Run, critical: CriticalPath | None = None, stalls: Stalls | None = None,
                input_on_path: bool | None = None) -> StageStats:
    """Per-stage statistics, the slowest samples and the CPU view.

    Parameters
    ----------
    run : Run
    critical : CriticalPath, optional
        For each stage's time on the critical path.
    stalls : Stalls, optional
        For the wall time and whether the loop stalled at all.
    input_on_path : bool, optional
        Whether the input side holds enough of the critical path to set the
        pace; when it does not, more workers cannot help.

    Returns
    -------
    StageStats

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for i in range(5):
    ...         with pipeprobe.stage("decode", sample=i):
    ...             pass
    >>> st = stage_stats(pipeprobe.load(d))
    >>> int(st.table.loc[st.table["stage"] == "decode", "count"].iloc[0])
    5

    References
    ----------
    Hyndman, R. J. and Fan, Y. (1996). Sample quantiles in statistical
    packages. The American Statistician 50(4), 361-365 (linear
    interpolation, their definition 7, for p50/p95/p99).
    """
    wall = critical.wall_s if critical is not None else (stalls.wall_s if stalls is not None else run.wall_s)
    pieces = _stage_pieces(run)
    table = _table(run, critical_seconds(critical.segments) if critical is not None else None, wall, pieces)
    cores = usable_cores(run.header)
    busy = core_busy_during_stalls(run)
    saturated = None if math.isnan(busy) else bool(busy >= SATURATED_FROM)
    labels = input_stage_labels(critical.segments) if critical is not None else None
    more, why = _more_workers(run, stalls, input_on_path, busy, cores, table, labels)
    return StageStats(table=table, slowest=_slowest(pieces), cores=cores, core_busy_in_stalls=busy,
                      cores_saturated=saturated, more_workers=more, more_workers_reason=why)
