"""Charts of a run: stage durations, stall fraction, what-if sweep and ceilings."""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np
import pandas as pd
from matplotlib.axes import Axes

from ..load import Run
from ._style import (
    PATH_COLOUR,
    STALL_EDGE,
    STEP_COLOUR,
    _analysis_parts,
    _fmt_ms,
    _fmt_s,
    _load,
    _new_axes,
    _style,
    stage_colours,
)

#: Fills of the replayed speed-ups: indigo mixed with white (2x lightest, free full).
_CEILING_FILLS = {"replay 2x": "#ADA7CC", "replay 4x": "#7066A6", "replay free": STEP_COLOUR}


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
            levels = _label_levels(_axis_fraction(xs, edges[0], edges[-1], use_log))
            for j, (xv, sid, bid) in enumerate(zip(xs, top_k["sample_id"], top_k["batch_id"], strict=True)):
                ax.annotate(str(j + 1), (xv, row + 0.4), xytext=(0, 4 + _LABEL_STEP_PT * levels[j]),
                            textcoords="offset points", ha="center", va="bottom", fontsize=6.5, zorder=7)
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


#: Labels of the slowest spans closer than this share of the axis width stack upwards (a label is
#: about 1 % of a 9-inch axis wide at 6.5 pt) ...
_LABEL_GAP = 0.025
#: ... by this many points per level (one label height plus a little air).
_LABEL_STEP_PT = 8


def _axis_fraction(xs: np.ndarray, lo: float, hi: float, log_scale: bool) -> np.ndarray:
    """Positions ``xs`` as shares of the axis from ``lo`` to ``hi`` (log or linear)."""
    if log_scale:
        lo, hi = math.log(max(lo, 1e-12)), math.log(max(hi, 1e-12))
        xs = np.log(np.maximum(xs, 1e-12))
    return (xs - lo) / (hi - lo) if hi > lo else np.zeros(len(xs))


def _label_levels(frac: np.ndarray, gap: float = _LABEL_GAP) -> list[int]:
    """A stacking level per label so that labels within ``gap`` of each other never share a level.

    Examples
    --------
    >>> _label_levels(np.array([0.90, 0.905, 0.5, 0.91]))
    [0, 1, 0, 2]
    """
    levels = [0] * len(frac)
    placed: list[tuple[float, int]] = []
    for i, x in enumerate(frac):
        taken = {lv for px, lv in placed if abs(px - x) < gap}
        levels[i] = next(lv for lv in range(len(frac) + 1) if lv not in taken)
        placed.append((float(x), levels[i]))
    return levels


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
    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=4, decode_ms=2, step_ms=2)
    >>> ax = draw_stall_fraction(pipeprobe.load(d))
    >>> ax.get_ylabel(), ax.lines[0].get_ydata().tolist()
    ('stall (% of batch cycle)', [50.0, 50.0, 50.0, 50.0])
    """
    from ..stalls import stall_summary

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
    >>> import tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=4, decode_ms=6, step_ms=2)
    >>> ax = draw_sweep(d, values=[0, 1, 2])
    >>> ax.get_ylabel(), ax.lines[0].get_ydata().round(6).tolist()
    ('wall time (s)', [0.032, 0.026, 0.016])
    """
    from ..whatif import sweep

    preds = predictions
    if not isinstance(preds, (list, tuple)):
        source = preds
        if not isinstance(source, Run) and getattr(source, "run", None) is not None:
            source = source.run
        if values is None:
            if vary == "workers":
                from ..whatif.plan import build_plan

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
        From :func:`pipeprobe.whatif.ceilings.ceilings`; given a run or an
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
    >>> from pipeprobe.whatif.ceilings import Ceilings, StageCeiling
    >>> c = Ceilings([StageCeiling("decode", 0.5, 2.0, 1.6, 1.3, 1.45, "step")], 1.0, 1.0, 2, None)
    >>> draw_ceilings(c).get_xlabel()
    'speed-up of the whole run (x, 1 = unchanged)'

    References
    ----------
    Amdahl, G. M. (1967). Validity of the single processor approach to
    achieving large scale computing capabilities. AFIPS Conference
    Proceedings 30, 483-485.
    """
    from ..whatif.ceilings import ceilings as compute

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
