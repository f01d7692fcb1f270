"""Pictures of a recorded run, drawn with matplotlib.

This is the only pipeprobe module that imports matplotlib; ``import
pipeprobe`` never does. Use it as a module::

    from pipeprobe import plot
    ax = plot.draw_timeline(run, window_s=(2.0, 2.5))

Every ``draw_*`` function takes ``ax=None`` (a new figure is made when it
is None), draws, and returns the Axes (or the Figure, for the multi-panel
pictures). None calls ``plt.show``; none leaves a figure open that it did
not hand back.

Palette
-------
Stage colours come from Paul Tol's *muted* qualitative scheme (P. Tol,
"Colour Schemes", SRON technical note SRON/EPS/TN/09-002, issue 3.2, 2021),
built to stay distinct for the common forms of colour blindness and in
grey-scale print. The training step always gets the scheme's indigo, the
stall band a pale tint of its rose, and the critical path is drawn in black.
Heat maps use matplotlib's ``cividis`` (Nuñez, Anderton and Renslow 2018,
"Optimizing colormaps with consideration for color vision deficiency").
"""

from __future__ import annotations

import math
from typing import Any, Sequence

import matplotlib as mpl
import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.collections import LineCollection, PolyCollection
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from ._lanes import TimelineLane, TimelineLayout, layout_timeline, thread_lanes
from .load import Run

__all__ = [
    "PALETTE",
    "STEP_COLOUR",
    "STALL_COLOUR",
    "PATH_COLOUR",
    "stage_colours",
    "TimelineLane",
    "TimelineLayout",
    "layout_timeline",
    "draw_timeline",
    "draw_resources",
    "draw_overview",
    "draw_stage_durations",
    "draw_stall_fraction",
    "draw_ceilings",
    "draw_sweep",
]

#: Paul Tol's *muted* scheme minus indigo (kept for the step) and rose (kept
#: for stalls), in the order stages get them.
PALETTE: tuple[str, ...] = (
    "#88CCEE",  # cyan
    "#117733",  # green
    "#DDCC77",  # sand
    "#882255",  # wine
    "#44AA99",  # teal
    "#999933",  # olive
    "#AA4499",  # purple
    "#6F6F6F",  # mid grey (Tol's scheme has one grey; this darker one reads in print)
)
#: Colour of the training step.
STEP_COLOUR = "#332288"  # Tol muted indigo
#: Opaque fill of the consumer's stall band: Tol's rose (#CC6677) mixed 40:60 with white.
STALL_COLOUR = "#EBC2C9"
#: Edge line of the stall band.
STALL_EDGE = "#CC6677"
#: Colour of the critical-path overlay.
PATH_COLOUR = "#000000"

_BAR_HALF = 0.31  # half height of span bars within a lane of height 1
_BAND_HALF = 0.46  # half height of the stall band


def stage_colours(stages: Sequence[str]) -> dict[str, str]:
    """Map stage names to colours: ``step`` indigo, others along :data:`PALETTE`.

    Parameters
    ----------
    stages : sequence of str
        Stage names in the order they should take colours (the run's
        :attr:`~pipeprobe.Run.stages` order keeps colours stable between
        pictures of the same run). Past eight stages the palette repeats.

    Returns
    -------
    dict
        ``{stage: "#RRGGBB"}``, including ``"step"``.

    Examples
    --------
    >>> stage_colours(["read", "decode"])["decode"]
    '#117733'
    """
    out = {"step": STEP_COLOUR}
    k = 0
    for s in stages:
        if s in ("step", "wait") or s in out:
            continue
        out[s] = PALETTE[k % len(PALETTE)]
        k += 1
    return out


def _new_axes(ax: Axes | None, figsize: tuple[float, float]) -> Axes:
    if ax is not None:
        return ax
    fig = Figure(figsize=figsize, layout="constrained")
    return fig.add_subplot()


def _style(ax: Axes) -> None:
    """House look: light horizontal guides only, no top/right frame."""
    ax.spines["top"].set_visible(False)
    ax.spines["right"].set_visible(False)
    ax.tick_params(labelsize=8)


# --------------------------------------------------------------------------- timeline


def _rect_verts(x0: np.ndarray, x1: np.ndarray, y0: np.ndarray, y1: np.ndarray) -> np.ndarray:
    v = np.empty((len(x0), 4, 2))
    v[:, 0, 0] = x0
    v[:, 1, 0] = x0
    v[:, 2, 0] = x1
    v[:, 3, 0] = x1
    v[:, 0, 1] = y0
    v[:, 1, 1] = y1
    v[:, 2, 1] = y1
    v[:, 3, 1] = y0
    return v


def _axes_width_px(ax: Axes) -> int:
    try:
        return max(200, int(ax.get_window_extent().width))
    except Exception:  # a backend that cannot measure yet
        return 1200


def _path_nodes(run: Run, path: Any) -> pd.DataFrame:
    """Critical-path nodes, earliest first, from ``True``, a CriticalPath or a DataFrame."""
    if path is True:
        from .critical import critical_path
        from .timeline import build_timeline

        path = critical_path(build_timeline(run))
    frame = path.path if isinstance(getattr(path, "path", None), pd.DataFrame) else path
    if not isinstance(frame, pd.DataFrame):
        raise TypeError(
            f"path must be True, a CriticalPath or a DataFrame with start_s, end_s, pid, tid; got {type(path).__name__}"
        )
    missing = {"start_s", "end_s", "pid", "tid"} - set(frame.columns)
    if missing:
        raise ValueError(f"path nodes lack the columns {sorted(missing)}")
    return frame


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
        A loaded run.
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
    lanes_guess = max(1, len(run.processes)) if len(run.processes) else 1
    ax = _new_axes(ax, (11.0, max(2.6, 1.2 + 0.45 * lanes_guess)))
    px = resolution_px if resolution_px is not None else _axes_width_px(ax)
    lay = layout_timeline(run, window_s=window_s, resolution_px=px)
    colours = stage_colours(lay.stages)
    stage_rgba = np.array([mpl.colors.to_rgba(colours[s]) for s in lay.stages]) if lay.stages else np.zeros((0, 4))
    lo, hi = lay.window_s
    n = len(lay.lanes)

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

    bars = lay.bars
    cols = lay.columns
    if len(cols):
        cum = cols.groupby(["lane", "column"], sort=False)["share"].cumsum().to_numpy() - cols["share"].to_numpy()
    for i in range(n):
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

    if path is not None and path is not False:
        _draw_path(ax, lay, _path_nodes(run, path))

    ax.set_xlim(lo, hi)
    ax.set_ylim(max(n, 1) - 0.5, -0.5)  # first lane on top
    if not n:
        ax.text(0.5, 0.5, "no spans recorded", transform=ax.transAxes, ha="center", fontsize=9)
    ax.set_yticks(range(n))
    ax.set_yticklabels([lane.label for lane in lay.lanes], fontsize=8)
    ax.tick_params(axis="y", length=0)
    for i in range(n - 1):
        ax.axhline(i + 0.5, color="#BBBBBB", linewidth=0.5, zorder=0)
    ax.set_xlabel("time since run start (s)")
    shown = sum(lane.spans for lane in lay.lanes)
    merged = sum(lane.merged for lane in lay.lanes)
    note = f"{shown:,} spans in view"
    if merged:
        note += f"; {merged:,} shorter than a pixel ({_fmt_s(lay.pixel_s)}) shown as stage shares per column"
    ax.set_title(f"Pipeline timeline, {_fmt_s(hi - lo)} window   ·   {note}", loc="left", fontsize=9)
    _style(ax)
    if legend and n:
        used = set(bars["stage"].tolist()) | set(cols["stage"].tolist())
        handles = [Patch(facecolor=colours[s], label=s) for k, s in enumerate(lay.stages) if k in used]
        if len(st) or len(sc):
            handles.append(Patch(facecolor=STALL_COLOUR, label="stall (consumer waits for input)"))
        if path is not None and path is not False:
            handles.append(mpl.lines.Line2D([], [], color=PATH_COLOUR, linewidth=2, label="critical path"))
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.005, 1.0), frameon=False, fontsize=8,
                  handlelength=1.2, title="stage", title_fontsize=8, alignment="left")
    return ax


def _fmt_s(seconds: float) -> str:
    if seconds >= 1:
        return f"{seconds:.3g} s"
    if seconds >= 1e-3:
        return f"{seconds * 1e3:.3g} ms"
    return f"{seconds * 1e6:.3g} µs"


def _draw_path(ax: Axes, lay: TimelineLayout, nodes: pd.DataFrame) -> None:
    """Thick line through each path node at its lane's middle; thin links where the path changes lane."""
    lo, hi = lay.window_s
    if nodes.empty or not lay.lanes:
        return
    keys = pd.MultiIndex.from_arrays(
        [[lane.rank for lane in lay.lanes], [lane.pid for lane in lay.lanes], [lane.tid for lane in lay.lanes]]
    )
    rank = nodes["rank"].to_numpy(np.int64) if "rank" in nodes else np.zeros(len(nodes), np.int64)
    y = keys.get_indexer(pd.MultiIndex.from_arrays(
        [rank, nodes["pid"].to_numpy(np.int64), nodes["tid"].to_numpy(np.int64)]
    )).astype(float)
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


def _process_names(run: Run) -> dict[tuple[int, int], str]:
    """``(rank, pid) -> "main" / "worker k"``, the timeline's lane names without thread suffixes."""
    threads, _ = thread_lanes(run.spans)
    out: dict[tuple[int, int], str] = {}
    for r, p, name in zip(threads["rank"], threads["pid"], threads["name"], strict=True):
        out.setdefault((int(r), int(p)), str(name).split(" thread ")[0])
    return out


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
        A loaded run.
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
    a_mem.set_xlabel("time since run start (s)")
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


def draw_stage_durations(
    run: Run,
    ax: Axes | None = None,
    slowest: int = 3,
    log: bool | None = None,
    bins: int = 60,
) -> Axes:
    """Draw each stage's span-duration distribution, slowest samples named.

    One row per stage (training step last): a filled histogram scaled to
    the row, a white tick at the median, a black triangle at the 99th
    percentile, and the ``slowest`` longest spans marked and labelled with
    their sample id (or batch id, for steps). The duration axis is
    logarithmic when the slowest span is more than 30 times the 1st
    percentile, since a tail that long squashes everything else on a
    linear axis.

    Parameters
    ----------
    run : Run
        A loaded run.
    ax : Axes, optional
        Where to draw; a new figure otherwise.
    slowest : int
        How many of each stage's slowest spans to label.
    log : bool, optional
        Force a logarithmic (True) or linear (False) duration axis.
    bins : int
        Histogram bins per stage.

    Returns
    -------
    Axes

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False) as probe:
    ...     for batch in probe.watch([[0], [1]]):
    ...         with pipeprobe.stage("decode", sample=batch[0]):
    ...             pass
    >>> draw_stage_durations(pipeprobe.load(d)).get_xlabel()
    'span duration (ms)'
    """
    sp = run.spans
    names = [s for s in run.stages] + (["step"] if (sp["stage"] == "step").any() else [])
    ax = _new_axes(ax, (9.0, 1.0 + 0.55 * max(1, len(names))))
    colours = stage_colours(run.stages)
    if not names:
        ax.text(0.5, 0.5, "no stage spans recorded", transform=ax.transAxes, ha="center")
        ax.set_xlabel("span duration (ms)")
        _style(ax)
        return ax
    body = sp[sp["stage"].isin(names)]
    dur_ms = body["dur_s"].to_numpy(float) * 1e3
    positive = dur_ms[dur_ms > 0]
    lo_ms = float(np.quantile(positive, 0.01)) if len(positive) else 1e-3
    hi_ms = float(dur_ms.max()) if len(dur_ms) else 1.0
    use_log = (hi_ms > 30 * lo_ms) if log is None else bool(log)
    floor = max(float(positive.min()) if len(positive) else 1e-3, 1e-6)
    if use_log:
        edges = np.geomspace(floor, max(hi_ms, floor * 1.01), bins + 1)
    else:
        edges = np.linspace(0.0, max(hi_ms, 1e-6), bins + 1)
    stage_of = body["stage"].astype(str).to_numpy()
    for row, name in enumerate(names):
        sel = stage_of == name
        d = np.maximum(dur_ms[sel], floor) if use_log else dur_ms[sel]
        counts, _ = np.histogram(d, bins=edges)
        h = counts / max(1, counts.max()) * 0.8
        x = np.repeat(edges, 2)[1:-1]
        top = row + 0.4 - np.repeat(h, 2)
        ax.fill_between(x, row + 0.4, top, color=colours[name], linewidth=0, zorder=2)
        ax.plot(x, top, color="#222222", linewidth=0.5, zorder=3)
        med, p99 = np.quantile(d, [0.5, 0.99])
        ax.plot([med, med], [row + 0.4, row - 0.45], color="white", linewidth=2.2, zorder=4)
        ax.plot([med, med], [row + 0.4, row - 0.45], color="#222222", linewidth=0.6, zorder=5)
        ax.plot([p99], [row + 0.42], marker="^", color="#000000", markersize=5, zorder=5, linestyle="none")
        stats = f"n={int(sel.sum()):,}   median {_fmt_ms(med)}   p99 {_fmt_ms(p99)}"
        if slowest > 0 and sel.any():
            top_k = body[sel].nlargest(slowest, "dur_s")
            xs = np.maximum(top_k["dur_s"].to_numpy() * 1e3, floor)
            ax.plot(xs, np.full(len(xs), row + 0.4), marker="o", markersize=4, color="#000000",
                    markerfacecolor="white", linestyle="none", zorder=6)
            names_k = []
            for j, (xv, sid, bid) in enumerate(zip(xs, top_k["sample_id"], top_k["batch_id"], strict=True)):
                ax.annotate(str(j + 1), (xv, row + 0.4), xytext=(0, 4), textcoords="offset points",
                            ha="center", va="bottom", fontsize=6.5, zorder=7)
                if name == "step" or int(sid) < 0:
                    who = f"batch {int(bid)}" if int(bid) >= 0 else "unknown"
                else:
                    who = f"sample {int(sid)}"
                names_k.append(f"{j + 1}: {who} {_fmt_ms(xv)}")
            stats += "\nslowest  " + "   ".join(names_k)
        ax.text(1.0, row - 0.42, stats, transform=ax.get_yaxis_transform(), ha="right", va="top",
                fontsize=7, color="#222222", linespacing=1.3, zorder=8,
                bbox={"facecolor": "white", "alpha": 0.85, "edgecolor": "none", "pad": 1.0})
    if use_log:
        ax.set_xscale("log")
    ax.set_yticks(range(len(names)))
    ax.set_yticklabels(names, fontsize=8)
    ax.set_ylim(len(names) - 0.5, -0.6)
    ax.tick_params(axis="y", length=0)
    ax.set_xlabel("span duration (ms)")
    ax.grid(axis="x", color="#DDDDDD", linewidth=0.6, which="major")
    ax.set_title(
        "Span durations per stage" + (" (log scale)" if use_log else "")
        + "   ·   | median   ▲ 99th percentile   ○ slowest spans, numbered",
        loc="left", fontsize=9,
    )
    _style(ax)
    return ax


def _fmt_ms(ms: float) -> str:
    return _fmt_s(ms / 1e3)


# --------------------------------------------------------------------------- stall fraction


def _analysis_parts(run: Any) -> tuple[Run, Any]:
    """(Run, Analysis or None) from a Run or an Analysis."""
    if isinstance(run, Run):
        return run, None
    inner = getattr(run, "run", None)
    if isinstance(inner, Run):
        return inner, run
    raise TypeError(f"expected a pipeprobe Run or Analysis, got {type(run).__name__}")


def draw_stall_fraction(
    run: Any,
    ax: Axes | None = None,
    rolling_batches: int | None = None,
    rank: int | None = None,
) -> Axes:
    """Draw each batch's stall fraction, its rolling mean, and the warm-up batches.

    A batch's stall fraction is the time the training loop waited for it
    divided by its cycle, from asking for it to asking for the next one
    (``wait_s / cycle_s`` of :attr:`pipeprobe.stalls.Stalls.per_batch`).
    Thin bars show every batch, a line the trailing rolling mean, a grey
    band the warm-up batches at the start of each epoch (left out of the
    steady-state figure, drawn as a dashed level), and dotted lines the
    epoch boundaries.

    Parameters
    ----------
    run : Run or Analysis
        A loaded run, or its :func:`pipeprobe.analyze` result (reused
        rather than recomputed).
    ax : Axes, optional
        Where to draw; a new figure otherwise.
    rolling_batches : int, optional
        Window of the rolling mean; a twentieth of the batches (at least 3)
        by default.
    rank : int, optional
        Which rank; the lowest by default.

    Returns
    -------
    Axes

    Examples
    --------
    >>> import pipeprobe, tempfile, time
    >>> d = tempfile.mkdtemp()
    >>> def batches():
    ...     for b in range(4):
    ...         time.sleep(0.002)
    ...         yield [b]
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for batch in probe.watch(batches()):
    ...         with probe.step():
    ...             time.sleep(0.002)
    >>> draw_stall_fraction(pipeprobe.load(d)).get_ylabel()
    'stall (% of batch cycle)'
    """
    from .stalls import stall_summary

    run_, analysis = _analysis_parts(run)
    stalls = analysis.stalls if analysis is not None else stall_summary(run_)
    ax = _new_axes(ax, (9.0, 3.2))
    b = stalls.per_batch
    if len(b):
        rk = int(b["rank"].min()) if rank is None else rank
        b = b[b["rank"] == rk].sort_values("batch_id", kind="stable").reset_index(drop=True)
    ax.set_xlabel("batch (in delivery order)")
    ax.set_ylabel("stall (% of batch cycle)")
    if b.empty:
        ax.text(0.5, 0.5, "no batches delivered", transform=ax.transAxes, ha="center")
        _style(ax)
        return ax
    x = b["batch_id"].to_numpy(np.float64)
    cycle = b["cycle_s"].to_numpy(np.float64)
    frac = np.where(cycle > 0, b["wait_s"].to_numpy(np.float64) / np.where(cycle > 0, cycle, 1.0), 0.0) * 100
    n = len(b)
    win = rolling_batches if rolling_batches is not None else max(3, n // 20)
    if win < 1:
        raise ValueError(f"rolling_batches must be >= 1, got {win}")
    # rolling mean of time, not of fractions: stall seconds over cycle seconds in the window
    wait_roll = pd.Series(b["wait_s"].to_numpy(np.float64)).rolling(win, min_periods=1).sum().to_numpy()
    cyc_roll = pd.Series(cycle).rolling(win, min_periods=1).sum().to_numpy()
    roll = np.where(cyc_roll > 0, wait_roll / np.where(cyc_roll > 0, cyc_roll, 1.0), 0.0) * 100
    warm = b["warmup"].to_numpy(bool)
    # warm-up bands: runs of consecutive warm-up batches
    edges = np.flatnonzero(np.diff(np.concatenate([[0], warm.astype(np.int8), [0]])))
    for k, (a, z) in enumerate(zip(edges[::2], edges[1::2], strict=True)):
        ax.axvspan(x[a] - 0.5, x[z - 1] + 0.5, color="#DDDDDD", zorder=0, linewidth=0,
                   label="warm-up batches" if k == 0 else None)
    ax.bar(x, frac, width=0.8 if n <= 400 else 1.0, color=STALL_EDGE, alpha=0.55, linewidth=0, zorder=2,
           label="stall of each batch")
    ax.plot(x, roll, color=PATH_COLOUR, linewidth=1.6, zorder=3, label=f"rolling, {win} batches")
    ax.axhline(100 * stalls.steady_fraction, color=STEP_COLOUR, linestyle="--", linewidth=1.0, zorder=3,
               label=f"steady state {100 * stalls.steady_fraction:.1f} %")
    epochs = b["epoch"].to_numpy()
    for i in np.flatnonzero(epochs[1:] != epochs[:-1]) + 1:
        ax.axvline(x[i] - 0.5, color="#555555", linestyle=":", linewidth=0.8, zorder=1)
    ax.set_ylim(0, 100)
    ax.set_xlim(x[0] - 0.5, x[-1] + 0.5)
    ax.grid(axis="y", color="#DDDDDD", linewidth=0.6)
    ax.set_title(
        f"Stall per batch   ·   {100 * stalls.fraction:.1f} % of wall time overall, "
        f"{_fmt_s(stalls.warmup_s)} of it in warm-up", loc="left", fontsize=9,
    )
    ax.legend(loc="upper left", bbox_to_anchor=(1.005, 1.0), frameon=False, fontsize=8)
    _style(ax)
    return ax


# --------------------------------------------------------------------------- what-if sweep


def draw_sweep(
    predictions: Any,
    ax: Axes | None = None,
    vary: str = "workers",
    values: Sequence[Any] | None = None,
) -> Axes:
    """Draw predicted wall time against one setting, with the measured run marked.

    Parameters
    ----------
    predictions : list of Prediction, or Run / Analysis / run folder
        Results of :func:`pipeprobe.whatif.sweep` over one setting; given a
        run instead, the sweep over ``values`` is computed here.
    ax : Axes, optional
        Where to draw; a new figure otherwise.
    vary : str
        The scenario key that changes between predictions (``"workers"``,
        ``"prefetch"`` or ``"cores"``).
    values : sequence, optional
        Settings to replay when ``predictions`` is a run; by default 0 to
        twice the recorded worker count plus two (for ``workers``), or
        1, 2, 4, 8, 16 (otherwise).

    Returns
    -------
    Axes

    Examples
    --------
    >>> import pipeprobe, tempfile, time
    >>> d = tempfile.mkdtemp()
    >>> def batches():
    ...     for i in range(4):
    ...         with pipeprobe.stage("decode", sample=i):
    ...             time.sleep(0.004)
    ...         yield [i]
    >>> with pipeprobe.Probe(d, report=False) as probe:
    ...     for batch in probe.watch(batches()):
    ...         with probe.step():
    ...             time.sleep(0.002)
    >>> draw_sweep(d, values=[0, 1, 2]).get_ylabel()
    'wall time (s)'
    """
    from .whatif import sweep

    preds = predictions
    if not isinstance(preds, (list, tuple)):
        source = preds
        if not isinstance(source, Run) and getattr(source, "run", None) is not None:
            source = source.run
        if values is None:
            if vary == "workers":
                from .replay import build_plan

                rec = build_plan(source if isinstance(source, Run) else _load(source)).workers
                values = list(range(0, 2 * int(rec) + 3))
            else:
                values = [1, 2, 4, 8, 16]
        preds = sweep(source, [{vary: v} for v in values])
    if not preds:
        raise ValueError("draw_sweep needs at least one prediction")
    ax = _new_axes(ax, (7.0, 3.6))
    recorded = preds[0].recorded.get(vary)
    xs = np.array([p.scenario.get(vary) if p.scenario.get(vary) is not None else recorded for p in preds], float)
    wall = np.array([p.predicted_wall_s for p in preds], float)
    stall = np.array([p.predicted_stall_fraction for p in preds], float)
    order = np.argsort(xs, kind="stable")
    xs, wall, stall = xs[order], wall[order], stall[order]
    measured = preds[0].measured_wall_s
    ax.plot(xs, wall, color=STEP_COLOUR, linewidth=1.8, marker="o", markersize=4.5, zorder=3,
            label="predicted (replay)")
    for x, w, f in zip(xs, wall, stall, strict=True):
        ax.annotate(f"{100 * f:.0f} %", (x, w), xytext=(0, 6), textcoords="offset points", ha="center",
                    fontsize=7, color=STALL_EDGE)
    if recorded is not None and math.isfinite(float(recorded)):
        ax.plot([float(recorded)], [measured], marker="D", markersize=8, color=STALL_EDGE,
                markeredgecolor=PATH_COLOUR, linestyle="none", zorder=4, label=f"measured ({vary} = {recorded})")
    ax.set_xlabel(f"{vary} (loader worker processes)" if vary == "workers" else vary)
    ax.set_ylabel("wall time (s)")
    ax.set_ylim(bottom=0, top=max(float(np.nanmax(wall)), measured) * 1.15)
    if np.all(np.isfinite(xs)) and np.allclose(xs, np.round(xs)):
        ax.set_xticks(xs)
    ax.grid(axis="y", color="#DDDDDD", linewidth=0.6)
    ax.set_title(f"What-if: wall time against {vary}   ·   % = predicted stall", loc="left", fontsize=9)
    ax.legend(loc="lower left", frameon=False, fontsize=8)
    _style(ax)
    return ax


def _load(path: Any) -> Run:
    from .load import load

    return load(path)


# --------------------------------------------------------------------------- ceilings

#: Fills of the replayed speed-ups: indigo mixed with white (2x lightest, free full).
_CEILING_FILLS = {"replay 2x": "#ADA7CC", "replay 4x": "#7066A6", "replay free": STEP_COLOUR}


def draw_ceilings(ceilings: Any, ax: Axes | None = None, stages: int = 8) -> Axes:
    """Draw, for each stage, Amdahl's ceiling next to the replayed speed-ups at 2x, 4x and free.

    One row per stage (largest critical-path share first), four bars side
    by side, each starting at 1x (no change): a hatched, open bar for
    Amdahl's ceiling ``1 / (1 - p)`` from the stage's critical-path share
    ``p``, then the whole run's replayed speed-up with the stage 2x faster,
    4x faster and free, in deepening indigo. Infinite ceilings (a stage
    holding the whole path) end at the right edge with an arrow.

    Parameters
    ----------
    ceilings : Ceilings, Analysis or Run
        From :func:`pipeprobe.ceilings.ceilings`; given a run or an
        analysis, they are computed here.
    ax : Axes, optional
        Where to draw; a new figure otherwise.
    stages : int
        Draw at most this many stages.

    Returns
    -------
    Axes

    Examples
    --------
    >>> from pipeprobe.ceilings import Ceilings, StageCeiling
    >>> c = Ceilings([StageCeiling("decode", 0.5, 2.0, 1.6, 1.3, 1.45, "step")], 1.0, 1.0, 2, 3, 0.6, 2, True, 1.2)
    >>> draw_ceilings(c).get_xlabel()
    'speed-up of the whole run (x, 1 = unchanged)'

    References
    ----------
    Amdahl, G. M. (1967). Validity of the single processor approach to
    achieving large scale computing capabilities. AFIPS Conference
    Proceedings 30, 483-485.
    """
    from .ceilings import ceilings as compute

    c = ceilings
    if not isinstance(getattr(c, "stages", None), list):
        run_, analysis = _analysis_parts(c)
        c = compute(run_, analysis=analysis)
    rows = c.stages[:stages]
    ax = _new_axes(ax, (8.0, 1.0 + 0.62 * max(1, len(rows))))
    ax.set_xlabel("speed-up of the whole run (x, 1 = unchanged)")
    if not rows:
        ax.text(0.5, 0.5, "no stages to change", transform=ax.transAxes, ha="center")
        _style(ax)
        return ax
    series = [
        ("Amdahl ceiling", [r.amdahl_ceiling for r in rows]),
        ("replay 2x", [r.speedup_2x for r in rows]),
        ("replay 4x", [r.speedup_4x for r in rows]),
        ("replay free", [r.free_speedup for r in rows]),
    ]
    finite = [v for _, vals in series for v in vals if math.isfinite(v)]
    right = max([1.05] + finite) * 1.12
    h = 0.19
    for k, (name, vals) in enumerate(series):
        y = np.arange(len(rows)) - 1.5 * h + k * h
        v = np.array(vals, float)
        shown = np.where(np.isfinite(v), v, right)
        if name == "Amdahl ceiling":
            ax.barh(y, shown - 1.0, left=1.0, height=h * 0.92, facecolor="white", edgecolor=PATH_COLOUR,
                    hatch="////", linewidth=0.8, label=name, zorder=2)
        else:
            ax.barh(y, shown - 1.0, left=1.0, height=h * 0.92, color=_CEILING_FILLS[name], label=name, zorder=2)
        for yy, val, x in zip(y, v, shown, strict=True):
            text = "∞" if not math.isfinite(val) else f"{val:.2f}x"
            ax.text(min(x, right) + right * 0.004, yy, text, va="center", fontsize=6.5, color="#222222")
            if not math.isfinite(val):
                ax.annotate("", (right, yy), xytext=(right * 0.96, yy),
                            arrowprops={"arrowstyle": "->", "color": PATH_COLOUR, "linewidth": 1})
    ax.axvline(1.0, color=PATH_COLOUR, linewidth=0.8, zorder=3)
    ax.set_xlim(1.0 - (right - 1.0) * 0.02, right * 1.04)
    ax.set_yticks(range(len(rows)))
    ax.set_yticklabels([f"{r.stage}\n{100 * r.share:.1f} % of path" for r in rows], fontsize=8)
    ax.set_ylim(len(rows) - 0.5, -0.5)
    ax.tick_params(axis="y", length=0)
    ax.grid(axis="x", color="#DDDDDD", linewidth=0.6)
    ax.set_title("Speed-up ceilings per stage: Amdahl's law and the replay", loc="left", fontsize=9)
    ax.legend(loc="upper left", bbox_to_anchor=(1.005, 1.0), frameon=False, fontsize=8)
    _style(ax)
    return ax
