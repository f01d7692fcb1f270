"""What changed between two runs, and whether the second one regressed.

:func:`compare` lines up two :class:`~pipeprobe.analysis.Analysis` objects:
what sets the pace (:func:`pipeprobe.pace.judge`) and the replayed
speed-up at stake on each side, wall time, time per batch, stall
fractions, each stage's mean span time and each critical-path share. Optional limits turn it into a gate for CI:
``pipeprobe compare RUN_A RUN_B --max-stall-increase 0.05`` exits with 1
when run B stalls more than 5 percentage points more than run A.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import pandas as pd

from ._jsonnum import json_ready
from ._text import printable
from .analysis import Analysis
from .pace import judge

__all__ = ["Comparison", "compare", "format_comparison", "comparison_dict", "COMPARE_COLUMNS"]

#: Columns of :attr:`Comparison.rows`.
COMPARE_COLUMNS = {
    "metric": "what is compared, e.g. 'wall_s', 'stall_fraction', 'stage decode mean_s', 'share decode'",
    "a": "value in run A (NaN when absent)",
    "b": "value in run B (NaN when absent)",
    "change": "relative change (b - a) / a for times ('relative'), difference b - a for fractions ('points')",
    "unit": "'relative' or 'points'",
    "limit": "the largest allowed increase of change (NaN: no limit)",
    "regressed": "True when change exceeds limit",
}


@dataclass(frozen=True)
class Comparison:
    """Result of :func:`compare`.

    Attributes
    ----------
    run_a, run_b : str
        The two run folders.
    rows : DataFrame
        See :data:`COMPARE_COLUMNS`.
    pace_a, pace_b : str
        What sets the pace of each run (the verdict's outcome: 'input',
        'step', 'in turn', 'level' or 'none').
    """

    run_a: str
    run_b: str
    rows: pd.DataFrame
    pace_a: str
    pace_b: str

    @property
    def regressed(self) -> bool:
        """True when any metric went past its limit."""
        return bool(self.rows["regressed"].any())

    @property
    def failures(self) -> list[str]:
        """One sentence per metric past its limit."""
        out = []
        for r in self.rows[self.rows["regressed"]].itertuples():
            out.append(f"{r.metric} rose {_change(r.change, r.unit)} (limit {_change(r.limit, r.unit)})")
        return out


def _rel(a: float, b: float) -> float:
    if not (math.isfinite(a) and math.isfinite(b)) or a <= 0:
        return float("nan")
    return (b - a) / a


def compare(a: Analysis, b: Analysis, *, max_stall_increase: float | None = None,
            max_wall_increase: float | None = None, max_stage_increase: float | None = None) -> Comparison:
    """Compare run B with run A.

    Parameters
    ----------
    a, b : Analysis
        The baseline and the new run.
    max_stall_increase : float, optional
        Largest allowed rise of the stall fraction, in fraction points
        (0.05: from 10 % to 15 %).
    max_wall_increase : float, optional
        Largest allowed relative rise of wall time per batch (0.1: 10 % slower).
    max_stage_increase : float, optional
        Largest allowed relative rise of any stage's mean span time (step included).

    Returns
    -------
    Comparison

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> def rec():
    ...     d = tempfile.mkdtemp()
    ...     with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...         for batch in probe.watch([[0], [1]]):
    ...             with probe.step():
    ...                 pass
    ...     return pipeprobe.analyze(d)
    >>> c = compare(rec(), rec(), max_stall_increase=1.0)
    >>> c.regressed
    False

    References
    ----------
    Common practice: relative change for times, difference in points for
    fractions, so a 5 % stall becoming 10 % reads as +5 points, not +100 %.
    """
    rows: list[dict[str, Any]] = []

    def add(metric: str, va: float, vb: float, unit: str, limit: float | None) -> None:
        change = _rel(va, vb) if unit == "relative" else (vb - va)
        lim = float("nan") if limit is None else float(limit)
        bad = bool(math.isfinite(lim) and math.isfinite(change) and change > lim + 1e-12)
        rows.append({"metric": metric, "a": va, "b": vb, "change": change, "unit": unit, "limit": lim,
                     "regressed": bad})

    va, vb = judge(a), judge(b)
    add("input free speedup", va.input_free_speedup, vb.input_free_speedup, "relative", None)
    add("step free speedup", va.step_free_speedup, vb.step_free_speedup, "relative", None)
    add("wall_s", a.wall_s, b.wall_s, "relative", None)
    per_a = a.wall_s / a.batches if a.batches else float("nan")
    per_b = b.wall_s / b.batches if b.batches else float("nan")
    add("wall_s per batch", per_a, per_b, "relative", max_wall_increase)
    add("stall_fraction", a.stalls.fraction, b.stalls.fraction, "points", max_stall_increase)
    add("steady_stall_fraction", a.stalls.steady_fraction, b.stalls.steady_fraction, "points", None)
    ta = a.stages.table.set_index("stage")["mean_s"]
    tb = b.stages.table.set_index("stage")["mean_s"]
    for stage in list(ta.index) + [s for s in tb.index if s not in ta.index]:
        add(f"stage {stage} mean_s", float(ta.get(stage, float("nan"))), float(tb.get(stage, float("nan"))),
            "relative", max_stage_increase)
    sa, sb = a.stage_shares(), b.stage_shares()
    for label in list(sa) + [x for x in sb if x not in sa]:
        add(f"share {label}", sa.get(label, 0.0), sb.get(label, 0.0), "points", None)
    frame = pd.DataFrame(rows, columns=list(COMPARE_COLUMNS))
    return Comparison(run_a=str(a.run.run_dir), run_b=str(b.run.run_dir), rows=frame,
                      pace_a=va.pace, pace_b=vb.pace)


def _pace_words() -> dict[str, str]:
    from .pace import HEADINGS

    return dict(HEADINGS)


_PACE_WORDS = _pace_words()


def _change(x: float, unit: str) -> str:
    if not math.isfinite(x):
        return "n/a"
    return f"{100 * x:+.1f} %" if unit == "relative" else f"{100 * x:+.1f} pts"


def _value(metric: str, x: float) -> str:
    if not math.isfinite(x):
        return "-"
    if metric.endswith("speedup"):
        return "unbounded" if math.isinf(x) else f"{x:.2f}x"
    if "fraction" in metric or metric.startswith("share "):
        return f"{100 * x:.1f} %"
    if metric.endswith("mean_s"):
        return f"{1e3 * x:.3f} ms"
    return f"{x:.3f} s"


def format_comparison(c: Comparison) -> str:
    """The comparison as plain text, at most 100 columns wide.

    Parameters
    ----------
    c : Comparison

    Returns
    -------
    str
    """
    def cut(s: str, n: int) -> str:
        return s if len(s) <= n else "..." + s[-(n - 3):]

    lines = [f"compare  A {cut(c.run_a, 88)}", f"         B {cut(c.run_b, 88)}",
             f"  pace  A: {_PACE_WORDS.get(c.pace_a, c.pace_a)}", f"        B: {_PACE_WORDS.get(c.pace_b, c.pace_b)}",
             "",
             f"  {'metric':<34} {'A':>12} {'B':>12} {'change':>12} {'limit':>12}"]
    for r in c.rows.itertuples():
        lim = _change(r.limit, r.unit) if math.isfinite(r.limit) else ""
        flag = "  REGRESSED" if r.regressed else ""
        lines.append(f"  {cut(str(r.metric), 34):<34} {_value(r.metric, r.a):>12} {_value(r.metric, r.b):>12} "
                     f"{_change(r.change, r.unit):>12} {lim:>12}{flag}")
    lines.append("")
    if c.regressed:
        lines.append("result  REGRESSED: " + "; ".join(c.failures))
    else:
        gated = c.rows["limit"].notna().any()
        lines.append("result  within limits" if gated else "result  no limits given (pass --max-... to gate)")
    lines = [printable(line) for line in lines]
    return "\n".join(line if len(line) <= 100 else line[:97] + "..." for line in lines)


def comparison_dict(c: Comparison) -> dict[str, Any]:
    """The comparison as a JSON-ready dict: ``run_a, run_b, pace_a, pace_b, regressed, failures, rows``.

    Numbers follow the report's rule (:mod:`pipeprobe._jsonnum`): NaN is null, infinity ``"inf"``.

    Parameters
    ----------
    c : Comparison

    Returns
    -------
    dict
    """
    return json_ready({
        "run_a": c.run_a, "run_b": c.run_b, "pace_a": c.pace_a, "pace_b": c.pace_b,
        "regressed": c.regressed, "failures": c.failures,
        "rows": [{"metric": r.metric, "a": r.a, "b": r.b, "change": r.change, "unit": r.unit,
                  "limit": r.limit, "regressed": bool(r.regressed)} for r in c.rows.itertuples()],
    })
