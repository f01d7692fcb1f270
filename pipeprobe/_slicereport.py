"""The report of a run analysed in slices (:func:`pipeprobe.sliced.analyze_sliced`): text or JSON.

It holds what the sliced analysis gives exactly, the same numbers the full
report shows for them: wall time, stalls, the critical path's shares and
the stage table. It says what it leaves out (the replays and ceilings, the
suggested actions and the HTML timeline need every span in memory at once).
"""

from __future__ import annotations

import sys
from typing import Any, TextIO

from ._jsonnum import dumps, json_ready
from ._text import printable
from .sliced import SlicedAnalysis

__all__ = ["print_sliced_report", "sliced_json", "LEFT_OUT"]

#: What the report of a run analysed in slices does not hold, in one sentence.
LEFT_OUT = ("analysed in slices (bounded memory): the what-if replays, the ceilings, the suggested actions and the "
            "HTML timeline need the whole run in memory; run `pipeprobe report --slice-batches 0` on a machine "
            "with room for it to get them")


def sliced_json(a: SlicedAnalysis) -> dict[str, Any]:
    """The report as one JSON-ready dict (numbers as :func:`pipeprobe._jsonnum.json_number` spells them)."""
    st = a.stalls
    return json_ready({
        "run_dir": str(a.run.run_dir), "analysis": "sliced", "slices": a.slices, "left_out": LEFT_OUT,
        "wall_s": (a.wall_s), "batches": int(len(a.run.batches)),
        "stalls": {"total_s": (st.total_s), "fraction": (st.fraction), "steady_s": (st.steady_s),
                   "steady_fraction": (st.steady_fraction), "warmup_s": (st.warmup_s),
                   "warmup_batches": st.warmup_batches},
        "critical_path": [{"label": str(r.label), "kind": str(r.kind), "side": str(r.side),
                           "seconds": (r.seconds), "share": (r.share)}
                          for r in a.critical.shares.itertuples(index=False)],
        "stages": [{k: (v if isinstance(v, (int, float)) else str(v)) for k, v in row.items()}
                   for row in a.stages.table.to_dict("records")],
    })


def print_sliced_report(a: SlicedAnalysis, file: TextIO | None = None, *, as_json: bool = False) -> None:
    """Print the report of a run analysed in slices, as text or one JSON object."""
    out = file if file is not None else sys.stdout
    if as_json:
        print(dumps(sliced_json(a)), file=out)
        return
    st = a.stalls
    lines = [f"pipeprobe report: {printable(str(a.run.run_dir))}",
             f"  {len(a.run.batches)} batches, {a.wall_s:.3f} s wall time, {a.slices} slices",
             f"  stalls: {st.total_s:.3f} s, {100 * st.fraction:.1f} % of wall time "
             f"({100 * st.steady_fraction:.1f} % after the first {st.warmup_batches} batch(es) of each epoch)",
             "", "  critical path (share of wall time):"]
    for r in a.critical.shares.itertuples(index=False):
        lines.append(f"    {100 * r.share:6.1f} %  {r.seconds:10.3f} s  {printable(str(r.label))}")
    lines += ["", "  stages (count, total, p50, p95, on the critical path):"]
    for r in a.stages.table.itertuples(index=False):
        lines.append(f"    {printable(str(r.stage))}: {r.count}, {r.total_s:.3f} s, {1e3 * r.p50_s:.3f} ms, "
                     f"{1e3 * r.p95_s:.3f} ms, {r.critical_s:.3f} s")
    lines += ["", f"  note: {LEFT_OUT}"]
    print("\n".join(lines), file=out)
