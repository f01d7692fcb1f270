"""Shared look of pipeprobe's pictures: the palette, axes styling and small helpers."""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from ..lanes import lane_name, thread_lanes
from ..load import Run

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


def _fmt_s(seconds: float) -> str:
    if seconds >= 1:
        return f"{seconds:.3g} s"
    if seconds >= 1e-3:
        return f"{seconds * 1e3:.3g} ms"
    return f"{seconds * 1e6:.3g} µs"


def _fmt_ms(ms: float) -> str:
    return _fmt_s(ms / 1e3)


# --------------------------------------------------------------------------- stall fraction


def _load(path: Any) -> Run:
    from ..load import load

    return load(path)


# --------------------------------------------------------------------------- ceilings


#: The time axis label of the timeline and the resource strip: a plain run, and a windowed one.
_TIME_LABEL = "time since run start (s)"
_CONDENSED_LABEL = "recorded time, the gaps between recorded stretches cut out (s)"


def _analysis_axis(run: Run) -> tuple[Run, str]:
    """The run on the analysis' time axis (a windowed run with its stretches end to end) and the axis label."""
    from ..stretches import condense, is_windowed

    if is_windowed(run):
        return condense(run), _CONDENSED_LABEL
    return run, _TIME_LABEL


def _analysis_parts(run: Any) -> tuple[Run, Any]:
    """(Run, Analysis or None) from a Run or an Analysis."""
    if isinstance(run, Run):
        return run, None
    inner = getattr(run, "run", None)
    if isinstance(inner, Run):
        return inner, run
    raise TypeError(f"expected a pipeprobe Run or Analysis, got {type(run).__name__}")


def _process_names(run: Run) -> dict[tuple[int, int], str]:
    """``(rank, pid) -> "main" / "worker k"``: the timeline's lane names of each process's first thread."""
    threads, _ = thread_lanes(run.spans)
    multi_rank = threads["rank"].nunique() > 1
    out: dict[tuple[int, int], str] = {}
    for r, p, k in zip(threads["rank"], threads["pid"], threads["process"], strict=True):
        out.setdefault((int(r), int(p)), lane_name(int(r) if multi_rank or r else None, int(k)))
    return out


def _path_nodes(run: Run, path: Any) -> pd.DataFrame:
    """Critical-path nodes, earliest first, from ``True``, a CriticalPath or a DataFrame."""
    if path is True:
        from ..stretches import timeline_and_path

        path = timeline_and_path(run)[1]  # the analysis' own path (one stretch at a time for a windowed run)
    frame = path.path if isinstance(getattr(path, "path", None), pd.DataFrame) else path
    if not isinstance(frame, pd.DataFrame):
        raise TypeError(
            f"path must be True, a CriticalPath or a DataFrame with start_s, end_s, pid, tid; got {type(path).__name__}"
        )
    missing = {"start_s", "end_s", "pid", "tid"} - set(frame.columns)
    if missing:
        raise ValueError(f"path nodes lack the columns {sorted(missing)}")
    return frame
