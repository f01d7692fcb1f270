"""Timeline pictures: thread lanes, the resource strip and the overview of both."""

from __future__ import annotations

from typing import Any, Sequence

import matplotlib as mpl
import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.collections import LineCollection, PolyCollection
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from .._timeline_layout import TimelineLayout, layout_timeline
from ..load import Run
from ._style import (
    _BAND_HALF,
    _BAR_HALF,
    PALETTE,
    PATH_COLOUR,
    STALL_COLOUR,
    STEP_COLOUR,
    _analysis_axis,
    _axes_width_px,
    _fmt_s,
    _new_axes,
    _path_nodes,
    _process_names,
    _rect_verts,
    _style,
    stage_colours,
)


def draw_timeline(
    run: Run,
    ax: Axes | None = None,
    window_s: tuple[float, float] | None = None,
    path: Any = None,
    resolution_px: int | None = None,
    legend: bool = True,
) -> Axes:
    """Draw one lane per thread, spans coloured by stage, stalls shaded.

    The consumer lane (the thread that waited for batches and ran the
    steps) comes first; its stall intervals, when the training loop waited
    for input, are a pale rose band behind the lane. Each loader worker
    thread gets a lane below. The critical path, when given, is a black
    line through the middle of the spans on it, with thin black links
    where it moves from one lane to another.

    Large runs stay quick: spans narrower than one pixel column are not
    drawn one by one but merged, with numpy, into per-column stage shares
    (see :func:`layout_timeline`); stalls narrower than a column likewise
    shade their column in proportion to the time waited, so the shaded
    area stays equal to the stall time at any zoom. Each lane is one
    :class:`~matplotlib.collections.PolyCollection` built from a vertex
    array, so a 1,000,000-span run draws a few thousand rectangles.

    Parameters
    ----------
    run : Run
        A loaded run. A run recorded with a window (``Probe(window=...)``)
        is drawn with its stretches end to end, the unrecorded gaps cut out
        (:func:`pipeprobe.stretches.condense`): the axis of the analysis
        and of its critical path.
    ax : Axes, optional
        Where to draw; a new figure (not registered with pyplot) otherwise.
    window_s : (float, float), optional
        Zoom to this window, seconds from the run start.
    path : True, CriticalPath or DataFrame, optional
        The critical path to draw: ``True`` computes it
        (:func:`pipeprobe.critical.critical_path`); a
        :class:`~pipeprobe.critical.CriticalPath` or a DataFrame of its
        nodes (columns ``start_s, end_s, pid, tid``, and ``rank`` for
        multi-rank runs, earliest first) is drawn as given.
    resolution_px : int, optional
        Pixel columns for merging; the axes width in pixels by default.
    legend : bool
        Draw the stage legend under the lanes.

    Returns
    -------
    Axes

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False) as probe:
    ...     for batch in probe.watch([[0], [1]]):
    ...         with probe.step():
    ...             pass
    >>> ax = draw_timeline(pipeprobe.load(d))
    >>> ax.get_xlabel()
    'time since run start (s)'
    """
    run, xlabel = _analysis_axis(run)  # a windowed run: its stretches end to end, as the analysis and path see it
    lanes_guess = max(1, len(run.processes)) if len(run.processes) else 1
    ax = _new_axes(ax, (11.0, max(2.6, 1.2 + 0.45 * lanes_guess)))
    px = resolution_px if resolution_px is not None else _axes_width_px(ax)
    lay = layout_timeline(run, window_s=window_s, resolution_px=px)
    colours = stage_colours(lay.stages)
    stage_rgba = np.array([mpl.colors.to_rgba(colours[s]) for s in lay.stages]) if lay.stages else np.zeros((0, 4))
    _draw_stall_band(ax, lay)
    _draw_spans(ax, lay, stage_rgba)
    with_path = path is not None and path is not False
    if with_path:
        _draw_path(ax, lay, _path_nodes(run, path))
    _label_lanes(ax, lay, xlabel)
    _style(ax)
    if legend and lay.lanes:
        _draw_legend(ax, lay, colours, with_path)
    return ax


def _draw_stall_band(ax: Axes, lay: TimelineLayout) -> None:
    """The consumer's stall band: wide waits as rectangles, merged ones as columns shaded by their share."""
    lo = lay.window_s[0]
    st = lay.stalls
    sc = lay.stall_columns
    stall_rgb = np.array(mpl.colors.to_rgb(STALL_COLOUR))
    for i in sorted(set(st["lane"].tolist()) | set(sc["lane"].tolist())):
        part = st[st["lane"] == i]
        y = np.full(len(part), float(i))
        verts = _rect_verts(part["start_s"].to_numpy(), part["end_s"].to_numpy(), y - _BAND_HALF, y + _BAND_HALF)
        fills = np.tile(np.append(stall_rgb, 1.0), (len(part), 1))
        cpart = sc[sc["lane"] == i]
        if len(cpart):
            # merged waits: the column's colour runs from white (no stall) to the stall colour (all stall)
            x0 = lo + cpart["column"].to_numpy() * lay.pixel_s
            yc = np.full(len(cpart), float(i))
            verts = np.concatenate([verts, _rect_verts(x0, x0 + lay.pixel_s, yc - _BAND_HALF, yc + _BAND_HALF)])
            share = cpart["share"].to_numpy()[:, None]
            mix = 1.0 - share * (1.0 - stall_rgb[None, :])
            fills = np.concatenate([fills, np.column_stack([mix, np.ones(len(cpart))])])
        coll = PolyCollection(verts, facecolors=fills, edgecolors="none", linewidths=0, zorder=1)
        coll.set_snap(False)  # keep sub-pixel edges, so the shaded area matches the stall time
        coll.set_gid(f"pipeprobe:stall:{i}")
        ax.add_collection(coll, autolim=False)


def _draw_spans(ax: Axes, lay: TimelineLayout, stage_rgba: np.ndarray) -> None:
    """Per lane, one collection of exact rectangles and one of stacked per-column stage shares."""
    lo = lay.window_s[0]
    bars = lay.bars
    cols = lay.columns
    if len(cols):
        cum = cols.groupby(["lane", "column"], sort=False)["share"].cumsum().to_numpy() - cols["share"].to_numpy()
    for i in range(len(lay.lanes)):
        b = bars[bars["lane"] == i]
        if len(b):
            y = np.full(len(b), float(i))
            coll = PolyCollection(
                _rect_verts(b["start_s"].to_numpy(), b["end_s"].to_numpy(), y - _BAR_HALF, y + _BAR_HALF),
                facecolors=stage_rgba[b["stage"].to_numpy()], edgecolors="none", linewidths=0, zorder=2,
            )
            coll.set_gid(f"pipeprobe:bars:{i}")
            ax.add_collection(coll, autolim=False)
        sel = (cols["lane"] == i).to_numpy() if len(cols) else np.zeros(0, bool)
        if sel.any():
            c = cols[sel]
            x0 = lo + c["column"].to_numpy() * lay.pixel_s
            bottom = i + _BAR_HALF - cum[sel] * 2 * _BAR_HALF
            top = bottom - c["share"].to_numpy() * 2 * _BAR_HALF
            coll = PolyCollection(
                _rect_verts(x0, x0 + lay.pixel_s, top, bottom),
                facecolors=stage_rgba[c["stage"].to_numpy()], edgecolors="none", linewidths=0, zorder=2,
            )
            coll.set_gid(f"pipeprobe:columns:{i}")
            ax.add_collection(coll, autolim=False)


def _label_lanes(ax: Axes, lay: TimelineLayout, xlabel: str) -> None:
    """Window, lane labels and separators, the axis label and the title with the span counts."""
    lo, hi = lay.window_s
    n = len(lay.lanes)
    ax.set_xlim(lo, hi)
    ax.set_ylim(max(n, 1) - 0.5, -0.5)  # first lane on top
    if not n:
        ax.text(0.5, 0.5, "no spans recorded", transform=ax.transAxes, ha="center", fontsize=9)
    ax.set_yticks(range(n))
    ax.set_yticklabels([lane.label for lane in lay.lanes], fontsize=8)
    ax.tick_params(axis="y", length=0)
    for i in range(n - 1):
        ax.axhline(i + 0.5, color="#BBBBBB", linewidth=0.5, zorder=0)
    ax.set_xlabel(xlabel)
    shown = sum(lane.spans for lane in lay.lanes)
    merged = sum(lane.merged for lane in lay.lanes)
    note = f"{shown:,} spans in view"
    if merged:
        note += f"; {merged:,} shorter than a pixel ({_fmt_s(lay.pixel_s)}) shown as stage shares per column"
    ax.set_title(f"Pipeline timeline, {_fmt_s(hi - lo)} window   ·   {note}", loc="left", fontsize=9)


def _draw_legend(ax: Axes, lay: TimelineLayout, colours: dict[str, str], with_path: bool) -> None:
    used = set(lay.bars["stage"].tolist()) | set(lay.columns["stage"].tolist())
    handles = [Patch(facecolor=colours[s], label=s) for k, s in enumerate(lay.stages) if k in used]
    if len(lay.stalls) or len(lay.stall_columns):
        handles.append(Patch(facecolor=STALL_COLOUR, label="stall (consumer waits for input)"))
    if with_path:
        handles.append(mpl.lines.Line2D([], [], color=PATH_COLOUR, linewidth=2, label="critical path"))
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.005, 1.0), frameon=False, fontsize=8,
              handlelength=1.2, title="stage", title_fontsize=8, alignment="left")


def _draw_path(ax: Axes, lay: TimelineLayout, nodes: pd.DataFrame) -> None:
    """Thick line through each path node at its lane's middle; thin links where the path changes lane."""
    lo, hi = lay.window_s
    if nodes.empty or not lay.lanes:
        return
    th = lay.threads if lay.threads is not None else pd.DataFrame(
        {"rank": [x.rank for x in lay.lanes], "pid": [x.pid for x in lay.lanes], "tid": [x.tid for x in lay.lanes],
         "lane": np.arange(len(lay.lanes))})
    keys = pd.MultiIndex.from_arrays([th["rank"].to_numpy(np.int64), th["pid"].to_numpy(np.int64),
                                      th["tid"].to_numpy(np.int64)])
    rank = nodes["rank"].to_numpy(np.int64) if "rank" in nodes else np.zeros(len(nodes), np.int64)
    at = keys.get_indexer(pd.MultiIndex.from_arrays(
        [rank, nodes["pid"].to_numpy(np.int64), nodes["tid"].to_numpy(np.int64)]
    ))
    y = np.where(at >= 0, th["lane"].to_numpy(np.int64)[np.maximum(at, 0)], -1).astype(float)
    s = nodes["start_s"].to_numpy(np.float64)
    e = nodes["end_s"].to_numpy(np.float64)
    ok = y >= 0
    s, e, y = s[ok], e[ok], y[ok]
    seen = (e >= lo) & (s <= hi) & (e > s)
    runs = np.empty((int(seen.sum()), 2, 2))
    runs[:, 0, 0] = np.clip(s[seen], lo, hi)
    runs[:, 1, 0] = np.clip(e[seen], lo, hi)
    runs[:, 0, 1] = y[seen]
    runs[:, 1, 1] = y[seen]
    # link node k to k+1: down/up at the end of k, then along the next lane to the start of k+1
    move = (y[:-1] != y[1:]) & (e[:-1] <= hi) & (s[1:] >= lo)
    k = np.flatnonzero(move)
    links = np.empty((len(k), 3, 2))
    links[:, 0, 0] = e[k]
    links[:, 0, 1] = y[k]
    links[:, 1, 0] = e[k]
    links[:, 1, 1] = y[k + 1]
    links[:, 2, 0] = np.maximum(s[k + 1], e[k])
    links[:, 2, 1] = y[k + 1]
    halo = LineCollection(runs, colors="white", linewidths=4.6, zorder=4, capstyle="butt")
    ax.add_collection(halo, autolim=False)  # keeps the line visible over dark bars
    coll = LineCollection(runs, colors=PATH_COLOUR, linewidths=2.2, zorder=4, capstyle="butt")
    coll.set_gid("pipeprobe:path")
    ax.add_collection(coll, autolim=False)
    coll = LineCollection(links, colors=PATH_COLOUR, linewidths=0.8, zorder=4)
    coll.set_gid("pipeprobe:path-links")
    ax.add_collection(coll, autolim=False)


# --------------------------------------------------------------------------- resources


def draw_resources(
    run: Run,
    ax: Sequence[Axes] | None = None,
    window_s: tuple[float, float] | None = None,
    rank: int | None = None,
) -> Figure:
    """Draw the resource strip: CPU per core, CPU per process, and memory.

    Three panels on one time axis (seconds from the run start, the same as
    the timeline's): a heat strip of busy percentage per core (``cividis``,
    one row per core), one line per process for its CPU use in percent of
    one core, and one line per process for its resident memory in MiB. The
    sampler's readings are averages over the interval ending at each
    sample time, so each reading is drawn as a step over that interval;
    the first reading of each series, whose interval is unknown, is left out.

    Parameters
    ----------
    run : Run
        A loaded run (a windowed run on the timeline's condensed axis).
    ax : sequence of three Axes, optional
        Where to draw the core, process CPU and memory panels; a new figure
        with shared time axis otherwise.
    window_s : (float, float), optional
        Time window, seconds from the run start.
    rank : int, optional
        Which rank's samples; the lowest rank present by default.

    Returns
    -------
    Figure

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0.01) as probe:
    ...     for batch in probe.watch([[0], [1]]):
    ...         with probe.step():
    ...             total = sum(range(100_000))
    >>> fig = draw_resources(pipeprobe.load(d))
    >>> fig.axes[2].get_ylabel()
    'resident\\nmemory (MiB)'
    """
    if ax is None:
        fig = Figure(figsize=(11.0, 4.2), layout="constrained")
        axes = fig.subplots(3, 1, sharex=True, height_ratios=[1.0, 1.2, 1.0])
    else:
        axes = list(ax)
        if len(axes) != 3:
            raise ValueError(f"ax must hold three Axes (cores, process CPU, memory), got {len(axes)}")
        fig = axes[0].figure
    a_core, a_cpu, a_mem = axes
    run, xlabel = _analysis_axis(run)  # the timeline's axis: a windowed run's samples inside its stretches
    res = run.resources
    rk = (int(res["rank"].min()) if len(res) else 0) if rank is None else rank
    res = res[res["rank"] == rk]
    if window_s is None:
        lo, hi = 0.0, max(run.wall_s, float(res["t_s"].max()) if len(res) else 0.0, 1e-3)
    else:
        lo, hi = float(window_s[0]), float(window_s[1])
    cores = res[(res["pid"] == 0) & (res["core"] >= 0)]
    procs = res[res["core"] < 0]
    if len(cores):
        grid = cores.pivot_table(index="core", columns="t_s", values="cpu_pct", aggfunc="mean")
        t = grid.columns.to_numpy(float)
        # reading k averages (t[k-1], t[k]]; the first one covers an unknown span, so it is not drawn
        mesh = a_core.pcolormesh(
            t, np.arange(len(grid.index) + 1) - 0.5, grid.to_numpy()[:, 1:], cmap="cividis", vmin=0, vmax=100,
            shading="flat",
        )
        cbar = fig.colorbar(mesh, ax=a_core, pad=0.01, fraction=0.03, aspect=8)
        cbar.set_label("busy %", fontsize=8)
        cbar.ax.tick_params(labelsize=7)
        a_core.set_yticks(range(len(grid.index)))
        a_core.set_yticklabels([str(c) for c in grid.index], fontsize=7)
        a_core.set_ylim(len(grid.index) - 0.5, -0.5)
    else:
        a_core.text(0.5, 0.5, "no per-core samples recorded", transform=a_core.transAxes, ha="center", fontsize=8)
    a_core.set_ylabel("core")
    a_core.set_title("CPU per core, per process, and memory", loc="left", fontsize=9)
    names = _process_names(run)
    order = sorted(procs["pid"].unique(), key=lambda p: (names.get((rk, int(p)), "~"), int(p)))
    for k, pid in enumerate(order):
        g = procs[procs["pid"] == pid]
        name = names.get((rk, int(pid)), "process")
        colour = STEP_COLOUR if name.endswith("main") else PALETTE[k % len(PALETTE)]
        label = f"{name} (pid {pid})"
        g = g.iloc[1:]  # the first reading averages over an unknown span
        a_cpu.step(g["t_s"], g["cpu_pct"], where="pre", color=colour, linewidth=1.2, label=label)
        mem = g[g["rss_bytes"] > 0]  # 0 or -1: the process had gone or could not be read
        a_mem.step(mem["t_s"], mem["rss_bytes"] / 2**20, where="pre", color=colour, linewidth=1.2, label=label)
    if len(procs):
        a_cpu.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), frameon=False, fontsize=7)
        a_mem.set_ylim(bottom=0)
        a_cpu.set_ylim(bottom=0)
    else:
        a_cpu.text(0.5, 0.5, "no process samples recorded", transform=a_cpu.transAxes, ha="center", fontsize=8)
    a_cpu.set_ylabel("CPU (%,\n100 = 1 core)")
    a_mem.set_ylabel("resident\nmemory (MiB)")
    a_mem.set_xlabel(xlabel)
    for a in axes:
        a.set_xlim(lo, hi)
        a.yaxis.label.set_fontsize(8)
        _style(a)
    for a in (a_cpu, a_mem):
        a.grid(axis="y", color="#DDDDDD", linewidth=0.6)
    return fig


def draw_overview(
    run: Run,
    window_s: tuple[float, float] | None = None,
    path: Any = None,
    fig: Figure | None = None,
) -> Figure:
    """Draw the timeline with the resource strip under it, on one time axis.

    Parameters
    ----------
    run : Run
        A loaded run.
    window_s : (float, float), optional
        Time window, seconds from the run start.
    path : DataFrame, optional
        Critical-path segments, as for :func:`draw_timeline`.
    fig : Figure, optional
        Draw into this (empty) figure; a new one otherwise.

    Returns
    -------
    Figure
        Axes in order: timeline, cores, process CPU, memory.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False) as probe:
    ...     for batch in probe.watch([[0], [1]]):
    ...         with probe.step():
    ...             pass
    >>> len(draw_overview(pipeprobe.load(d)).axes) >= 4
    True
    """
    n_lanes = max(1, len(run.spans.groupby(["rank", "pid", "tid"]).size())) if len(run.spans) else 1
    if fig is None:
        fig = Figure(figsize=(11.0, 5.0 + 0.4 * n_lanes), layout="constrained")
    axes = fig.subplots(4, 1, sharex=True, height_ratios=[0.9 + 0.5 * n_lanes, 0.9, 1.1, 1.0])
    draw_timeline(run, ax=axes[0], window_s=window_s, path=path, legend=True)
    axes[0].set_xlabel("")
    draw_resources(run, ax=axes[1:], window_s=window_s or axes[0].get_xlim())
    axes[1].set_title("")
    return fig


# --------------------------------------------------------------------------- stage durations
