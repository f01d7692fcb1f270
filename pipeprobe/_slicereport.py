"""The report of a run analysed in slices (:func:`pipeprobe.sliced.analyze_sliced`): text or JSON.

It holds what the sliced analysis gives exactly, the same numbers the full
report shows for them: wall time, stalls, the critical path's shares and
the stage table, and Amdahl's law's ceilings from those shares (which need
no replay). It says what it leaves out (the replays and the replayed
ceilings, the suggested actions and the HTML timeline need every span in
memory at once).
"""

from __future__ import annotations

import sys
from typing import Any, TextIO

from ._jsonnum import dumps, json_ready
from ._text import printable
from .sliced import SlicedAnalysis

__all__ = ["print_sliced_report", "sliced_json", "amdahl_rows", "LEFT_OUT"]

#: What the report of a run analysed in slices does not hold, in one sentence.
LEFT_OUT = ("analysed in slices (bounded memory): the what-if replays, the replayed ceilings, the suggested actions "
            "and the HTML timeline need the whole run in memory; run `pipeprobe report --slice-batches 0` on a "
            "machine with room for it to get them")


def amdahl_rows(a: SlicedAnalysis) -> list[dict[str, Any]]:
    """Per stage and step label on the critical path, largest share first: the share and the whole run's
    speed-up by Amdahl's law with that label 2x faster and free.

    Examples
    --------
    >>> import tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> from pipeprobe.sliced import analyze_sliced
    >>> d = write_example_run(tempfile.mkdtemp(), batches=4, decode_ms=6, step_ms=2)
    >>> [(r["label"], round(r["share"], 3), round(r["speedup_2x"], 3), round(r["ceiling"], 3))
    ...  for r in amdahl_rows(analyze_sliced(d))]
    [('decode', 0.75, 1.6, 4.0), ('step', 0.25, 1.143, 1.333)]

    References
    ----------
    .. [1] G. M. Amdahl, AFIPS 1967 (the part not sped up caps the gain).
    """
    from .whatif.laws import amdahl_ceiling, amdahl_speedup

    rows = []
    for r in a.critical.shares.itertuples(index=False):
        p = min(1.0, max(0.0, float(r.share)))
        if str(r.kind) in ("stage", "step") and p > 0:
            rows.append({"label": str(r.label), "share": p, "speedup_2x": amdahl_speedup(p, 2.0),
                         "ceiling": amdahl_ceiling(p)})
    return sorted(rows, key=lambda r: -r["share"])


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
        "amdahl": amdahl_rows(a),
    })


def _x(v: float) -> str:
    return "unbounded" if v == float("inf") else f"{v:.2f}x"


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
    lines += ["", "  Amdahl's law from the critical path (whole run's speed-up with the stage 2x faster, free):"]
    for r in amdahl_rows(a):
        lines.append(f"    {printable(r['label'])}: {100 * r['share']:.1f} % of the path, 2x: {r['speedup_2x']:.2f}x, "
                     f"free: {_x(r['ceiling'])}")
    lines += ["", f"  note: {LEFT_OUT}"]
    print("\n".join(lines), file=out)
