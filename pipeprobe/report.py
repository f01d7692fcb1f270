"""The run report: one list of sections, each giving its text, its JSON and its HTML.

:data:`SECTIONS` lists the report's parts in order. A :class:`Section`
works out its figures once per analysis (``compute``) and turns them into
text lines (``text``), keys of the JSON object (``data``) and a piece of
the HTML page (``html``). :class:`Report` holds one analysis with every
section's figures, so the text (``Probe.close()``, ``pipeprobe report``),
the JSON (``--json``) and the HTML page (``--html``) show the same numbers
and replay the run only once. :func:`add_section` adds a section to all
three. Text lines fit in :data:`WIDTH` columns and every text from the
trace is made printable (:func:`pipeprobe._text.printable`).
"""

from __future__ import annotations

import math
import os
import sys
from dataclasses import asdict, dataclass
from typing import Any, Callable, TextIO

from ._jsonnum import dumps, json_number, json_ready
from ._text import printable
from .analysis import Analysis, analyze
from .critical import PACE_SPEEDUP
from .errors import PipeprobeError
from .pace import Verdict, judge
from .stalls import sample_words

# isort: split
# -- the what-if layer (the replay plan and the ceilings); kept together for the move to pipeprobe/whatif/
from .ceilings import REPORT_MAX_BATCHES, Ceilings, ceilings, format_ceilings
from .ceilings import _head as _first_batches
from .replay import build_plan

__all__ = [
    "Section",
    "Report",
    "SECTIONS",
    "WIDTH",
    "JSON_SCHEMA",
    "SCHEMA_VERSION",
    "add_section",
    "build_report",
    "format_report",
    "report_dict",
    "print_close_report",
]

#: Columns the text report fits in.
WIDTH = 100
#: Value of the ``schema`` key of the JSON report.
SCHEMA_VERSION = "pipeprobe-report/2"


@dataclass(frozen=True)
class Section:
    """One part of the report, in text, JSON and HTML.

    Attributes
    ----------
    name : str
        Short name, unique in the list (e.g. ``"critical path"``).
    text : callable
        ``text(figures) -> list[str]``: lines of at most :data:`WIDTH` characters.
    data : callable, optional
        ``data(figures) -> dict``: keys merged into the JSON report.
    html : callable, optional
        ``html(figures, page) -> str``: the section's part of the HTML page
        (``page.analysis``, ``page.dpi``, ``page.window_s``); without it the
        page shows the text lines under the section's name.
    compute : callable, optional
        ``compute(report) -> figures``, called once per analysis; without it
        the figures are the :class:`~pipeprobe.analysis.Analysis` itself.
    """

    name: str
    text: Callable[[Any], list[str]]
    data: Callable[[Any], dict[str, Any]] | None = None
    html: Callable[[Any, Any], str] | None = None
    compute: Callable[[Report], Any] | None = None


class Report:
    """One analysis with the figures of every section, each computed once.

    Parameters
    ----------
    analysis : Analysis
    sections : list of Section, optional
        Default :data:`SECTIONS` (as it is when the report is made).

    Attributes
    ----------
    analysis : Analysis
    parts : list of (Section, figures)
    """

    def __init__(self, analysis: Analysis, sections: list[Section] | None = None) -> None:
        self.analysis = analysis
        self._plan: Any = None
        self._plan_made = False
        self.parts: list[tuple[Section, Any]] = []
        for sec in list(SECTIONS if sections is None else sections):
            self.parts.append((sec, sec.compute(self) if sec.compute is not None else analysis))

    @property
    def replay_plan(self) -> Any:
        """The replay plan of the first :data:`~pipeprobe.ceilings.REPORT_MAX_BATCHES` batches (None: no replay)."""
        if not self._plan_made:
            self._plan_made = True
            if self.analysis.batches:
                try:
                    self._plan = _first_batches(build_plan(self.analysis.run), REPORT_MAX_BATCHES)
                except PipeprobeError:
                    self._plan = None
        return self._plan

    def figures(self, name: str) -> Any:
        """The figures of the section called ``name``."""
        for sec, fig in self.parts:
            if sec.name == name:
                return fig
        raise KeyError(f"no report section named {name!r}")


def build_report(analysis: Analysis, sections: list[Section] | None = None) -> Report:
    """Work out every section's figures once: the report ready for text, JSON and HTML.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for batch in probe.watch([[0], [1]]):
    ...         with probe.step():
    ...             pass
    >>> r = build_report(pipeprobe.analyze(d))
    >>> r.parts[0][0].name
    'verdict'
    """
    return Report(analysis, sections)


def _as_report(x: Analysis | Report, sections: list[Section] | None) -> Report:
    return x if isinstance(x, Report) else Report(x, sections)


# -- number and line formats (one place for each) ------------------------------------------------------
def _pct(x: float | None) -> str:
    return "   n/a" if x is None or not math.isfinite(x) else f"{100 * x:5.1f} %"


def _speedup(x: float) -> str:
    if math.isnan(x):
        return "n/a"
    return "unbounded" if math.isinf(x) else f"{x:.2f}x"


def _fit(line: str) -> str:
    line = printable(line)
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


# -- verdict -------------------------------------------------------------------------------------------
def _verdict_compute(report: Report) -> Verdict:
    return judge(report.analysis, plan=report.replay_plan)


def _verdict_text(v: Verdict, a: Analysis) -> list[str]:
    run = a.run
    lines = [f"pipeprobe  {run.run_dir}",
             f"  {a.wall_s:.3f} s wall, {a.batches} batches, {len(run.spans)} spans, {len(run.processes)} process(es)",
             f"  pace  {v.heading}"]
    if a.batches:
        lines.append(f"    critical path: input side {100 * v.input_share:.0f} %, step side {100 * v.step_share:.0f} %")
        lines.append(f"    input free: run {_speedup(v.input_free_speedup)} faster (replayed); "
                     f"Amdahl's ceiling {_speedup(v.input_ceiling)}")
        lines.append(f"    step free: run {_speedup(v.step_free_speedup)} faster (replayed); "
                     f"Amdahl's ceiling {_speedup(v.step_ceiling)}")
    if v.note:
        lines += _wrap(v.note, "      ", "    note: ")
    for p in run.problems[:3]:
        lines.append(f"  note: {p}")
    return lines


def _verdict_data(v: Verdict, a: Analysis) -> dict[str, Any]:
    run = a.run
    return {
        "schema": SCHEMA_VERSION,
        "run_dir": str(run.run_dir),
        "wall_s": json_number(a.wall_s),
        "batches": a.batches,
        "spans": int(len(run.spans)),
        "processes": int(len(run.processes)),
        "clock": {"method": run.clock.get("method"), "uncertainty_s": json_number(run.clock.get("uncertainty_s"))},
        "problems": list(run.problems),
        "pace": {"outcome": v.pace, "heading": v.heading, "input_path_share": v.input_share,
                 "step_path_share": v.step_share, "note": v.note},
        "at_stake": {"input_free_speedup": v.input_free_speedup, "step_free_speedup": v.step_free_speedup,
                     "input_amdahl_ceiling": v.input_ceiling, "step_amdahl_ceiling": v.step_ceiling,
                     "replayed_batches": v.replayed_batches, "threshold_speedup": PACE_SPEEDUP},
    }


def _with_analysis(fn: Callable[[Any, Analysis], Any]) -> Callable[[Report], Any]:
    """A compute step that keeps the analysis beside the figures."""
    return lambda report: (fn(report), report.analysis)


# -- actions -------------------------------------------------------------------------------------------
def _action_text(a: Analysis) -> list[str]:
    if not a.actions:
        return ["top actions  nothing stands out"]
    lines = ["top actions"]
    for i, act in enumerate(a.actions[:3], start=1):
        at = f" [{act.seconds:.3f} s at stake]" if act.seconds > 0 else ""
        lines += _wrap(printable(act.text) + at, "     ", f"  {i}. ")
    return lines


def _action_data(a: Analysis) -> dict[str, Any]:
    return {"actions": [{"kind": x.kind, "text": x.text, "seconds": json_number(x.seconds)} for x in a.actions[:3]]}


# -- ceilings ------------------------------------------------------------------------------------------
def _ceilings_compute(report: Report) -> Ceilings | str | None:
    """The ceilings of the report's replay plan; a sentence when the replay cannot run; None without batches."""
    if not report.analysis.batches:
        return None
    if report.replay_plan is None:
        return "no replay: the run's batches could not be laid out for the replay"
    try:
        return ceilings(report.replay_plan, analysis=report.analysis)
    except PipeprobeError as exc:
        return f"no replay: {exc}"


def _ceilings_text(fig: tuple[Ceilings | str | None, Analysis]) -> list[str]:
    c, a = fig
    if c is None:
        return []
    if isinstance(c, str):
        return ["speed-up ceilings", f"  {c}"]
    lines = format_ceilings(c, WIDTH)
    if a.batches > REPORT_MAX_BATCHES:
        lines.insert(1, f"  (replayed on the first {REPORT_MAX_BATCHES} of {a.batches} batches)")
    return lines


def _ceilings_data(fig: tuple[Ceilings | str | None, Analysis]) -> dict[str, Any]:
    c = fig[0]
    return {"ceilings": asdict(c) if isinstance(c, Ceilings) else None}


# -- stalls --------------------------------------------------------------------------------------------
def _worst_stalls(a: Analysis, n: int) -> Any:
    pb = a.stalls.per_batch
    return pb[pb["wait_s"] > 0].sort_values("wait_s", ascending=False).head(n)


def _stall_text(a: Analysis) -> list[str]:
    s = a.stalls
    if not a.batches:
        return ["stalls  none measured: no batch reached probe.watch()"]
    lines = [
        f"stalls  {s.total_s:.3f} s = {_pct(s.fraction).strip()} of wall;  steady state "
        f"{_pct(s.steady_fraction).strip()}",
        f"  warm-up (first {s.warmup_batches} batch(es) of each epoch, not in the steady state): "
        f"{s.warmup_extra_s:.3f} s extra stall",
    ]
    for row in _worst_stalls(a, 3).itertuples():
        why = f": {row.blame_text}" if row.blame_text else ""
        lines.append(f"  batch {row.batch_id:>6}  waited {1e3 * row.wait_s:9.2f} ms{why}")
    if len(s.per_epoch) > 1:
        ep = ", ".join(f"{int(r.epoch)}: {100 * r.stall_fraction:.0f} %" for r in s.per_epoch.head(8).itertuples())
        more = ", ..." if len(s.per_epoch) > 8 else ""
        lines.append(f"  per epoch  {ep}{more}")
    return lines


def _stall_data(a: Analysis) -> dict[str, Any]:
    s = a.stalls
    return {
        "stall_s": s.total_s,
        "stall_fraction": s.fraction,
        "steady_stall_fraction": s.steady_fraction,
        "warmup": {"batches_per_epoch": s.warmup_batches, "stall_s": s.warmup_s, "extra_stall_s": s.warmup_extra_s},
        "epochs": [
            {"epoch": int(r.epoch), "batches": int(r.batches), "stall_s": r.stall_s, "stall_fraction": r.stall_fraction}
            for r in s.per_epoch.itertuples()
        ],
        "worst_stalls": [
            {"rank": int(r.rank), "batch_id": int(r.batch_id), "wait_s": r.wait_s, "blame": r.blame,
             "blame_lane": r.blame_lane, "blame_samples": list(r.blame_sample_ids), "blame_sample_count":
             int(r.blame_sample_count), "blame_s": r.blame_s}
            for r in _worst_stalls(a, 10).itertuples()
        ],
    }


# -- critical path -------------------------------------------------------------------------------------
def _critical_text(a: Analysis) -> list[str]:
    cp = a.critical
    lines = [f"critical path  {len(cp.path)} nodes over {len(cp.batches)} batches; where the wall time went:"]
    for row in cp.shares.head(8).itertuples():
        bar = "#" * int(round(30 * row.share))
        lines.append(f"  {printable(row.label)[:24]:<24} {row.seconds:10.3f} s {_pct(row.share)}  {bar}")
    if len(cp.shares) > 8:
        rest = cp.shares.iloc[8:]
        lines.append(f"  {'(' + str(len(rest)) + ' more)':<24} {rest['seconds'].sum():10.3f} s "
                     f"{_pct(float(rest['share'].sum()))}")
    if len(cp.lanes):
        lanes = ", ".join(f"{r.lane} {100 * r.share:.0f} %" for r in cp.lanes.head(5).itertuples())
        lines.append(f"  threads on the path: {lanes}")
    return lines


def _critical_data(a: Analysis) -> dict[str, Any]:
    cp = a.critical
    return {
        "critical_path": [{"stage": str(r.label), "kind": str(r.kind), "side": str(r.side), "seconds": r.seconds,
                           "share": r.share} for r in cp.shares.itertuples()],
        "critical_path_lanes": [{"lane": str(r.lane), "seconds": r.seconds, "share": r.share}
                                for r in cp.lanes.itertuples()],
        "critical_path_nodes": int(len(cp.path)),
        "critical_path_batches": len(cp.batches),
    }


# -- stages --------------------------------------------------------------------------------------------
#: Columns of the stage table, in the order text and HTML both show them: (title, unit).
STAGE_COLUMNS = [("count", ""), ("total", "s"), ("mean", "ms"), ("p50", "ms"), ("p95", "ms"), ("p99", "ms"),
                 ("cpu/wall", ""), ("on path", "%")]


def stage_cells(r: Any) -> list[str]:
    """One row of the stage table as text cells, in :data:`STAGE_COLUMNS` order."""
    ratio = "n/a" if not math.isfinite(r.cpu_ratio) else f"{r.cpu_ratio:.2f}"
    return [f"{int(r.count)}", f"{r.total_s:.3f}", f"{1e3 * r.mean_s:.2f}", f"{1e3 * r.p50_s:.2f}",
            f"{1e3 * r.p95_s:.2f}", f"{1e3 * r.p99_s:.2f}", ratio, _pct(r.critical_share).strip()]


def _stage_text(a: Analysis) -> list[str]:
    t = a.stages.table
    if t.empty:
        return ["stages  none recorded"]
    widths = [8, 9, 9, 8, 8, 8, 8, 8]
    head = " ".join(f"{(n + ' ' + u).strip() if u not in ('', '%') else n:>{w}}" for (n, u), w in
                    zip(STAGE_COLUMNS, widths, strict=True))
    lines = [f"{'stages':<18} {head}"]
    for r in t.head(10).itertuples():
        cells = " ".join(f"{c:>{w}}" for c, w in zip(stage_cells(r), widths, strict=True))
        lines.append(f"  {printable(r.stage)[:16]:<16} {cells}")
    for r in _notable_tails(a).itertuples():
        lines.append(f"  slowest: {r.samples} of {r.of_samples} '{r.stage}' samples cost "
                     f"{100 * r.share:.0f} % of its time ({sample_words(list(r.sample_ids), int(r.samples))})")
    st = a.stages
    busy = "unknown" if not math.isfinite(st.core_busy_in_stalls) else f"{100 * st.core_busy_in_stalls:.0f} %"
    lines += _wrap(f"{st.cores} cores, busy during stalls: {busy}. More workers can help: {st.more_workers} - "
                   f"{printable(st.more_workers_reason)}", "  ", "  cpu  ")
    return lines


def _notable_tails(a: Analysis) -> Any:
    sl = a.stages.slowest
    sl = sl[sl["share"] >= 2 * sl["samples"] / sl["of_samples"].clip(lower=1)]
    return sl.sort_values("share", ascending=False).head(3)


def _stage_data(a: Analysis) -> dict[str, Any]:
    st = a.stages
    return {
        "stages": [
            {"stage": str(r.stage), "count": int(r.count), "total_s": r.total_s, "mean_s": r.mean_s, "p50_s": r.p50_s,
             "p95_s": r.p95_s, "p99_s": r.p99_s, "max_s": r.max_s, "cpu_s": r.cpu_s, "cpu_ratio": r.cpu_ratio,
             "critical_s": r.critical_s, "critical_share": r.critical_share}
            for r in st.table.itertuples()
        ],
        "slowest_samples": [
            {"stage": str(r.stage), "samples": int(r.samples), "of_samples": int(r.of_samples),
             "sample_ids": [int(i) for i in r.sample_ids], "seconds": r.seconds, "share": r.share}
            for r in st.slowest.itertuples()
        ],
        "cpu": {"cores": st.cores, "core_busy_in_stalls": st.core_busy_in_stalls,
                "cores_saturated": st.cores_saturated, "more_workers": st.more_workers,
                "more_workers_reason": st.more_workers_reason},
    }


# -- several ranks -------------------------------------------------------------------------------------
def _ranks_compute(report: Report) -> Any:
    from .ranks import rank_count, rank_view

    run = report.analysis.run
    return (rank_view(run) if rank_count(run) > 1 else None), rank_count(run)


def _ranks_text(fig: tuple[Any, int]) -> list[str]:
    from .ranks import format_rank_view

    view, _ = fig
    return [] if view is None else format_rank_view(view).splitlines()


def _ranks_data(fig: tuple[Any, int]) -> dict[str, Any]:
    from .ranks import rank_view_dict

    view, count = fig
    if view is None:
        return {"ranks": {"count": count, "cross_rank_view": False}}
    return {"ranks": {"count": count, "cross_rank_view": True, **rank_view_dict(view)}}


# -- what recording cost -------------------------------------------------------------------------------
def _cost_compute(report: Report) -> Any:
    from .probecost import recording_cost

    a = report.analysis
    return recording_cost(a.run, a.stages.table, a.wall_s)


def _cost_text(c: Any) -> list[str]:
    if not c.measured:
        return [f"recording cost  {c.spans} spans; per-span cost not measured in this run, so no estimate"]
    lines = [f"recording cost  {c.spans} spans; per-span cost measured at probe start, time it added:"]
    for p in c.processes.itertuples(index=False):
        if math.isnan(p.span_cost_ns):
            lines.append(f"  {p.role} pid {p.pid}: {p.spans} spans, cost not measured")
        else:
            lines.append(f"  {p.role} pid {p.pid}: {p.spans} spans x {p.span_cost_ns / 1e3:.2f} us = "
                         f"{1e3 * p.added_s:.2f} ms, {100 * p.wall_share:.2f} % of wall")
    for r in c.too_short.itertuples(index=False):
        lines.append(f"  '{r.stage}' is too short to time per item (median {1e6 * r.p50_s:.1f} us, under "
                     f"{1e6 * r.limit_s:.1f} us): time it per batch")
    return lines


def _cost_data(c: Any) -> dict[str, Any]:
    return {"recording_cost": {
        "spans": c.spans, "measured": c.measured,
        "processes": [dict(p._asdict()) for p in c.processes.itertuples(index=False)],
        "too_short": [dict(r._asdict()) for r in c.too_short.itertuples(index=False)],
    }}


# -- what to run next ----------------------------------------------------------------------------------
#: Longest run folder the "next" commands quote in full (longer ones: RUN_DIR, the folder named at the top).
_NEXT_PATH_MAX = 40


def _next_text(a: Analysis) -> list[str]:
    if not a.batches:
        return []
    run = printable(a.run.run_dir)
    run = run if len(run) <= _NEXT_PATH_MAX else "RUN_DIR"  # a command cut at 100 columns would mislead
    top = next((str(r.label) for r in a.critical.shares.itertuples() if r.side == "input" and r.kind == "stage"),
               "step")
    return ["next",
            f"  pipeprobe whatif {run} --faster {printable(top)}=2   # what a faster stage would buy",
            f"  pipeprobe whatif {run} --workers 4",
            f"  pipeprobe report {run} --html report.html   # charts and the timeline",
            "  notebooks/walkthrough.ipynb   # the same steps in a notebook"]


def _no_html(fig: Any, page: Any) -> str:
    return ""


def _page(name: str) -> Callable[[Any, Any], str]:
    """The HTML of a built-in section: a function of :mod:`pipeprobe.html` (imported when the page is made)."""

    def render(figures: Any, page: Any) -> str:
        from . import html

        return getattr(html, name)(figures, page)

    render.__name__ = name
    return render


#: The default report, in order: what paces the run and what a change would buy first. ``add_section`` adds more.
SECTIONS: list[Section] = [
    Section("verdict", lambda f: _verdict_text(*f), lambda f: _verdict_data(*f), _page("verdict_html"),
            _with_analysis(_verdict_compute)),
    Section("actions", _action_text, _action_data, _page("actions_html")),
    Section("ceilings", _ceilings_text, _ceilings_data, _page("ceilings_html"), _with_analysis(_ceilings_compute)),
    Section("stalls", _stall_text, _stall_data, _page("stalls_html")),
    Section("critical path", _critical_text, _critical_data, _page("critical_html")),
    Section("stages", _stage_text, _stage_data, _page("stages_html")),
    Section("ranks", _ranks_text, _ranks_data, _page("ranks_html"), _ranks_compute),
    Section("timeline", lambda a: [], None, _page("timeline_html")),
    Section("recording cost", _cost_text, _cost_data, _page("cost_html"), _cost_compute),
    Section("next", _next_text, None, _no_html),
]

#: Keys of the JSON report (``pipeprobe report RUN --json``), with their meaning.
JSON_SCHEMA: dict[str, str] = {
    "schema": f"format name and version, {SCHEMA_VERSION!r}",
    "run_dir": "the run folder",
    "wall_s": "wall time of the run, seconds (the critical-path attribution adds up to it)",
    "batches": "batches delivered to the training loop",
    "spans": "recorded spans",
    "processes": "processes that wrote spans",
    "clock": "{method: 'shared-monotonic' | 'wall-anchor' | 'measured-offsets', uncertainty_s: null when unknown}",
    "problems": "list of what was missing or damaged in the run folder",
    "pace": "{outcome: 'input' | 'step' | 'in turn' | 'level' | 'none', heading, input_path_share, "
            "step_path_share, note}: which side sets the pace",
    "at_stake": "{input_free_speedup, step_free_speedup (replayed), input_amdahl_ceiling, step_amdahl_ceiling, "
                "replayed_batches, threshold_speedup}: what freeing each side would buy",
    "actions": "up to 3 of {kind, text, seconds}: suggested changes, largest time at stake first",
    "ceilings": "{stages: list of {stage, share, amdahl_ceiling, free_speedup, speedup_2x, speedup_4x, "
                "next_critical}, baseline_replay_wall_s, measured_wall_s, workers, workers_to_hide, "
                "hidden_wall_s, cores, has_cores, cores_needed, stall_left}; null without batches",
    "stall_s": "total time the loop waited for batches, seconds",
    "stall_fraction": "stall_s / wall_s (per rank-second for several ranks)",
    "steady_stall_fraction": "stall share of the loop's time, warm-up batches left out",
    "warmup": "{batches_per_epoch, stall_s, extra_stall_s}: the warm-up left out of the steady state, and its "
              "stall beyond what as many steady batches wait",
    "epochs": "list of {epoch, batches, stall_s, stall_fraction}",
    "worst_stalls": "up to 10 longest waits: {rank, batch_id, wait_s, blame, blame_lane, blame_samples (up to 8 "
                    "sample ids), blame_sample_count, blame_s}",
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
    "recording_cost": "{spans, measured, processes: list of {pid, rank, role, spans, span_cost_ns, added_s, "
                      "wall_share}, too_short: list of {stage, p50_s, limit_s}}; span_cost_ns null when the run "
                      "did not measure it",
    "ranks": "{count, cross_rank_view: false} for one rank; with several: also straggler_rank, straggler_cause, "
             "straggler_stage, straggler_stall_fraction, straggler_cost_s, idle_rank_s, missing_ranks, "
             "per_rank: list of {rank, steps, last_steps, caused_s, waited_s, stall_s, active_s, stall_fraction}",
}


def add_section(section: Section, *, after: str | None = None) -> None:
    """Add ``section`` to the default report (text, JSON and HTML), after the section named ``after``.

    A section of the same name is replaced; without ``after`` it goes at the end.

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


def format_report(analysis: Analysis | Report, sections: list[Section] | None = None) -> str:
    """The report as plain text, at most :data:`WIDTH` columns wide, control characters escaped.

    Parameters
    ----------
    analysis : Analysis or Report
    sections : list of Section, optional
        Default :data:`SECTIONS` (ignored for a :class:`Report`).

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
    for sec, fig in _as_report(analysis, sections).parts:
        lines = [_fit(x) for x in sec.text(fig)]
        if lines:
            blocks.append("\n".join(lines))
    return "\n\n".join(blocks)


def report_dict(analysis: Analysis | Report, sections: list[Section] | None = None) -> dict[str, Any]:
    """The report as a JSON-ready dict (see :data:`JSON_SCHEMA`): NaN is None, infinity ``"inf"``.

    Parameters
    ----------
    analysis : Analysis or Report
    sections : list of Section, optional
        Default :data:`SECTIONS` (ignored for a :class:`Report`).

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
    for sec, fig in _as_report(analysis, sections).parts:
        if sec.data is not None:
            out.update(sec.data(fig))
    return json_ready(out)


def print_report(report: Report, file: TextIO | None = None, *, as_json: bool = False) -> None:
    """Print a made :class:`Report` as text or one JSON object to ``file`` (default stdout)."""
    out = file or sys.stdout
    print(dumps(report_dict(report)) if as_json else format_report(report), file=out)


def print_close_report(run_dir: str | os.PathLike, file: TextIO | None = None, *, as_json: bool = False) -> None:
    """Analyse ``run_dir`` and print its report to ``file`` (default stdout).

    Parameters
    ----------
    run_dir : path-like
    file : text stream, optional
    as_json : bool, default False
        Print one JSON object instead of text.
    """
    print_report(Report(analyze(run_dir)), file, as_json=as_json)
