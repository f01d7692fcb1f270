"""What recording cost a run: spans per process, the per-span cost, and the share of wall time it added.

Each process's header may carry ``span_cost_ns``: the cost of one span in
nanoseconds, measured on that machine when the probe started (a short
calibration). :func:`recording_cost` multiplies it by the spans the
process recorded to estimate the time recording added, and states it as a
share of the run's wall time. Runs recorded without the measurement say so
and get no estimate: nothing is guessed. A stage whose median span is
shorter than :data:`SHORT_SPAN_FACTOR` times the per-span cost is too short
to time per item: the probe would weigh on what it measures; time it per
batch instead.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import pandas as pd

from .errors import TraceFormatError
from .load import Run
from .tracefile import read_json

__all__ = ["RecordingCost", "recording_cost", "SHORT_SPAN_FACTOR", "MAX_SPAN_COST_NS"]

#: A stage whose median span is under this many per-span costs is flagged (the probe's own time would be
#: over 5 % of what it measures).
SHORT_SPAN_FACTOR = 20
#: A per-span cost above this (1 ms) is not a measurement of a span; the header is not trusted for it.
MAX_SPAN_COST_NS = 1e6


@dataclass(frozen=True)
class RecordingCost:
    """The probe's own cost in one run.

    Attributes
    ----------
    spans : int
        Spans recorded in the run.
    processes : DataFrame
        ``pid, rank, role, spans, span_cost_ns (NaN: not measured), added_s, wall_share``.
    measured : bool
        At least one process measured its per-span cost.
    too_short : DataFrame
        ``stage, p50_s, limit_s``: stages whose median span is under
        :data:`SHORT_SPAN_FACTOR` per-span costs.
    """

    spans: int
    processes: pd.DataFrame
    measured: bool
    too_short: pd.DataFrame


def _span_cost_ns(run: Run, row: Any) -> float:
    """The process's measured per-span cost, from the loaded table or its header; NaN when absent."""
    value: Any = getattr(row, "span_cost_ns", None)
    if value is None:
        try:
            value = read_json(run.run_dir / str(row.file).replace(".bin", ".json")).get("span_cost_ns")
        except (TraceFormatError, OSError):
            value = None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return math.nan
    value = float(value)
    return value if 0 < value <= MAX_SPAN_COST_NS else math.nan


def recording_cost(run: Run, stage_table: pd.DataFrame, wall_s: float) -> RecordingCost:
    """Estimate what recording cost each process of ``run``, and flag stages too short to time per item.

    Parameters
    ----------
    run : Run
    stage_table : DataFrame
        ``Analysis.stages.table`` (for each stage's median span).
    wall_s : float
        Wall time of the run.

    Returns
    -------
    RecordingCost

    Examples
    --------
    A run written without the per-span measurement (as by a version before
    it) gets no estimate:

    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> a = pipeprobe.analyze(write_example_run(tempfile.mkdtemp(), batches=3))
    >>> c = recording_cost(a.run, a.stages.table, a.wall_s)
    >>> c.spans, c.measured
    (9, False)

    References
    ----------
    Common practice: a timer's own cost must be small against the interval
    it times (here under 5 %, hence 20x).
    """
    rows = []
    for p in run.processes.itertuples(index=False):
        cost = _span_cost_ns(run, p)
        added = int(p.spans) * cost * 1e-9
        rows.append({"pid": int(p.pid), "rank": int(p.rank), "role": str(p.role), "spans": int(p.spans),
                     "span_cost_ns": cost, "added_s": added, "wall_share": added / wall_s if wall_s > 0 else math.nan})
    procs = pd.DataFrame(rows, columns=["pid", "rank", "role", "spans", "span_cost_ns", "added_s", "wall_share"])
    measured = bool(procs["span_cost_ns"].notna().any())
    short = pd.DataFrame(columns=["stage", "p50_s", "limit_s"])
    if measured and len(stage_table):
        limit = SHORT_SPAN_FACTOR * float(procs["span_cost_ns"].max()) * 1e-9
        t = stage_table[stage_table["p50_s"] < limit]
        short = pd.DataFrame({"stage": t["stage"].astype(str), "p50_s": t["p50_s"].astype(float), "limit_s": limit})
    return RecordingCost(spans=int(len(run.spans)), processes=procs, measured=measured,
                         too_short=short.reset_index(drop=True))
