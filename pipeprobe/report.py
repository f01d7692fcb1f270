"""The end-of-run stall report printed by ``Probe.close()`` and ``pipeprobe report``."""

from __future__ import annotations

import os
import sys
from typing import TextIO

from .load import Run, load


def format_basic_report(run: Run) -> str:
    """Return a short plain-text summary: wall time, stall fraction, per-stage totals."""
    wall = run.wall_s
    stall = float(run.batches["wait_s"].sum()) if len(run.batches) else 0.0
    frac = stall / wall if wall > 0 else 0.0
    lines = [
        f"pipeprobe run {run.run_dir}",
        f"  wall {wall:.3f} s   batches {len(run.batches)}   stalled {stall:.3f} s ({100 * frac:.1f} % of wall)",
    ]
    sp = run.spans
    if len(sp):
        g = sp.groupby("stage", observed=True)["dur_s"].agg(["count", "sum", "mean"])
        lines.append(f"  {'stage':<20} {'count':>8} {'total s':>10} {'mean ms':>10}")
        for name, row in g.sort_values("sum", ascending=False).iterrows():
            lines.append(f"  {str(name)[:20]:<20} {int(row['count']):>8} {row['sum']:>10.3f} {1e3 * row['mean']:>10.3f}")
    return "\n".join(lines)


def print_close_report(run_dir: str | os.PathLike, file: TextIO | None = None) -> None:
    """Load ``run_dir`` and print its report to ``file`` (default stdout)."""
    run = load(run_dir)
    print(format_basic_report(run), file=file or sys.stdout)
