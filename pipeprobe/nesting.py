"""Stages inside other stages: each thread's time given to the innermost stage running.

A stage timed inside another stage of the same thread (``decode`` inside
the loader's automatic ``fetch``, ``resize`` inside your ``augment``) would
count twice if both spans were added up, and would vanish if only the
outer one were kept. :func:`flatten_spans` cuts each thread's spans into
pieces that do not overlap: every instant a thread spent inside at least
one span belongs to exactly one piece, the piece of the innermost span
running then (the one that started last). A span with stages inside keeps
only its time outside them, under the label :func:`own_label` gives it.

:func:`span_pieces` does this for a run's spans and carries each piece's
ids: a nested span that was recorded without a sample or batch id (a
decorated function whose first argument is no int) takes them from the
span around it, so its time still belongs to the right batch.

The timeline's nodes (:mod:`pipeprobe.timeline`), the stage table's own
time (:mod:`pipeprobe.stagestats`) and the replay plan's columns
(:mod:`pipeprobe.whatif._recorded`) all come from here, so nested time is
counted once everywhere and a label is made in one place.

The steps of :func:`flatten_spans`: time order per thread
(:func:`thread_order`; when no span of a thread starts before the previous
one ended, ``_is_flat``, every span is one piece and the rest is skipped), each span's depth (``_depths``: a sweep over start and
end events), its parent (``_parents``: the last span one level up), the
check that no span outlives its parent (``_crossing_threads``), and the
pieces between children (``_pieces_between``). Threads whose spans cross
(a stage held open across a ``yield``) take the exact event sweep of
``_sweep_crossing``, a loop over their spans only.

References
----------
.. [1] Knuth, D. E. (1997). The Art of Computer Programming, Vol. 1, 2.3
   (nested intervals as a forest; a node's own time = its span less its children's).
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from .record._loaders import COLLATE_STAGE, FETCH_STAGE

#: The training step's stage name (``Probe.step``): a reserved stage, timed by pipeprobe.
STEP_STAGE = "step"

__all__ = ["Flat", "as_text", "flatten_spans", "inherit", "labels_inside", "own_label", "pieces_and_inside", "span_pieces", "stage_labels", "thread_codes", "thread_order", "PIECE_COLUMNS", "AUTOMATIC_STAGES"]

#: Stages pipeprobe times by itself (the DataLoader hooks' and ``Probe.step``'s); their own time is what your
#: stages inside them left.
AUTOMATIC_STAGES = frozenset({FETCH_STAGE, COLLATE_STAGE, STEP_STAGE})

#: Columns :func:`span_pieces` adds or replaces on the span rows it returns (one row per piece).
PIECE_COLUMNS = {
    "span": "row of the input spans whose time this piece is (the innermost span running)",
    "label": "the span's stage, or its own-time label (own_label) when a stage of its kind encloses others",
    "start_s": "start of the piece",
    "end_s": "end of the piece",
    "dur_s": "end_s - start_s",
    "cpu_s": "the span's CPU time less its children's, shared among its pieces by duration (NaN unknown)",
    "sample_id": "the span's sample id, else the nearest enclosing span's (-1 none)",
    "batch_id": "the span's batch id, else the nearest enclosing span's (-1 none)",
    "epoch": "the span's epoch, else the nearest enclosing span's (-1 none)",
}


def own_label(stage: str) -> str:
    """The label of a stage's own time, when stages ran inside it: the one rule for that name.

    Examples
    --------
    >>> own_label("fetch"), own_label("step"), own_label("augment")
    ('fetch, outside your stages', 'step, outside your stages', 'augment (own time)')
    """
    if stage in AUTOMATIC_STAGES:
        return f"{stage}, outside your stages"
    return f"{stage} (own time)"


@dataclass(frozen=True)
class Flat:
    """The pieces of a set of spans and how the spans nest.

    Attributes
    ----------
    span, start, end : ndarray
        Per piece: the span (input index) it belongs to, its start and end;
        sorted by thread, then time. No two pieces of one thread overlap.
    parent : ndarray
        Per input span: the span it ran inside (-1 none).
    depth : ndarray
        Per input span: how many spans it ran inside.
    children : ndarray
        Per input span: how many spans ran directly inside it.
    """

    span: np.ndarray
    start: np.ndarray
    end: np.ndarray
    parent: np.ndarray
    depth: np.ndarray
    children: np.ndarray


def flatten_spans(start: np.ndarray, end: np.ndarray, thread: np.ndarray) -> Flat:
    """Cut spans into non-overlapping pieces per thread, each the time of the innermost span running.

    Parameters
    ----------
    start, end : ndarray of float
        Span starts and ends (``end >= start``).
    thread : ndarray of int
        Thread code per span; spans of different threads never nest.

    Returns
    -------
    Flat

    Examples
    --------
    A 10 s ``fetch`` with ``decode`` from 1 to 4 s and ``augment`` from 5 to 9 s:

    >>> import numpy as np
    >>> f = flatten_spans(np.array([0.0, 1.0, 5.0]), np.array([10.0, 4.0, 9.0]), np.zeros(3, int))
    >>> [(int(s), float(a), float(b)) for s, a, b in zip(f.span, f.start, f.end)]
    [(0, 0.0, 1.0), (1, 1.0, 4.0), (0, 4.0, 5.0), (2, 5.0, 9.0), (0, 9.0, 10.0)]
    >>> f.parent.tolist(), f.children.tolist()
    ([-1, 0, 0], [2, 0, 0])

    References
    ----------
    .. [1] Knuth, D. E. (1997). The Art of Computer Programming, Vol. 1, 2.3 (nested intervals as a forest).
    """
    start = np.asarray(start, np.float64)
    end = np.asarray(end, np.float64)
    thread = np.asarray(thread, np.int64)
    n = len(start)
    if n == 0:
        z = np.zeros(0, np.int64)
        return Flat(z, np.zeros(0), np.zeros(0), z, z, z)
    order = thread_order(start, end, thread)
    if _is_flat(start, end, thread, order):  # nothing nests: each span is one piece (the common case, fast)
        z = np.zeros(n, np.int64)
        return Flat(order, start[order], end[order], z - 1, z, z)
    depth = _depths(start, end, thread, order)
    parent = _parents(thread, order, depth)
    bad = _crossing_threads(start, end, thread, parent)
    span, p0, p1 = _pieces_between(start, end, order, parent, ~np.isin(thread, bad))
    for th in bad:  # a loop over the spans of crossing threads only; see _sweep_crossing
        idx = np.flatnonzero(thread == th)
        s2, a2, b2, par2 = _sweep_crossing(start[idx], end[idx])
        span, p0, p1 = np.r_[span, idx[s2]], np.r_[p0, a2], np.r_[p1, b2]
        parent[idx] = np.where(par2 >= 0, idx[np.maximum(par2, 0)], -1)
    if len(bad):
        depth = _depth_from_parents(parent)
    o = np.lexsort((p1, p0, thread[span]))
    span, p0, p1 = span[o], p0[o], p1[o]
    children = np.bincount(parent[parent >= 0], minlength=n).astype(np.int64)
    return Flat(span, p0, p1, parent, depth, children)


def thread_order(start: np.ndarray, end: np.ndarray, thread: np.ndarray) -> np.ndarray:
    """Spans by thread, then start, the longer first (an enclosing span before what it encloses), then index.

    Spans mostly come in that order within each thread already: then a stable sort by thread (a radix
    sort on small thread codes) is the answer, checked in one pass, and the four-key sort is skipped.

    Examples
    --------
    >>> thread_order(np.array([0.0, 1.0, 0.0]), np.array([2.0, 3.0, 5.0]), np.array([1, 0, 1])).tolist()
    [1, 2, 0]
    """
    small = len(thread) and thread.min() >= 0 and thread.max() < (1 << 16)
    o = np.argsort(thread.astype(np.uint16) if small else thread, kind="stable")
    th, s0, e0 = thread[o], start[o], end[o]
    in_order = (th[1:] != th[:-1]) | (s0[1:] > s0[:-1]) | ((s0[1:] == s0[:-1]) & (e0[1:] <= e0[:-1]))
    return o if in_order.all() else np.lexsort((np.arange(len(start)), -end, start, thread))


def thread_codes(spans: pd.DataFrame, rows: np.ndarray | None = None, sort: bool = False) -> np.ndarray:
    """Per span (of ``rows``, or all), a code of its thread ``(rank, pid, tid)``: ``groupby(...).ngroup()``.

    Threads are numbered in order of first appearance (``sort=False``) or of
    ``(rank, pid, tid)`` (``sort=True``), as pandas numbers groups. Spans come
    in long runs of one thread (a file per process), so only the first span of
    each run is grouped, and the codes repeated: no hashing of every row.

    Examples
    --------
    >>> sp = pd.DataFrame({"rank": [0, 0, 0, 0], "pid": [9, 9, 4, 9], "tid": [1, 1, 1, 2]})
    >>> thread_codes(sp).tolist(), thread_codes(sp, sort=True).tolist(), thread_codes(sp, np.array([2, 3])).tolist()
    ([0, 0, 1, 2], [1, 1, 0, 2], [0, 1])
    """
    keys = ("rank", "pid", "tid")
    n = len(spans)
    if n == 0 or (rows is not None and len(rows) == 0):
        return np.zeros(0, np.int64)
    cols = [spans[c].to_numpy() for c in keys]
    change = np.zeros(n, bool)
    change[0] = True
    for c in cols:
        change[1:] |= c[1:] != c[:-1]
    head = np.flatnonzero(change)
    heads = pd.DataFrame({k: c[head] for k, c in zip(keys, cols, strict=True)})
    per_head = heads.groupby(list(keys), sort=sort or rows is not None, observed=True).ngroup().to_numpy(np.int64)
    code = np.repeat(per_head, np.diff(np.append(head, n)))
    if rows is None:
        return code
    code = code[rows]  # codes in key order; renumbered by first appearance among the rows (or kept sorted)
    if sort:
        first = np.unique(code)
    else:
        sub_head = np.flatnonzero(np.r_[True, code[1:] != code[:-1]])
        first = pd.unique(code[sub_head])
    lut = np.zeros(int(per_head.max()) + 1, np.int64)
    lut[first] = np.arange(len(first))
    return lut[code]


def _is_flat(start: np.ndarray, end: np.ndarray, thread: np.ndarray, order: np.ndarray) -> bool:
    """No span of a thread starts before the previous one (in thread order) ended, and none has zero length
    inside another."""
    th, s0, e0 = thread[order], start[order], end[order]
    same = th[1:] == th[:-1]
    return not bool((same & (s0[1:] < e0[:-1])).any() | (same & (s0[1:] == s0[:-1])).any())


def _depths(start: np.ndarray, end: np.ndarray, thread: np.ndarray, order: np.ndarray) -> np.ndarray:
    """How many spans of its thread were open when each span started (an event sweep, vectorised).

    Events: +1 at a start, -1 at an end; at one instant ends come first (a
    span ending when the next starts encloses nothing), except the end of a
    zero-length span, which comes after the starts at its instant.
    """
    n = len(start)
    rank_in_order = np.empty(n, np.int64)
    rank_in_order[order] = np.arange(n)
    zero = end <= start
    t = np.concatenate([start, end])
    kind = np.concatenate([np.ones(n, np.int64), np.where(zero, 2, 0)])
    th = np.concatenate([thread, thread])
    tie = np.concatenate([rank_in_order, rank_in_order])
    ev = np.lexsort((tie, kind, t, th))
    step = np.where(kind[ev] == 1, 1, -1)
    open_before = np.cumsum(step) - step  # open spans just before each event (threads sum to 0 when balanced)
    depth = np.empty(n, np.int64)
    is_start = ev < n
    depth[ev[is_start]] = open_before[is_start]  # every thread's events sum to 0: no carry-over
    return depth


def _parents(thread: np.ndarray, order: np.ndarray, depth: np.ndarray) -> np.ndarray:
    """Per span, the last span before it (in thread order) one level up; -1 at depth 0."""
    n = len(order)
    pos = np.empty(n, np.int64)
    pos[order] = np.arange(n)
    levels = int(depth.max()) + 2
    th_code = pd.factorize(thread)[0].astype(np.int64)
    key = (th_code * levels + depth) * (n + 1) + pos
    sorted_idx = np.argsort(key, kind="stable")
    sorted_key = key[sorted_idx]
    query = (th_code * levels + depth - 1) * (n + 1) + pos
    hit = np.searchsorted(sorted_key, query, side="left") - 1
    parent = np.full(n, -1, np.int64)
    ok = (depth > 0) & (hit >= 0)
    cand = sorted_idx[np.maximum(hit, 0)]
    same_level = (key[cand] // (n + 1)) == (th_code * levels + depth - 1)
    ok &= same_level
    parent[ok] = cand[ok]
    return parent


def _crossing_threads(start: np.ndarray, end: np.ndarray, thread: np.ndarray, parent: np.ndarray) -> np.ndarray:
    """Threads where a span outlives the span it started in (not nested): they need the exact sweep."""
    has = parent >= 0
    p = parent[has]
    bad = (end[has] > end[p]) | (start[has] < start[p])
    return np.unique(thread[has][bad])


def _pieces_between(start: np.ndarray, end: np.ndarray, order: np.ndarray, parent: np.ndarray,
                    use: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Each span's time outside its children: before each child, and after the last (nested spans only).

    Leaf spans keep one piece even at zero length (a node of its own);
    enclosing spans keep only pieces of positive length.
    """
    o = order[use[order]]
    kids = o[parent[o] >= 0]
    kids = kids[np.argsort(parent[kids], kind="stable")]  # siblings stay in start order
    par = parent[kids]
    first_kid = np.r_[True, par[1:] != par[:-1]] if len(kids) else np.zeros(0, bool)
    prev_end = np.where(first_kid, start[par], end[np.r_[kids[:1], kids[:-1]]] if len(kids) else 0.0)
    last_kid = np.r_[par[1:] != par[:-1], True] if len(kids) else np.zeros(0, bool)
    tail_from = start.copy()
    tail_from[par[last_kid]] = end[kids[last_kid]]
    has_kids = np.zeros(len(start), bool)
    has_kids[par] = True
    span = np.concatenate([par, o])
    p0 = np.concatenate([prev_end, tail_from[o]])
    p1 = np.concatenate([start[kids], end[o]])
    is_tail = np.arange(len(span)) >= len(par)
    keep = (p1 > p0) | ((p1 == p0) & is_tail & ~has_kids[span])
    return span[keep], p0[keep], p1[keep]


def _sweep_crossing(start: np.ndarray, end: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Pieces of one thread whose spans cross: at each instant, the open span that started last wins.

    Returns ``(span, piece_start, piece_end, parent)`` in local indices; a
    span's parent is the winner when it started if that one also outlasts
    it (a span is inside only what contains it, so chains stay as short as
    the real nesting). A heap of open spans, latest start on top; ended
    spans leave it when they reach the top. Plain lists: scalar reads of
    numpy arrays would cost more than the heap.
    """
    n = len(start)
    order = np.lexsort((np.arange(n), -end, start)).tolist()
    st, en = start.tolist(), end.tolist()
    bounds = np.unique(np.concatenate([start, end]))
    heap: list[tuple[int, int]] = []  # (-position in start order, span)
    parent = [-1] * n
    owner = [-1] * len(bounds)
    k = 0
    for b, t in enumerate(bounds.tolist()):
        while heap and en[heap[0][1]] <= t:
            heapq.heappop(heap)
        while k < n and st[order[k]] <= t:
            i = order[k]
            if heap and en[heap[0][1]] >= en[i]:
                parent[i] = heap[0][1]
            heapq.heappush(heap, (-k, i))
            k += 1
        while heap and en[heap[0][1]] <= t:  # zero-length spans that just started
            heapq.heappop(heap)
        owner[b] = heap[0][1] if heap else -1
    own, a, z = np.array(owner[:-1], np.int64), bounds[:-1], bounds[1:]
    use = own >= 0
    own, a, z = own[use], a[use], z[use]
    zero = np.flatnonzero(end <= start)
    cut = np.isin(a[1:], start[zero])  # a zero-length span splits the piece it sits in, as a nested one would
    new = np.r_[True, (own[1:] != own[:-1]) | (a[1:] != z[:-1]) | cut] if len(own) else np.zeros(0, bool)
    last = np.r_[new[1:], True] if len(own) else np.zeros(0, bool)
    span, p0, p1 = own[new], a[new], z[last]
    if len(zero):  # zero-length spans own no segment; they keep a zero-length piece
        span, p0, p1 = np.r_[span, zero], np.r_[p0, start[zero]], np.r_[p1, end[zero]]
    return span, p0, p1, np.array(parent, np.int64)


def _depth_from_parents(parent: np.ndarray) -> np.ndarray:
    """Depth of each span from its parent links (one pass per level)."""
    depth = np.zeros(len(parent), np.int64)
    cur = parent.copy()
    while (cur >= 0).any():
        depth += cur >= 0
        cur = np.where(cur >= 0, parent[np.maximum(cur, 0)], -1)
    return depth


def inherit(values: np.ndarray, parent: np.ndarray, depth: np.ndarray) -> np.ndarray:
    """Each span's value, or its nearest enclosing span's where its own is negative (unknown).

    One vectorised pass per nesting level, outermost first.

    Examples
    --------
    >>> inherit(np.array([7, -1, -1]), np.array([-1, 0, 1]), np.array([0, 1, 2])).tolist()
    [7, 7, 7]
    """
    out = np.asarray(values, np.int64).copy()
    if not len(out) or not (parent >= 0).any():  # nothing nests: every span keeps its own
        return out
    by_level = np.argsort(depth, kind="stable")
    cuts = np.searchsorted(depth[by_level], np.arange(1, int(depth.max()) + 2))  # where levels 1, 2, ... begin
    for lo, hi in zip(cuts[:-1], cuts[1:], strict=True):
        idx = by_level[lo:hi]
        idx = idx[(out[idx] < 0) & (parent[idx] >= 0)]
        out[idx] = out[parent[idx]]
    return out


def span_pieces(spans: pd.DataFrame, columns: Sequence[str] | None = None,
                rows: np.ndarray | None = None) -> pd.DataFrame:
    """The pieces of a run's spans: each thread's time given to the innermost span running.

    Parameters
    ----------
    spans : DataFrame
        Rows of :attr:`pipeprobe.load.Run.spans` (any subset: only these
        nest; give stage spans, not waits or steps).
    columns : sequence of str, optional
        The columns of ``spans`` to carry (default: all of them); the piece
        columns are always there. Fewer columns, less memory on a large run.
    rows : ndarray of int, optional
        The positions of the spans to cut (default: all): the same pieces as
        ``span_pieces(spans.iloc[rows])``, without that copy of the spans.

    Returns
    -------
    DataFrame
        One row per piece: the columns of ``spans`` (of the span the piece
        belongs to) with those of :data:`PIECE_COLUMNS` replaced or added;
        sorted by thread, then time. The pieces of a thread never overlap,
        so their durations add up to the time the thread spent in the spans.

    Examples
    --------
    ``augment`` (no sample id) inside a ``fetch`` of sample 3:

    >>> import pandas as pd
    >>> sp = pd.DataFrame({"stage": ["fetch", "augment"], "start_s": [0.0, 0.2], "end_s": [1.0, 0.8],
    ...                    "rank": 0, "pid": 1, "tid": 1, "sample_id": [3, -1], "batch_id": [0, -1],
    ...                    "epoch": [0, -1], "cpu_s": [1.0, 0.6]})
    >>> p = span_pieces(sp)
    >>> p[["label", "dur_s", "sample_id", "cpu_s"]].round(6).values.tolist()
    [['fetch, outside your stages', 0.2, 3, 0.2], ['augment', 0.6, 3, 0.6], ['fetch, outside your stages', 0.2, 3, 0.2]]

    References
    ----------
    .. [1] Knuth, D. E. (1997). The Art of Computer Programming, Vol. 1, 2.3
       (a node's own time: its span less its children's).
    """
    return pieces_and_inside(spans, columns, rows, inside=False)[0]


def pieces_and_inside(spans: pd.DataFrame, columns: Sequence[str] | None = None, rows: np.ndarray | None = None,
                      inside: bool = True) -> tuple[pd.DataFrame, dict[str, tuple[str, ...]]]:
    """:func:`span_pieces` and :func:`labels_inside` of the same spans, from one cut (half the work of the two).

    Examples
    --------
    >>> sp = pd.DataFrame({"stage": ["fetch", "augment"], "start_s": [0.0, 0.2], "end_s": [1.0, 0.8],
    ...                    "rank": 0, "pid": 1, "tid": 1})
    >>> p, held = pieces_and_inside(sp, columns=("stage",), rows=np.array([0, 1]))
    >>> p["label"].tolist(), held
    (['fetch, outside your stages', 'augment', 'fetch, outside your stages'], {'fetch': ('augment', 'fetch, outside your stages')})
    """
    sp = spans.reset_index(drop=True)
    carry = list(sp.columns) if columns is None else [c for c in sp.columns if c in set(columns)]
    if rows is not None and len(rows) == len(sp) and bool((np.diff(rows) == 1).all()):
        rows = None  # every row, in order: no index needed
    if (len(sp) if rows is None else len(rows)) == 0:
        return sp.iloc[:0][carry].assign(span=np.zeros(0, np.int64), label=pd.Categorical([])), {}
    cut = _Cut.of(sp, rows)
    flat, code = cut.flat, cut.code
    at = flat.span if rows is None else np.asarray(rows, np.int64)[flat.span]  # the pieces' rows of ``spans``
    dur = flat.end - flat.start
    # column by column (categoricals stay codes): no copy of the columns a piece replaces
    out = {c: (None if c in PIECE_COLUMNS else sp[c].array.take(at)) for c in carry}
    out["span"] = flat.span
    cats, label_code = np.unique(cut.labels.astype(str), return_inverse=True)
    out["label"] = pd.Categorical.from_codes(label_code[code[flat.span]], categories=list(cats))
    out["start_s"], out["end_s"], out["dur_s"] = flat.start, flat.end, dur
    step = code == (list(cut.names).index(STEP_STAGE) if STEP_STAGE in cut.names else -1)
    out["cpu_s"] = _own_cpu(cut.column(sp, "cpu_s", np.float64), flat, dur, step)
    for col in ("sample_id", "batch_id", "epoch"):
        if col in carry:
            out[col] = inherit(cut.column(sp, col, np.int64), flat.parent, flat.depth)[flat.span]
    return pd.DataFrame(out, copy=False), (cut.inside() if inside else {})  # fresh arrays: no second copy


def labels_inside(spans: pd.DataFrame) -> dict[str, tuple[str, ...]]:
    """Per stage with stages inside it: the labels of its own time and of every piece inside it.

    What making the stage faster touches: its own time and the time of
    every stage recorded inside it, at any depth.

    Examples
    --------
    >>> import pandas as pd
    >>> sp = pd.DataFrame({"stage": ["fetch", "augment", "resize"], "start_s": [0.0, 0.2, 0.3],
    ...                    "end_s": [1.0, 0.8, 0.4], "rank": 0, "pid": 1, "tid": 1})
    >>> labels_inside(sp)
    {'augment': ('augment (own time)', 'resize'), 'fetch': ('augment (own time)', 'fetch, outside your stages', 'resize')}
    """
    sp = spans.reset_index(drop=True)
    return _Cut.of(sp, None).inside() if len(sp) else {}


def as_text(values: pd.Series) -> np.ndarray:
    """A column of stage names or labels as an object array of str, fast for categoricals.

    (Converting a categorical with ``astype(str)`` builds one string per
    row; this takes each category once.)

    Examples
    --------
    >>> as_text(pd.Series(pd.Categorical(["fetch", "decode", "fetch"]))).tolist()
    ['fetch', 'decode', 'fetch']
    """
    if isinstance(values.dtype, pd.CategoricalDtype):
        names = np.array([str(x) for x in values.cat.categories], dtype=object)
        return names[values.cat.codes.to_numpy(np.int64)] if len(names) else np.zeros(len(values), object)
    return np.array([str(x) for x in values], dtype=object) if values.dtype != object else values.to_numpy(object)


def stage_labels(names: Sequence[str], code: np.ndarray, children: np.ndarray) -> np.ndarray:
    """Per stage name: the name, or :func:`own_label` of it when a span of that stage had spans inside.

    One label per stage name for the whole run, so a stage's own time shows
    under one name everywhere.

    Parameters
    ----------
    names : sequence of str
        Stage names; ``code`` indexes them.
    code : ndarray of int
        Per span, its stage's index in ``names``.
    children : ndarray of int
        Per span, spans directly inside it (:attr:`Flat.children`).

    Examples
    --------
    >>> stage_labels(["fetch", "decode"], np.array([0, 1]), np.array([1, 0])).tolist()
    ['fetch, outside your stages', 'decode']
    """
    enclosing = np.zeros(len(names), bool)
    enclosing[np.unique(code[children > 0])] = True
    return np.array([own_label(str(n)) if e else str(n) for n, e in zip(names, enclosing, strict=True)], dtype=object)


@dataclass(frozen=True)
class _Cut:
    """:func:`flatten_spans` of a span frame (of its ``rows``, or all): the pieces, each span's stage code,
    the stage names and the label of each name."""

    flat: Flat
    code: np.ndarray
    names: np.ndarray
    labels: np.ndarray
    rows: np.ndarray | None

    @classmethod
    def of(cls, sp: pd.DataFrame, rows: np.ndarray | None) -> _Cut:
        """Cut the spans at ``rows`` (all when None), reading only the columns the cut needs."""
        if rows is not None:
            rows = np.asarray(rows, np.int64)
        thread = thread_codes(sp, rows)
        start = sp["start_s"].to_numpy(np.float64)
        end = sp["end_s"].to_numpy(np.float64)
        flat = flatten_spans(start if rows is None else start[rows], end if rows is None else end[rows], thread)
        cat = sp["stage"].astype("category").cat
        names = np.array([str(x) for x in cat.categories], dtype=object)
        code = cat.codes.to_numpy(np.int64)
        if rows is not None:
            code = code[rows]
        return cls(flat, code, names, stage_labels(names, code, flat.children), rows)

    def column(self, sp: pd.DataFrame, name: str, dtype: type) -> np.ndarray | None:
        """Per cut span, column ``name`` of ``sp`` (None when ``sp`` has no such column)."""
        if name not in sp:
            return None
        values = sp[name].to_numpy(dtype)
        return values if self.rows is None else values[self.rows]

    def inside(self) -> dict[str, tuple[str, ...]]:
        """:func:`labels_inside` of the cut spans."""
        flat, code, names, labels = self.flat, self.code, self.names, self.labels
        if not (flat.children > 0).any():
            return {}
        k = len(names)
        piece_code = code[flat.span]
        pairs = [piece_code * k + piece_code]  # (stage around, stage of the piece) as one int
        up = flat.parent[flat.span]
        while (up >= 0).any():  # one step up per nesting level, all pieces at once
            has = up >= 0
            pairs.append(code[up[has]] * k + piece_code[has])
            up = np.where(has, flat.parent[np.maximum(up, 0)], -1)
        pair = np.unique(np.concatenate(pairs))
        outer, inner = pair // k, pair % k
        enclosing = np.unique(code[flat.children > 0])
        return {str(names[c]): tuple(sorted(str(labels[i]) for i in inner[outer == c])) for c in enclosing}


def _own_cpu(cpu: np.ndarray | None, flat: Flat, piece_dur: np.ndarray, process_clock: np.ndarray) -> np.ndarray:
    """Per piece: its span's CPU time less its children's, shared among the span's pieces by duration.

    ``process_clock`` marks spans whose CPU time is the process's, all threads (the step: its
    math-library pools work while the stages inside it run): their CPU beyond their children's is
    shared by duration among all pieces inside them, theirs and their stages', not theirs alone.
    """
    if cpu is None:
        return np.full(len(flat.span), np.nan)
    n = len(cpu)
    has = flat.parent >= 0
    if not has.any() and len(flat.span) == n and (np.bincount(flat.span, minlength=n) == 1).all():
        return np.maximum(0.0, cpu)[flat.span]  # nothing nests, one piece a span: its own CPU (as below, faster)
    in_kids = np.bincount(flat.parent[has], weights=np.nan_to_num(cpu[has]), minlength=n)
    own = np.maximum(0.0, cpu - in_kids)
    own_dur = np.bincount(flat.span, weights=piece_dur, minlength=n)
    share = np.divide(piece_dur, own_dur[flat.span], out=np.zeros(len(piece_dur)), where=own_dur[flat.span] > 0)
    single = np.bincount(flat.span, minlength=n)[flat.span] == 1
    out = own[flat.span] * np.where(single, 1.0, share)
    shared = process_clock & (flat.children > 0) & np.isfinite(cpu)
    if not shared.any():
        return out
    # each piece's nearest enclosing (or own) process-clock span with stages inside, -1 none
    holder = inherit(np.where(shared, np.arange(n), -1), flat.parent, flat.depth)[flat.span]
    inside = holder >= 0
    whole = np.bincount(holder[inside], weights=piece_dur[inside], minlength=n)  # the span's duration
    extra = np.divide(own[holder[inside]] * piece_dur[inside], whole[holder[inside]],
                      out=np.zeros(int(inside.sum())), where=whole[holder[inside]] > 0)
    out[inside] = np.where(flat.span[inside] == holder[inside], 0.0, out[inside]) + extra
    return out
