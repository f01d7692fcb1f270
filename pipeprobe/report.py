"""The run report: plain text for the terminal (``Probe.close()``, ``pipeprobe report``) and JSON.

The report is a list of :class:`Section` objects, each turning an
:class:`~pipeprobe.analysis.Analysis` into a few lines of text and a piece
of the JSON object. :data:`SECTIONS` is the default list; later layers add
their own with :func:`add_section` (e.g. the what-if ceilings after the
critical path). Text lines fit in :data:`WIDTH` columns.
"""

from __future__ import annotations

import json
import math
import os
import sys
from dataclasses import dataclass
from typing import Any, Callable, TextIO

from .analysis import Analysis, analyze
from .whatif.ceilings import section_data as _ceilings_data
from .whatif.ceilings import section_lines as _ceilings_text

__all__ = [
    "Section",
    "SECTIONS",
    "WIDTH",
    "JSON_SCHEMA",
    "SCHEMA_VERSION",
    "add_section",
    "format_report",
    "report_dict",
    "print_close_report",
]

#: Columns the text report fits in.
WIDTH = 100
#: Value of the ``schema`` key of the JSON report.
SCHEMA_VERSION = "pipeprobe-report/1"


@dataclass(frozen=True)
class Section:
    """One part of the report.

    Attributes
    ----------
    name : str
        Short name, unique in the list (e.g. ``"critical path"``).
    text : callable
        ``text(analysis) -> list[str]``: lines of at most :data:`WIDTH` characters.
    data : callable, optional
        ``data(analysis) -> dict``: keys merged into the JSON report.
    """

    name: str
    text: Callable[[Analysis], list[str]]
    data: Callable[[Analysis], dict[str, Any]] | None = None


def _num(x: Any) -> Any:
    """A JSON-safe number: NaN and infinities become None."""
    if x is None:
        return None
    if isinstance(x, bool):
        return x
    f = float(x)
    return f if math.isfinite(f) else None


def _pct(x: float) -> str:
    return "   n/a" if x is None or not math.isfinite(x) else f"{100 * x:5.1f} %"


def _fit(line: str) -> str:
    return line if len(line) <= WIDTH else line[: WIDTH - 3] + "..."


def _wrap(text: str, indent: str, first: str = "") -> list[str]:
    words = text.split()
    lines: list[str] = []
    cur = first
    for w in words:
        if len(cur) + len(w) + 1 > WIDTH and cur.strip():
            lines.append(cur.rstrip())
            cur = indent
        cur += w + " "
    if cur.strip():
        lines.append(cur.rstrip())
    return lines


# -- sections ---------------------------------------------------------------
def _head_text(a: Analysis) -> list[str]:
    run = a.run
    procs = len(run.processes)
    lines = [_fit(f"pipeprobe  {run.run_dir}"),
             f"  {a.wall_s:.3f} s wall, {a.batches} batches, {len(run.spans)} spans, {procs} process(es)"]
    lines += _wrap(f"{a.verdict.word.upper()}: {a.verdict.reason}", "  ", "  verdict ")
    for p in run.problems[:3]:
        lines.append(_fit(f"  note: {p}"))
    return lines


def _head_data(a: Analysis) -> dict[str, Any]:
    run = a.run
    return {
        "schema": SCHEMA_VERSION,
        "run_dir": str(run.run_dir),
        "wall_s": _num(a.wall_s),
        "batches": a.batches,
        "spans": int(len(run.spans)),
        "processes": int(len(run.processes)),
        "clock": {"method": run.clock.get("method"), "uncertainty_s": _num(run.clock.get("uncertainty_s"))},
        "problems": list(run.problems),
        "verdict": a.verdict.word,
        "verdict_reason": a.verdict.reason,
    }


def _stall_text(a: Analysis) -> list[str]:
    s = a.stalls
    if not a.batches:
        return ["stalls  none measured: no batch reached probe.watch()"]
    lines = [
        f"stalls  {s.total_s:.3f} s = {_pct(s.fraction).strip()} of wall;  steady state "
        f"{_pct(s.steady_fraction).strip()}",
        f"  warm-up left out of the steady state: first {s.warmup_batches} batch(es) of each epoch, "
        f"{s.warmup_s:.3f} s of stall",
    ]
    pb = s.per_batch
    worst = pb[pb["wait_s"] > 0].sort_values("wait_s", ascending=False).head(3)
    for row in worst.itertuples():
        why = f": {row.blame_text}" if row.blame_text else ""
        lines.append(_fit(f"  batch {row.batch_id:>6}  waited {1e3 * row.wait_s:9.2f} ms{why}"))
    if len(s.per_epoch) > 1:
        ep = ", ".join(f"{int(r.epoch)}: {100 * r.stall_fraction:.0f} %" for r in s.per_epoch.head(8).itertuples())
        more = ", ..." if len(s.per_epoch) > 8 else ""
        lines.append(_fit(f"  per epoch  {ep}{more}"))
    return [_fit(x) for x in lines]


def _stall_data(a: Analysis) -> dict[str, Any]:
    s = a.stalls
    pb = s.per_batch
    worst = pb[pb["wait_s"] > 0].sort_values("wait_s", ascending=False).head(10)
    return {
        "stall_s": _num(s.total_s),
        "stall_fraction": _num(s.fraction),
        "steady_stall_fraction": _num(s.steady_fraction),
        "warmup": {"batches_per_epoch": s.warmup_batches, "stall_s": _num(s.warmup_s)},
        "epochs": [
            {"epoch": int(r.epoch), "batches": int(r.batches), "stall_s": _num(r.stall_s),
             "stall_fraction": _num(r.stall_fraction)}
            for r in s.per_epoch.itertuples()
        ],
        "worst_stalls": [
            {"rank": int(r.rank), "batch_id": int(r.batch_id), "wait_s": _num(r.wait_s), "blame": r.blame,
             "blame_lane": r.blame_lane, "blame_samples": r.blame_samples, "blame_s": _num(r.blame_s)}
            for r in worst.itertuples()
        ],
    }


def _critical_text(a: Analysis) -> list[str]:
    cp = a.critical
    lines = [f"critical path  {len(cp.path)} nodes over {len(cp.batches)} batches; where the wall time went:"]
    for row in cp.shares.head(8).itertuples():
        bar = "#" * int(round(30 * row.share))
        lines.append(f"  {str(row.label)[:24]:<24} {row.seconds:10.3f} s {_pct(row.share)}  {bar}")
    if len(cp.shares) > 8:
        rest = cp.shares.iloc[8:]
        lines.append(f"  {'(' + str(len(rest)) + ' more)':<24} {rest['seconds'].sum():10.3f} s "
                     f"{_pct(float(rest['share'].sum()))}")
    if len(cp.lanes):
        lanes = ", ".join(f"{r.lane} {100 * r.share:.0f} %" for r in cp.lanes.head(5).itertuples())
        lines.append(_fit(f"  threads on the path: {lanes}"))
    return lines


def _critical_data(a: Analysis) -> dict[str, Any]:
    cp = a.critical
    return {
        "critical_path": [
            {"stage": str(r.label), "kind": str(r.kind), "side": str(r.side), "seconds": _num(r.seconds),
             "share": _num(r.share)}
            for r in cp.shares.itertuples()
        ],
        "critical_path_lanes": [{"lane": str(r.lane), "seconds": _num(r.seconds), "share": _num(r.share)}
                                for r in cp.lanes.itertuples()],
        "critical_path_nodes": int(len(cp.path)),
        "critical_path_batches": len(cp.batches),
    }


def _stage_text(a: Analysis) -> list[str]:
    t = a.stages.table
    if t.empty:
        return ["stages  none recorded"]
    lines = [f"{'stages':<18} {'count':>8} {'total s':>9} {'mean ms':>9} {'p50 ms':>8} {'p95 ms':>8} "
             f"{'p99 ms':>8} {'cpu/wall':>8} {'on path':>8}"]
    for r in t.head(10).itertuples():
        ratio = "     n/a" if not math.isfinite(r.cpu_ratio) else f"{r.cpu_ratio:8.2f}"
        lines.append(f"  {str(r.stage)[:16]:<16} {r.count:>8} {r.total_s:9.3f} {1e3 * r.mean_s:9.2f} "
                     f"{1e3 * r.p50_s:8.2f} {1e3 * r.p95_s:8.2f} {1e3 * r.p99_s:8.2f} {ratio} "
                     f"{_pct(r.critical_share)}")
    sl = a.stages.slowest
    sl = sl[sl["share"] >= 2 * sl["samples"] / sl["of_samples"].clip(lower=1)]
    for r in sl.sort_values("share", ascending=False).head(3).itertuples():
        ids = ", ".join(str(i) for i in r.sample_ids[:6]) + (", ..." if len(r.sample_ids) > 6 else "")
        lines.append(_fit(f"  slowest: {r.samples} of {r.of_samples} '{r.stage}' samples cost "
                          f"{100 * r.share:.0f} % of its time (ids {ids})"))
    st = a.stages
    busy = "unknown" if not math.isfinite(st.core_busy_in_stalls) else f"{100 * st.core_busy_in_stalls:.0f} %"
    lines += _wrap(f"{st.cores} cores, busy during stalls: {busy}. More workers can help: {st.more_workers} - "
                   f"{st.more_workers_reason}", "  ", "  cpu  ")
    return lines


def _stage_data(a: Analysis) -> dict[str, Any]:
    st = a.stages
    return {
        "stages": [
            {"stage": str(r.stage), "count": int(r.count), "total_s": _num(r.total_s), "mean_s": _num(r.mean_s),
             "p50_s": _num(r.p50_s), "p95_s": _num(r.p95_s), "p99_s": _num(r.p99_s), "max_s": _num(r.max_s),
             "cpu_s": _num(r.cpu_s), "cpu_ratio": _num(r.cpu_ratio), "critical_s": _num(r.critical_s),
             "critical_share": _num(r.critical_share)}
            for r in st.table.itertuples()
        ],
        "slowest_samples": [
            {"stage": str(r.stage), "samples": int(r.samples), "of_samples": int(r.of_samples),
             "sample_ids": [int(i) for i in r.sample_ids], "seconds": _num(r.seconds), "share": _num(r.share)}
            for r in st.slowest.itertuples()
        ],
        "cpu": {"cores": st.cores, "core_busy_in_stalls": _num(st.core_busy_in_stalls),
                "cores_saturated": st.cores_saturated, "more_workers": st.more_workers,
                "more_workers_reason": st.more_workers_reason},
    }


def _action_text(a: Analysis) -> list[str]:
    if not a.actions:
        return ["actions  nothing stands out"]
    lines = ["top actions"]
    for i, act in enumerate(a.actions[:3], start=1):
        at = f" [{act.seconds:.3f} s at stake]" if act.seconds > 0 else ""
        lines += _wrap(act.text + at, "     ", f"  {i}. ")
    return lines


def _action_data(a: Analysis) -> dict[str, Any]:
    return {"actions": [{"kind": x.kind, "text": x.text, "seconds": _num(x.seconds)} for x in a.actions[:3]]}


#: The default report, in order. ``add_section`` inserts more.
SECTIONS: list[Section] = [
    Section("head", _head_text, _head_data),
    Section("stalls", _stall_text, _stall_data),
    Section("critical path", _critical_text, _critical_data),
    Section("ceilings", _ceilings_text, _ceilings_data),
    Section("stages", _stage_text, _stage_data),
    Section("actions", _action_text, _action_data),
]

#: Keys of the JSON report (``pipeprobe report RUN --json``), with their meaning.
JSON_SCHEMA: dict[str, str] = {
    "schema": f"format name and version, {SCHEMA_VERSION!r}",
    "run_dir": "the run folder",
    "wall_s": "wall time of the run, seconds (the critical-path attribution adds up to it)",
    "batches": "batches delivered to the training loop",
    "spans": "recorded spans",
    "processes": "processes that wrote spans",
    "clock": "{method: 'shared-monotonic' | 'wall-anchor', uncertainty_s: null when unknown}",
    "problems": "list of what was missing or damaged in the run folder",
    "verdict": "'input-bound', 'step-bound', 'balanced' or 'no batches'",
    "verdict_reason": "the numbers behind the verdict, in a sentence",
    "stall_s": "total time the loop waited for batches, seconds",
    "stall_fraction": "stall_s / wall_s (per rank-second for several ranks)",
    "steady_stall_fraction": "stall share of the loop's time, warm-up batches left out",
    "warmup": "{batches_per_epoch, stall_s}: the warm-up left out of the steady state",
    "epochs": "list of {epoch, batches, stall_s, stall_fraction}",
    "worst_stalls": "up to 10 longest waits: {rank, batch_id, wait_s, blame, blame_lane, blame_samples, blame_s}",
    "critical_path": "list of {stage, kind, side, seconds, share}, largest first; stage is a stage name, "
                     "'step', 'delivery' or 'unexplained gap'; seconds sum to wall_s",
    "critical_path_lanes": "list of {lane, seconds, share}: threads on the critical path",
    "critical_path_nodes": "nodes (spans and deliveries) on the critical path",
    "critical_path_batches": "batches with work on the critical path",
    "stages": "list of {stage, count, total_s, mean_s, p50_s, p95_s, p99_s, max_s, cpu_s, cpu_ratio, "
              "critical_s, critical_share}",
    "slowest_samples": "list of {stage, samples, of_samples, sample_ids, seconds, share}",
    "cpu": "{cores, core_busy_in_stalls, cores_saturated, more_workers: 'yes'|'no'|'unknown', "
           "more_workers_reason}",
    "actions": "up to 3 of {kind, text, seconds}: suggested changes, largest time at stake first",
    "ceilings": "{stages: list of {stage, share, amdahl_ceiling, free_speedup, speedup_2x, speedup_4x, "
                "next_critical}, baseline_replay_wall_s, measured_wall_s, workers, workers_to_hide, "
                "hidden_wall_s, cores, has_cores, cores_needed, stall_left}; null without batches; "
                "infinite speed-ups are null",
}


def add_section(section: Section, *, after: str | None = None) -> None:
    """Add ``section`` to the default report, after the section named ``after`` (default: at the end).

    A section of the same name is replaced.

    Parameters
    ----------
    section : Section
    after : str, optional
        Name of an existing section.

    Raises
    ------
    ValueError
        ``after`` names no section.

    Examples
    --------
    >>> from pipeprobe.report import Section, add_section, SECTIONS
    >>> add_section(Section("example", lambda a: ["example line"]), after="critical path")
    >>> [s.name for s in SECTIONS].index("example") == [s.name for s in SECTIONS].index("critical path") + 1
    True
    >>> SECTIONS[:] = [s for s in SECTIONS if s.name != "example"]
    """
    names = [s.name for s in SECTIONS]
    if section.name in names:
        SECTIONS.pop(names.index(section.name))
        names = [s.name for s in SECTIONS]
    if after is None:
        SECTIONS.append(section)
        return
    if after not in names:
        raise ValueError(f"no report section named {after!r}; sections are {', '.join(names)}")
    SECTIONS.insert(names.index(after) + 1, section)


def format_report(analysis: Analysis, sections: list[Section] | None = None) -> str:
    """The report as plain text, at most :data:`WIDTH` columns wide.

    Parameters
    ----------
    analysis : Analysis
    sections : list of Section, optional
        Default :data:`SECTIONS`.

    Returns
    -------
    str

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for batch in probe.watch([[0], [1]]):
    ...         with probe.step():
    ...             pass
    >>> text = format_report(pipeprobe.analyze(d))
    >>> max(len(line) for line in text.splitlines()) <= 100
    True
    """
    blocks = []
    for sec in sections if sections is not None else SECTIONS:
        lines = [_fit(x) for x in sec.text(analysis)]
        if lines:
            blocks.append("\n".join(lines))
    return "\n\n".join(blocks)


def report_dict(analysis: Analysis, sections: list[Section] | None = None) -> dict[str, Any]:
    """The report as a JSON-ready dict (see :data:`JSON_SCHEMA`); NaN becomes None.

    Parameters
    ----------
    analysis : Analysis
    sections : list of Section, optional
        Default :data:`SECTIONS`.

    Returns
    -------
    dict

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for batch in probe.watch([[0]]):
    ...         pass
    >>> report_dict(pipeprobe.analyze(d))["batches"]
    1
    """
    out: dict[str, Any] = {}
    for sec in sections if sections is not None else SECTIONS:
        if sec.data is not None:
            out.update(sec.data(analysis))
    return out


def print_close_report(run_dir: str | os.PathLike, file: TextIO | None = None, *, as_json: bool = False) -> None:
    """Analyse ``run_dir`` and print its report to ``file`` (default stdout).

    Parameters
    ----------
    run_dir : path-like
    file : text stream, optional
    as_json : bool, default False
        Print one JSON object instead of text.
    """
    analysis = analyze(run_dir)
    out = file or sys.stdout
    if as_json:
        print(json.dumps(report_dict(analysis), allow_nan=False), file=out)
    else:
        print(format_report(analysis), file=out)

