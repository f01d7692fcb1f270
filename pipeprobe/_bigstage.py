"""One stage too large to hold at once, in the sliced analysis (:mod:`pipeprobe.sliced`): its row of the stage
table and its slowest samples, worked out a piece at a time with the in-memory analysis' last bits.

The stage table of a stage whose spans and pieces outnumber a group
(:data:`pipeprobe._spill.GROUP_ROWS`) is built from its numbers on disk,
read back one slice's part at a time:

* count, maximum: counted and compared part by part;
* sums and the mean: pandas adds a group that is not one block of rising
  group ids with compensated (Kahan) summation, one value after another
  (:mod:`pipeprobe._grouplayout`): :func:`kahan` carries the sum *and* its
  compensation from part to part, so the result is pandas' own;
* percentiles: exact order statistics (:func:`order_statistics`: a
  histogram of the values' bit patterns narrows each wanted rank to a
  stretch of values small enough to sort), then pandas' linear
  interpolation;
* own time: compensated sum of the stage's pieces in the whole run's order
  (thread, then start), each thread's pieces read part by part;
* slowest samples: each sample's seconds summed as pandas sums them
  (:func:`pipeprobe.stagestats._group_sums`) within a share of the samples
  at a time (the pieces sorted into shares by sample id on disk), the 50
  slowest of each share kept, and all samples' seconds added up largest
  first as the in-memory analysis adds them, in one array of 8 bytes a
  sample (the one part that still grows with the run: with the samples of
  the data set, not with the epochs).

Where the whole run's layout makes pandas take the other way of adding (each
stage one block of rising group ids), or the stage's pieces are not in time
order part by part, the caller builds the row all at once as before.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Callable, Iterable, Iterator

import numpy as np
import pandas as pd

from ._spill import Spill
from .stagestats import _TAIL_MAX, TAIL_FRACTION, _group_sums, _slowest, _slowest_frame

__all__ = ["kahan", "order_statistics", "quantiles", "span_numbers", "piece_numbers", "CHUNK"]

#: Values read back or bucketed at once, at most (about 8 MB a column).
CHUNK = 1_000_000
_QS = (0.5, 0.95, 0.99)
_SIGN = np.uint64(1 << 63)


def kahan(values: np.ndarray, state: tuple[float, float] = (0.0, 0.0)) -> tuple[float, float]:
    """Compensated sum of ``values`` (NaN skipped) continued from ``state`` (sum, compensation): pandas'
    group-by sum and mean of values that are not one block of rising group ids (pandas 3.1 ``group_sum``).

    Examples
    --------
    >>> v = np.array([0.005, 0.008, 0.005000000000000001, 0.008, 0.0050000000000000044, 0.008])
    >>> kahan(v[3:], kahan(v[:3]))[0] == kahan(v)[0] == 0.03900000000000001
    True
    """
    s, c = state
    v = np.asarray(values, np.float64)
    for x in v[~np.isnan(v)].tolist():
        y = x - c
        t = s + y
        c = (t - s) - y
        if c != c:  # an infinite value: pandas resets the compensation
            c = 0.0
        s = t
    return s, c


def _keys(values: np.ndarray) -> np.ndarray:
    """Unsigned integers that sort as the (non-NaN) float64 ``values`` do."""
    bits = np.ascontiguousarray(values, np.float64).view(np.uint64)
    return np.where(bits & _SIGN, ~bits, bits | _SIGN)


def _value(key: int) -> float:
    bits = np.uint64(key)
    return float((bits ^ _SIGN if bits & _SIGN else ~bits).view(np.float64))


def order_statistics(chunks: Callable[[], Iterable[np.ndarray]], ranks: list[int], limit: int = CHUNK) -> list[float]:
    """The ``ranks``-th smallest (from 0) of the non-NaN values that ``chunks()`` yields, exactly, holding at most
    about ``limit`` of them at once: each pass over the chunks counts the values of each rank's stretch of bit
    patterns in 65,536 buckets and keeps the bucket holding the rank, until the stretch is one pattern or small.

    Examples
    --------
    >>> v = np.array([5.0, 1.0, 4.0, 2.0, 3.0, 2.0])
    >>> order_statistics(lambda: (v[:2], v[2:]), [0, 2, 5], limit=2)
    [1.0, 2.0, 5.0]
    """
    lo = {r: 0 for r in ranks}
    hi = {r: (1 << 64) - 1 for r in ranks}
    below = {r: 0 for r in ranks}
    inside = {r: -1 for r in ranks}  # values in the stretch, -1: not counted yet
    done: dict[int, float] = {}
    while len(done) < len(set(ranks)):
        todo = sorted({r for r in ranks if r not in done})
        small = [r for r in todo if 0 <= inside[r] <= limit or lo[r] == hi[r]]
        wide = [r for r in todo if r not in small]
        shift = {r: max(0, (hi[r] - lo[r]).bit_length() - 16) for r in wide}
        counts = {r: np.zeros((1 << 16) + 1, np.int64) for r in wide}
        kept: dict[int, list[np.ndarray]] = {r: [] for r in small}
        for chunk in chunks():
            k = _keys(chunk[~np.isnan(chunk)])
            for r in todo:
                mine = k[(k >= np.uint64(lo[r])) & (k <= np.uint64(hi[r]))]
                if r in kept:
                    kept[r].append(mine)
                else:
                    counts[r] += np.bincount(((mine - np.uint64(lo[r])) >> np.uint64(shift[r])).astype(np.int64),
                                             minlength=len(counts[r]))
        for r in small:
            got = np.sort(np.concatenate(kept[r])) if kept[r] else np.zeros(0, np.uint64)
            done[r] = _value(int(got[r - below[r]]))
        for r in wide:
            cum = np.cumsum(counts[r])
            b = int(np.searchsorted(cum, r - below[r], side="right"))
            below[r] += int(cum[b - 1]) if b else 0
            inside[r] = int(counts[r][b])
            lo[r], hi[r] = lo[r] + (b << shift[r]), min(hi[r], lo[r] + ((b + 1) << shift[r]) - 1)
    return [done[r] for r in ranks]


def quantiles(chunks: Callable[[], Iterable[np.ndarray]], n: int, qs: tuple[float, ...] = _QS,
              limit: int = CHUNK) -> list[float]:
    """pandas' group-by quantiles (linear interpolation, Hyndman and Fan's definition 7) of the ``n`` non-NaN
    values ``chunks()`` yields: the order statistics at ``q (n - 1)`` and the next, ``v + (next - v) * frac``.

    Examples
    --------
    >>> v = np.arange(11.0)[::-1]
    >>> quantiles(lambda: (v[:4], v[4:]), 11, (0.5, 0.95), limit=3)
    [5.0, 9.5]
    """
    if n == 0:
        return [float("nan")] * len(qs)
    where = [(int(q * (n - 1)), (q * (n - 1)) % 1) for q in qs]
    ranks = sorted({i for i, _ in where} | {i + 1 for i, f in where if f != 0.0})
    stat = dict(zip(ranks, order_statistics(chunks, ranks, limit), strict=True))
    return [stat[i] if f == 0.0 else stat[i] + (stat[i + 1] - stat[i]) * f for i, f in where]


def span_numbers(parts: Callable[[], Iterator[dict[str, np.ndarray]]]) -> dict[str, float]:
    """count, total_s, mean_s, max_s, p50_s, p95_s, p99_s and cpu_s of one stage's spans (``dur_s``, ``cpu_s``),
    read part by part in the whole run's order, as :func:`pipeprobe.stagestats._table` gets them from pandas when
    the stage is not one block of rising group ids (compensated sums)."""
    count = seen = cpu_seen = 0
    total, cpu = (0.0, 0.0), (0.0, 0.0)
    top = -math.inf
    for part in parts():
        dur, c = part["dur_s"], part["cpu_s"]
        count += len(dur)
        ok = dur[~np.isnan(dur)]
        seen += len(ok)
        if len(ok):
            top = max(top, float(ok.max()))
        total, cpu = kahan(ok, total), kahan(c, cpu)
        cpu_seen += int(np.count_nonzero(~np.isnan(c)))
    p50, p95, p99 = quantiles(lambda: (p["dur_s"] for p in parts()), seen)
    return {"count": count, "total_s": total[0], "mean_s": total[0] / seen if seen else math.nan,
            "max_s": top if seen else math.nan, "p50_s": p50, "p95_s": p95, "p99_s": p99,
            "cpu_s": cpu[0] if cpu_seen else math.nan}


def _time_ordered(spill: Spill, stage: int) -> tuple[list[int], list[int]] | None:
    """The threads of the stage's pieces and their labels, if each thread's pieces come in time order part by
    part (each part's after the previous part's); else None."""
    last: dict[int, float] = {}
    labels: set[int] = set()
    for part in spill.key_parts(stage, ("thread", "start_s", "label")):
        labels |= set(np.unique(part["label"]).tolist())
        th, start = part["thread"], part["start_s"]
        for t in np.unique(th).tolist():
            s = start[th == t]
            if t in last and last[t] > float(s.min()):
                return None
            last[t] = float(s.max())
    return sorted(last), sorted(labels)


def piece_numbers(spill: Spill, stage: int, key_split: bool, folder: Path,
                  label_name: str) -> tuple[float, pd.DataFrame] | None:
    """The stage's own time and its slowest-samples row (an empty frame when its pieces have no sample), from its
    pieces on disk; None where the pieces are not in time order part by part or hold more than one label.

    ``key_split``: the whole run's (label, sample) pairs are not each one block, so pandas adds each sample's
    pieces with compensated sums (:class:`pipeprobe._grouplayout.PieceLayout`)."""
    order = _time_ordered(spill, stage)
    if order is None or len(order[1]) > 1:
        return None
    shares = max(1, math.ceil(spill.counts().get(stage, 0) / CHUNK))
    by_sample = Spill(folder, f"samples{stage}", {"sample_id": np.int64, "dur_s": np.float64})
    try:
        own = (0.0, 0.0)
        for t in order[0]:
            for part in spill.key_parts(stage, ("thread", "start_s", "sample_id", "dur_s")):
                mine = part["thread"] == t
                o = np.argsort(part["start_s"][mine], kind="stable")
                dur, sample = part["dur_s"][mine][o], part["sample_id"][mine][o]
                own = kahan(dur, own)
                has = sample >= 0
                by_sample.append(sample[has] % shares, {"sample_id": sample[has], "dur_s": dur[has]})
        return own[0], _slowest_of(by_sample, shares, key_split, label_name)
    finally:
        by_sample.remove()


def _slowest_of(by_sample: Spill, shares: int, key_split: bool, label_name: str) -> pd.DataFrame:
    """The slowest-samples row of one label from its pieces' (sample, seconds) sorted into ``shares`` by sample."""
    seconds = np.empty(by_sample.rows, np.float64)
    n = 0
    best_ids, best = [], []
    for share in range(shares):
        got = by_sample.read([share], oldest_first=True)
        key, dur = got["sample_id"], got["dur_s"]
        if key_split:  # two keys seen twice, interleaved: pandas adds every sample's pieces compensated, as for the run
            key, dur = np.r_[-2, -3, -2, -3, key], np.r_[0.0, 0.0, 0.0, 0.0, dur]
        ids, sums = _group_sums(key, dur)
        real = ids >= 0
        ids, sums = ids[real], sums[real]
        seconds[n:n + len(sums)] = sums
        n += len(sums)
        top = np.lexsort((ids, -sums))[:_TAIL_MAX]
        best_ids.append(ids[top])
        best.append(sums[top])
    if n == 0:
        return _slowest(pd.DataFrame())  # no sample: no row, the columns of the in-memory analysis' empty frame
    desc = seconds[:n]
    np.negative(desc, out=desc)
    desc.sort()
    np.negative(desc, out=desc)  # largest first, as the in-memory analysis sorts each label's seconds
    total = float(pd.Series(desc, copy=False).groupby(np.zeros(1, np.int64).repeat(n), sort=True).sum().iloc[0]) \
        if np.isnan(desc).any() else float(np.add.reduceat(desc, np.zeros(1, np.intp))[0])
    ids, sums = np.concatenate(best_ids), np.concatenate(best)
    k = int(min(_TAIL_MAX, max(1, math.ceil(TAIL_FRACTION * n))))
    top = np.lexsort((ids, -sums))[:k]
    return _slowest_frame(pd.DataFrame({"stage": np.full(len(top), label_name, dtype=object), "sample_id": ids[top],
                                        "dur_s": sums[top], "n": n, "k": k, "total": total}))
