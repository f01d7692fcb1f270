"""The run report: one list of sections, each giving its text, its JSON and its HTML.

:data:`SECTIONS` lists the report's parts in order. A :class:`Section`
works out its figures once per analysis (``compute``) and turns them into
text lines (``text``), keys of the JSON object (``data``) and a piece of
the HTML page (``html``). :class:`Report` holds one analysis with every
section's figures, so the text (``Probe.close()``, ``pipeprobe report``),
the JSON (``--json``) and the HTML page (``--html``) show the same numbers
and replay the run only once. :func:`add_section` adds a section to all
three. Text lines fit in :data:`WIDTH` columns and every text from the
trace is made printable (:func:`pipeprobe._text.printable`). The text and
JSON of the built-in sections live in :mod:`pipeprobe._sections`, their HTML
in :mod:`pipeprobe.html`; this module lists them and holds the steps that
replay the run (once per report).
"""

from __future__ import annotations

import os
import sys
from dataclasses import asdict, dataclass, replace
from typing import Any, Callable, TextIO

from . import _sections as part
from ._jsonnum import dumps, json_ready
from ._sections import SCHEMA_VERSION, WIDTH, fit
from ._threadsection import threads_compute, threads_data, threads_text
from .analysis import Analysis, analyze, thread_actions
from .errors import PipeprobeError
from .pace import Verdict, judge

# isort: split
# -- the what-if layer (the replay plan and the ceilings); kept together for the move to pipeprobe/whatif/
from .whatif.advice import WorkerAdvice, advised_analysis, worker_advice
from .whatif.ceilings import REPORT_MAX_BATCHES, Ceilings, ceilings, format_ceilings
from .whatif.ceilings import _head as _first_batches
from .whatif.plan import build_plan
from .whatif.restart import WorkerRestarts, format_restarts, worker_restarts

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
        self._advice: WorkerAdvice | None = None
        self._advice_made = False
        self._restarts: WorkerRestarts | None = None
        self._restarts_made = False
        self._threads: Any = None
        self.parts: list[tuple[Section, Any]] = []
        for sec in list(SECTIONS if sections is None else sections):
            self.parts.append((sec, sec.compute(self) if sec.compute is not None else analysis))

    @property
    def replay_plan(self) -> Any:
        """The replay plan of the first :data:`~pipeprobe.whatif.ceilings.REPORT_MAX_BATCHES` batches (None: no replay)."""
        if not self._plan_made:
            self._plan_made = True
            if self.analysis.batches:
                try:
                    self._plan = _first_batches(build_plan(self.analysis.run), REPORT_MAX_BATCHES)
                except PipeprobeError:
                    self._plan = None
        return self._plan

    @property
    def worker_advice(self) -> WorkerAdvice | None:
        """The run's one worker advice (:func:`~pipeprobe.whatif.advice.worker_advice`; None: no replay)."""
        if not self._advice_made:
            self._advice_made = True
            if self.replay_plan is not None:
                try:
                    self._advice = worker_advice(self.replay_plan)
                except PipeprobeError:
                    self._advice = None
        return self._advice

    @property
    def worker_restarts(self) -> WorkerRestarts | None:
        """What restarting the loader workers at each epoch cost (:func:`~pipeprobe.whatif.restart.worker_restarts`)."""
        if not self._restarts_made:
            self._restarts_made = True
            if self.replay_plan is not None:
                try:
                    self._restarts = worker_restarts(self.replay_plan, self.analysis.run)
                except PipeprobeError:
                    self._restarts = None
        return self._restarts

    @property
    def thread_check(self) -> Any:
        """The thread check (:func:`~pipeprobe.threads.check_threads`) with the replay's busy background cores."""
        if self._threads is None:
            self._threads = threads_compute(self)
        return self._threads

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
    >>> [section.name for section, figures in r.parts][:4]
    ['recorded script', 'recording window', 'verdict', 'actions']
    """
    return Report(analysis, sections)


def _as_report(x: Analysis | Report, sections: list[Section] | None) -> Report:
    return x if isinstance(x, Report) else Report(x, sections)


def _verdict_compute(report: Report) -> Verdict:
    return judge(report.analysis, plan=report.replay_plan)


def _with_analysis(fn: Callable[[Any, Analysis], Any]) -> Callable[[Report], Any]:
    """A compute step that keeps the analysis beside the figures."""
    return lambda report: (fn(report), report.analysis)


# -- ceilings ------------------------------------------------------------------------------------------
def _ceilings_compute(report: Report) -> Ceilings | str | None:
    """The ceilings of the report's replay plan; a sentence when the replay cannot run; None without batches."""
    if not report.analysis.batches:
        return None
    if report.replay_plan is None:
        return "no replay: the run's batches could not be laid out for the replay"
    try:
        return ceilings(report.replay_plan, analysis=report.analysis, advice=report.worker_advice)
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


def _advised(report: Report) -> Analysis:
    """The analysis with its worker action and CPU answer read from the report's one worker advice, and the
    thread fix of the report's own thread check (the one its threads section shows)."""
    advised = advised_analysis(report.analysis, report.worker_advice, report.worker_restarts)
    return replace(advised, actions=thread_actions(advised.actions, report.thread_check))


def _restarts_data(r: WorkerRestarts | None) -> dict[str, Any]:
    return {"worker_restarts": r.to_dict() if r is not None else None}


def _no_html(fig: Any, page: Any) -> str:
    return ""


def _page(name: str) -> Callable[[Any, Any], str]:
    """The HTML of a built-in section: a function of :mod:`pipeprobe.html` (imported when the page is made)."""

    def render(figures: Any, page: Any) -> str:
        from . import html

        return getattr(html, name)(figures, page)

    render.__name__ = name
    return render


#: Name of the section on a run folder recorded by ``pipeprobe run`` (its loaders; what 'step' means there).
SCRIPT_SECTION = "recorded script"

#: The default report, in order: what paces the run and what a change would buy first. ``add_section`` adds more.
SECTIONS: list[Section] = [
    Section(SCRIPT_SECTION, part.script_text, part.script_data, None, part.script_compute),
    Section("recording window", part.window_text, part.window_data),
    Section("verdict", lambda f: part.verdict_text(*f), lambda f: part.verdict_data(*f), _page("verdict_html"),
            _with_analysis(_verdict_compute)),
    Section("actions", part.action_text, part.action_data, _page("actions_html"), _advised),
    Section("ceilings", _ceilings_text, _ceilings_data, _page("ceilings_html"), _with_analysis(_ceilings_compute)),
    Section("stalls", part.stall_text, part.stall_data, _page("stalls_html"),
            lambda report: part.restart_blame(report.analysis, report.worker_restarts)),
    Section("worker restarts", lambda r: format_restarts(r) if r else [], _restarts_data, _page("restarts_html"),
            lambda report: report.worker_restarts),
    Section("critical path", part.critical_text, part.critical_data, _page("critical_html")),
    Section("stages", part.stage_text, part.stage_data, _page("stages_html"), _advised),
    Section("ranks", part.ranks_text, part.ranks_data, _page("ranks_html"), part.ranks_compute),
    Section("timeline", lambda a: [], None, _page("timeline_html")),
    Section("threads", threads_text, threads_data, None, lambda report: report.thread_check),
    Section("recording cost", part.cost_text, part.cost_data, _page("cost_html"), part.cost_compute),
    Section("next", lambda f: part.next_text(*f), None, _no_html, lambda r: (r.analysis, r.worker_advice)),
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
                "next_critical}, baseline_replay_wall_s, measured_wall_s, workers, advice: {more_workers, "
                "recorded_workers, workers, prefetch, stall_now, stall_left, measured_stall, speedup, seconds_saved, "
                "cores, machine_cores, cores_limit, unlimited_workers, unlimited_speedup, cores_busy, reason}, "
                "model_check: {miss, flagged, likely_cause} or null (the report replayed only the first batches)}; "
                "null without batches",
    "worker_restarts": "{restarts, epochs, first_start_s, restart_s: per later epoch, restart_total_s, "
                       "persistent_wall_s, saved_s, measured_wall_s, worth_naming}: new loader workers at each "
                       "epoch, and the replay with them kept; null without a replay",
    "stall_s": "total time the loop waited for batches, seconds",
    "stall_fraction": "stall_s / wall_s (per rank-second for several ranks)",
    "steady_stall_fraction": "stall share of the loop's time, warm-up batches left out",
    "warmup": "{batches_per_epoch, stall_s, extra_stall_s}: the warm-up left out of the steady state, and its "
              "stall beyond what as many steady batches wait",
    "epochs": "list of {epoch, batches, stall_s, stall_fraction}",
    "worst_stalls": "up to 10 longest waits: {rank, batch_id, wait_s, blame, blame_lane, blame_samples (up to 8 "
                    "sample ids), blame_sample_count, blame_s}; blame 'workers starting': an epoch's first wait spent "
                    "on loader workers starting (new ones every epoch: persistent_workers=False)",
    "critical_path": "list of {stage, kind, side, seconds, share}, largest first; stage is a stage name, "
                     "'step', 'delivery' or 'unexplained gap'; seconds sum to wall_s",
    "critical_path_lanes": "list of {lane, seconds, share}: threads on the critical path",
    "critical_path_nodes": "nodes (spans and deliveries) on the critical path",
    "critical_path_batches": "batches with work on the critical path",
    "stages": "list of {stage, count, total_s, mean_s, p50_s, p95_s, p99_s, max_s, cpu_s, cpu_ratio, "
              "critical_s, critical_share, own_s, label}",
    "slowest_samples": "list of {stage, samples, of_samples, sample_ids, seconds, share}",
    "cpu": "{cores, core_busy_in_stalls, cores_saturated, more_workers: 'yes'|'no'|'unknown', "
           "more_workers_reason}; with a replay, the same answer as ceilings.advice",
    "threads": "{skipped: null or why, cores, step_threads, step_cores, pools: list of {api, library, threads}, "
               "workers, worker_load, oversubscribed, busy_steps, idle_steps, busy_step_s, idle_step_s, slowdown, "
               "explained_slowdown, unexplained, cost_s, advice, background_cores, spin_s, spin_share, spins}: the step's threads against the "
               "loader workers",
    "recording_cost": "{spans, measured, processes: list of {pid, rank, role, spans, span_cost_ns, added_s, "
                      "wall_share}, too_short: list of {stage, p50_s, limit_s}}; span_cost_ns null when the run "
                      "did not measure it",
    "script": "null, or {command, step: what 'step' means (the loop's time between batches, not timed), "
              "training_loader, loaders: list of {loader, batches, epochs, stall_s, loop_s, stall_share}}: a run "
              "recorded by pipeprobe run (its script.json)",
    "window": "null, or {spec, every_batches, period_s, stretches: list of {stretch, first_batch, last_batch, "
              "batches, start_s, wall_s}}: a run recorded in stretches (Probe(window=...))",
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
        lines = [fit(x) for x in sec.text(fig)]
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
