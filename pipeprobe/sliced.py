"""The analysis of a run too large for memory: one time slice at a time, joined exactly.

:func:`analyze_sliced` gives the critical path with its shares, the stalls
and the stage table of a run, equal to those of :func:`pipeprobe.analyze`,
while holding the spans of one slice at a time. The steps:

``scan``
    read every span file once in bounded pieces (:func:`pipeprobe._slicereader.scan_run`),
    keeping the per-batch tables (waits, steps, membership) and an index of
    the time each piece of each file covers;
``cut``
    cut the run's time at the consumer's requests for every
    ``slice_batches``-th batch (:func:`slice_edges`); a slice *owns* the
    timeline nodes and spans that start inside it;
``read``
    per slice, the spans overlapping the slice and a stretch of context
    before it and after it (:func:`pipeprobe._slicereader.read_range`): the
    in-memory timeline of those spans gives each node the slice owns its
    last-arriving dependency, as the whole run's timeline would;
``join``
    walk the critical path back from the end of the last step, slice by
    slice from the last: where the path leaves a slice, the node it enters
    is found again, by its thread and times, in the slice that owns it. The
    walk checks itself: a dependency that ends before the context read, or
    none where context was cut off, means the context was too short, and
    the slice is read again with four times the context (at most the whole
    run before it). Each slice's path nodes go to files in a temporary
    folder as the walk finds them (:mod:`pipeprobe._pathspill`);
``path sums``
    the shares per label and per thread, the stage table's seconds on the
    path and the stall blame are worked out from those files a slice's
    nodes at a time, in path order, adding up as the whole path's are added;
``stage table``
    each slice's own spans (stage, duration, CPU time) and the pieces of
    their innermost stages (label, sample, thread, start, duration) go to
    files in the same folder (:mod:`pipeprobe._spill`), deleted once the
    table is built; the table is built a group of whole stages
    at a time (about :data:`pipeprobe._spill.GROUP_ROWS` rows), each stage's
    numbers read back in the whole run's order and laid out so that pandas
    adds them up as it adds the whole run's (:mod:`pipeprobe._grouplayout`):
    the sums, percentiles and slowest samples are those of the whole run. A
    stage with more rows than a group is worked out a slice's part at a time
    (:mod:`pipeprobe._bigstage`: sums carried with their compensation, exact
    percentiles by selection, each sample's seconds a share of the samples
    at a time).

What is kept in memory across slices: the per-batch tables (waits, steps;
the membership rows, about 28 bytes a sample, until the walk ends) and the
index of the files. The dependency timeline (its nodes and edges, several
hundred bytes a span) exists for one slice at a time; the stage table's
numbers for one group of stages at a time (a stage larger than a group: a
slice's part of it, and its seconds per sample, 8 bytes each, for the sum of
all samples largest first). The path's files stay until the analysis is
closed (:meth:`SlicedAnalysis.close`, a ``with`` block) or garbage-collected:
``critical.path`` and ``critical.segments`` are built from them when read.
"""

from __future__ import annotations

import math
import os
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from . import _spill
from ._bigstage import piece_numbers, span_numbers
from ._grouplayout import Blocks, PieceLayout
from ._pathspill import NUMBERED, TEXT, PathStore
from ._progress import progress, step
from ._slicereader import RunScan, latest_first_delivery, read_range, scan_run
from ._spill import Spill, key_groups
from .critical import PACE_SPEEDUP, CriticalPath
from .lanes import thread_lanes
from .load import Run
from .nesting import span_pieces
from .stagestats import (
    SATURATED_FROM,
    StageStats,
    _finish_table,
    _more_workers,
    _own_time,
    _slowest,
    _table,
    core_busy_during_stalls,
)
from .stalls import Stalls, summarise_stalls
from .timeline import NODE_COLUMNS, Timeline, build_timeline, sink_node
from .tracefile import usable_cores

__all__ = ["SlicedAnalysis", "analyze_sliced", "slice_edges", "SLICE_SPANS", "slice_batches_for", "AUTO_SLICE_SPANS"]

#: Spans per slice by default (the slice's timeline, with its context, holds about twice as many).
SLICE_SPANS = 300_000
#: From this many span records on, ``pipeprobe report`` analyses a run in slices by default.
AUTO_SLICE_SPANS = 12_000_000
#: Slices of context read before and after each slice at first (more when the walk asks for it).
_CONTEXT = 1
_AFTER = 0


@dataclass(frozen=True)
class SlicedAnalysis:
    """What :func:`analyze_sliced` found: the parts of :class:`pipeprobe.Analysis` that slices can give.

    Attributes
    ----------
    run : Run
        The run's per-batch tables (``spans`` and ``samples`` are empty: the spans were read a slice at
        a time, and the membership rows are freed before the stage table is built).
    critical : CriticalPath
        The critical path (``path`` holds its nodes; ``node`` and ``pred``
        number them along the path) and its attribution. ``path`` and
        ``segments`` are read from files in a temporary folder (under
        ``TMPDIR``) when first read; :meth:`close` (or a ``with`` block)
        deletes the files, as does the garbage collector once the critical
        path is no longer referenced.
    stalls : Stalls
    stages : StageStats
    slices : int
        Time slices the run was read in.
    rereads : int
        Slices read again with more context.
    """

    run: Run
    critical: CriticalPath
    stalls: Stalls
    stages: StageStats
    slices: int
    rereads: int

    @property
    def wall_s(self) -> float:
        """Wall time of the run."""
        return self.critical.wall_s

    def close(self) -> None:
        """Delete the files that hold the critical path's nodes (``critical.path`` and ``critical.segments``
        are built from them when first read; afterwards reading one not yet read raises ValueError). Also done
        at the end of a ``with`` block, when the critical path is garbage-collected, and at exit."""
        store = self.critical._store
        if store is not None:
            store.close()

    def __enter__(self) -> SlicedAnalysis:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def stage_shares(self) -> dict[str, float]:
        """Critical-path share of wall time per label, as :meth:`pipeprobe.Analysis.stage_shares`."""
        sh = self.critical.shares
        return {str(k): float(v) for k, v in zip(sh["label"], sh["share"], strict=True)}


def slice_batches_for(spans: int, batches: int) -> int:
    """Batches per slice that hold about :data:`SLICE_SPANS` spans.

    Examples
    --------
    >>> slice_batches_for(30_000_000, 300_000)
    3000
    """
    per_batch = max(1.0, spans / max(1, batches))
    return max(1, int(SLICE_SPANS / per_batch))


def slice_edges(batches: pd.DataFrame, slice_batches: int) -> np.ndarray:
    """Times where slices begin: ``-inf``, then the request of every ``slice_batches``-th batch, then ``inf``.

    The batches of the lowest rank, in the order the consumer asked for
    them, set the edges.

    Examples
    --------
    >>> import pandas as pd
    >>> b = pd.DataFrame({"rank": 0, "wait_start_s": [0.0, 1.0, 2.0, 3.0, 4.0]})
    >>> slice_edges(b, 2).tolist()
    [-inf, 2.0, 4.0, inf]
    """
    if slice_batches < 1:
        raise ValueError(f"slice_batches must be at least 1, got {slice_batches}")
    if not len(batches):
        return np.array([-np.inf, np.inf])
    b = batches[batches["rank"] == batches["rank"].min()]
    starts = np.sort(b["wait_start_s"].to_numpy(np.float64))
    cuts = np.unique(starts[slice_batches::slice_batches])
    return np.concatenate([[-np.inf], cuts, [np.inf]])


@dataclass
class _Walk:
    """The join state of the critical path at a slice edge: the node to continue from, and the nodes so far."""

    key: tuple | None  # (kind, stage, rank, pid, tid, start_s, end_s) of the next node, None when done
    store: PathStore  # per slice the path nodes it owns, on disk
    origin_s: float = 0.0
    end_s: float = 0.0


@dataclass
class _Kept:
    """Per own span and per own piece, the few numbers the stage table needs, on disk (one part per slice)."""

    spans: Spill
    pieces: Spill
    pairs: set
    span_blocks: Blocks
    layout: PieceLayout
    per_batch: pd.DataFrame
    seen: set
    repeated: set
    names: dict
    thread_order: pd.Series
    rereads: int = 0
    cpu_nan: bool = False


def analyze_sliced(run_dir: str | os.PathLike, *, slice_batches: int | None = None,
                   warmup_batches: int | None = None) -> SlicedAnalysis:
    """Analyse a run one time slice at a time: critical path, stalls and stage table, exactly.

    Parameters
    ----------
    run_dir : path-like
        A run directory.
    slice_batches : int, optional
        Batches of the lowest rank per slice (default: :func:`slice_batches_for`).
    warmup_batches : int, optional
        As for :func:`pipeprobe.analyze`.

    Returns
    -------
    SlicedAnalysis

    Raises
    ------
    RunNotFoundError, TraceFormatError
        When :func:`pipeprobe.load` could not read the run either.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=4, decode_ms=6, step_ms=2)
    >>> s = analyze_sliced(d, slice_batches=1)
    >>> s.slices, s.stage_shares() == pipeprobe.analyze(d).stage_shares()
    (4, True)

    References
    ----------
    Kelley, J. E. and Walker, M. R. (1959). Critical-path planning and
    scheduling (the critical path method: a longest path is a chain of
    last-arriving dependencies, so it can be followed back piece by piece).
    """
    store = PathStore(Path(tempfile.mkdtemp(prefix="pipeprobe-slices-")))
    try:
        with progress("analysis in slices"):
            return _analyse(Path(run_dir), slice_batches, warmup_batches, store)
    except BaseException:
        store.close()  # the files go now, not when the traceback is freed
        raise


def _analyse(run_dir: Path, slice_batches: int | None, warmup_batches: int | None, store: PathStore) -> SlicedAnalysis:
    """The steps of :func:`analyze_sliced`; the path's files stay in ``store.folder``, the stage table's are
    deleted when it is built."""
    step("reading the run's index")
    scan = scan_run(run_dir)
    if slice_batches is None:
        slice_batches = slice_batches_for(scan.spans, len(scan.batches))
    edges = slice_edges(scan.batches, slice_batches)
    walk, kept = _walk_slices(scan, edges, store)
    step("critical path, stalls and stage table")
    _give_back_freed()
    # the membership rows (about 28 bytes a sample) served the slices' links: the stalls need only their count
    # and the median of samples per batch
    samples = len(scan.samples)
    scan.samples = scan.samples.iloc[:0]
    run = scan.run(_empty_spans(), _empty_samples())
    critical, crit, inputs = _spilled_path(walk)
    pairs = store.stall_pairs if store.piece_count else None
    stalls = summarise_stalls(_with_per_batch_stages(run, kept, samples, scan.batch_samples), critical.wall_s, pairs,
                              warmup_batches=warmup_batches)
    _give_back_freed()  # the walk's and the stalls' many small objects: the stage table's largest stage comes next
    try:
        stages = _stage_table(run, critical, stalls, kept, crit, inputs)
    finally:
        kept.spans.remove()
        kept.pieces.remove()
    return SlicedAnalysis(run=run, critical=critical, stalls=stalls, stages=stages, slices=len(edges) - 1,
                          rereads=kept.rereads)


def _give_back_freed() -> None:
    """Ask glibc to hand the memory freed so far back to the system (``malloc_trim``; elsewhere nothing).

    The walk and the stalls free millions of small objects whose pages glibc keeps; the next phase's
    peak then sits on top of them (about 0.1 GiB at 30 M stage spans).
    """
    try:
        if not sys.platform.startswith("linux") or not (os.confstr("CS_GNU_LIBC_VERSION") or "").startswith("glibc"):
            return
        import ctypes

        ctypes.CDLL(None).malloc_trim(0)
    except (ValueError, OSError, AttributeError):  # no such call on this system
        return


def _empty_spans() -> pd.DataFrame:
    from .load import _empty_spans as empty

    return empty()


def _empty_samples() -> pd.DataFrame:
    return pd.DataFrame({c: np.zeros(0, np.float64 if c == "ready_s" else np.int64)
                         for c in ("rank", "batch_id", "sample_id", "ready_s")})


def _walk_slices(scan: RunScan, edges: np.ndarray, store: PathStore) -> tuple[_Walk, _Kept]:
    """Read the slices from the last to the first; walk the path back and keep the path's nodes and the
    stage-table numbers (in files under ``store.folder``)."""
    folder = store.folder
    walk = _Walk(key=_SINK, store=store, origin_s=0.0, end_s=_run_wall(scan))
    kept = _Kept(spans=Spill(folder, "spans", {"dur_s": np.float64, "cpu_s": np.float64}),
                 pieces=Spill(folder, "pieces", _PIECE_DTYPES), pairs=set(), span_blocks=Blocks(),
                 layout=PieceLayout(),
                 per_batch=pd.DataFrame({"stage": [], "rank": [], "batch_id": []}),
                 seen=set(), repeated=set(), names={}, thread_order=scan.threads.set_index(["rank", "pid", "tid"])["order"])
    lanes = _global_lanes(scan)
    t = scan.threads
    began = {(int(r), int(p), int(i)): float(f) for r, p, i, f in zip(t["rank"], t["pid"], t["tid"], t["first_s"], strict=True)}
    count = len(edges) - 1
    for k in range(count - 1, -1, -1):
        step(f"slice {count - k} of {count}")
        context = _CONTEXT
        while True:
            sub, own, hi = _read_slice(scan, edges, k, context)
            if _walk_back(walk, build_timeline(sub), edges, k, context, lanes, began):
                break
            context *= 4
            kept.rereads += 1
        _keep(kept, sub, own, scan, hi)
    return walk, kept


def _read_slice(scan: RunScan, edges: np.ndarray, k: int, context: int) -> tuple[Run, np.ndarray, float]:
    """The spans of slice ``k`` with ``context`` slices before it and one after it, and which of them it owns;
    read again up to the latest delivery an own span belongs to when that lies beyond."""
    count = len(edges) - 1
    lo, hi = edges[max(0, k - context)], edges[min(count, k + 1 + _AFTER)]
    sub = read_range(scan, lo, hi)
    own = _own_mask(sub.spans, edges[k], edges[k + 1])
    later = _latest_delivery(scan, sub.spans, own)
    if later > hi:
        hi = later
        sub = read_range(scan, lo, hi)
        own = _own_mask(sub.spans, edges[k], edges[k + 1])
    return sub, own, hi


def _own_mask(spans: pd.DataFrame, t0: float, t1: float) -> np.ndarray:
    start = spans["start_s"].to_numpy(np.float64)
    return (start >= t0) & (start < t1)


def _latest_delivery(scan: RunScan, sp: pd.DataFrame, own: np.ndarray) -> float:
    """The latest delivery of a batch an own span belongs to (its membership row may lie beyond those read)."""
    rank, batch = sp["rank"].to_numpy(np.int64), sp["batch_id"].to_numpy(np.int64)
    unlinked = own & (batch < 0) & (sp["sample_id"].to_numpy() >= 0)
    latest = -np.inf
    if unlinked.any():  # the first membership row of the sample at or after the span ended, as load links it
        latest = latest_first_delivery(scan, sp["end_s"].to_numpy(np.float64)[unlinked], rank[unlinked],
                                       sp["sample_id"].to_numpy(np.int64)[unlinked])
    linked = own & (batch >= 0)
    if linked.any():
        bt = scan.batches
        key = bt["rank"].to_numpy(np.int64) * (1 << 33) + bt["batch_id"].to_numpy(np.int64)
        want = np.unique(rank[linked] * (1 << 33) + batch[linked])
        ready = bt["ready_s"].to_numpy(np.float64)[np.isin(key, want)]
        if len(ready):
            latest = max(latest, float(ready.max()))
    return latest


#: The walk's first key: the sink of the whole run's timeline (the last step to end), found in the last slice.
_SINK = ("sink",)


def _key_of(nodes: pd.DataFrame, i: int) -> tuple:
    r = nodes.iloc[i]
    return (str(r["kind"]), str(r["stage"]), int(r["rank"]), int(r["pid"]), int(r["tid"]), float(r["start_s"]),
            float(r["end_s"]))


def _find(nodes: pd.DataFrame, key: tuple) -> int:
    """Node id of the node with this key (the last such, as the timeline breaks ties by the highest id); -1 if none."""
    if key == _SINK:
        return sink_node(Timeline(nodes, pd.DataFrame({"src": [], "dst": [], "kind": []}), 0.0, 0.0))
    kind, stage, rank, pid, tid, s0, s1 = key
    hit = ((nodes["start_s"].to_numpy() == s0) & (nodes["end_s"].to_numpy() == s1)
           & (nodes["pid"].to_numpy() == pid) & (nodes["tid"].to_numpy() == tid)
           & (nodes["rank"].to_numpy() == rank) & (nodes["kind"].astype(str).to_numpy() == kind)
           & (nodes["stage"].astype(str).to_numpy() == stage))
    found = np.flatnonzero(hit)
    return int(found[-1]) if len(found) else -1


def _walk_back(walk: _Walk, tl: Timeline, edges: np.ndarray, k: int, context: int, lanes: dict,
               threads: dict) -> bool:
    """Follow the path back through the nodes slice ``k`` owns; False when the context read was too short."""
    nodes = tl.nodes
    lo = edges[max(0, k - context)]
    start = nodes["start_s"].to_numpy(np.float64)
    own = (start >= edges[k]) & (start < edges[k + 1])
    if own.any():
        walk.origin_s = min(walk.origin_s, float(start[own].min()))
        walk.end_s = max(walk.end_s, float(nodes["end_s"].to_numpy()[own].max()))
    if walk.key is None or (walk.key == _SINK and k != len(edges) - 2):
        return True
    if walk.key != _SINK and not edges[k] <= walk.key[5] < edges[k + 1]:
        return True  # the path goes on in an earlier slice
    v = _find(nodes, walk.key)
    if v < 0 or (walk.key != _SINK and not own[v]):
        if lo == -np.inf:
            raise RuntimeError("sliced analysis: the critical path enters a slice at a node it does not hold")
        return False
    cut = _cut_threads(nodes, threads, lo)
    ids = _chain(walk, nodes, own & ~cut, own, v, lo)
    if ids is None:
        return False
    take = np.asarray(ids[::-1], np.int64)
    rows = {c: nodes[c].array.take(take) for c in NODE_COLUMNS if c not in (*NUMBERED, "lane")}
    rows = {c: v if c in TEXT else np.asarray(v) for c, v in rows.items()}
    rows["lane"] = [lanes.get((int(r), int(p), int(t)), "") for r, p, t in
                    zip(rows["rank"], rows["pid"], rows["tid"], strict=True)]
    walk.store.append(rows)
    return True


def _cut_threads(nodes: pd.DataFrame, threads: dict, lo: float) -> np.ndarray:
    """Per node: the first node of its thread in the slice's timeline although its thread ran before the
    context read (its previous node on the thread, and so whether it waited idle, are not known)."""
    if lo == -np.inf or not len(nodes):
        return np.zeros(len(nodes), bool)
    keys = ["rank", "pid", "tid"]
    first = nodes.groupby(keys, sort=False, observed=True)["node"].transform("min").to_numpy() == nodes["node"].to_numpy()
    began = np.array([threads.get((int(r), int(p), int(t)), -np.inf) for r, p, t in
                      zip(nodes["rank"], nodes["pid"], nodes["tid"], strict=True)], np.float64)
    return first & (began < lo)


def _chain(walk: _Walk, nodes: pd.DataFrame, sure: np.ndarray, own: np.ndarray, v: int,
           lo: float) -> list[int] | None:
    """Node ids from ``v`` back along ``pred`` while the slice owns them; sets the key of the node beyond.
    None when a dependency may lie before the context read (``lo``), or a node's last-arriving dependency
    is not ``sure``."""
    pred = nodes["pred"].to_numpy(np.int64).tolist()
    end = nodes["end_s"].to_numpy(np.float64)
    ids = []
    while v >= 0 and own[v]:
        if not sure[v]:
            return None
        ids.append(v)
        u = pred[v]
        if lo != -np.inf and (u < 0 or end[u] < lo):
            return None
        v = u
    walk.key = _key_of(nodes, v) if v >= 0 else None
    return ids


def _global_lanes(scan: RunScan) -> dict[tuple[int, int, int], str]:
    """Each thread's lane name as the whole run's timeline names it (:func:`pipeprobe.lanes.thread_lanes`)."""
    t = scan.threads
    if not len(t):
        return {}
    two = pd.DataFrame({
        "rank": np.repeat(t["rank"].to_numpy(np.int64), 2), "pid": np.repeat(t["pid"].to_numpy(np.int64), 2),
        "tid": np.repeat(t["tid"].to_numpy(np.int64), 2),
        "start_s": np.column_stack([t["first_s"], t["first_s"]]).ravel(),
        "end_s": np.column_stack([t["last_s"], t["last_s"]]).ravel(),
        "stage": np.repeat(np.where(t["consumer"].to_numpy(bool), "wait", "stage"), 2),
        "role": np.repeat(t["role"].to_numpy(object), 2),
    })
    lanes, lane = thread_lanes(two)
    names = lanes["name"].to_numpy(object)[lane]
    return {(int(r), int(p), int(i)): str(n) for r, p, i, n in
            zip(two["rank"], two["pid"], two["tid"], names, strict=True)}


def _run_wall(scan: RunScan) -> float:
    """:attr:`pipeprobe.load.Run.wall_s` of the whole run."""
    end = scan.header.get("end_mono_ns")
    if end is not None and scan.axis.clock.get("method") == "shared-monotonic":
        return max(0.0, (int(end) - scan.axis.t0_ns) / 1e9)
    return max(0.0, scan.last_end_s) if scan.spans else 0.0


def _spilled_path(walk: _Walk) -> tuple[CriticalPath, pd.Series | None, set[str]]:
    """The critical path from its nodes on disk, with the attribution of :func:`pipeprobe.critical.critical_path`;
    and for the stage table its seconds per label and its input stages (:meth:`PathStore.attribution`)."""
    store = walk.store
    store.origin_s, store.end_s = walk.origin_s, walk.end_s
    shares, lanes, crit, inputs = store.attribution()
    return (CriticalPath(shares=shares, lanes=lanes, origin_s=walk.origin_s, end_s=walk.end_s, store=store),
            crit, inputs)


def _codes(kept: _Kept, column: pd.Series) -> np.ndarray:
    """A categorical column as codes into ``kept.names`` (one list of stage names and labels for all slices)."""
    cat = column.astype("category").cat
    table = np.array([kept.names.setdefault(str(c), len(kept.names)) for c in cat.categories] + [-1], np.int32)
    return table[cat.codes.to_numpy()].astype(np.int16 if len(kept.names) < (1 << 15) else np.int32)


def _keep(kept: _Kept, sub: Run, own: np.ndarray, scan: RunScan, hi: float) -> None:
    """Keep the own spans' stage, duration and CPU, and the own pieces (label, stage, sample, thread, start,
    duration) of one slice: a few numbers each, no text."""
    sp = sub.spans
    is_wait = (sp["stage"] == "wait").to_numpy()
    user = ~is_wait  # steps are cut like stages (stagestats._stage_pieces): an epoch timer has them as children
    keep = own & ~is_wait
    code = _codes(kept, sp["stage"]).astype(np.int64)
    kept.spans.append(code[keep], {"dur_s": sp["dur_s"].to_numpy()[keep], "cpu_s": sp["cpu_s"].to_numpy()[keep]})
    kept.span_blocks.prepend(np.where(is_wait, -1, code)[own])  # the stage table's grouping drops the waits
    kept.cpu_nan |= bool(np.isnan(sp["cpu_s"].to_numpy(np.float64)[own]).any())
    _keep_per_batch(kept, sp, own)
    # a span reaching past the spans read gets its pieces from its whole thread over its whole extent
    end = sp["end_s"].to_numpy(np.float64)
    long = own & user & (end > hi)
    _keep_pieces(kept, sp[user], own[user] & ~long[user])
    for th in {(int(r), int(p), int(t)) for r, p, t in sp.loc[long, ["rank", "pid", "tid"]].itertuples(index=False)}:
        mine = long & (sp["rank"] == th[0]).to_numpy() & (sp["pid"] == th[1]).to_numpy() & (sp["tid"] == th[2]).to_numpy()
        whole = read_range(scan, float(sp["start_s"].to_numpy()[mine].min()), float(end[mine].max()), thread=th).spans
        wu = whole[(whole["stage"] != "wait").to_numpy()]
        ident = set(zip(sp["start_s"].to_numpy()[mine], end[mine], sp["stage"].astype(str).to_numpy()[mine]))
        _keep_pieces(kept, wu, np.array([k in ident for k in zip(wu["start_s"], wu["end_s"], wu["stage"].astype(str))], bool))


def _keep_pieces(kept: _Kept, us: pd.DataFrame, take: np.ndarray) -> None:
    """Keep the pieces of the spans ``take`` marks among the stage spans ``us`` (their innermost-stage time)."""
    if not take.any():
        return
    pieces = span_pieces(us[["stage", "start_s", "end_s", "rank", "pid", "tid", "sample_id"]],
                         columns=("stage", "sample_id", "rank", "pid", "tid"))
    if not len(pieces):
        return
    p = pieces[take[pieces["span"].to_numpy(np.int64)]]
    th = pd.MultiIndex.from_arrays([p["rank"], p["pid"], p["tid"]])
    stage, label = _codes(kept, p["stage"]).astype(np.int64), _codes(kept, p["label"])
    kept.pairs |= set(zip(*np.unique(np.column_stack([stage, label]), axis=0).T.tolist(), strict=True))
    cols = {"label": label, "sample_id": p["sample_id"].to_numpy(np.int64),
            "thread": kept.thread_order.reindex(th).to_numpy(np.int32),
            "start_s": p["start_s"].to_numpy(np.float64), "dur_s": p["dur_s"].to_numpy(np.float64)}
    kept.layout.add(stage, label, cols["sample_id"], cols["thread"], cols["start_s"])
    kept.pieces.append(stage, cols)


def _keep_per_batch(kept: _Kept, sp: pd.DataFrame, own: np.ndarray) -> None:
    """Stages seen with a batch and a sample, and those seen twice in one batch (stalls' per-batch stages)."""
    m = own & (sp["batch_id"].to_numpy() >= 0) & (sp["sample_id"].to_numpy() >= 0)
    if not m.any():
        return
    f = pd.DataFrame({"stage": sp["stage"].astype(str).to_numpy()[m], "rank": sp["rank"].to_numpy()[m],
                      "batch_id": sp["batch_id"].to_numpy()[m]})
    kept.seen |= set(f["stage"])
    f = pd.concat([kept.per_batch, f[~f["stage"].isin(kept.repeated)]], ignore_index=True)
    kept.repeated |= set(f.loc[f.duplicated(["stage", "rank", "batch_id"]), "stage"])
    kept.per_batch = f[~f["stage"].isin(kept.repeated)].drop_duplicates()


def _with_per_batch_stages(run: Run, kept: _Kept, samples: int, batch_samples: float) -> Run:
    """``run`` with stand-in spans and membership rows from which stalls finds the same per-batch stages as
    from all of them.

    :func:`pipeprobe.stalls.stall_summary` reads the spans only for the
    stages timed once per batch: one row per stage seen with a batch and a
    sample, two alike for a stage seen twice in one batch; and the
    membership rows only for whether there are any and whether the median
    batch holds more than one sample (``samples`` rows, ``batch_samples``
    the median): none, one row, or two of one batch.
    """
    names = sorted(kept.seen) + sorted(kept.repeated)
    n = len(names)
    spans = pd.DataFrame({"stage": names, "rank": np.zeros(n, np.int64), "batch_id": np.zeros(n, np.int64),
                          "sample_id": np.zeros(n, np.int64)})
    rows = 0 if not samples else 1 if batch_samples <= 1 else 2
    members = pd.DataFrame({"rank": np.zeros(rows, np.int64), "batch_id": np.zeros(rows, np.int64),
                            "sample_id": np.arange(rows, dtype=np.int64), "ready_s": np.zeros(rows)})
    return Run(run_dir=run.run_dir, header=run.header, spans=spans, batches=run.batches, samples=members,
               resources=run.resources, processes=run.processes, problems=run.problems, clock=run.clock,
               t0_ns=run.t0_ns)


#: The columns kept per piece of innermost stage (the key of its rows in the spill: ``stage``).
_PIECE_DTYPES = {"label": np.int32, "sample_id": np.int64, "thread": np.int32,
                 "start_s": np.float64, "dur_s": np.float64}


def _stage_table(run: Run, critical: CriticalPath, stalls: Stalls, kept: _Kept, crit: pd.Series | None,
                 inputs: set[str]) -> StageStats:
    """The stage table and slowest samples from the kept numbers, read back a group of stages at a time.

    Each group holds whole stages and the whole labels of their time, each stage's spans in run order and its
    pieces in the order of the whole run's pieces, laid out so that pandas adds them up as it does the whole
    run's (:mod:`pipeprobe._grouplayout`): every row is the whole run's, while memory holds one group's numbers.
    """
    names = np.array(sorted(kept.names, key=kept.names.get) or [""], dtype=object)
    labels = _label_codes(kept, names)
    rows = kept.spans.counts()
    for k, n in kept.pieces.counts().items():
        rows[k] = rows.get(k, 0) + n
    stages_rising = kept.layout.stages_rising()
    tables, slowest = [], []
    for group in [*key_groups(rows, sorted(kept.pairs)), []]:
        if not group and tables:
            break  # the empty group gives the empty table's columns when there is no stage at all
        big = _big_stage(kept, run, crit, critical.wall_s, group, names, labels, stages_rising)
        if big is not None:  # one stage larger than a group: its numbers a slice's part at a time
            tables.append(big[0])
            slowest.append(big[1])
            continue
        pieces = _group_pieces(kept, group, names, labels, stages_rising)
        own, slow = _own_time(pieces), _slowest(pieces)
        del pieces  # the spans' numbers are read once the pieces' are freed: one of the two in memory at a time
        tables.append(_group_table(run, crit, critical.wall_s, names, _group_spans(kept, group), own))
        slowest.append(slow[slow["stage"] != labels[1][-1]])
    table = pd.concat([t for t in tables if len(t)] or tables[-1:], ignore_index=True)
    table = table.sort_values(["total_s", "stage"], ascending=[False, True], kind="stable").reset_index(drop=True)
    slow = pd.concat([t for t in slowest if len(t)] or slowest[-1:], ignore_index=True)
    slow = slow.sort_values("stage", kind="stable").reset_index(drop=True)
    cores = usable_cores(run.header)
    busy = core_busy_during_stalls(run)
    saturated = None if math.isnan(busy) else bool(busy >= SATURATED_FROM)
    input_on = critical.input_share >= 1.0 - 1.0 / PACE_SPEEDUP
    more, why = _more_workers(run, stalls, input_on, busy, cores, table, inputs)
    return StageStats(table=table, slowest=slow, cores=cores, core_busy_in_stalls=busy,
                      cores_saturated=saturated, more_workers=more, more_workers_reason=why)


def _big_stage(kept: _Kept, run: Run, crit: pd.Series | None, wall_s: float, group: list[int], names: np.ndarray,
               labels: tuple[np.ndarray, list[str]], stages_rising: bool) -> tuple[pd.DataFrame, pd.DataFrame] | None:
    """The stage table's row and the slowest samples of a group that is one stage with more rows than a group
    holds, worked out a part at a time (:mod:`pipeprobe._bigstage`); None where pandas would add the whole run's
    numbers of it the other way (its stage one block of rising group ids) or its pieces are not in time order
    part by part: then it is built all at once."""
    if len(group) != 1 or kept.span_blocks.rising or stages_rising:
        return None
    stage = group[0]
    if kept.spans.counts().get(stage, 0) + kept.pieces.counts().get(stage, 0) <= _spill.GROUP_ROWS:
        return None
    recode, categories = labels
    own = _own_time(pd.DataFrame({"stage": pd.Series(dtype=object), "dur_s": pd.Series(dtype=float),
                                  "label": pd.Series(dtype=object)}))
    slow = _slowest(pd.DataFrame())
    if kept.pieces.counts().get(stage, 0):
        mine = [label for s, label in kept.pairs if s == stage]
        label = categories[int(recode[mine[0]])]
        got = piece_numbers(kept.pieces, stage, kept.layout.key_split, kept.pieces.folder, label)
        if got is None:
            return None
        at = pd.Index([str(names[stage])], dtype=object)
        own = pd.DataFrame({"own_s": pd.Series([got[0]], index=at), "label": pd.Series([label], index=at, dtype=object)})
        slow = got[1]
    t = pd.DataFrame(span_numbers(lambda: kept.spans.key_parts(stage, ("dur_s", "cpu_s"))),
                     index=pd.Index([str(names[stage])], dtype=object))
    return _finish_table(t, crit, wall_s, own), slow


def _label_codes(kept: _Kept, names: np.ndarray) -> tuple[np.ndarray, list[str]]:
    """The labels of the pieces as categories sorted as text (as :func:`pipeprobe.nesting.span_pieces` gives
    them), then one more, a label no stage has (for the rows that set how pandas adds, see
    :func:`_group_pieces`); and the recoding from ``kept.names`` codes to them."""
    used = np.array(sorted({label for _, label in kept.pairs}), np.int64)
    text = names[used] if len(used) else np.zeros(0, object)
    by_text = np.argsort(text.astype(str), kind="stable")
    recode = np.zeros(len(names), np.int64)
    recode[used[by_text]] = np.arange(len(used))
    categories = [str(t) for t in text[by_text]]
    extra = "\x00"
    while extra in categories:
        extra += "\x00"
    return recode, [*categories, extra]


def _group_spans(kept: _Kept, group: list[int]) -> dict[str, np.ndarray]:
    """The spans of the stages in ``group`` (codes, durations, CPU), laid out for pandas to add them up as it
    adds the whole run's: sorted by stage where the whole run's stages come in blocks (one dropped row with no
    CPU time in front where some span had none), else one dropped row at the end."""
    cols = kept.spans.read(group)
    if kept.span_blocks.rising:
        order = np.argsort(cols["key"], kind="stable")
        cols = {c: v[order] for c, v in cols.items()}
        extra = {"key": [-1], "dur_s": [0.0], "cpu_s": [np.nan]} if kept.cpu_nan else None
        return cols if extra is None else {c: np.concatenate([extra[c], v]) for c, v in cols.items()}
    return {c: np.concatenate([v, [-1 if c == "key" else 0.0]]) for c, v in cols.items()}


def _group_pieces(kept: _Kept, group: list[int], names: np.ndarray, labels: tuple[np.ndarray, list[str]],
                  stages_rising: bool) -> pd.DataFrame:
    """The pieces of the stages in ``group`` by thread (in the order threads first ran a stage), then time: per
    stage the order of :func:`pipeprobe.nesting.span_pieces` on the whole run.

    Rows with no stage and the extra label, dropped by the sums, make pandas add up as it does for the whole
    run: three in front (two samples of the extra label, the first again) where the whole run's (label,
    sample) pairs are not each one block, one at the end where its stages are not.
    """
    recode, categories = labels
    cols = kept.pieces.read(group)
    order = np.lexsort((cols.pop("start_s"), cols.pop("thread")))
    front = 3 if kept.layout.key_split else 0
    end = 0 if stages_rising else 1
    extra = len(categories) - 1

    def placed(values: np.ndarray, head: list, tail: list) -> np.ndarray:
        """The column in order, with the rows in front and at the end (each unordered copy freed at once)."""
        return np.concatenate([np.asarray(head[:front], values.dtype), values[order], np.asarray(tail[:end], values.dtype)])

    return pd.DataFrame({
        "stage": pd.Categorical.from_codes(placed(cols.pop("key"), [-1] * 3, [-1]), categories=names),
        "label": pd.Categorical.from_codes(placed(recode[cols.pop("label")], [extra] * 3, [-1]),
                                           categories=categories),
        "sample_id": placed(cols.pop("sample_id"), [0, 1, 0], [-1]),
        "dur_s": placed(cols.pop("dur_s"), [0.0] * 3, [0.0]),
    }, copy=False)


def _group_table(run: Run, crit: pd.Series | None, wall_s: float, names: np.ndarray, spans: dict[str, np.ndarray],
                 own: pd.DataFrame) -> pd.DataFrame:
    """The stage table's rows of the stages of one group, from their spans and their pieces' own time."""
    frame = pd.DataFrame({"stage": pd.Categorical.from_codes(spans.pop("key"), categories=names),
                          "dur_s": spans.pop("dur_s"), "cpu_s": spans.pop("cpu_s")}, copy=False)
    light = Run(run_dir=run.run_dir, header=run.header, spans=frame, batches=run.batches, samples=run.samples,
                resources=run.resources, processes=run.processes, clock=run.clock, t0_ns=run.t0_ns)
    return _table(light, crit, wall_s, None, own)
