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
    new epoch. Shorter idle times are scheduling noise, not such a wait;
``step``
    step ``k-1`` -> step ``k`` of the same rank;
``thread``
    consecutive nodes on the same thread (same rank, pid and tid).

An edge is kept only when the recording agrees with it (``u`` ended at or
before ``v`` started), so a span linked to the wrong batch cannot create a
cycle. Spans nested in another span of the same thread are not nodes (the
outermost span stands for the whole block), and a user stage that encloses
a step or a delivery of its own thread (e.g. a stage around a whole epoch)
is not a node either; both still count in the per-stage statistics.

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
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

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
    "stage": "stage name; 'step' for steps, 'delivery' for delivery nodes",
    "side": "'input' (producing batches), 'delivery' or 'consumer' (steps, stages after delivery)",
    "start_s": "start, seconds from run start (delivery: the instant the batch reached the consumer)",
    "end_s": "end (delivery: same as start_s)",
    "dur_s": "end_s - start_s",
    "rank": "rank",
    "pid": "process id",
    "tid": "thread id",
    "lane": "readable thread name: 'main', 'main thread 2', 'worker 1', 'worker 1 thread 2', "
            "prefixed 'rank R ' for ranks above 0",
    "batch_id": "batch id, -1 when the span is linked to no batch",
    "sample_id": "sample id, -1 unknown",
    "epoch": "epoch, -1 unknown",
    "span": "row of Run.spans, -1 for delivery nodes",
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

_LANE_MAIN = "main"
_NODE_KINDS = ("stage", "step", "delivery")
_N_STAGE, _N_STEP, _N_DELIVERY = range(3)
_SIDES = ("input", "delivery", "consumer")
_S_INPUT, _S_DELIVERY, _S_CONSUMER = range(3)


@dataclass(frozen=True)
class Timeline:
    """Dependency graph of a run. See the module docstring for its rules.

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

    nodes: pd.DataFrame
    edges: pd.DataFrame
    origin_s: float
    end_s: float

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
        return f"<pipeprobe.Timeline: {len(self.nodes)} nodes, {len(self.edges)} edges, {self.wall_s:.3f} s>"


def sink_node(timeline: Timeline) -> int:
    """Node the critical path is walked back from: the last step to end (else the last node); -1 if none."""
    nodes = timeline.nodes
    if nodes.empty:
        return -1
    end = nodes["end_s"].to_numpy()
    steps = np.flatnonzero((nodes["kind"] == "step").to_numpy())
    pool = steps if len(steps) else np.arange(len(nodes))
    # last to end; among equal ends the highest id (latest start)
    order = np.lexsort((pool, end[pool]))
    return int(pool[order[-1]])


def _bkey(rank: np.ndarray, batch: np.ndarray) -> np.ndarray:
    return rank.astype(np.int64) * (1 << 33) + batch.astype(np.int64) + 1


def _lanes(threads: pd.DataFrame, consumer: set[int]) -> dict[int, str]:
    """Readable name per thread code. ``threads``: th, rank, pid, tid, role, first_s (one row per thread)."""
    names: dict[int, str] = {}
    t = threads.sort_values(["rank", "first_s", "th"])
    for rank, part in t.groupby("rank", sort=True):
        prefix = f"rank {rank} " if rank else ""
        main = part[part["role"] != "worker"]
        heads = [th for th in main["th"] if th in consumer] or list(main["th"].head(1))
        for i, th in enumerate(heads, start=1):
            names[int(th)] = prefix + _LANE_MAIN + (f" {i}" if i > 1 else "")
        k = 1
        for th in main["th"]:
            if int(th) not in names:
                k += 1
                names[int(th)] = f"{prefix}main thread {k}"
        workers = part[part["role"] == "worker"]
        order = workers.groupby("pid", sort=False)["first_s"].min().sort_values()
        for w_i, pid in enumerate(order.index, start=1):
            for t_i, th in enumerate(workers.loc[workers["pid"] == pid, "th"], start=1):
                names[int(th)] = f"{prefix}worker {w_i}" + (f" thread {t_i}" if t_i > 1 else "")
    return names


def _consecutive(order: np.ndarray, group: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pairs (order[i], order[i+1]) whose ``group`` (already in that order) agrees."""
    if len(order) < 2:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    same = group[1:] == group[:-1]
    return order[:-1][same], order[1:][same]


def build_timeline(run: Run) -> Timeline:
    """Build the dependency timeline of a loaded run.

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
    >>> import pipeprobe, tempfile, time
    >>> d = tempfile.mkdtemp()
    >>> def batches():
    ...     for b in range(2):
    ...         with pipeprobe.stage("decode", sample=b):
    ...             time.sleep(0.002)
    ...         yield [b]
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for batch in probe.watch(batches()):
    ...         with probe.step():
    ...             time.sleep(0.004)
    >>> tl = build_timeline(pipeprobe.load(d))
    >>> list(tl.nodes["stage"])
    ['decode', 'delivery', 'step', 'decode', 'delivery', 'step']

    References
    ----------
    Kelley, J. E. and Walker, M. R. (1959). Critical-path planning and
    scheduling. Proc. Eastern Joint Computer Conference, 160-173 (the
    activity network and the longest path).
    """
    sp = run.spans
    n_sp = len(sp)
    stage_cat = sp["stage"].astype("category") if n_sp else pd.Categorical([])
    cats = [str(c) for c in stage_cat.cat.categories] if n_sp else []
    scode = stage_cat.cat.codes.to_numpy(np.int64) if n_sp else np.zeros(0, np.int64)
    is_wait = scode == (cats.index("wait") if "wait" in cats else -2)
    is_step = scode == (cats.index("step") if "step" in cats else -2)
    if "delivery" not in cats:
        cats.append("delivery")
    deliv_code = cats.index("delivery")
    start = sp["start_s"].to_numpy(np.float64)
    end = sp["end_s"].to_numpy(np.float64)
    rank = sp["rank"].to_numpy(np.int64)
    pid = sp["pid"].to_numpy(np.int64)
    tid = sp["tid"].to_numpy(np.int64)
    batch = sp["batch_id"].to_numpy(np.int64)
    sample = sp["sample_id"].to_numpy(np.int64)
    epoch = sp["epoch"].to_numpy(np.int64)
    worker = (sp["role"].astype(str) == "worker").to_numpy(bool) if n_sp else np.zeros(0, bool)
    th = (sp.groupby(["rank", "pid", "tid"], sort=True, observed=True).ngroup().to_numpy(np.int64)
          if n_sp else np.zeros(0, np.int64))

    # -- batches: ready instant and consumer thread ------------------------
    w_idx = np.flatnonzero(is_wait & (batch >= 0))
    wt = pd.DataFrame({"key": _bkey(rank[w_idx], batch[w_idx]), "i": w_idx})
    w_idx = wt.drop_duplicates("key", keep="last")["i"].to_numpy(np.int64)
    n_b = len(w_idx)
    b_key = pd.Index(_bkey(rank[w_idx], batch[w_idx]))
    b_ready = end[w_idx]
    b_th = th[w_idx]
    consumer_threads = {int(x) for x in np.unique(b_th)}

    bi = b_key.get_indexer(_bkey(rank, batch)) if n_b else np.full(n_sp, -1, np.int64)
    bi = np.where(batch >= 0, bi, -1)
    has_b = bi >= 0
    safe = np.maximum(bi, 0)
    ready_of = np.where(has_b, b_ready[safe], np.nan) if n_b else np.full(n_sp, np.nan)
    on_cth = has_b & (th == b_th[safe]) if n_b else np.zeros(n_sp, bool)
    user = ~is_wait & ~is_step

    # -- umbrellas: user stages around a step or a delivery of their own thread
    anchors_t = np.concatenate([(start[is_step] + end[is_step]) / 2, b_ready])
    anchors_th = np.concatenate([th[is_step], b_th])
    umbrella = np.zeros(n_sp, bool)
    u_idx = np.flatnonzero(user)
    if len(u_idx) and len(anchors_t):
        left = pd.DataFrame({"t": start[u_idx], "th": th[u_idx], "i": u_idx}).sort_values("t", kind="stable")
        right = pd.DataFrame({"t": anchors_t, "th": anchors_th, "a": anchors_t}).sort_values("t", kind="stable")
        j = pd.merge_asof(left, right, on="t", by="th", direction="forward", allow_exact_matches=False)
        a = j["a"].to_numpy(np.float64)
        ii = j["i"].to_numpy(np.int64)
        hit = ~np.isnan(a)
        umbrella[ii[hit]] = a[hit] < end[ii[hit]]

    # -- outermost spans per thread ----------------------------------------
    cand = np.flatnonzero(~is_wait & ~umbrella)
    keep = np.zeros(n_sp, bool)
    if len(cand):
        c = cand[np.lexsort((-end[cand], start[cand], th[cand]))]
        cf = pd.DataFrame({"th": th[c], "end": end[c]})
        prev_max = cf.groupby("th", sort=False)["end"].cummax().groupby(cf["th"], sort=False).shift(1)
        pm = prev_max.to_numpy(np.float64)
        keep[c] = np.isnan(pm) | (start[c] >= pm)

    # -- node arrays (kept spans, then one delivery per batch), in time order
    k_idx = np.flatnonzero(keep)
    consumer_side = user & on_cth & (start >= ready_of)
    producer = user & has_b & (end <= ready_of) & ~consumer_side
    kind_sp = np.where(is_step, _N_STEP, _N_STAGE)
    side_sp = np.where(is_step | consumer_side, _S_CONSUMER, _S_INPUT)

    def cat(sp_arr: np.ndarray, b_arr: Any) -> np.ndarray:
        return np.concatenate([sp_arr[k_idx], np.broadcast_to(b_arr, (n_b,))])

    ns_ = cat(start, b_ready)
    ne_ = cat(end, b_ready)
    korder = cat(np.where(is_step, 2, 0), 1)
    perm = np.lexsort((korder, ne_, ns_))
    n = len(perm)
    ns = ns_[perm]
    ne = ne_[perm]
    nth = cat(th, b_th)[perm]
    nbi = cat(np.where(has_b, bi, -1), np.arange(n_b))[perm]
    nkind = cat(kind_sp, _N_DELIVERY)[perm]
    nsample = cat(sample, -1)[perm]
    nrank = cat(rank, rank[w_idx])[perm]
    prod = cat(producer, False)[perm]
    cons = cat(consumer_side, False)[perm]
    is_deliv = nkind == _N_DELIVERY
    is_stepn = nkind == _N_STEP
    deliv_of_b = np.full(n_b, -1, np.int64)
    deliv_of_b[nbi[is_deliv]] = np.flatnonzero(is_deliv)

    srcs: list[np.ndarray] = []
    dsts: list[np.ndarray] = []
    kinds: list[np.ndarray] = []

    def add(s: np.ndarray, d: np.ndarray, k: int) -> None:
        srcs.append(np.asarray(s, np.int64))
        dsts.append(np.asarray(d, np.int64))
        kinds.append(np.full(len(s), k, np.int8))

    ids = np.arange(n, dtype=np.int64)
    # thread edges: node ids are in time order already
    o = ids[np.lexsort((ids, nth))]
    add(*_consecutive(o, nth[o]), _K_THREAD)
    # sample chains, and each chain's last stage -> delivery
    ps = ids[prod & (nsample >= 0)]
    o = ps[np.lexsort((ps, nsample[ps], nbi[ps]))]
    gkey = nbi[o] * (1 << 31) + nsample[o]
    add(*_consecutive(o, gkey), _K_SAMPLE)
    tails = o[np.append(gkey[1:] != gkey[:-1], True)] if len(o) else o
    add(tails, deliv_of_b[nbi[tails]], _K_DELIVERY)
    # assembly chains (batch-level producer spans) -> delivery; chain tails -> next assembly span
    pa = ids[prod & (nsample < 0)]
    if len(pa):
        o = pa[np.lexsort((pa, nbi[pa]))]
        add(*_consecutive(o, nbi[o]), _K_ASSEMBLY)
        lasts = o[np.append(nbi[o][1:] != nbi[o][:-1], True)]
        add(lasts, deliv_of_b[nbi[lasts]], _K_DELIVERY)
        if len(tails):
            left = pd.DataFrame({"t": ne[tails], "b": nbi[tails], "src": tails}).sort_values("t", kind="stable")
            right = pd.DataFrame({"t": ns[pa], "b": nbi[pa], "dst": pa}).sort_values("t", kind="stable")
            j = pd.merge_asof(left, right, on="t", by="b", direction="forward")
            hit = j["dst"].notna().to_numpy()
            add(j["src"].to_numpy()[hit], j["dst"].to_numpy()[hit].astype(np.int64), _K_ASSEMBLY)
    # consumer side: delivery -> consumer stages -> steps of the batch; delivery -> steps
    pc = ids[cons]
    add(deliv_of_b[nbi[pc]], pc, _K_CONSUMER)
    st_b = ids[is_stepn & (nbi >= 0)]
    add(deliv_of_b[nbi[st_b]], st_b, _K_CONSUMER)
    if len(pc) and len(st_b):
        j = pd.DataFrame({"b": nbi[pc], "src": pc}).merge(pd.DataFrame({"b": nbi[st_b], "dst": st_b}), on="b")
        add(j["src"].to_numpy(), j["dst"].to_numpy(), _K_CONSUMER)
    # slot: the training loop's latest event -> a worker's first span of a batch, when the
    # worker sat idle for at least SLOT_MIN_IDLE_S after its previous span
    pw = ids[prod & ~np.isin(nth, list(consumer_threads))]
    cons_nodes = ids[np.isin(nth, list(consumer_threads))]
    if len(pw) and len(cons_nodes):
        heads = pd.DataFrame({"b": nbi[pw], "th": nth[pw], "dst": pw}).groupby(["b", "th"], sort=False)["dst"].min()
        hd = np.sort(heads.to_numpy(np.int64))
        o = ids[np.lexsort((ids, nth))]
        prev = np.full(n, -1, np.int64)
        a_, b_ = _consecutive(o, nth[o])
        prev[b_] = a_
        idle_from = np.where(prev[hd] >= 0, ne[np.maximum(prev[hd], 0)], np.inf)
        idle = ns[hd] - idle_from >= SLOT_MIN_IDLE_S
        hd, idle_from = hd[idle], idle_from[idle]
        if len(hd):
            left = pd.DataFrame({"t": ns[hd], "r": nrank[hd], "dst": hd}).sort_values("t", kind="stable")
            right = pd.DataFrame({"t": ne[cons_nodes], "r": nrank[cons_nodes], "src": cons_nodes})
            j = pd.merge_asof(left, right.sort_values("t", kind="stable"), on="t", by="r", direction="backward")
            hit = j["src"].notna().to_numpy()
            src_ = j["src"].to_numpy()[hit].astype(np.int64)
            dst_ = j["dst"].to_numpy()[hit]
            keep_ = ne[src_] > idle_from[np.searchsorted(hd, dst_)]  # the event came while the worker was idle
            add(src_[keep_], dst_[keep_], _K_SLOT)
    # step k-1 -> step k per rank
    st = ids[is_stepn]
    o = st[np.lexsort((st, nrank[st]))]
    add(*_consecutive(o, nrank[o]), _K_STEP)

    src = np.concatenate(srcs)
    dst = np.concatenate(dsts)
    ek = np.concatenate(kinds)
    ok = (src >= 0) & (dst >= 0) & (src != dst)
    src, dst, ek = src[ok], dst[ok], ek[ok]
    ok = ne[src] <= ns[dst]  # the recording must agree with the dependency
    src, dst, ek = src[ok], dst[ok], ek[ok]
    # one edge per pair, keeping the first kind in EDGE_KINDS order
    o = np.lexsort((ek, dst, src))
    src, dst, ek = src[o], dst[o], ek[o]
    first = np.ones(len(src), bool)
    first[1:] = (src[1:] != src[:-1]) | (dst[1:] != dst[:-1])
    src, dst, ek = src[first], dst[first], ek[first]

    # -- last-arriving dependency: latest end; ties go to dependency edges --
    origin = float(min(0.0, ns.min())) if n else 0.0
    pred = np.full(n, -1, np.int64)
    if len(src):
        o = np.lexsort((src, -ek.astype(np.int64), ne[src], dst))
        d_sorted = dst[o]
        last = np.append(d_sorted[1:] != d_sorted[:-1], True)
        pred[d_sorted[last]] = src[o][last]
    ready = np.where(pred >= 0, ne[np.maximum(pred, 0)], origin) if n else np.zeros(0)

    # -- lanes ---------------------------------------------------------------
    npid = cat(pid, pid[w_idx])[perm]
    ntid = cat(tid, tid[w_idx])[perm]
    nworker = cat(worker, worker[w_idx])[perm]
    if n:
        firsts = pd.DataFrame({"th": nth, "rank": nrank, "pid": npid, "tid": ntid, "worker": nworker, "first_s": ns})
        threads = firsts.groupby("th", sort=True).agg(
            rank=("rank", "first"), pid=("pid", "first"), tid=("tid", "first"), worker=("worker", "first"),
            first_s=("first_s", "min")).reset_index()
        threads["role"] = np.where(threads["worker"], "worker", "main")
        names = _lanes(threads, consumer_threads)
        lane_cats = sorted(set(names.values()))
        code_of = np.full(int(nth.max()) + 1, -1, np.int64)
        for code, name in names.items():
            code_of[code] = lane_cats.index(name)
        lane = pd.Categorical.from_codes(code_of[nth], categories=lane_cats)
    else:
        lane = pd.Categorical([])
    nodes = pd.DataFrame(
        {
            "node": ids,
            "kind": pd.Categorical.from_codes(nkind, categories=list(_NODE_KINDS)),
            "stage": pd.Categorical.from_codes(cat(scode, deliv_code)[perm], categories=cats),
            "side": pd.Categorical.from_codes(cat(side_sp, _S_DELIVERY)[perm], categories=list(_SIDES)),
            "start_s": ns,
            "end_s": ne,
            "dur_s": ne - ns,
            "rank": nrank,
            "pid": npid,
            "tid": ntid,
            "lane": lane,
            "batch_id": cat(np.where(has_b, batch, -1), batch[w_idx])[perm],
            "sample_id": nsample,
            "epoch": cat(epoch, epoch[w_idx])[perm],
            "span": cat(np.arange(n_sp), -1)[perm],
            "pred": pred,
            "ready_s": ready,
            "gap_s": ns - ready,
            "weight_s": ne - ready,
        }
    )
    nodes["stage"] = nodes["stage"].cat.remove_unused_categories()
    edges = pd.DataFrame({"src": src, "dst": dst,
                          "kind": pd.Categorical.from_codes(ek.astype(np.int64), categories=list(EDGE_KINDS))})
    end_s = max(float(run.wall_s), float(ne.max()) if n else 0.0)
    return Timeline(nodes=nodes, edges=edges, origin_s=origin, end_s=end_s)


def lane_names(nodes: pd.DataFrame) -> list[str]:
    """Lanes in display order: consumer first, then other main threads, then workers."""
    if nodes.empty:
        return []
    first = nodes.groupby("lane", sort=False)["start_s"].min()
    def rank_key(name: str) -> tuple[Any, ...]:
        main = " main" in f" {name}"
        return (name.split(" ")[1] if name.startswith("rank ") else "0", 0 if main else 1, first[name], name)
    return sorted(first.index, key=rank_key)
