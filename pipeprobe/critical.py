"""The critical path of an observed run and where its wall time went.

:func:`critical_path` walks back from the end of the last training step
along each node's last-arriving dependency (see :mod:`pipeprobe.timeline`)
to the start of the run. The walk visits a chain of nodes that touch end
to start in time; between two of them lies either nothing recorded (an
``'unexplained gap'``) or, before a delivery node, the time a finished
batch spent being handed to the consumer (``'delivery'``). Together with
the time after the last step, these pieces tile the run from its start to
its end, so the attribution adds up to the wall time exactly.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ._coded import Names, codes_of, text_column
from .timeline import Timeline, sink_node

__all__ = ["CriticalPath", "critical_path", "critical_path_length", "GAP", "DELIVERY", "SEGMENT_COLUMNS",
           "SHARE_COLUMNS", "PACE_SPEEDUP"]

#: A side of the pipeline (input or step) counts as setting the pace when making it free could
#: speed the whole run up by at least this factor. Our choice: a predicted gain under 5 % is
#: within the replay's error against real reruns (up to 4.5 % in bench/bench_predict.py) and
#: the run-to-run scatter of wall time on a shared machine (about 3 %).
PACE_SPEEDUP = 1.05

#: Label of critical-path time when nothing recorded ran.
GAP = "unexplained gap"
#: Label of critical-path time a finished batch spent reaching the consumer.
DELIVERY = "delivery"

#: Columns of :attr:`CriticalPath.segments`: pieces tiling the run's wall time.
SEGMENT_COLUMNS = {
    "start_s": "piece start",
    "end_s": "piece end",
    "seconds": "end_s - start_s",
    "label": "stage name, 'step', 'delivery' or 'unexplained gap'",
    "kind": "'stage', 'step', 'delivery' or 'gap'",
    "side": "'input', 'consumer', 'delivery' or 'gap'",
    "node": "timeline node the piece belongs to (-1 for the time after the last step)",
    "lane": "thread that ran it ('' for gaps)",
    "batch_id": "batch of the node (-1 unknown)",
    "sample_id": "sample of the node (-1 unknown)",
}

#: Columns of :attr:`CriticalPath.shares`: one row per label, largest first.
SHARE_COLUMNS = {
    "label": "stage name, 'step', 'delivery' or 'unexplained gap'",
    "kind": "'stage', 'step', 'delivery' or 'gap'",
    "side": "'input', 'consumer', 'delivery' or 'gap'",
    "seconds": "critical-path time with this label",
    "share": "seconds / wall time",
}


class CriticalPath:
    """The observed critical path and its attribution.

    From :func:`critical_path`, the path's rows are taken from the timeline
    the first time :attr:`path` is read (a full epoch's path has millions
    of nodes; until then it keeps a reference to the timeline); :attr:`node_count`,
    :attr:`batches`, :attr:`length_s` and :attr:`head_s` are answered without them.
    From :func:`pipeprobe.sliced.analyze_sliced`, :attr:`path` and :attr:`segments`
    are read from files on disk the first time they are read (a ``store``, see
    :mod:`pipeprobe._pathspill`).

    Attributes
    ----------
    path : DataFrame
        The timeline nodes on the path, earliest first (columns of
        :data:`pipeprobe.timeline.NODE_COLUMNS`): which batches, samples
        and threads (``lane``, ``pid``, ``tid``) set the pace.
    segments : DataFrame
        See :data:`SEGMENT_COLUMNS`; the pieces tile ``[origin_s, end_s]``.
    shares : DataFrame
        See :data:`SHARE_COLUMNS`; ``seconds`` sums to :attr:`wall_s`.
    lanes : DataFrame
        ``lane, seconds, share``: critical-path time per thread (gaps excluded).
    origin_s, end_s : float
        The run's time axis (from the timeline).
    """

    __slots__ = ("_path", "_timeline", "_ids", "_segments", "_store", "shares", "lanes", "origin_s", "end_s")

    def __init__(self, path: pd.DataFrame | None = None, segments: pd.DataFrame | None = None,
                 shares: pd.DataFrame | None = None, lanes: pd.DataFrame | None = None, origin_s: float = 0.0,
                 end_s: float = 0.0, *, timeline: Timeline | None = None, ids: np.ndarray | None = None,
                 store: Any = None) -> None:
        given = store is not None or ((path is None) != (ids is None) and segments is not None)
        if not given or shares is None or lanes is None:
            raise TypeError("CriticalPath takes path (or timeline and ids, or a store), segments, shares and lanes")
        self._path, self._timeline, self._ids, self._store = path, timeline, ids, store
        self._segments = segments
        self.shares, self.lanes = shares, lanes
        self.origin_s, self.end_s = float(origin_s), float(end_s)

    @property
    def path(self) -> pd.DataFrame:
        """See the class docstring (taken from the timeline, or the store, on first read)."""
        if self._path is None:
            if self._store is not None:
                self._path = self._store.path()
            else:
                self._path = self._timeline.node_rows(self._ids)
                self._timeline = None
        return self._path

    @property
    def segments(self) -> pd.DataFrame:
        """See the class docstring (built from the store on first read)."""
        if self._segments is None:
            self._segments = self._store.segments()
        return self._segments

    @property
    def node_count(self) -> int:
        """Nodes on the path (``len(path)``), without building it."""
        if self._path is not None:
            return len(self._path)
        return self._store.node_count if self._store is not None else len(self._ids)

    def _column(self, name: str) -> np.ndarray:
        if self._path is not None:
            return self._path[name].to_numpy()
        if self._store is not None:
            return self._store.column(name)
        return self._timeline.node_column(name)[self._ids]

    def __repr__(self) -> str:
        return f"<pipeprobe.CriticalPath: {self.node_count} nodes, {self.wall_s:.3f} s>"

    @property
    def wall_s(self) -> float:
        """Wall time the attribution covers."""
        return self.end_s - self.origin_s

    @property
    def length_s(self) -> float:
        """Length of the path itself: from the origin to the end of its last node."""
        if not self.node_count:
            return 0.0
        return float(self._column("end_s")[-1]) - self.origin_s

    @property
    def batches(self) -> list[int]:
        """Batch ids with at least one node on the path, in order."""
        b = self._column("batch_id")
        return [int(x) for x in np.unique(b[b >= 0])]

    @property
    def head_s(self) -> float:
        """Unexplained gap before the first node of the path (start-up)."""
        return float(self._column("start_s")[0]) - self.origin_s if self.node_count else 0.0

    @property
    def tail_s(self) -> float:
        """Time from the end of the last step to the end of the run (shut-down), counted as gap."""
        return self.end_s - self.origin_s - self.length_s if self.node_count else self.wall_s

    def share_of(self, label: str) -> float:
        """Share of wall time attributed to ``label`` (0 when absent)."""
        hit = self.shares.loc[self.shares["label"] == label, "share"]
        return float(hit.sum())

    @property
    def input_share(self) -> float:
        """Share of wall time on the input side of the path: loader stages and deliveries."""
        return float(self.shares.loc[self.shares["side"].isin(["input", "delivery"]), "share"].sum())

    @property
    def step_share(self) -> float:
        """Share of wall time on the step side of the path: the step and the stages after a delivery."""
        return float(self.shares.loc[self.shares["side"] == "consumer", "share"].sum())


def _walk(pred: np.ndarray, sink: int) -> np.ndarray:
    """Node ids from the first node to ``sink`` following ``pred`` back."""
    out = []
    v = sink
    p = pred.tolist()  # list indexing is several times faster than numpy scalars
    while v >= 0:
        out.append(v)
        v = p[v]
    return np.array(out[::-1], dtype=np.int64)


def critical_path(timeline: Timeline) -> CriticalPath:
    """Find the critical path of the observed run and attribute its wall time.

    Walks back from the end of the last step (the last node when no step was
    timed) along the last-arriving dependency of each node. Every second of
    ``[origin_s, end_s]`` is given one label: the stage of the node running
    on the path, ``'delivery'`` for a finished batch on its way to the
    consumer, or ``'unexplained gap'`` when nothing recorded ran (including
    the time after the last step).

    Parameters
    ----------
    timeline : Timeline
        From :func:`pipeprobe.timeline.build_timeline`.

    Returns
    -------
    CriticalPath

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe.timeline import build_timeline
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=2, decode_ms=6, step_ms=2)
    >>> cp = critical_path(build_timeline(pipeprobe.load(d)))
    >>> round(cp.wall_s, 6), round(cp.share_of("decode"), 6), round(cp.share_of("step"), 6)
    (0.016, 0.75, 0.25)

    References
    ----------
    Kelley, J. E. and Walker, M. R. (1959). Critical-path planning and
    scheduling. Proc. Eastern Joint Computer Conference, 160-173.
    """
    origin, end = timeline.origin_s, timeline.end_s
    sink = sink_node(timeline)
    ids = _walk(timeline.node_column("pred"), sink) if sink >= 0 else np.zeros(0, np.int64)
    path = timeline.node_rows(ids)  # the path's rows only: a large run's nodes frame is never built
    segments, shares, lanes = path_attribution(path, ids, origin, end)
    del path  # taken again from the timeline when read: a full epoch's path is large
    return CriticalPath(segments=segments, shares=shares, lanes=lanes, origin_s=origin, end_s=end, timeline=timeline,
                        ids=ids)


def path_attribution(path: pd.DataFrame, ids: np.ndarray, origin: float,
                     end: float) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """``segments, shares, lanes`` of :class:`CriticalPath` from the path's rows (``ids``: their node ids) and
    the time axis ``[origin, end]``; for a path joined from pieces (:mod:`pipeprobe.sliced`) as for one walked."""
    seg = _segment_arrays(path, ids, origin, end)
    names = seg.pop("names")
    keep = seg.pop("seconds") > 0
    for k in list(seg):  # a column at a time: a long path's pieces are never held twice over
        seg[k] = seg[k][keep]
    segments = segment_frame(seg, names)
    codes = pd.DataFrame({c: seg.pop(c) for c in ("label", "kind", "side", "lane")},
                         copy=False).assign(seconds=segments["seconds"])
    shares, lanes = _attribute_codes(codes, names, end - origin)
    return segments, shares, lanes


def segment_frame(seg: dict[str, np.ndarray], names: list[str]) -> pd.DataFrame:
    """:attr:`CriticalPath.segments` from the arrays of its pieces of more than no time (text as codes into ``names``)."""
    return pd.DataFrame({
        "start_s": seg["start_s"], "end_s": seg["end_s"], "seconds": seg["end_s"] - seg["start_s"],
        **{c: text_column(seg[c], names) for c in ("label", "kind", "side")},
        "node": seg["node"], "lane": text_column(seg["lane"], names),
        "batch_id": seg["batch_id"], "sample_id": seg["sample_id"],
    }, copy=False)  # fresh arrays: no second copy


def attribute(segments: pd.DataFrame, wall: float) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Critical-path time per label and per thread (:attr:`CriticalPath.shares`, ``.lanes``) from its pieces.

    Used where pieces of several paths are put side by side (the stretches of
    a windowed run, :mod:`pipeprobe.stretches`); shares are of ``wall``.
    """
    names = Names([""])
    codes = pd.DataFrame({c: names.recode(*codes_of(segments[c])) for c in ("label", "kind", "side", "lane")})
    return _attribute_codes(codes.assign(seconds=segments["seconds"].to_numpy(np.float64)), names.names, wall)


def _attribute_codes(codes: pd.DataFrame, names: list[str], wall: float) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Shares per (label, kind, side) and per lane from coded pieces (``names`` spell the codes)."""
    shares = codes.groupby(["label", "kind", "side"], sort=False)["seconds"].sum().reset_index()
    on = codes[codes["lane"].to_numpy() != names.index("")]
    return _shares_and_lanes(shares, on.groupby("lane", sort=False)["seconds"].sum().reset_index(), names, wall)


def _shares_and_lanes(shares: pd.DataFrame, lanes: pd.DataFrame, names: list[str],
                      wall: float) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Shares and lanes from the seconds per coded (label, kind, side) and per coded lane, each in the order the
    keys first appear along the path."""
    shares = _named(shares, names, ["label", "kind", "side"])
    shares = shares.sort_values(["seconds", "label"], ascending=[False, True], kind="stable").reset_index(drop=True)
    shares["share"] = shares["seconds"] / wall if wall > 0 else 0.0
    lanes = _named(lanes, names, ["lane"])
    lanes = lanes.sort_values(["seconds", "lane"], ascending=[False, True], kind="stable").reset_index(drop=True)
    lanes["share"] = lanes["seconds"] / wall if wall > 0 else 0.0
    return shares, lanes


def _named(frame: pd.DataFrame, names: list[str], columns: list[str]) -> pd.DataFrame:
    """Code columns of a small frame turned back into text, in place of the codes."""
    return frame.assign(**{c: text_column(frame[c].to_numpy(np.int64), names) for c in columns})


def _segment_arrays(path: pd.DataFrame, ids: np.ndarray, origin: float, end: float) -> dict[str, Any]:
    """The pieces tiling ``[origin, end]``, as arrays: per path node the wait before it (a gap, or the
    delivery before a delivery node) and the node itself, then the tail after the last node. Text
    columns are codes into ``names`` (see :mod:`pipeprobe._coded`)."""
    names = segment_names()
    k = len(path)
    coded = {c: names.recode(*codes_of(path[c])) if k else np.zeros(0, np.int64) for c in ("kind", "stage", "side", "lane")}
    cols = {c: path[c].to_numpy(np.float64) for c in ("ready_s", "start_s", "end_s")}
    cols |= {c: path[c].to_numpy(np.int64) for c in ("batch_id", "sample_id")}
    pieces = node_pieces(cols | coded, ids, names)
    tail = tail_piece(float(cols["end_s"][-1]) if k else origin, end, names)
    out: dict[str, Any] = {c: np.concatenate([v, tail[c]]) for c, v in pieces.items()}
    out["names"] = names.names
    return out


def segment_names() -> Names:
    """The names the pieces' text columns start from (the codes of :func:`node_pieces` and :func:`tail_piece`)."""
    return Names([GAP, DELIVERY, "gap", "delivery", ""])


def node_pieces(cols: dict[str, np.ndarray], ids: np.ndarray, names: Names) -> dict[str, np.ndarray]:
    """Per path node, the wait before it and the node itself: two rows of :data:`SEGMENT_COLUMNS` (``seconds``
    included, pieces of no time too), the text columns as codes into ``names`` (from :func:`segment_names`).

    ``cols`` holds the nodes' ``ready_s, start_s, end_s, batch_id, sample_id`` and their ``kind, stage, side,
    lane`` as codes into ``names``; ``ids`` their node ids. Each node's rows depend on that node alone, so
    the path's pieces are those of its parts, one after another (:mod:`pipeprobe._pathspill`).
    """
    k = len(ids)
    kind, lane = cols["kind"], cols["lane"]
    is_deliv = kind == names.code("delivery")

    def pairs(before: Any, at: np.ndarray) -> np.ndarray:
        """Per node ``before`` then ``at``."""
        return np.column_stack([np.broadcast_to(before, (k,)), at]).ravel() if k else np.zeros(0, np.asarray(at).dtype)

    wait_kind = np.where(is_deliv, names.code("delivery"), names.code("gap"))
    seg_start = pairs(cols["ready_s"], cols["start_s"])
    seg_end = pairs(cols["start_s"], cols["end_s"])
    return {
        "start_s": seg_start, "end_s": seg_end, "seconds": seg_end - seg_start,
        "label": pairs(np.where(is_deliv, names.code(DELIVERY), names.code(GAP)), cols["stage"]),
        "kind": pairs(wait_kind, kind),
        "side": pairs(wait_kind, cols["side"]),
        "node": pairs(ids, ids),
        "lane": pairs(np.where(is_deliv, lane, names.code("")), lane),
        "batch_id": pairs(cols["batch_id"], cols["batch_id"]),
        "sample_id": pairs(cols["sample_id"], cols["sample_id"]),
    }


def tail_piece(start: float, end: float, names: Names) -> dict[str, np.ndarray]:
    """The piece after the last node (from ``start``, the end of the last node, to the end of the run): a gap."""
    gap = names.code(GAP)
    return {"start_s": np.array([start]), "end_s": np.array([end]), "seconds": np.array([end]) - np.array([start]),
            "label": np.array([gap]), "kind": np.array([names.code("gap")]), "side": np.array([names.code("gap")]),
            "node": np.array([-1]), "lane": np.array([names.code("")]), "batch_id": np.array([-1]),
            "sample_id": np.array([-1])}


def critical_path_length(timeline: Timeline) -> float:
    """Length in seconds of the observed critical path (origin to the end of the last step).

    Parameters
    ----------
    timeline : Timeline

    Returns
    -------
    float

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe.timeline import build_timeline
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for batch in probe.watch([[0], [1]]):
    ...         with probe.step():
    ...             pass
    >>> tl = build_timeline(pipeprobe.load(d))
    >>> critical_path_length(tl) <= tl.wall_s
    True

    References
    ----------
    Kelley, J. E. and Walker, M. R. (1959). Critical-path planning and
    scheduling. Proc. Eastern Joint Computer Conference, 160-173.
    """
    sink = sink_node(timeline)
    if sink < 0:
        return 0.0
    return float(timeline.node_column("end_s")[sink]) - timeline.origin_s
