"""The critical path of the analysis in slices (:mod:`pipeprobe.sliced`), kept on disk.

The walk finds the path a slice at a time, from the last slice to the
first; :class:`PathStore` appends each slice's path nodes to files in the
analysis' temporary folder (a :class:`pipeprobe._spill.Spill`, text as
codes), so memory holds no node of the path. Everything the analysis
needs from the path is then worked out from those files a part (one
slice's nodes) at a time, in path order:

``pieces``
    the path's pieces of time (:data:`pipeprobe.critical.SEGMENT_COLUMNS`)
    of a part depend on that part's nodes alone
    (:func:`pipeprobe.critical.node_pieces`), so the path's pieces are the
    parts' pieces one after another, then the tail;
``attribution``
    the shares per label and per thread, and the stage table's seconds per
    label, the same sums over the same numbers in the same order as
    :func:`pipeprobe.critical.path_attribution` and the stage table's
    pandas calls give: carried part by part with their compensation
    (:class:`_RunningSums`) where pandas adds compensated; a grouping whose
    keys are each one block of pieces (pandas then adds one value after
    another) is summed from all pieces at once (a key and a number each);
``stall pairs``
    the pieces inside each stall, found part by part and put in the order
    :func:`pipeprobe.stalls._stall_pairs` gives them for the whole path.

:attr:`CriticalPath.path` and :attr:`CriticalPath.segments` are built from
the files when first read. The files live as long as the store: they are
deleted when :meth:`PathStore.close` is called (``SlicedAnalysis.close``, or
the end of its ``with`` block), when the store is garbage-collected, or at
the latest when the interpreter exits (:func:`weakref.finalize`).
"""

from __future__ import annotations

import shutil
import weakref
from pathlib import Path
from typing import Iterator

import numpy as np
import pandas as pd

from ._bigstage import kahan
from ._coded import codes_of
from ._spill import Spill
from .critical import _attribute_codes, _shares_and_lanes, node_pieces, segment_frame, segment_names, tail_piece
from .stalls import BLAME_IDS, _stall_pairs
from .timeline import NODE_COLUMNS

__all__ = ["PathStore", "TEXT", "NUMBERED"]

#: The text columns of the path's nodes (codes on disk, categories in the path).
TEXT = ("kind", "stage", "side", "lane")
#: Node columns the path numbers anew along it (not kept on disk).
NUMBERED = ("node", "pred", "span")
#: The columns on disk and their types (the timeline's).
_DTYPES = {c: (np.int32 if c in TEXT else np.float64 if c.endswith("_s") else np.int64)
           for c in NODE_COLUMNS if c not in NUMBERED}


class PathStore:
    """The critical path's nodes in files under ``folder`` (which the store owns and deletes), slice by slice.

    Parameters
    ----------
    folder : Path
        An empty temporary folder; deleted with everything in it when the store is closed or collected.

    Examples
    --------
    >>> import tempfile
    >>> s = PathStore(Path(tempfile.mkdtemp()))
    >>> s.node_count, s.is_open
    (0, True)
    >>> s.close()
    >>> s.is_open
    False
    """

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        self.names = segment_names()
        self.origin_s, self.end_s = 0.0, 0.0
        self.piece_count = 0
        self._finalizer = weakref.finalize(self, shutil.rmtree, str(folder), True)
        self._spill = Spill(folder, "path", _DTYPES)

    @property
    def is_open(self) -> bool:
        """Whether the files are still there."""
        return self._finalizer.alive

    def close(self) -> None:
        """Delete the folder and its files (again: nothing)."""
        self._finalizer()

    def append(self, columns: dict[str, np.ndarray | pd.Categorical]) -> None:
        """One slice's path nodes, earliest first (this slice lies before those appended so far): the node
        columns but ``node, pred, span``; ``kind, stage, side`` categorical, ``lane`` as names."""
        n = len(columns["start_s"])
        cols = {c: np.asarray(v) for c, v in columns.items() if c not in TEXT}
        for c in ("kind", "stage", "side"):
            cols[c] = self.names.recode(*codes_of(pd.Series(columns[c])))
        lanes = pd.unique(np.asarray(columns["lane"], object))  # in order of first appearance, as coded one by one
        table = np.array([self.names.code(str(x)) for x in lanes], np.int64)
        cols["lane"] = table[pd.Index(lanes).get_indexer(np.asarray(columns["lane"], object))]
        self._spill.append(np.zeros(n, np.int64), cols)

    @property
    def node_count(self) -> int:
        return self._spill.rows

    def column(self, name: str) -> np.ndarray:
        """One numeric column of the path, in path order."""
        self._check()
        return self._spill.column(name)

    def path(self) -> pd.DataFrame:
        """:attr:`pipeprobe.CriticalPath.path`: the nodes numbered along the path, text as categories of the
        names used (sorted)."""
        self._check()
        n = self.node_count
        numbered = {"node": np.arange(n, dtype=np.int64), "pred": np.arange(n, dtype=np.int64) - 1,
                    "span": np.full(n, -1, np.int64)}
        if not n:
            path = pd.DataFrame({c: [] for c in NODE_COLUMNS})
            for c in TEXT:
                path[c] = path[c].astype(str).astype("category")
            return path.assign(**numbered)
        cols = {c: numbered[c] if c in NUMBERED else self._text(c) if c in TEXT else self._spill.column(c)
                for c in NODE_COLUMNS}
        return pd.DataFrame(cols, copy=False)

    def _text(self, name: str) -> pd.Categorical:
        codes = self._spill.column(name)
        used = np.unique(codes)
        text = np.array(self.names.names, dtype=object)[used]
        order = np.argsort(text.astype(str), kind="stable")
        recode = np.zeros(len(self.names.names), np.int64)
        recode[used[order]] = np.arange(len(used))
        return pd.Categorical.from_codes(recode[codes], categories=pd.Index([str(t) for t in text[order]]).astype(str))

    def pieces(self) -> Iterator[dict[str, np.ndarray]]:
        """The path's pieces of time, a part at a time in path order, then the tail; pieces of no time left out."""
        self._check()
        node = 0
        last_end = self.origin_s
        for part in self._spill.parts():
            k = len(part["key"])
            ids = np.arange(node, node + k, dtype=np.int64)
            node += k
            if k:
                last_end = float(part["end_s"][-1])
            yield _positive(node_pieces(part, ids, self.names))
        yield _positive(tail_piece(last_end, self.end_s, self.names))

    def segments(self) -> pd.DataFrame:
        """:attr:`pipeprobe.CriticalPath.segments`, built from the files."""
        parts = list(self.pieces())
        seg = {c: np.concatenate([p[c] for p in parts]) for c in parts[0]}
        return segment_frame(seg, self.names.names)

    def attribution(self) -> tuple[pd.DataFrame, pd.DataFrame, pd.Series | None, set[str]]:
        """``shares, lanes`` of the path, and for the stage table its seconds per stage or step label (None
        without pieces) and the labels of its input stages: the sums of the whole path's pieces, in its order.

        Each sum is carried from part to part (:class:`_RunningSums`); where pandas would add the whole path's
        pieces one value after another (each key one block of rows), the pieces are read again and added up as
        numpy adds one block (:class:`_BlockSum`).
        """
        names = self.names.names
        wide = len(names) + 1
        rank = np.empty(len(names), np.int64)
        rank[np.argsort(np.array(names, dtype=object).astype(str), kind="stable")] = np.arange(len(names))
        shares, lanes, stage = _RunningSums(), _RunningSums(), _RunningSums(sorted_keys=True)
        stage_kinds, no_lane = [self._code("stage"), self._code("step")], self._code("")
        inputs: set[int] = set()
        self.piece_count = 0
        for p in self.pieces():
            self.piece_count += len(p["seconds"])
            label, kind, side, lane = (p[c].astype(np.int64) for c in ("label", "kind", "side", "lane"))
            sec = p["seconds"]
            shares.add((label * wide + kind) * wide + side, sec)
            lanes.add(lane[lane != no_lane], sec[lane != no_lane])
            on = np.isin(kind, stage_kinds)
            stage.add(rank[label[on]], sec[on])
            inputs |= set(np.unique(label[(kind == self._code("stage")) & (side == self._code("input"))]).tolist())
        if not self.piece_count or not stage.state:
            return self._attribution_at_once()
        keys, sums = shares.result() if shares.compensated else self._summed_in_blocks("shares", wide, rank, shares)
        by_key = pd.DataFrame({"label": keys // (wide * wide), "kind": keys // wide % wide, "side": keys % wide,
                               "seconds": sums})
        keys, sums = lanes.result() if lanes.compensated else self._summed_in_blocks("lanes", wide, rank, lanes)
        shares_, lanes_ = _shares_and_lanes(by_key, pd.DataFrame({"lane": keys, "seconds": sums}), names,
                                            self.end_s - self.origin_s)
        keys, sums = stage.result() if stage.compensated else self._summed_in_blocks("stage", wide, rank, stage)
        text = np.array(names, dtype=object)[np.argsort(rank)[keys]]
        crit = pd.Series(sums, index=pd.Index([str(x) for x in text]), name="seconds").rename_axis("label")
        return shares_, lanes_, crit, {str(names[c]) for c in inputs}

    def _summed_in_blocks(self, which: str, wide: int, rank: np.ndarray,
                          sums: _RunningSums) -> tuple[np.ndarray, np.ndarray]:
        """The keys and sums of one of :meth:`attribution`'s groupings (``shares``, ``lanes``, ``stage``) whose
        keys are each one block of pieces, as pandas adds them then (:class:`_BlockSum`), read again part by part."""
        blocks = {k: _BlockSum(n) for k, n in sums.count.items()}
        for p in self.pieces():
            label, kind, side, lane = (p[c].astype(np.int64) for c in ("label", "kind", "side", "lane"))
            take = {"shares": np.ones(len(label), bool), "lanes": lane != self._code(""),
                    "stage": np.isin(kind, [self._code("stage"), self._code("step")])}[which]
            key = {"shares": (label * wide + kind) * wide + side, "lanes": lane,
                   "stage": rank[label] if len(label) else label}[which][take]
            values = p["seconds"][take]
            for k in np.unique(key).tolist():
                blocks[k].add(values[key == k])
        keys, _ = sums.result()
        return keys, np.array([blocks[k].result() for k in keys.tolist()], np.float64)

    def _attribution_at_once(self) -> tuple[pd.DataFrame, pd.DataFrame, pd.Series | None, set[str]]:
        """:meth:`attribution` from all the path's pieces at once (a label code and a number each)."""
        narrow = np.int16 if len(self.names.names) < (1 << 15) else np.int32
        cols: dict[str, list[np.ndarray]] = {c: [] for c in ("label", "kind", "side", "lane", "seconds")}
        self.piece_count = 0
        for p in self.pieces():
            self.piece_count += len(p["seconds"])
            for c, got in cols.items():
                got.append(p[c] if c == "seconds" else p[c].astype(narrow))
        codes = pd.DataFrame({c: np.concatenate(v) for c, v in cols.items()}, copy=False)
        cols.clear()
        shares, lanes = _attribute_codes(codes, self.names.names, self.end_s - self.origin_s)
        crit, inputs = self._stage_seconds(codes)
        return shares, lanes, crit, inputs

    def _stage_seconds(self, codes: pd.DataFrame) -> tuple[pd.Series | None, set[str]]:
        """:func:`pipeprobe.stagestats.critical_seconds` and :func:`~pipeprobe.stagestats.input_stage_labels`
        from the coded pieces: the labels grouped by their rank in text order, as pandas groups the text."""
        names = np.array(self.names.names, dtype=object)
        kind = codes["kind"].to_numpy()
        label = codes["label"].to_numpy()
        stage_kind = np.isin(kind, [self._code("stage"), self._code("step")])
        inputs = {str(x) for x in names[np.unique(label[(kind == self._code("stage"))
                                                        & (codes["side"].to_numpy() == self._code("input"))])]}
        if not len(codes):
            return None, inputs
        rank = np.empty(len(names), np.int64)
        rank[np.argsort(names.astype(str), kind="stable")] = np.arange(len(names))
        by_rank = np.argsort(rank)
        crit = codes["seconds"][stage_kind].groupby(rank[label[stage_kind]], sort=True).sum()
        crit.index = pd.Index([str(x) for x in names[by_rank[crit.index.to_numpy(np.int64)]]])
        return crit.rename_axis("label"), inputs

    def _code(self, name: str) -> int:
        """The code of ``name`` (-2, no code, when no node has it)."""
        return self.names.names.index(name) if name in self.names.names else -2

    def stall_pairs(self, b: pd.DataFrame, stalled: np.ndarray) -> pd.DataFrame:
        """Pairs of (stalled batch, piece of the path inside its stall) that blame the stalls as
        :func:`pipeprobe.stalls._stall_pairs` of the whole path does, in a few rows per stall (:class:`_StallSums`).
        """
        ready = b["ready_s"].to_numpy(np.float64)
        sums = _StallSums(sorted({str(x) for x in self.names.names}))
        waiting: list[pd.DataFrame] = []
        offset = 0
        for p in self.pieces():
            seg = pd.DataFrame({"start_s": p["start_s"], "end_s": p["end_s"],
                                "label": pd.Categorical.from_codes(p["label"], categories=self._text_names()),
                                "lane": pd.Categorical.from_codes(p["lane"], categories=self._text_names()),
                                "sample_id": p["sample_id"]}, copy=False)
            pairs = _stall_pairs(b, seg, stalled)
            waiting.append(pairs.assign(order=pairs["order"].to_numpy() + offset))
            offset += len(seg)
            if not len(seg):
                continue
            pairs = pd.concat(waiting, ignore_index=True).sort_values("row", kind="stable")
            done = ready[pairs["row"].to_numpy(np.int64)] <= float(p["end_s"][-1])  # later pieces start after
            sums.add(pairs[done])
            waiting = [pairs[~done]]
        sums.add(pd.concat(waiting, ignore_index=True).sort_values("row", kind="stable"))
        return sums.pairs()

    def _text_names(self) -> pd.Index:
        return pd.Index(self.names.names).astype(str)

    def _check(self) -> None:
        if not self.is_open:
            raise ValueError("the analysis in slices was closed, and with it the files of its critical path: "
                             "read critical.path and critical.segments before closing it")


class _RunningSums:
    """Per key, pandas' group-by sum of values given part by part, the keys in the order they first appear
    (``sorted_keys``: as pandas sorts them), while pandas adds them compensated (:func:`pipeprobe._bigstage.kahan`).

    pandas adds one value after another instead when its group ids rise along the rows and no value is NaN
    (:mod:`pipeprobe._grouplayout`): each key one block of rows (``sorted_keys``: the keys never falling).
    ``compensated`` says whether the whole sequence given so far is the compensated case.

    Examples
    --------
    >>> r = _RunningSums()
    >>> r.add(np.array([1, 2, 1]), np.array([0.5, 1.0, 0.25]))
    >>> r.add(np.array([2]), np.array([2.0]))
    >>> [k.tolist() for k in r.result()], r.compensated
    ([[1, 2], [0.75, 3.0]], True)
    """

    def __init__(self, sorted_keys: bool = False) -> None:
        self.sorted_keys = sorted_keys
        self.state: dict[int, tuple[float, float]] = {}
        self.count: dict[int, int] = {}
        self.blocks = True
        self.nan = False
        self._last: int | None = None

    def add(self, key: np.ndarray, values: np.ndarray) -> None:
        """The next rows: their keys (integers) and values."""
        if not len(key):
            return
        self.nan |= bool(np.isnan(values).any())
        if self.sorted_keys:
            self.blocks &= bool((key[1:] >= key[:-1]).all()) and (self._last is None or int(key[0]) >= self._last)
        else:
            runs = key[np.r_[0, np.flatnonzero(key[1:] != key[:-1]) + 1]].tolist()
            new = runs[1:] if runs[0] == self._last else runs
            self.blocks &= len(set(new)) == len(new) and not any(k in self.state for k in new)
        self._last = int(key[-1])
        uniq, first = np.unique(key, return_index=True)
        for k in uniq[np.argsort(first)].tolist():
            mine = values[key == k]
            self.state[k] = kahan(mine, self.state.get(k, (0.0, 0.0)))
            self.count[k] = self.count.get(k, 0) + len(mine)

    @property
    def compensated(self) -> bool:
        return not self.blocks or self.nan

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        """The keys (first seen first, or sorted) and their sums."""
        keys = sorted(self.state) if self.sorted_keys else list(self.state)
        return np.array(keys, np.int64), np.array([self.state[k][0] for k in keys], np.float64)


#: Values numpy adds at once in a :class:`_BlockSum` (about 8 MB).
BLOCK_LEAF = 1 << 20


def _halves(n: int) -> tuple[int, int]:
    """How numpy's pairwise summation splits ``n`` values: below the middle, at a multiple of 8."""
    n2 = n // 2
    return n2 - n2 % 8, n - (n2 - n2 % 8)


def _leaves(n: int, leaf: int) -> list[int]:
    """The lengths of the stretches of ``n`` values that numpy's pairwise summation splits down to ``leaf``."""
    if n <= leaf:
        return [n] if n else []
    a, b = _halves(n)
    return _leaves(a, leaf) + _leaves(b, leaf)


def _joined(n: int, leaf: int, sums: Iterator[float]) -> float:
    """The pairwise sum of ``n`` values from the sums of its :func:`_leaves`, added as numpy adds the halves."""
    if n <= leaf:
        return next(sums)
    a, b = _halves(n)
    left = _joined(a, leaf, sums)
    return left + _joined(b, leaf, sums)


class _BlockSum:
    """numpy's ``add.reduceat`` over one block of ``n`` values (pandas' sum of a group that is one block of rising
    group ids), the values given part by part: the first value plus the pairwise sum of the rest (numpy
    ``pairwise_sum``: halves split below the middle at a multiple of 8), whose stretches of at most
    :data:`BLOCK_LEAF` values numpy adds itself.

    Examples
    --------
    >>> v = np.random.default_rng(1).random(1000)
    >>> b = _BlockSum(1000)
    >>> for part in np.array_split(v, 7):
    ...     b.add(part)
    >>> bool(b.result() == np.add.reduceat(v, np.zeros(1, np.intp))[0])
    True
    """

    def __init__(self, n: int) -> None:
        self.n, self.leaf = n, max(128, BLOCK_LEAF)
        self.sizes = _leaves(n - 1, self.leaf) if n > 1 else []
        self.first: float | None = None
        self.sums: list[float] = []
        self._held: list[np.ndarray] = []
        self._have = 0

    def add(self, values: np.ndarray) -> None:
        """The next values of the block."""
        if self.first is None and len(values):
            self.first, values = float(values[0]), values[1:]
        while len(values):
            want = self.sizes[len(self.sums)]
            take, values = values[:want - self._have], values[want - self._have:]
            self._held.append(take)
            self._have += len(take)
            if self._have == want:
                self.sums.append(float(np.add.reduceat(np.concatenate([[0.0], *self._held]), np.zeros(1, np.intp))[0]))
                self._held, self._have = [], 0

    def result(self) -> float:
        if self.n <= 1:
            return 0.0 if self.first is None else self.first
        return self.first + _joined(self.n - 1, self.leaf, iter(self.sums))


def _positive(pieces: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The pieces of more than no time (as :func:`pipeprobe.critical.path_attribution` keeps them)."""
    keep = pieces["seconds"] > 0
    return {c: v[keep] for c, v in pieces.items()}


#: The key :func:`pipeprobe.stalls._blame` sums the pairs by.
_BLAME_KEY = ["row", "label", "lane"]


class _StallSums:
    """The blame's sums of the pairs, taken a set of whole stalls at a time, and the pairs that give them.

    :func:`pipeprobe.stalls._blame` sums the pairs per (stall, label, lane) with one pandas group-by over all
    of them, which adds one value after another (``ufunc.reduceat``) when every group is one block of rows,
    compensated otherwise (:mod:`pipeprobe._grouplayout`): which of the two, only the whole set of pairs tells.
    So each set of stalls is summed both ways, the samples of each way's largest group per stall kept,
    and :meth:`pairs` gives per group one row holding the sum of the way the whole set takes, then the
    kept samples as rows of no time: :func:`~pipeprobe.stalls._blame` finds from them the same sums (a sum
    plus zeros), the same largest group and the same samples, in the same order. Of each group's samples only
    the first :data:`~pipeprobe.stalls.BLAME_IDS` (those the blame names) are rows; the group's row counts the
    rest (column ``more``).
    """

    def __init__(self, names: list[str] | None = None) -> None:
        #: the text of labels and lanes, sorted: kept as categories in that order (a code a row, not an object;
        #: they sort as the text does, as the blame sorts them)
        self.names = names
        self.groups: list[pd.DataFrame] = []
        self.samples: list[pd.DataFrame] = []
        self.blocks = True
        self.empty: pd.DataFrame | None = None

    def add(self, pairs: pd.DataFrame) -> None:
        """The pairs of whole stalls, sorted by stall, each stall's in the path's order."""
        if self.names is not None:
            pairs = pairs.assign(**{c: pd.Categorical(pairs[c].to_numpy(object), categories=self.names)
                                    for c in ("label", "lane")})
        if self.empty is None:
            self.empty = pairs.iloc[:0]
        if not len(pairs):
            return
        gid = pairs.groupby(_BLAME_KEY, sort=False).ngroup().to_numpy(np.int64)
        self.blocks &= bool(pd.Index(gid).is_monotonic_increasing)
        sec = pairs["sec"].to_numpy(np.float64)
        # compensated: a dropped key at the end; one value after another: the groups laid out as blocks
        kahan = pd.Series(np.r_[sec, 0.0]).groupby(np.r_[gid.astype(np.float64), np.nan], sort=False).sum()
        order = np.argsort(gid, kind="stable")
        blocks = pd.Series(sec[order]).groupby(gid[order], sort=False).sum()
        first = np.unique(gid, return_index=True)[1]
        g = pairs.iloc[first][[*_BLAME_KEY, "order"]].reset_index(drop=True)
        g = g.assign(kahan=kahan.to_numpy(np.float64), blocks=blocks.to_numpy(np.float64))
        top = np.zeros(len(gid) and gid.max() + 1, bool)
        for way in ("kahan", "blocks"):  # as _blame picks the largest group per stall
            ranked = g.sort_values(["row", way, "label"], ascending=[True, False, True], kind="stable")
            top[ranked.drop_duplicates("row", keep="first").index.to_numpy()] = True
        mine = top[gid] & (pairs["sample"].to_numpy() >= 0)
        kept = pairs[mine].assign(group=gid[mine]).drop_duplicates(["group", "sample"], keep="first")
        # the blame names the first BLAME_IDS samples and counts the rest: the rest travel as a count per group
        rank = kept.groupby("group", sort=False).cumcount().to_numpy()
        more = np.bincount(kept["group"].to_numpy()[rank >= BLAME_IDS], minlength=len(g))
        self.groups.append(g.assign(more=more[:len(g)]))
        self.samples.append(kept[rank < BLAME_IDS].drop(columns="group").assign(sec=0.0, more=0))

    def pairs(self) -> pd.DataFrame:
        """The rows that stand for all the pairs (see the class docstring)."""
        if not self.groups:
            return self.empty
        way = "blocks" if self.blocks else "kahan"
        g = pd.concat(self.groups, ignore_index=True)
        g = g.assign(sec=g[way], sample=-1)[["row", "label", "lane", "sec", "sample", "order", "more"]]
        out = pd.concat([g, *self.samples], ignore_index=True)
        return out.sort_values(["row", "order"], kind="stable").reset_index(drop=True)
