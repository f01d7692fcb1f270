"""How pandas adds up a grouping, followed across the slices of the sliced analysis (:mod:`pipeprobe.sliced`).

pandas (3.1) sums a group-by in one of two ways, and the last bits of a
group's sum depend on which: when the group ids rise along the rows (every
group one contiguous block, the dropped ones only in front) it adds each
block with ``ufunc.reduceat``, one value after another; otherwise it adds
with compensated (Kahan) summation. The in-memory stage table groups the
whole run's spans and pieces, so its choice depends on the whole run's
layout; the sliced analysis groups one group of stages at a time, whose
layout may differ. To give the same sums, it follows, slice by slice, what
the whole run's layout would be, and then lays out each group so that pandas
takes the same way (sorted by group for ``reduceat``, one dropped row at
the end for compensated sums).

Three groupings are followed: the spans by stage, waits dropped
(:class:`Blocks`, in run order); the pieces by stage; the pieces with a
sample by (label, sample) (:class:`PieceLayout`, in the pieces' order:
thread, then start).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["Blocks", "PieceLayout", "pair_runs"]


def pair_runs(a: np.ndarray, b: np.ndarray) -> tuple[int, int]:
    """(runs, distinct) of the pairs ``(a[i], b[i])`` in this order: equal when each pair is one block.

    Examples
    --------
    >>> pair_runs(np.array([1, 1, 2, 1]), np.array([0, 0, 0, 0]))
    (3, 2)
    """
    if not len(a):
        return 0, 0
    runs = 1 + int(np.count_nonzero((a[1:] != a[:-1]) | (b[1:] != b[:-1])))
    o = np.lexsort((b, a))
    sa, sb = a[o], b[o]
    return runs, 1 + int(np.count_nonzero((sa[1:] != sa[:-1]) | (sb[1:] != sb[:-1])))


@dataclass
class Blocks:
    """Whether a sequence of codes, given in parts each *before* the parts so far, holds every code in one
    contiguous block, with the dropped code -1 only in front (then pandas' group ids rise along it).

    Examples
    --------
    >>> b = Blocks()
    >>> b.prepend(np.array([2, 3]))
    >>> b.prepend(np.array([-1, 2]))
    >>> b.rising
    True
    >>> b.prepend(np.array([3]))
    >>> b.rising
    False
    """

    runs: int = 0
    codes: set = field(default_factory=set)
    first: int | None = None

    def prepend(self, codes: np.ndarray) -> None:
        """Put ``codes`` before the sequence so far."""
        if not len(codes):
            return
        self.runs += 1 + int(np.count_nonzero(codes[1:] != codes[:-1]))
        if self.first is not None and int(codes[-1]) == self.first:
            self.runs -= 1
        self.codes |= set(np.unique(codes).tolist())
        self.first = int(codes[0])

    @property
    def rising(self) -> bool:
        return self.runs == len(self.codes) and (-1 not in self.codes or self.first == -1)


@dataclass
class PieceLayout:
    """The whole run's layout of the pieces, followed one batch of pieces at a time (the batches in the
    reverse of their final order, as the slices come).

    ``stage_split`` and ``key_split``: a stage's pieces, or a (label, sample)'s, are known not to form one
    block in the whole run's order. A batch proves it when they do not within it (its pieces keep their
    relative order in the whole run's). For the stages, the blocks of each batch are kept (few while no
    stage is split) and joined at the end; for (label, sample), only what batches prove is known (keeping
    every pair seen would grow with the run). What this leaves open: a pair split only across batches, whose
    pieces come back together in a group of stages while nothing of that group lies between them; the two ways
    of adding differ only for a pair of three pieces or more (an epoch timer's own time per sample over three
    epochs, say) and only in the last bits.
    """

    stage_split: bool = False
    key_split: bool = False
    _runs: list[np.ndarray] = field(default_factory=list)

    def add(self, stage: np.ndarray, label: np.ndarray, sample: np.ndarray, thread: np.ndarray,
            start_s: np.ndarray) -> None:
        """One batch of pieces (any order: they are put in the whole run's order, thread then start)."""
        o = np.lexsort((start_s, thread))
        stage, thread, start_s = stage[o], thread[o], start_s[o]
        if not self.key_split:
            has = sample[o] >= 0
            runs, distinct = pair_runs(label[o][has], sample[o][has])
            self.key_split = runs > distinct
        if self.stage_split or not len(stage):
            return
        runs, distinct = pair_runs(stage, np.zeros(len(stage), np.int64))
        if runs > distinct:
            self.stage_split = True
            self._runs.clear()
            return
        cut = np.flatnonzero((stage[1:] != stage[:-1]) | (thread[1:] != thread[:-1])) + 1
        first, last = np.r_[0, cut], np.r_[cut - 1, len(stage) - 1]
        # per block: thread, first start, last start, stage, and the batch (later batches come first)
        self._runs.append(np.column_stack([thread[first].astype(np.float64), start_s[first], start_s[last],
                                           stage[first].astype(np.float64),
                                           np.full(len(first), -float(len(self._runs)))]))

    def stages_rising(self) -> bool:
        """Whether the pieces' group ids by stage rise in the whole run's order (each stage one block)."""
        if self.stage_split:
            return False
        if not self._runs:
            return True
        r = np.concatenate(self._runs)
        r = r[np.lexsort((r[:, 4], r[:, 1], r[:, 0]))]
        same_thread = r[1:, 0] == r[:-1, 0]
        crossed = same_thread & (r[:-1, 2] > r[1:, 1]) & (r[:-1, 3] != r[1:, 3])
        if crossed.any():
            return False
        runs, distinct = pair_runs(r[:, 3], np.zeros(len(r)))
        return runs == distinct
