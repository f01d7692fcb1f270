"""Stretches: the recorded windows of a long job, each analysed on its own.

A run recorded with a window (``Probe(window=...)``, ``pipeprobe run
--window``) holds only some batches. Each maximal run of consecutive
recorded batch ids is a *stretch*; between two stretches nothing was
recorded, so no stall, dependency or critical path may cross that gap.

A stretch covers the training loop's own time: from asking for its first
batch to the end of its last step (or its last span). Work done for its
batches before that, a loader's prefetch during the unrecorded time, keeps
its spans (stage statistics see it whole) but is cut at the stretch start
for the timeline and critical path: what the loop did not wait for is not
on its path.

The steps: find the stretches and their extent on the run's axis
(:func:`stretch_table`); cut the unrecorded gaps out, laying the stretches
end to end on one axis from 0 (:func:`condense`; the resource samples
taken inside a stretch come along, those of the gaps stay in the run
folder); then build each stretch's timeline and critical path by itself
and put them side by side (:func:`timeline_and_path`). Wall time, stall
time, critical-path time per stage and per thread are then sums over the
stretches, and their shares are taken of the summed wall time.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd
from pandas.api.types import union_categoricals

from ._text import printable
from .critical import CriticalPath, attribute, critical_path
from .load import Run
from .timeline import Timeline, build_timeline

__all__ = ["STRETCH_COLUMNS", "stretch_table", "condense", "timeline_and_path", "is_windowed", "epoch_start_recorded"]

#: Columns of :func:`stretch_table`, one row per stretch.
STRETCH_COLUMNS = {
    "stretch": "stretch number, 0 for the first",
    "first_batch": "its first batch id",
    "last_batch": "its last batch id",
    "batches": "batches in it",
    "start_s": "start on the run's time axis (the loop asked for its first batch)",
    "end_s": "end on the run's time axis (the last span of its batches)",
    "wall_s": "end_s - start_s",
    "offset_s": "where it starts on the condensed axis (the walls of the stretches before it)",
}

_TIME_COLUMNS = {"spans": ("start_s", "end_s"), "batches": ("wait_start_s", "ready_s", "step_start_s", "step_end_s"),
                 "samples": ("ready_s",), "resources": ("t_s",)}


def _on_ns(t_s: np.ndarray) -> np.ndarray:
    """Moved times back on the nanosecond grid the clock has (so moving adds no sub-ns pieces)."""
    return np.round(t_s * 1e9) / 1e9


def is_windowed(run: Run) -> bool:
    """True when the run was recorded with a window (its header has a ``window`` field)."""
    return isinstance(run.header.get("window"), dict)


def _stretch_of_batches(firsts: np.ndarray, lasts: np.ndarray, batch: np.ndarray) -> np.ndarray:
    """Stretch number of each batch id (-1: none)."""
    k = np.searchsorted(firsts, batch, side="right") - 1
    ok = (k >= 0) & (batch >= 0)
    ok[ok] &= batch[ok] <= lasts[k[ok]]
    return np.where(ok, k, -1)


def epoch_start_recorded(batches: pd.DataFrame) -> np.ndarray:
    """Per row of a batches table: True unless its epoch may have begun before the recording did.

    In a windowed run (a ``stretch`` column) an epoch's first recorded
    batch is its first batch only when it is batch 0 or the batch before
    it was recorded too (in another epoch); otherwise the window opened
    mid-epoch and none of its batches is a warm-up batch.

    Examples
    --------
    >>> import pandas as pd
    >>> b = pd.DataFrame({"rank": [0, 0, 0, 0], "epoch": [0, 0, 1, 1], "batch_id": [5, 6, 7, 8], "stretch": 0})
    >>> epoch_start_recorded(b).tolist()
    [False, False, True, True]
    """
    if "stretch" not in batches or batches.empty:
        return np.ones(len(batches), bool)
    rank = batches["rank"].to_numpy(np.int64)
    first = batches.groupby(["rank", "epoch"], sort=False)["batch_id"].transform("min").to_numpy(np.int64)
    recorded = set(zip(rank.tolist(), batches["batch_id"].to_numpy(np.int64).tolist()))
    return np.array([f == 0 or (r, f - 1) in recorded for r, f in zip(rank.tolist(), first.tolist())], bool)


def stretch_table(run: Run) -> pd.DataFrame:
    """The stretches of a run: maximal runs of consecutive recorded batch ids, with their extent.

    Parameters
    ----------
    run : Run
        From :func:`pipeprobe.load`.

    Returns
    -------
    DataFrame
        See :data:`STRETCH_COLUMNS`; empty when no batch was delivered.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0, window="1:3,5:6") as probe:
    ...     for batch in probe.watch(range(8)):
    ...         with probe.step():
    ...             pass
    >>> stretch_table(pipeprobe.load(d))[["first_batch", "last_batch", "batches"]].values.tolist()
    [[1, 2, 2], [5, 5, 1]]

    References
    ----------
    Denning, P. J. and Buzen, J. P. (1978). The operational analysis of
    queueing network models. ACM Computing Surveys 10(3), 225-261 (figures
    are taken over an observation period; each stretch is one).
    """
    ids = np.unique(run.batches["batch_id"].to_numpy(np.int64))
    ids = ids[ids >= 0]
    if not len(ids):
        return pd.DataFrame({c: pd.Series(dtype=float) for c in STRETCH_COLUMNS})
    cut = np.flatnonzero(np.diff(ids) > 1)
    firsts, lasts = ids[np.r_[0, cut + 1]], ids[np.r_[cut, len(ids) - 1]]
    b, sp = run.batches, run.spans
    kb = _stretch_of_batches(firsts, lasts, b["batch_id"].to_numpy(np.int64))
    ks = _stretch_of_batches(firsts, lasts, sp["batch_id"].to_numpy(np.int64))
    starts = pd.Series(b["wait_start_s"].to_numpy(np.float64), index=kb)
    ends = pd.concat([pd.Series(np.fmax(b["ready_s"], b["step_end_s"]).to_numpy(np.float64), index=kb),
                      pd.Series(sp["end_s"].to_numpy(np.float64)[ks >= 0], index=ks[ks >= 0])])
    start = starts.groupby(level=0).min().reindex(range(len(firsts))).to_numpy(np.float64)
    end = ends.groupby(level=0).max().reindex(range(len(firsts))).to_numpy(np.float64)
    wall = end - start
    return pd.DataFrame({
        "stretch": np.arange(len(firsts)), "first_batch": firsts, "last_batch": lasts,
        "batches": np.bincount(kb[kb >= 0], minlength=len(firsts)), "start_s": start, "end_s": end,
        "wall_s": wall, "offset_s": np.r_[0.0, np.cumsum(wall)[:-1]],
    })


def _stretch_of_times(table: pd.DataFrame, t0: np.ndarray, t1: np.ndarray) -> np.ndarray:
    """Stretch holding each interval ``[t0, t1]`` whole (-1: none, it lies in a gap or across one)."""
    start = table["start_s"].to_numpy(np.float64)
    end = table["end_s"].to_numpy(np.float64)
    k = np.searchsorted(start, t0, side="right") - 1
    ok = k >= 0
    ok[ok] &= t1[ok] <= end[k[ok]]
    return np.where(ok, k, -1)


def _stretch_of_rows(name: str, frame: pd.DataFrame, table: pd.DataFrame) -> np.ndarray:
    """Stretch of each row of a run table: by its batch id, else (spans without one, resources) by its time."""
    firsts = table["first_batch"].to_numpy(np.int64)
    lasts = table["last_batch"].to_numpy(np.int64)
    if name == "resources":
        t = frame["t_s"].to_numpy(np.float64)
        return _stretch_of_times(table, t, t)
    k = _stretch_of_batches(firsts, lasts, frame["batch_id"].to_numpy(np.int64))
    if name == "spans":
        loose = k < 0  # linked to no recorded batch: kept when it lies inside a stretch
        k[loose] = _stretch_of_times(table, frame["start_s"].to_numpy(np.float64)[loose],
                                     frame["end_s"].to_numpy(np.float64)[loose])
    return k


def _shifted(name: str, frame: pd.DataFrame, k: np.ndarray, shift: np.ndarray) -> pd.DataFrame:
    """The rows of ``frame`` in a stretch, their times moved by their stretch's ``shift``, with a ``stretch`` column."""
    keep = k >= 0
    out = frame[keep].copy()
    ks = k[keep]
    for col in _TIME_COLUMNS[name]:
        if col in out:
            out[col] = _on_ns(out[col].to_numpy(np.float64) + shift[ks])
    out["stretch"] = ks
    return out.reset_index(drop=True)


def condense(run: Run) -> Run:
    """The run with its unrecorded gaps cut out: its stretches end to end on one axis from 0.

    A run recorded without a window, or already condensed, is returned as
    it is. Spans, batches, sample rows and resource samples of each
    stretch keep their order and spacing and gain a ``stretch`` column;
    spans linked to no recorded batch are kept only inside a stretch. The
    header's ``window`` field gains ``stretches``, the rows of
    :func:`stretch_table` (on the original axis).

    Parameters
    ----------
    run : Run

    Returns
    -------
    Run

    Examples
    --------
    >>> import pipeprobe, tempfile, time
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0, window="0:1,3:4") as probe:
    ...     for batch in probe.watch(range(4)):
    ...         with probe.step():
    ...             time.sleep(0.01)
    >>> run = pipeprobe.load(d)
    >>> run.wall_s > 0.035, condense(run).wall_s < 0.03
    (True, True)

    References
    ----------
    Denning, P. J. and Buzen, J. P. (1978). The operational analysis of
    queueing network models (each stretch is an observation period of its own).
    """
    if not is_windowed(run) or "stretch" in run.batches:  # load() never makes a stretch column
        return run
    table = stretch_table(run)
    shift = (table["offset_s"] - table["start_s"]).to_numpy(np.float64)
    parts = {name: _shifted(name, getattr(run, name), _stretch_of_rows(name, getattr(run, name), table), shift)
             for name in _TIME_COLUMNS}
    wall = float(table["wall_s"].sum())
    window = {**_checked_window(run.header["window"]), "stretches": table.to_dict("records")}
    header = {**run.header, "window": window, "end_mono_ns": run.t0_ns + int(round(wall * 1e9))}
    return replace(run, header=header, **parts)


def _checked_window(raw: dict[str, Any]) -> dict[str, Any]:
    """The header's window description with only fields of the expected types (a header is input, not code)."""
    spec, every, period = raw.get("spec"), raw.get("every_batches"), raw.get("period_s")
    ok_num = (lambda v, t: isinstance(v, t) and not isinstance(v, bool) and 0 <= v < 2**31)  # noqa: E731
    return {"spec": spec[:200] if isinstance(spec, str) else "?",
            "every_batches": int(every) if ok_num(every, int) else 0,
            "period_s": float(period) if ok_num(period, (int, float)) else 0.0}


def _part(run: Run, k: int, offset_s: float, wall_s: float) -> Run:
    """Stretch ``k`` of a condensed run as a run of its own, on an axis from 0; spans cut at its start."""
    parts = {}
    for name, cols in _TIME_COLUMNS.items():
        frame = getattr(run, name)
        rows = frame[frame["stretch"].to_numpy() == k].copy()
        for col in cols:
            rows[col] = _on_ns(rows[col].to_numpy(np.float64) - offset_s)
            if name == "spans":  # work done ahead of the stretch (a prefetch) starts with it
                rows[col] = np.maximum(rows[col].to_numpy(np.float64), 0.0)
        parts[name] = rows.reset_index(drop=True)
    return replace(run, header={**run.header, "end_mono_ns": run.t0_ns + int(round(wall_s * 1e9))}, **parts)


def _moved(frame: pd.DataFrame, offset_s: float, base: int, times: tuple[str, ...], ids: tuple[str, ...]) -> pd.DataFrame:
    out = frame.copy()
    for col in times:
        out[col] = _on_ns(out[col].to_numpy(np.float64) + offset_s)
    for col in ids:
        v = out[col].to_numpy(np.int64)
        out[col] = np.where(v >= 0, v + base, v)
    return out


def _concat(frames: list[pd.DataFrame]) -> pd.DataFrame:
    """Rows of several frames, categorical columns kept categorical (categories in order of appearance)."""
    out = pd.concat(frames, ignore_index=True)
    for col in frames[0].columns:
        if isinstance(frames[0][col].dtype, pd.CategoricalDtype):
            out[col] = union_categoricals([f[col] for f in frames], ignore_order=True)
    return out


def timeline_and_path(run: Run) -> tuple[Timeline, CriticalPath]:
    """The timeline and critical path of a run, one stretch at a time for a condensed windowed run.

    Each stretch's timeline is built from its own spans only (no edge
    crosses a gap) and its critical path walked back from its own last
    step; the timelines are then put side by side (node ids renumbered,
    times on the condensed axis) and the critical paths one after the
    other, so each stretch's pieces tile its own wall time and the shares
    are of the summed wall time. A run recorded without a window is
    analysed as usual.

    Parameters
    ----------
    run : Run
        A run from :func:`condense` (or any run).

    Returns
    -------
    (Timeline, CriticalPath)

    Examples
    --------
    >>> import pipeprobe, tempfile, time
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0, window="0:1,3:4") as probe:
    ...     for batch in probe.watch(range(4)):
    ...         with probe.step():
    ...             time.sleep(0.01)
    >>> tl, cp = timeline_and_path(condense(pipeprobe.load(d)))
    >>> bool(abs(cp.shares["seconds"].sum() - tl.wall_s) < 1e-9), cp.share_of("unexplained gap") < 0.2
    (True, True)

    References
    ----------
    Kelley, J. E. and Walker, M. R. (1959). Critical-path planning and
    scheduling (the critical path method, applied per stretch).
    """
    stretches = run.header["window"].get("stretches") if is_windowed(run) and "stretch" in run.batches else None
    if not stretches:
        timeline = build_timeline(run)
        return timeline, critical_path(timeline)
    tls, cps = [], []
    of_stretch = run.spans["stretch"].to_numpy()
    for row in stretches:
        k = int(row["stretch"])
        tl = build_timeline(_part(run, k, float(row["offset_s"]), float(row["wall_s"])))
        rows = np.flatnonzero(of_stretch == k)  # the part's span rows in the condensed run
        tl.nodes["span"] = np.where(tl.nodes["span"] >= 0, rows[np.maximum(tl.nodes["span"], 0)], -1)
        tls.append(tl)
        cps.append(critical_path(tl))
    return _side_by_side(tls, cps, [float(r["offset_s"]) for r in stretches])


def _side_by_side(tls: list[Timeline], cps: list[CriticalPath], offsets: list[float]) -> tuple[Timeline, CriticalPath]:
    """One timeline and one critical path from those of the stretches, on the condensed axis."""
    bases = np.r_[0, np.cumsum([len(t.nodes) for t in tls])[:-1]].tolist()
    node_times, node_ids = ("start_s", "end_s", "ready_s"), ("node", "pred")
    nodes = _concat([_moved(t.nodes, o, b, node_times, node_ids) for t, o, b in zip(tls, offsets, bases)])
    edges = _concat([_moved(t.edges, 0.0, b, (), ("src", "dst")) for t, b in zip(tls, bases)])
    end = offsets[-1] + tls[-1].end_s
    timeline = Timeline(nodes=nodes, edges=edges, origin_s=0.0, end_s=end)
    path = _concat([_moved(c.path, o, b, node_times, node_ids) for c, o, b in zip(cps, offsets, bases)])
    segments = _concat([_moved(c.segments, o, b, ("start_s", "end_s"), ("node",)) for c, o, b in zip(cps, offsets, bases)])
    shares, lanes = attribute(segments, end)
    return timeline, CriticalPath(path=path, segments=segments, shares=shares, lanes=lanes, origin_s=0.0, end_s=end)


def window_words(run: Run) -> list[str]:
    """Sentences for the report on a windowed run: which batches were recorded, the duty cycle, the stretches.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0, window="1:3") as probe:
    ...     for batch in probe.watch(range(4)):
    ...         pass
    >>> window_words(condense(pipeprobe.load(d)))[0]
    'Window 1:3 (fixed batch ranges): 2 of 4 batches recorded, in 1 stretch: batches 1-2.'
    """
    if not is_windowed(run):
        return []
    rows = run.header["window"].get("stretches") if "stretch" in run.batches else None
    if not rows:
        return [f"Window {printable(str(run.header['window'].get('spec', '?'))[:200])}: no batch was recorded."]
    window = run.header["window"]
    shown = ", ".join(f"{r['first_batch']}-{r['last_batch']}" if r["last_batch"] > r["first_batch"]
                      else f"{r['first_batch']}" for r in rows[:8])
    more = f" and {len(rows) - 8} more" if len(rows) > 8 else ""
    cycle = (f"{window['every_batches']} batches every {window['period_s']:g} s"
             if window.get("every_batches") else "fixed batch ranges")
    of = f" of {run.header['batches']}" if run.header.get("batches") is not None else ""
    got = sum(int(r["batches"]) for r in rows)
    noun = "batch" if not of and got == 1 else "batches"
    words = [f"Window {printable(window['spec'])} ({cycle}): {got}{of} {noun} recorded, in {len(rows)} "
             f"stretch{'es' if len(rows) != 1 else ''}: batches {shown}{more}."]
    if len(rows) > 1:
        words.append("Stalls, the critical path and shares are worked out per stretch and summed; the time "
                     "between stretches, when nothing was recorded, is left out of every figure.")
    return words
