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

from .._timeline_layout import TimelineLane, TimelineLayout, layout_timeline
from ._charts import draw_ceilings, draw_stage_durations, draw_stall_fraction, draw_sweep
from ._style import _BAND_HALF, _BAR_HALF, PALETTE, PATH_COLOUR, STALL_COLOUR, STEP_COLOUR, stage_colours  # noqa: F401
from ._timeline import draw_overview, draw_resources, draw_timeline

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
