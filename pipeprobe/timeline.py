"""The per-batch dependency timeline of a run: which recorded work waited for which.

:func:`build_timeline` turns a loaded :class:`~pipeprobe.load.Run` into a
directed acyclic graph held as two DataFrames, :attr:`Timeline.nodes` and
:attr:`Timeline.edges`. A node is a recorded span (a stage or a training
step) or the delivery of a batch to the consumer; an edge ``u -> v`` says
``v`` could not start before ``u`` ended.

Edges, per batch (dependency edges):

``sample``
    the stages of one sample, in the order they started (read -> decode ->
    augment, whatever the user named);
``assembly``
    batch-level producer spans (no sample id, e.g. ``collate``) in start
    order, fed by the last stage of each sample that ended before them;
``delivery``
    the last producer span of each sample and of the assembly chain -> the
    batch's delivery node (the instant the consumer's wait ended,
    ``ready_s``);
``consumer``
    delivery -> consumer-side stages of the batch (spans in the consumer
    thread with that batch id that start after the delivery, e.g. a copy
    to the device) -> the batch's step;

and resource edges:

``slot``
    the training loop's latest event (a delivery, a step, a stage of its
    own) -> the first span of a batch's production on a worker thread that
    sat idle for at least :data:`SLOT_MIN_IDLE_S` after its previous span,
    when that event came during the idle time: a loader with bounded
    prefetch hands a worker its next task only when the loop takes a batch
    and frees a slot, and at an epoch start only when the loop asks for the
    new epoch. A worker thread's first span counts as after an idle time:
    with torch's default ``persistent_workers=False`` the loader starts new
    worker processes for each epoch when the loop asks for it. Shorter idle
    times are scheduling noise, not such a wait;
``step``
    step ``k-1`` -> step ``k`` of the same rank;
``thread``
    consecutive nodes on the same thread (same rank, pid and tid).

An edge is kept only when the recording agrees with it (``u`` ended at or
before ``v`` started), so a span linked to the wrong batch cannot create a
cycle. Stages nested in other stages of the same thread count once: each
thread's stage time is cut into pieces, each the time of the innermost
stage running (:func:`pipeprobe.nesting.span_pieces`), and the pieces are
the nodes; a stage with stages inside keeps only its own time, under the
label :func:`pipeprobe.nesting.own_label` gives it (``fetch, outside your
stages``), and a nested stage recorded without ids takes its sample and
batch from the stage around it. A user stage that encloses a step or a
delivery of its own thread (e.g. a stage around a whole epoch) is not a
node (it still counts in the per-stage statistics). A stage inside a step
(``forward``, ``backward``) is: the step is cut like any enclosing stage,
its own time under ``step, outside your stages``, still a ``step`` node.

:func:`build_timeline` takes these steps, each a function below: the spans
as arrays with their threads and lanes (``_span_arrays``; lanes named by
:func:`pipeprobe.lanes.lane_name`, the one rule for lane names), one delivery per batch
(``_deliveries``), the spans that are nodes and their time order
(``_innermost``: stage spans cut into the pieces of the innermost stage
running; ``_node_order``: no waits, no umbrellas, time order), the node
columns the rules read (``_node_arrays``), one rule per edge kind
(``_sample_edges``, ``_assembly_edges``, ``_delivery_edges``,
``_consumer_edges``, ``_slot_edges``, ``_step_edges``, ``_thread_edges``),
the edges the recording agrees with (``_edges``), and each node's
last-arriving dependency (``_last_arriving``).

Each node's *last-arriving dependency* (``pred``) is the predecessor that
ended last; the node waited from that instant (``ready_s``) until it
started (``gap_s``), then ran (``dur_s``). Its *weight* ``weight_s =
end_s - ready_s`` is what it adds to a path through it. With these weights
the longest path into any node ``v`` has length ``end_s(v) - origin_s``
(induction on the topological order: the longest path into ``v`` is the
longest into its last-arriving predecessor plus ``weight_s(v)``), so the
path found by walking back along ``pred`` is a longest path of the graph:
the observed critical path of the critical path method.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import TYPE_CHECKING, Any, Iterator

import numpy as np
import pandas as pd

from ._nodecolumns import NODE_KINDS, SIDES, EdgeColumns, NodeColumns, narrow
from .lanes import thread_lanes
from .nesting import flatten_spans, inherit, stage_labels, thread_codes, thread_order

if TYPE_CHECKING:  # pragma: no cover
    import networkx

    from .load import Run

__all__ = ["Timeline", "build_timeline", "NODE_COLUMNS", "EDGE_COLUMNS", "EDGE_KINDS"]

#: Edge kinds, dependency edges first (their order breaks ties between
#: predecessors that ended at the same instant).
EDGE_KINDS = ("sample", "assembly", "delivery", "consumer", "slot", "step", "thread")
_K_SAMPLE, _K_ASSEMBLY, _K_DELIVERY, _K_CONSUMER, _K_SLOT, _K_STEP, _K_THREAD = range(len(EDGE_KINDS))

#: A worker idle at least this long before starting a batch may have waited
#: for the training loop (a prefetch slot, an epoch start): see ``slot``.
SLOT_MIN_IDLE_S = 1e-3

#: Columns of :attr:`Timeline.nodes`, one row per node, in time order.
NODE_COLUMNS = {
    "node": "node id (= row position)",
    "kind": "'stage', 'step' or 'delivery'",
    "stage": "stage name ('step' for steps, 'delivery' for delivery nodes); the own-time label "
             "(pipeprobe.nesting.own_label) for the time a stage with stages inside spent outside them",
    "side": "'input' (producing batches), 'delivery' or 'consumer' (steps, stages after delivery)",
    "start_s": "start, seconds from run start (delivery: the instant the batch reached the consumer)",
    "end_s": "end (delivery: same as start_s)",
    "dur_s": "end_s - start_s",
    "rank": "rank",
    "pid": "process id",
    "tid": "thread id",
    "lane": "readable thread name (pipeprobe.lanes.lane_name): 'main', 'main thread 2', 'worker 1', 'worker 1 thread 2', "
            "prefixed 'rank R ' on runs of several ranks",
    "batch_id": "batch id, -1 when the span is linked to no batch",
    "sample_id": "sample id, -1 unknown",
    "epoch": "epoch, -1 unknown",
    "span": "row of Run.spans (for a piece of a stage: that stage's row), -1 for delivery nodes",
    "pred": "last-arriving dependency (node id), -1 when none",
    "ready_s": "when the last dependency ended (origin_s when none)",
    "gap_s": "start_s - ready_s: waited after the last dependency (for delivery nodes: the delivery time)",
    "weight_s": "end_s - ready_s: what the node adds to a path through it",
}

#: Columns of :attr:`Timeline.edges`, one row per edge.
EDGE_COLUMNS = {
    "src": "node that had to end first",
    "dst": "node that waited for it",
    "kind": "one of EDGE_KINDS",
}

_N_STAGE, _N_STEP, _N_DELIVERY = (NODE_KINDS.index(k) for k in ("stage", "step", "delivery"))
_S_INPUT, _S_DELIVERY, _S_CONSUMER = (SIDES.index(k) for k in ("input", "delivery", "consumer"))


class Timeline:
    """Dependency graph of a run. See the module docstring for its rules.

    A timeline from :func:`build_timeline` holds its nodes and edges as
    compact columns (:mod:`pipeprobe._nodecolumns`) and builds the two
    DataFrames the first time they are read; :func:`pipeprobe.critical.critical_path`
    reads the columns it needs without them. Once built, the frames are the
    timeline's nodes and edges (a change to them is what later readers see).

    Parameters
    ----------
    nodes, edges : DataFrame, optional
        See :data:`NODE_COLUMNS` and :data:`EDGE_COLUMNS` (or give ``columns``).
    origin_s, end_s : float
    columns, edge_columns : NodeColumns, EdgeColumns, optional
        Compact nodes and edges (:mod:`pipeprobe._nodecolumns`) in place of the frames.

    Attributes
    ----------
    nodes : DataFrame
        See :data:`NODE_COLUMNS`.
    edges : DataFrame
        See :data:`EDGE_COLUMNS`.
    origin_s : float
        Start of the time axis the paths are measured from (0, the run
        start, unless a span started earlier).
    end_s : float
        End of the run: the later of the recorded end and the last node end.
    """

    __slots__ = ("_nodes", "_edges", "_columns", "_edge_columns", "origin_s", "end_s")

    def __init__(self, nodes: pd.DataFrame | None = None, edges: pd.DataFrame | None = None, origin_s: float = 0.0,
                 end_s: float = 0.0, *, columns: NodeColumns | None = None,
                 edge_columns: EdgeColumns | None = None) -> None:
        if (nodes is None) == (columns is None) or (edges is None) == (edge_columns is None):
            raise TypeError("Timeline takes nodes and edges, or columns and edge_columns")
        self._nodes, self._edges = nodes, edges
        self._columns, self._edge_columns = columns, edge_columns
        self.origin_s, self.end_s = float(origin_s), float(end_s)

    @property
    def nodes(self) -> pd.DataFrame:
        """See :data:`NODE_COLUMNS` (built on first read from the compact columns)."""
        if self._nodes is None:
            self._nodes = self._columns.frame()
            self._columns = None  # the frame holds the nodes now
        return self._nodes

    @property
    def edges(self) -> pd.DataFrame:
        """See :data:`EDGE_COLUMNS` (built on first read from the compact columns)."""
        if self._edges is None:
            self._edges = self._edge_columns.frame()
            self._edge_columns = None
        return self._edges

    @property
    def node_count(self) -> int:
        """Nodes, without building the frame."""
        return len(self._columns) if self._nodes is None else len(self._nodes)

    @property
    def edge_count(self) -> int:
        """Edges, without building the frame."""
        return len(self._edge_columns) if self._edges is None else len(self._edges)

    def node_column(self, name: str) -> np.ndarray:
        """The numeric node column ``name`` (``start_s``, ``end_s``, ``pred``, ``batch_id``) as an array, without
        the frame."""
        if self._nodes is not None:
            return self._nodes[name].to_numpy()
        c = self._columns
        return {"start_s": c.start, "end_s": c.end, "pred": c.pred, "batch_id": c.batch}[name]

    def node_rows(self, ids: np.ndarray) -> pd.DataFrame:
        """Rows ``ids`` of :attr:`nodes`, renumbered from 0 (``nodes.iloc[ids]``), without the whole frame."""
        if self._nodes is not None:
            return self._nodes.iloc[ids].reset_index(drop=True)
        return self._columns.frame(ids)

    def _is_step(self) -> np.ndarray:
        if self._nodes is not None:
            return (self._nodes["kind"] == "step").to_numpy()
        return self._columns.kind == _N_STEP

    @property
    def wall_s(self) -> float:
        """Wall time covered: ``end_s - origin_s``."""
        return self.end_s - self.origin_s

    def to_networkx(self, weight: str = "weight_s") -> networkx.DiGraph:
        """Return the graph as a :class:`networkx.DiGraph` (networkx must be installed).

        Nodes are the node ids with every column of :attr:`nodes` as
        attributes, plus two virtual nodes: ``"start"`` (the origin, with an
        edge to every node without predecessors) and ``"end"`` (the end of
        the run, with one edge from the last step, the node the critical
        path is walked back from). Each edge carries ``kind`` and
        ``weight``: the target node's ``weight`` column (``"weight_s"`` or
        ``"dur_s"``); the edge into ``"end"`` weighs the time from the last
        step to the end of the run with ``"weight_s"`` and 0 with ``"dur_s"``.

        With ``weight="weight_s"``, ``networkx.dag_longest_path_length`` is
        the wall time and the longest path is the critical path; with
        ``"dur_s"`` the graph is the plain activity network of the critical
        path method (gaps ignored).

        Parameters
        ----------
        weight : {"weight_s", "dur_s"}
            Node column put on the edges into each node.

        Returns
        -------
        networkx.DiGraph

        Examples
        --------
        >>> import pandas as pd
        >>> from pipeprobe.timeline import Timeline
        >>> nodes = pd.DataFrame({"node": [0], "weight_s": [2.0], "dur_s": [2.0], "end_s": [2.0], "kind": ["step"]})
        >>> edges = pd.DataFrame({"src": pd.Series([], dtype=int), "dst": pd.Series([], dtype=int),
        ...                       "kind": pd.Series([], dtype=str)})
        >>> g = Timeline(nodes, edges, 0.0, 3.0).to_networkx()
        >>> sorted(g.edges(data="weight"), key=str)
        [('start', 0, 2.0), (0, 'end', 1.0)]
        """
        import networkx as nx

        if weight not in ("weight_s", "dur_s"):
            raise ValueError(f"weight must be 'weight_s' or 'dur_s', got {weight!r}")
        g = nx.DiGraph()
        nodes = self.nodes
        records = nodes.to_dict("records")
        g.add_nodes_from((int(r["node"]), r) for r in records)
        g.add_node("start", start_s=self.origin_s, end_s=self.origin_s)
        g.add_node("end", start_s=self.end_s, end_s=self.end_s)
        w = nodes[weight].to_numpy(np.float64)
        src = self.edges["src"].to_numpy(np.int64)
        dst = self.edges["dst"].to_numpy(np.int64)
        kinds = self.edges["kind"].astype(str).to_numpy()
        g.add_edges_from(
            (int(s), int(d), {"kind": k, "weight": float(w[d])}) for s, d, k in zip(src, dst, kinds, strict=True)
        )
        has_pred = np.zeros(len(nodes), bool)
        has_pred[dst] = True
        for v in np.flatnonzero(~has_pred):
            g.add_edge("start", int(v), kind="origin", weight=float(w[v]))
        sink = sink_node(self)
        if sink >= 0:
            tail = self.end_s - float(nodes["end_s"].iloc[sink]) if weight == "weight_s" else 0.0
            g.add_edge(sink, "end", kind="end", weight=tail)
        else:
            g.add_edge("start", "end", kind="end", weight=self.wall_s if weight == "weight_s" else 0.0)
        return g

    def __repr__(self) -> str:
        return f"<pipeprobe.Timeline: {self.node_count} nodes, {self.edge_count} edges, {self.wall_s:.3f} s>"


def sink_node(timeline: Timeline) -> int:
    """Node the critical path is walked back from: the last step to end (else the last node); -1 if none."""
    if not timeline.node_count:
        return -1
    end = timeline.node_column("end_s")
    steps = np.flatnonzero(timeline._is_step())
    pool = steps if len(steps) else np.arange(timeline.node_count)
    # last to end; among equal ends the highest id (latest start)
    order = np.lexsort((pool, end[pool]))
    return int(pool[order[-1]])


def _bkey(rank: np.ndarray, batch: np.ndarray) -> np.ndarray:
    return rank.astype(np.int64) * (1 << 33) + batch.astype(np.int64) + 1


def _consecutive(order: np.ndarray, group: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pairs (order[i], order[i+1]) whose ``group`` (already in that order) agrees."""
    if len(order) < 2:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    same = group[1:] == group[:-1]
    return order[:-1][same], order[1:][same]


# -- the steps of build_timeline -----------------------------------------------------------------


@dataclass(frozen=True)
class _Spans:
    """``run.spans`` as arrays, one entry per span, with its thread; rank, pid, tid and lane per thread."""

    stages: list[str]  # stage categories, 'delivery' appended
    code: np.ndarray
    is_wait: np.ndarray
    is_step: np.ndarray
    start: np.ndarray
    end: np.ndarray
    batch: np.ndarray
    sample: np.ndarray
    epoch: np.ndarray
    th: np.ndarray  # thread code (rank, pid, tid in sorted order)
    th_rank: np.ndarray  # per thread code: what a per-span column would repeat
    th_pid: np.ndarray
    th_tid: np.ndarray
    th_lane: np.ndarray
    lane_names: np.ndarray
    row: np.ndarray  # row of run.spans (a piece: the row of the span it is part of)

    @property
    def user(self) -> np.ndarray:
        return ~self.is_wait & ~self.is_step

    @property
    def rank(self) -> np.ndarray:
        return self.th_rank[self.th]


@dataclass(frozen=True)
class _Deliveries:
    """One delivery per batch (its last wait with that batch id), and each span's batch (-1 none)."""

    wait: np.ndarray  # span row of each batch's wait
    ready: np.ndarray
    th: np.ndarray
    of_span: np.ndarray


@dataclass(frozen=True)
class _Order:
    """Which span or delivery each node is, nodes in time order (kept spans, then deliveries, permuted)."""

    span_of: np.ndarray  # per node: its span row, -1 for a delivery
    is_delivery: np.ndarray
    delivery: np.ndarray  # per delivery node, in node order: its delivery index
    n_b: int

    @classmethod
    def of(cls, kept: np.ndarray, n_b: int, perm: np.ndarray) -> _Order:
        """Nodes ``kept`` spans then ``n_b`` deliveries, put in the order ``perm``."""
        span_of = np.concatenate([kept, np.full(n_b, -1, np.int64)])[perm]
        is_delivery = span_of < 0
        return cls(span_of, is_delivery, perm[is_delivery] - len(kept), n_b)

    def take(self, per_span: np.ndarray, per_delivery: Any) -> np.ndarray:
        """A node column from a per-span array and a per-delivery value (or array): one gather."""
        dtype = np.result_type(per_span, per_delivery)
        out = per_span[self.span_of].astype(dtype, copy=False) if len(per_span) else np.zeros(len(self.span_of), dtype)
        out[self.is_delivery] = np.broadcast_to(per_delivery, (self.n_b,))[self.delivery]
        return out


@dataclass(frozen=True)
class _Nodes:
    """Node columns the edge rules read (node id = position, in time order)."""

    start: np.ndarray
    end: np.ndarray
    th: np.ndarray
    batch: np.ndarray  # delivery index of the node's batch, -1 none
    kind: np.ndarray
    sample: np.ndarray
    th_rank: np.ndarray  # rank per thread code
    producer: np.ndarray
    consumer: np.ndarray
    on_consumer_thread: np.ndarray
    delivery_of_batch: np.ndarray

    @property
    def ids(self) -> np.ndarray:
        return np.arange(len(self.start), dtype=np.int64)

    @property
    def rank(self) -> np.ndarray:
        return self.th_rank[self.th]

    @cached_property
    def thread_order(self) -> np.ndarray:
        """Node ids by thread, then time (made once for the two rules that read it)."""
        ids = self.ids
        return ids[np.lexsort((ids, self.th))]

    @cached_property
    def sample_chains(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """:func:`_sample_chains`, made once for the three rules that read it."""
        return _sample_chains(self)


def _span_arrays(sp: pd.DataFrame) -> _Spans:
    n_sp = len(sp)
    stage_cat = sp["stage"].astype("category") if n_sp else pd.Series(pd.Categorical([]))
    cats = [str(c) for c in stage_cat.cat.categories] if n_sp else []
    code = stage_cat.cat.codes.to_numpy(np.int32) if n_sp else np.zeros(0, np.int32)
    is_wait = code == (cats.index("wait") if "wait" in cats else -2)
    is_step = code == (cats.index("step") if "step" in cats else -2)
    if "delivery" not in cats:
        cats.append("delivery")
    th = thread_codes(sp, sort=True).astype(np.int32)
    lanes, lane = thread_lanes(sp)
    n_th = int(th.max()) + 1 if n_sp else 0
    first = np.full(n_th, -1, np.int64)
    first[th[::-1]] = np.arange(n_sp - 1, -1, -1)  # a span of each thread: its rank, pid, tid and lane
    return _Spans(
        stages=cats, code=code, is_wait=is_wait, is_step=is_step,
        start=sp["start_s"].to_numpy(np.float64), end=sp["end_s"].to_numpy(np.float64),
        batch=sp["batch_id"].to_numpy(np.int64), sample=sp["sample_id"].to_numpy(np.int64),
        epoch=sp["epoch"].to_numpy(np.int64), th=th, th_rank=sp["rank"].to_numpy(np.int64)[first],
        th_pid=sp["pid"].to_numpy(np.int64)[first], th_tid=sp["tid"].to_numpy(np.int64)[first],
        th_lane=lane[first], lane_names=lanes["name"].to_numpy(object), row=np.arange(n_sp, dtype=np.int64),
    )


def _innermost(s: _Spans, d: _Deliveries) -> _Spans:
    """Waits as they are; steps and user stages cut into the pieces of the innermost span running.

    Stage spans around a step or a delivery of their thread (umbrellas) are
    left out, as before; steps and the other stages become
    :func:`pipeprobe.nesting.flatten_spans`, so nested time is counted once:
    a stage inside a step (``forward``) is a node of its own, and a step or
    stage with stages inside keeps its own time under
    :func:`pipeprobe.nesting.own_label` (``step, outside your stages``).
    """
    nest = np.flatnonzero((s.user & ~_umbrellas(s, d)) | s.is_step)
    flat = flatten_spans(s.start[nest], s.end[nest], s.th[nest])
    label_of_code = stage_labels(s.stages, s.code[nest], flat.children)
    stages = list(s.stages) + [x for x in dict.fromkeys(label_of_code) if x not in s.stages]
    new_code = pd.Index(stages).get_indexer(label_of_code)
    rows = np.concatenate([np.flatnonzero(s.is_wait), nest[flat.span]])  # umbrellas left out
    other = rows[:len(rows) - len(flat.span)]

    def col(per_span: np.ndarray, pieces: np.ndarray) -> np.ndarray:
        return np.concatenate([per_span[other], pieces])

    def ids(per_span: np.ndarray) -> np.ndarray:
        return col(per_span, inherit(per_span[nest], flat.parent, flat.depth)[flat.span])

    return _Spans(
        stages=stages, code=col(s.code, new_code[s.code[nest][flat.span]]), is_wait=s.is_wait[rows],
        is_step=s.is_step[rows], start=col(s.start, flat.start), end=col(s.end, flat.end), batch=ids(s.batch),
        sample=ids(s.sample), epoch=ids(s.epoch), th=s.th[rows], th_rank=s.th_rank, th_pid=s.th_pid,
        th_tid=s.th_tid, th_lane=s.th_lane, lane_names=s.lane_names, row=s.row[rows],
    )


def _deliveries(s: _Spans) -> _Deliveries:
    """Each batch's ready instant and consumer thread: its last wait with that batch id."""
    w_idx = np.flatnonzero(s.is_wait & (s.batch >= 0))
    wt = pd.DataFrame({"key": _bkey(s.rank[w_idx], s.batch[w_idx]), "i": w_idx})
    w_idx = wt.drop_duplicates("key", keep="last")["i"].to_numpy(np.int64)
    b_key = pd.Index(_bkey(s.rank[w_idx], s.batch[w_idx]))
    bi = b_key.get_indexer(_bkey(s.rank, s.batch)) if len(w_idx) else np.full(len(s.start), -1, np.int64)
    return _Deliveries(wait=w_idx, ready=s.end[w_idx], th=s.th[w_idx], of_span=np.where(s.batch >= 0, bi, -1))


def _umbrellas(s: _Spans, d: _Deliveries) -> np.ndarray:
    """User stages around a whole step or a delivery of their own thread (e.g. an epoch timer): not nodes.

    A stage inside a step is no umbrella: it is a piece of the step's time (:func:`_innermost`).
    """
    umbrella = np.zeros(len(s.start), bool)
    st = np.flatnonzero(s.is_step)
    on = np.zeros(len(s.th_rank), bool)  # threads with a delivery or a step: only their stages can be umbrellas
    on[d.th], on[s.th[st]] = True, True
    u_idx = np.flatnonzero(s.user & on[s.th])
    if not len(u_idx):
        return umbrella
    left = pd.DataFrame({"t": s.start[u_idx], "th": s.th[u_idx], "i": u_idx}).sort_values("t", kind="stable")
    if len(d.ready):  # a delivery strictly inside the stage
        right = pd.DataFrame({"t": d.ready, "th": d.th, "a": d.ready}).sort_values("t", kind="stable")
        j = pd.merge_asof(left, right, on="t", by="th", direction="forward", allow_exact_matches=False)
        a, ii = j["a"].to_numpy(np.float64), j["i"].to_numpy(np.int64)
        hit = ~np.isnan(a)
        umbrella[ii[hit]] = a[hit] < s.end[ii[hit]]
    if len(st):  # the first step starting at or after the stage also ends by the stage's end
        right = pd.DataFrame({"t": s.start[st], "th": s.th[st], "e": s.end[st]}).sort_values("t", kind="stable")
        j = pd.merge_asof(left, right, on="t", by="th", direction="forward")
        e, ii = j["e"].to_numpy(np.float64), j["i"].to_numpy(np.int64)
        hit = ~np.isnan(e)
        umbrella[ii[hit]] |= e[hit] <= s.end[ii[hit]]
    return umbrella


def _outermost(s: _Spans, candidate: np.ndarray) -> np.ndarray:
    """Candidate spans not nested in an earlier candidate of the same thread."""
    cand = np.flatnonzero(candidate)
    keep = np.zeros(len(s.start), bool)
    if len(cand):
        c = cand[thread_order(s.start[cand], s.end[cand], s.th[cand])]
        cf = pd.DataFrame({"th": s.th[c], "end": s.end[c]})
        prev_max = cf.groupby("th", sort=False)["end"].cummax().groupby(cf["th"], sort=False).shift(1)
        pm = prev_max.to_numpy(np.float64)
        keep[c] = np.isnan(pm) | (s.start[c] >= pm)
    return keep


def _span_sides(s: _Spans, d: _Deliveries) -> tuple[np.ndarray, np.ndarray]:
    """(producer, consumer side) per span: input work that ended by its batch's delivery, and
    consumer-thread work of the batch after it."""
    has_b = d.of_span >= 0
    safe = np.maximum(d.of_span, 0)
    n_b = len(d.wait)
    ready_of = np.where(has_b, d.ready[safe], np.nan) if n_b else np.full(len(s.start), np.nan)
    on_cth = has_b & (s.th == d.th[safe]) if n_b else np.zeros(len(s.start), bool)
    consumer_side = s.user & on_cth & (s.start >= ready_of)
    producer = s.user & has_b & (s.end <= ready_of) & ~consumer_side
    return producer, consumer_side


def _node_order(s: _Spans, d: _Deliveries) -> _Order:
    kept = np.flatnonzero(_outermost(s, ~s.is_wait))  # umbrellas are gone already (_innermost)
    n_b = len(d.wait)
    raw = _Order.of(kept, n_b, np.arange(len(kept) + n_b))
    korder = raw.take(np.where(s.is_step, 2, 0), 1)
    return _Order.of(kept, n_b, np.lexsort((korder, raw.take(s.end, d.ready), raw.take(s.start, d.ready))))


def _node_arrays(s: _Spans, d: _Deliveries, o: _Order, sides: tuple[np.ndarray, np.ndarray]) -> _Nodes:
    producer, consumer_side = sides
    nth = o.take(s.th, d.th)
    nbi = o.take(np.where(d.of_span >= 0, d.of_span, -1), np.arange(o.n_b))
    nkind = o.take(np.where(s.is_step, _N_STEP, _N_STAGE).astype(np.int8), _N_DELIVERY)
    is_deliv = nkind == _N_DELIVERY
    deliv_of_b = np.full(o.n_b, -1, np.int64)
    deliv_of_b[nbi[is_deliv]] = np.flatnonzero(is_deliv)
    return _Nodes(
        start=o.take(s.start, d.ready), end=o.take(s.end, d.ready), th=nth, batch=nbi, kind=nkind,
        sample=o.take(s.sample, -1), th_rank=s.th_rank,
        producer=o.take(producer, False), consumer=o.take(consumer_side, False),
        on_consumer_thread=np.isin(nth, np.unique(d.th)), delivery_of_batch=deliv_of_b,
    )


# -- one function per edge kind: each returns (src, dst) node ids ----------------------------------

_Pairs = tuple[np.ndarray, np.ndarray]


def _sample_chains(n: _Nodes) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Producer spans with a sample id ordered by (batch, sample, time); their chain keys; each chain's last."""
    ps = np.flatnonzero(n.producer & (n.sample >= 0))
    key = n.batch[ps] * (1 << 31) + n.sample[ps]
    if len(ps) and n.sample[ps].max() < (1 << 31):  # the key sorts as (batch, sample); ps ascending breaks ties
        by_key = np.argsort(key, kind="stable")
    else:
        by_key = np.lexsort((ps, n.sample[ps], n.batch[ps]))
    o, key = ps[by_key], key[by_key]
    tails = o[np.append(key[1:] != key[:-1], True)] if len(o) else o
    return o, key, tails


def _assembly_spans(n: _Nodes) -> np.ndarray:
    """Batch-level producer spans (no sample id) ordered by (batch, time)."""
    pa = np.flatnonzero(n.producer & (n.sample < 0))
    return pa[np.lexsort((pa, n.batch[pa]))]


def _sample_edges(n: _Nodes) -> _Pairs:
    """``sample``: the stages of one sample of one batch, in the order they started."""
    o, key, _ = n.sample_chains
    return _consecutive(o, key)


def _assembly_edges(n: _Nodes) -> _Pairs:
    """``assembly``: batch-level producer spans in order, each fed by the sample chains that ended before it."""
    o = _assembly_spans(n)
    if not len(o):
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    src, dst = _consecutive(o, n.batch[o])
    _, _, tails = n.sample_chains
    if len(tails):
        left = pd.DataFrame({"t": n.end[tails], "b": n.batch[tails], "src": tails}).sort_values("t", kind="stable")
        right = pd.DataFrame({"t": n.start[o], "b": n.batch[o], "dst": o}).sort_values("t", kind="stable")
        j = pd.merge_asof(left, right, on="t", by="b", direction="forward")
        hit = j["dst"].notna().to_numpy()
        src = np.concatenate([src, j["src"].to_numpy()[hit].astype(np.int64)])
        dst = np.concatenate([dst, j["dst"].to_numpy()[hit].astype(np.int64)])
    return src, dst


def _delivery_edges(n: _Nodes) -> _Pairs:
    """``delivery``: the last stage of each sample chain and of the assembly chain -> the batch's delivery."""
    _, _, tails = n.sample_chains
    o = _assembly_spans(n)
    lasts = o[np.append(n.batch[o][1:] != n.batch[o][:-1], True)] if len(o) else o
    src = np.concatenate([tails, lasts])
    return src, n.delivery_of_batch[n.batch[src]]


def _consumer_edges(n: _Nodes) -> _Pairs:
    """``consumer``: delivery -> consumer-side stages of the batch -> its steps; delivery -> steps."""
    pc = np.flatnonzero(n.consumer)
    st_b = np.flatnonzero((n.kind == _N_STEP) & (n.batch >= 0))
    src = [n.delivery_of_batch[n.batch[pc]], n.delivery_of_batch[n.batch[st_b]]]
    dst = [pc, st_b]
    if len(pc) and len(st_b):
        j = pd.DataFrame({"b": n.batch[pc], "src": pc}).merge(pd.DataFrame({"b": n.batch[st_b], "dst": st_b}), on="b")
        src.append(j["src"].to_numpy(np.int64))
        dst.append(j["dst"].to_numpy(np.int64))
    return np.concatenate(src), np.concatenate(dst)


def _slot_edges(n: _Nodes) -> _Pairs:
    """``slot``: the training loop's latest event -> a worker thread's first span of a batch, when the
    worker sat idle for at least :data:`SLOT_MIN_IDLE_S` (or had not run yet) and the event came during
    that idle time."""
    none = np.zeros(0, np.int64), np.zeros(0, np.int64)
    pw = np.flatnonzero(n.producer & ~n.on_consumer_thread)
    loop = np.flatnonzero(n.on_consumer_thread)
    if not len(pw) or not len(loop):
        return none
    # each (batch, thread)'s first node: pw ascends, so a pair's first occurrence is its lowest id
    hd = pw[~pd.Index((n.batch[pw] + 1) * (len(n.th_rank) + 1) + n.th[pw]).duplicated(keep="first")]  # no sort
    prev = np.full(len(n.start), -1, np.int64)
    a_, b_ = _consecutive(n.thread_order, n.th[n.thread_order])
    prev[b_] = a_
    # a thread's first span: the worker was new (a loader starts new worker processes each epoch), idle till then
    idle_from = np.where(prev[hd] >= 0, n.end[np.maximum(prev[hd], 0)], -np.inf)
    idle = n.start[hd] - idle_from >= SLOT_MIN_IDLE_S
    hd, idle_from = hd[idle], idle_from[idle]
    if not len(hd):
        return none
    left = pd.DataFrame({"t": n.start[hd], "r": n.rank[hd], "dst": hd}).sort_values("t", kind="stable")
    right = pd.DataFrame({"t": n.end[loop], "r": n.rank[loop], "src": loop}).sort_values("t", kind="stable")
    j = pd.merge_asof(left, right, on="t", by="r", direction="backward")
    hit = j["src"].notna().to_numpy()
    src = j["src"].to_numpy()[hit].astype(np.int64)
    dst = j["dst"].to_numpy()[hit].astype(np.int64)
    during = n.end[src] > idle_from[np.searchsorted(hd, dst)]  # the event came while the worker was idle
    return src[during], dst[during]


def _step_edges(n: _Nodes) -> _Pairs:
    """``step``: step k-1 -> step k of the same rank."""
    st = np.flatnonzero(n.kind == _N_STEP)
    o = st[np.lexsort((st, n.rank[st]))]
    return _consecutive(o, n.rank[o])


def _thread_edges(n: _Nodes) -> _Pairs:
    """``thread``: consecutive nodes on the same thread (node ids are in time order already)."""
    return _consecutive(n.thread_order, n.th[n.thread_order])


#: The rule of each edge kind, in :data:`EDGE_KINDS` order.
_EDGE_RULES = (_sample_edges, _assembly_edges, _delivery_edges, _consumer_edges, _slot_edges, _step_edges,
               _thread_edges)


def _edges(n: _Nodes) -> np.ndarray:
    """Every rule's edges that the recording agrees with, as one int64 key each: ``(src * nodes + dst) * kinds + kind``.

    Unsorted, and a node pair may come under several kinds: the last-arriving dependency needs neither, and
    :class:`pipeprobe._nodecolumns.EdgeColumns` sorts the keys (one per pair) only when the edges are read.
    A large run holds one array of them, not three.
    """
    count, kinds = len(n.start), len(EDGE_KINDS)
    keys = []
    for k, rule in enumerate(_EDGE_RULES):
        src, dst = (np.asarray(a, np.int64) for a in rule(n))
        ok = (src >= 0) & (dst >= 0) & (src != dst)
        src, dst = src[ok], dst[ok]
        ok = n.end[src] <= n.start[dst]  # the recording must agree with the dependency
        keys.append((src[ok] * count + dst[ok]) * kinds + k)  # exact below 2**30 nodes
    for cached in ("sample_chains", "thread_order"):  # they served the rules: free them
        n.__dict__.pop(cached, None)
    return np.concatenate(keys)


#: Edges decoded at a time by :func:`_last_arriving` (a bound on its scratch memory: about 40 bytes an edge).
_EDGE_CHUNK = 1 << 22


def _decoded(key: np.ndarray, count: int) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """``(src, dst, kind)`` of the edge keys of :func:`_edges`, a chunk at a time."""
    kinds = len(EDGE_KINDS)
    for at in range(0, len(key), _EDGE_CHUNK):
        pair, ek = np.divmod(key[at:at + _EDGE_CHUNK], kinds)
        src, dst = np.divmod(pair, count)
        yield src, dst, ek


def _last_arriving(n: _Nodes, key: np.ndarray) -> tuple[np.ndarray, float]:
    """Each node's last-arriving dependency (latest end; ties go to dependency edges), and the origin.

    Two passes over the edges, no sort: each node's latest dependency end, then among the dependencies that
    ended then, the dependency kind (lowest code) and then the highest node id, as one int key.
    """
    count, kinds = len(n.start), len(EDGE_KINDS)
    origin = float(min(0.0, n.start.min())) if count else 0.0
    latest = np.full(count, -np.inf)
    for src, dst, _ in _decoded(key, count):
        np.maximum.at(latest, dst, n.end[src])
    best = np.full(count, -1, np.int64)
    for src, dst, ek in _decoded(key, count):
        on = n.end[src] == latest[dst]
        np.maximum.at(best, dst[on], (kinds - 1 - ek[on]) * count + src[on])
    return np.where(best >= 0, best % count, -1), origin


def build_timeline(run: Run) -> Timeline:
    """Build the dependency timeline of a loaded run.

    The steps: spans as arrays with their lanes (:func:`_span_arrays`), one
    delivery per batch (:func:`_deliveries`), the spans that are nodes and
    their time order (:func:`_node_order`), one rule per edge kind
    (:data:`_EDGE_RULES`), the edges the recording agrees with
    (:func:`_edges`), and each node's last-arriving dependency
    (:func:`_last_arriving`).

    Parameters
    ----------
    run : Run
        From :func:`pipeprobe.load`.

    Returns
    -------
    Timeline
        Nodes, edges and each node's last-arriving dependency.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=2, decode_ms=2, step_ms=4)
    >>> tl = build_timeline(pipeprobe.load(d))
    >>> list(tl.nodes["stage"])
    ['decode', 'delivery', 'step', 'decode', 'delivery', 'step']

    References
    ----------
    Kelley, J. E. and Walker, M. R. (1959). Critical-path planning and
    scheduling. Proc. Eastern Joint Computer Conference, 160-173 (the
    activity network and the longest path).
    """
    s = _span_arrays(run.spans)
    s = _innermost(s, _deliveries(s))
    d = _deliveries(s)
    order = _node_order(s, d)
    sides = _span_sides(s, d)
    n = _node_arrays(s, d, order, sides)
    key = _edges(n)
    pred, origin = _last_arriving(n, key)
    edges = EdgeColumns(key=key, nodes=len(n.start), kinds=EDGE_KINDS)
    columns = _node_columns(s, d, order, n, sides, pred, origin)
    end_s = max(float(run.wall_s), float(n.end.max()) if len(n.end) else 0.0)
    return Timeline(origin_s=origin, end_s=end_s, columns=columns, edge_columns=edges)


def _node_columns(s: _Spans, d: _Deliveries, o: _Order, n: _Nodes, sides: tuple[np.ndarray, np.ndarray],
                  pred: np.ndarray, origin: float) -> NodeColumns:
    """The nodes as compact columns (:class:`pipeprobe._nodecolumns.NodeColumns`; the frame of
    :data:`NODE_COLUMNS` on request)."""
    side = np.where(s.is_step | sides[1], _S_CONSUMER, _S_INPUT).astype(np.int8)
    has_b = d.of_span >= 0
    return NodeColumns(
        kind=n.kind, stage=narrow(o.take(s.code, s.stages.index("delivery"))), stages=list(s.stages),
        side=o.take(side, _S_DELIVERY).astype(np.int8), start=n.start, end=n.end, th=n.th,
        th_rank=s.th_rank, th_pid=s.th_pid, th_tid=s.th_tid, th_lane=s.th_lane, lane_names=s.lane_names,
        batch=narrow(o.take(np.where(has_b, s.batch, -1), s.batch[d.wait])), sample=narrow(n.sample),
        epoch=narrow(o.take(s.epoch, s.epoch[d.wait])), span=narrow(o.take(s.row, -1)), pred=narrow(pred),
        origin=origin,
    )
