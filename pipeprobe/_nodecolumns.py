"""The timeline's nodes held as compact columns; the documented DataFrame is built only on request.

A timeline of a full epoch has tens of millions of nodes. The report reads
a few of their columns (each node's last-arriving dependency, the ends, the
steps) and the rows of the critical path, so :class:`NodeColumns` keeps one
numpy array per column, ids in the narrowest integer type that holds them,
text as small codes (stage, kind, side) and rank, pid, tid and lane once per
thread rather than once per node: about 45 bytes a node instead of about 150
for the frame. :meth:`NodeColumns.frame` builds the frame of
:data:`pipeprobe.timeline.NODE_COLUMNS` (all rows, or some rows, as
``frame().iloc[ids]`` would give them) with the same dtypes and categories.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import pandas as pd

__all__ = ["NodeColumns", "EdgeColumns", "narrow", "NODE_KINDS", "SIDES"]

#: Categories of the ``kind`` column, in code order.
NODE_KINDS = ("stage", "step", "delivery")
#: Categories of the ``side`` column, in code order.
SIDES = ("input", "delivery", "consumer")


def narrow(values: np.ndarray) -> np.ndarray:
    """Integers in the narrowest signed type that holds them (a copy only when the type changes).

    Examples
    --------
    >>> narrow(np.array([-1, 7, 300])).dtype.name, narrow(np.array([2**40])).dtype.name
    ('int16', 'int64')
    """
    values = np.asarray(values)
    if not len(values):
        return values.astype(np.int8)
    lo, hi = int(values.min()), int(values.max())
    for dtype in (np.int8, np.int16, np.int32):
        info = np.iinfo(dtype)
        if info.min <= lo and hi <= info.max:
            return values.astype(dtype)
    return values.astype(np.int64, copy=False)


def _int64(values: np.ndarray) -> np.ndarray:
    return values.astype(np.int64)


@dataclass(frozen=True, eq=False)
class NodeColumns:
    """The node columns of a timeline, compact (see the module docstring); node id = position."""

    kind: np.ndarray  # codes into NODE_KINDS
    stage: np.ndarray  # codes into stages
    stages: list[str]
    side: np.ndarray  # codes into SIDES
    start: np.ndarray
    end: np.ndarray
    th: np.ndarray  # thread code per node
    th_rank: np.ndarray  # per thread code
    th_pid: np.ndarray
    th_tid: np.ndarray
    th_lane: np.ndarray  # per thread code: its row in lane_names
    lane_names: np.ndarray
    batch: np.ndarray
    sample: np.ndarray
    epoch: np.ndarray
    span: np.ndarray
    pred: np.ndarray
    origin: float

    def __len__(self) -> int:
        return len(self.start)

    def ready(self, ids: np.ndarray | None = None) -> np.ndarray:
        """When each node's last dependency ended (the origin when none)."""
        pred = self.pred if ids is None else self.pred[ids]
        if not len(pred):
            return np.zeros(0)
        return np.where(pred >= 0, self.end[np.maximum(pred, 0)], self.origin)

    def frame(self, ids: np.ndarray | None = None) -> pd.DataFrame:
        """The documented nodes DataFrame; with ``ids``, its rows ``ids`` (renumbered from 0), same categories."""
        def pick(a: np.ndarray) -> np.ndarray:
            return a if ids is None else a[ids]

        th, start, end = pick(self.th), pick(self.start), pick(self.end)
        ready = self.ready(ids)
        lane_cats, code_of_lane = self._lanes()
        stage_used = np.bincount(self.stage, minlength=len(self.stages)) > 0 if len(self) else np.zeros(0, bool)
        stage_cats = [s for s, u in zip(self.stages, stage_used, strict=False) if u]
        stage_code = np.cumsum(stage_used) - 1 if len(stage_used) else np.zeros(0, np.int64)
        return pd.DataFrame(
            {
                "node": np.arange(len(self), dtype=np.int64) if ids is None else _int64(ids),
                "kind": pd.Categorical.from_codes(pick(self.kind), categories=list(NODE_KINDS)),
                "stage": pd.Categorical.from_codes(stage_code[pick(self.stage)] if len(stage_code) else
                                                   np.zeros(0, np.int8), categories=stage_cats),
                "side": pd.Categorical.from_codes(pick(self.side), categories=list(SIDES)),
                "start_s": start,
                "end_s": end,
                "dur_s": end - start,
                "rank": self.th_rank[th],
                "pid": self.th_pid[th],
                "tid": self.th_tid[th],
                "lane": pd.Categorical.from_codes(code_of_lane[self.th_lane[th]], categories=lane_cats),
                "batch_id": _int64(pick(self.batch)),
                "sample_id": _int64(pick(self.sample)),
                "epoch": _int64(pick(self.epoch)),
                "span": _int64(pick(self.span)),
                "pred": _int64(pick(self.pred)),
                "ready_s": ready,
                "gap_s": start - ready,
                "weight_s": end - ready,
            },
            copy=False,  # each column is a fresh array: no second copy while the frame is built
        )

    def _lanes(self) -> tuple[list[str], np.ndarray]:
        """The lane categories of the nodes' threads (threads of one worker slot share a name, sorted), and
        the category code of each lane row (-1: no node on that lane)."""
        n_th = len(self.th_lane)
        on = np.bincount(self.th, minlength=n_th) > 0 if len(self) else np.zeros(n_th, bool)
        used = np.unique(self.th_lane[on])
        lane_cats = sorted(set(self.lane_names[used]))
        code_of_lane = np.full(len(self.lane_names), -1, np.int64)
        code_of_lane[used] = [lane_cats.index(name) for name in self.lane_names[used]]
        return lane_cats, code_of_lane


@dataclass(frozen=True, eq=False)
class EdgeColumns:
    """The edges of a timeline as the rules gave them: one int64 key ``(src * nodes + dst) * kinds + kind`` per
    edge, unsorted, a node pair possibly under several kinds; sorted and made unique only on request."""

    key: np.ndarray
    nodes: int
    kinds: tuple[str, ...]

    @cached_property
    def unique(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(src, dst, kind code)`` sorted by (src, dst), one edge per node pair: its first kind in ``kinds`` order.

        A sort of the key orders the edges by (src, dst, kind), so the first of each pair has its lowest kind.
        """
        kinds = len(self.kinds)
        key = np.sort(self.key)
        pair = key // kinds
        first = np.ones(len(key), bool)
        first[1:] = pair[1:] != pair[:-1]
        key, pair = key[first], pair[first]
        return pair // self.nodes, pair % self.nodes, (key % kinds).astype(np.int8)

    def __len__(self) -> int:
        return len(self.unique[0])

    def frame(self) -> pd.DataFrame:
        """The documented edges DataFrame (``src``, ``dst`` as int64; ``kind`` categorical over ``kinds``)."""
        src, dst, kind = self.unique
        return pd.DataFrame({"src": src, "dst": dst,
                             "kind": pd.Categorical.from_codes(kind.astype(np.int64), categories=list(self.kinds))},
                            copy=False)
