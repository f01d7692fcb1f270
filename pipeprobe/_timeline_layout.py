"""The timeline picture's pixel layout: lanes, exact rectangles and merged pixel columns, as numbers.

The numpy/pandas half of :func:`pipeprobe.plot.draw_timeline`, kept apart
from matplotlib so it can be tested and reused without drawing. Lanes and
their names come from :func:`pipeprobe.lanes.thread_lanes`, the same
rule the dependency timeline uses. Public names are re-exported by
:mod:`pipeprobe.plot`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .lanes import thread_lanes
from .load import Run

__all__ = ["TimelineLane", "TimelineLayout", "layout_timeline"]


@dataclass(frozen=True)
class TimelineLane:
    """One lane of the timeline: a thread that recorded spans, or the threads of one worker slot.

    Attributes
    ----------
    label : str
        What the lane shows, e.g. ``"worker 1 (pid 4113)"``, or ``"worker 1
        (pids 4113, 4120, 4127)"`` when a loader started a new worker
        process in that slot each epoch.
    rank, pid, tid : int
        Which thread (the first one, for a slot of several processes).
    is_consumer : bool
        True for the thread that waited for batches and ran steps.
    spans : int
        Spans of this lane inside the window (``wait`` spans excluded: they
        are drawn as the stall band).
    exact : int
        Of those, drawn as their own rectangle (at least one pixel wide).
    merged : int
        Of those, folded into per-pixel-column stage occupancy.
    """

    label: str
    rank: int
    pid: int
    tid: int
    is_consumer: bool
    spans: int
    exact: int
    merged: int
    pids: tuple[int, ...] = ()


@dataclass(frozen=True)
class TimelineLayout:
    """What :func:`draw_timeline` draws, as numbers (no matplotlib objects).

    Attributes
    ----------
    window_s : (float, float)
        Start and end of the window, seconds from the run start.
    pixel_s : float
        Seconds per pixel column; spans shorter than this are merged.
    lanes : list of TimelineLane
        Top to bottom.
    stages : list of str
        Stage of each stage code used below.
    bars : DataFrame
        Exact rectangles: ``lane, stage, start_s, end_s`` (clipped to the window).
    columns : DataFrame
        Merged spans: ``lane, column, stage, share``, where ``share`` is the
        fraction of the column's time the lane spent in that stage (the
        shares of one column add up to at most 1).
    stalls : DataFrame
        Stall intervals (consumer waits) at least one column wide:
        ``lane, start_s, end_s`` (clipped to the window).
    stall_columns : DataFrame
        Shorter stall intervals, merged: ``lane, column, share`` (share of
        the column's time the consumer waited).
    threads : DataFrame
        Which lane each thread is drawn in: ``rank, pid, tid, lane``.
    """

    window_s: tuple[float, float]
    pixel_s: float
    lanes: list[TimelineLane]
    stages: list[str]
    bars: pd.DataFrame
    columns: pd.DataFrame
    stalls: pd.DataFrame
    stall_columns: pd.DataFrame
    threads: pd.DataFrame | None = None

    @property
    def stall_s(self) -> float:
        """Total stall time shaded in the window, seconds."""
        wide = float((self.stalls["end_s"] - self.stalls["start_s"]).sum())
        return wide + float(self.stall_columns["share"].sum()) * self.pixel_s


def _slot_lanes(threads: pd.DataFrame, lane: np.ndarray) -> tuple[pd.DataFrame, np.ndarray, pd.DataFrame]:
    """Merge threads that share a lane name (the worker processes of one slot, one per epoch) into one lane.

    Returns the lanes (``rank, pid, tid, consumer, name, pids``, in display
    order), each span's lane, and each thread's lane (``rank, pid, tid, lane``).
    """
    code, _ = pd.factorize(threads["name"])  # names in display order of their first thread
    per_thread = threads.assign(lane=code.astype(np.int64))
    g = per_thread.groupby("lane", sort=True)
    lanes = g.agg(rank=("rank", "first"), pid=("pid", "first"), tid=("tid", "first"), consumer=("consumer", "any"),
                  name=("name", "first"))
    lanes["pids"] = g["pid"].agg(lambda p: tuple(dict.fromkeys(int(x) for x in p)))
    return lanes.reset_index(drop=True), code.astype(np.int64)[lane], per_thread[["rank", "pid", "tid", "lane"]]


def _lane_label(name: str, pids: tuple[int, ...]) -> str:
    if len(pids) == 1:
        return f"{name} (pid {pids[0]})"
    shown = ", ".join(str(p) for p in pids[:3])
    return f"{name} (pids {shown}{', ...' if len(pids) > 3 else ''})"


def _column_time(lane: np.ndarray, code: np.ndarray, s: np.ndarray, e: np.ndarray, lo: float, pixel_s: float,
                 n_cols: int, n_lanes: int, n_codes: int) -> np.ndarray:
    """Seconds each (lane, column, code) spends in intervals shorter than a column.

    An interval crossing a column edge is split between the two columns it
    touches, so the seconds add up exactly to the intervals' total.
    """
    c0 = np.clip(np.floor((s - lo) / pixel_s).astype(np.int64), 0, n_cols - 1)
    c1 = np.clip(np.floor((e - lo) / pixel_s).astype(np.int64), 0, n_cols - 1)
    edge = lo + (c0 + 1) * pixel_s
    split = c1 > c0
    first = np.where(split, np.minimum(e, edge) - s, e - s)
    second = np.where(split, e - edge, 0.0)
    size = n_lanes * n_cols * n_codes
    out = np.bincount((lane * n_cols + c0) * n_codes + code, weights=first, minlength=size)[:size].astype(np.float64)
    out += np.bincount((lane * n_cols + c1) * n_codes + code, weights=second, minlength=size)[:size]
    return out.reshape(n_lanes, n_cols, n_codes)


def layout_timeline(
    run: Run,
    window_s: tuple[float, float] | None = None,
    resolution_px: int = 1200,
) -> TimelineLayout:
    """Compute the timeline's lanes, rectangles, merged columns and stall band.

    Spans are grouped into lanes by thread ``(rank, pid, tid)``, named and
    ordered by :func:`pipeprobe.lanes.thread_lanes` (the dependency
    timeline's lanes): per rank, the consumer thread (the one that waited
    for batches and ran steps) ``main`` first, then other threads of the
    training process, then loader workers ``worker 1, 2, ...`` in the order
    they first started work.
    A span at least one pixel column wide (``pixel_s = window / resolution_px``)
    becomes its own rectangle. Shorter spans cannot be told apart at this
    zoom, so their time is added, per lane and stage, to the pixel columns
    they cover (a span crossing a column edge is split between the two);
    each column then shows one stacked bar whose stage heights are the
    shares of that column's time. The number of rectangles drawn is thus
    bounded by lanes x columns x (1 + stages), whatever the span count.

    Parameters
    ----------
    run : Run
        A loaded run.
    window_s : (float, float), optional
        Time window in seconds from the run start; the whole run by default.
    resolution_px : int
        Pixel columns across the window (the drawing width in pixels).

    Returns
    -------
    TimelineLayout

    Raises
    ------
    ValueError
        The window is empty or reversed, or ``resolution_px < 1``.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False) as probe:
    ...     for batch in probe.watch([[0], [1]]):
    ...         with probe.step():
    ...             pass
    >>> from pipeprobe.plot import layout_timeline
    >>> lay = layout_timeline(pipeprobe.load(d))
    >>> [lane.is_consumer for lane in lay.lanes]
    [True]
    """
    if resolution_px < 1:
        raise ValueError(f"resolution_px must be >= 1, got {resolution_px}")
    sp = run.spans
    if window_s is None:
        hi = max(run.wall_s, float(sp["end_s"].max()) if len(sp) else 0.0)
        lo = min(0.0, float(sp["start_s"].min()) if len(sp) else 0.0)
        if hi <= lo:
            hi = lo + 1e-3
    else:
        lo, hi = float(window_s[0]), float(window_s[1])
        if not hi > lo:
            raise ValueError(f"window_s must be (start, end) with end > start, got {window_s!r}")
    pixel_s = (hi - lo) / resolution_px

    threads, lane, per_thread = _slot_lanes(*thread_lanes(sp))
    stage_arr = sp["stage"].astype(str).to_numpy() if len(sp) else np.zeros(0, object)
    is_wait = stage_arr == "wait"

    stages = run.stages + ["step"]
    start = sp["start_s"].to_numpy(np.float64) if len(sp) else np.zeros(0)
    end = sp["end_s"].to_numpy(np.float64) if len(sp) else np.zeros(0)
    inside = (end >= lo) & (start <= hi)
    s_clip = np.clip(start, lo, hi)
    e_clip = np.clip(end, lo, hi)

    # stall band: consumer waits; those narrower than a column become per-column shares
    w = inside & is_wait & (e_clip > s_clip)
    w_wide = w & ((e_clip - s_clip) >= pixel_s)
    w_narrow = w & ~w_wide
    stalls = pd.DataFrame({"lane": lane[w_wide], "start_s": s_clip[w_wide], "end_s": e_clip[w_wide]})
    stalls = stalls.sort_values(["lane", "start_s"], kind="stable").reset_index(drop=True)
    n_lanes_all = len(threads)
    socc = _column_time(lane[w_narrow], np.zeros(int(w_narrow.sum()), np.int64), s_clip[w_narrow], e_clip[w_narrow],
                        lo, pixel_s, resolution_px, n_lanes_all, 1)[:, :, 0] / pixel_s
    sl, sc = np.nonzero(socc > 0)
    stall_columns = pd.DataFrame({"lane": sl, "column": sc, "share": np.minimum(socc[sl, sc], 1.0)})

    d = inside & ~is_wait
    # every non-wait stage is in run.stages or is "step", so no code is -1
    st = pd.Categorical(stage_arr[d], categories=stages).codes.astype(np.int64)
    ln, s0, e0 = lane[d], s_clip[d], e_clip[d]
    wide = (e0 - s0) >= pixel_s
    bars = pd.DataFrame({"lane": ln[wide], "stage": st[wide], "start_s": s0[wide], "end_s": e0[wide]})
    # long spans first within a lane so nested, shorter ones are drawn on top
    bars = bars.assign(_d=bars["end_s"] - bars["start_s"]).sort_values(
        ["lane", "start_s", "_d"], ascending=[True, True, False], kind="stable"
    ).drop(columns="_d").reset_index(drop=True)

    narrow = ~wide
    n_lanes, n_st = len(threads), len(stages)
    occ = _column_time(ln[narrow], st[narrow], s0[narrow], e0[narrow], lo, pixel_s, resolution_px, n_lanes, n_st)
    occ /= pixel_s
    # nested spans can fill a column more than once; scale such columns down to 1
    occ /= np.maximum(occ.sum(axis=2, keepdims=True), 1.0)
    li, ci, si = np.nonzero(occ > 0)
    columns = pd.DataFrame({"lane": li, "column": ci, "stage": si, "share": occ[li, ci, si]})

    n_in = np.bincount(ln, minlength=n_lanes)
    n_exact = np.bincount(ln[wide], minlength=n_lanes)
    lanes = [
        TimelineLane(
            label=_lane_label(name, pids), rank=int(r), pid=int(p), tid=int(t), is_consumer=bool(c),
            spans=int(n_in[i]), exact=int(n_exact[i]), merged=int(n_in[i] - n_exact[i]), pids=pids,
        )
        for i, (r, p, t, c, name, pids) in enumerate(threads.itertuples(index=False))
    ]
    return TimelineLayout(
        window_s=(lo, hi), pixel_s=pixel_s, lanes=lanes, stages=stages,
        bars=bars, columns=columns, stalls=stalls, stall_columns=stall_columns, threads=per_thread,
    )
