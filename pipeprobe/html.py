"""The one-file HTML report: ``pipeprobe report RUN_DIR --html report.html``.

:func:`render_report` returns a complete HTML page made from the report's
one list of sections (:data:`pipeprobe.report.SECTIONS`): each section's
figures are worked out once and this module draws their HTML (a section
without its own HTML shows its text lines). :func:`write_report` writes
the page next to the target under a fresh name opened exclusively, then
renames it over the target, and refuses to replace anything that is not a
regular file. The page stands alone: its pictures are PNG images inside the
file (``data:`` URIs), its style sheet is inline, it holds no script and
fetches nothing (a Content-Security-Policy that allows only inline styles
and ``data:`` images says so to the browser too). Every text that comes
from the trace (stage names, thread names, the run folder, load problems)
is HTML-escaped, so a stage named ``<script>`` shows as text.
"""

from __future__ import annotations

import base64
import errno
import html
import io
import math
import os
import stat
import tempfile
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable

from . import __version__
from ._sections import STAGE_COLUMNS, stage_cells
from ._text import printable
from .errors import PipeprobeError
from .report import Report
from .whatif.predict import model_check_text

__all__ = ["render_report", "write_report", "OutputFileError"]


class OutputFileError(PipeprobeError, OSError):
    """The HTML report cannot be written where asked (a folder, a link, a device, a read-only place)."""

_CSS = """
body { font-family: "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; color: #1d1d1d; background: #ffffff;
       margin: 0 auto; max-width: 1160px; padding: 18px 28px 40px; line-height: 1.45; font-size: 14px; }
h1 { font-size: 21px; margin: 0 0 2px; font-weight: 600; }
h2 { font-size: 16px; margin: 30px 0 8px; padding-bottom: 3px; border-bottom: 2px solid #332288; font-weight: 600; }
.sub { color: #555555; font-size: 12.5px; margin: 0; }
.pace { margin: 16px 0 6px; padding: 12px 16px; border-top: 5px solid #332288; background: #F3F1F8; }
.pace .heading { font-size: 19px; font-weight: 600; display: block; margin-bottom: 4px; }
.pace.input { border-top-color: #117733; background: #EFF6F1; }
.pace.in-turn, .pace.level { border-top-color: #DDCC77; background: #FBF8EC; }
pre { font-size: 12.5px; background: #F6F6F6; padding: 8px; overflow-x: auto; }
.figures { display: flex; flex-wrap: wrap; gap: 10px; margin: 8px 0 12px; }
.figure { border: 1px solid #D5D5D5; padding: 6px 12px; min-width: 150px; }
.figure .value { font-size: 19px; font-weight: 600; display: block; }
.figure .what { font-size: 12px; color: #555555; }
table { border-collapse: collapse; margin: 6px 0 10px; font-size: 13px; }
th { text-align: left; font-weight: 600; border-bottom: 1.5px solid #555555; padding: 3px 10px 3px 0; }
td { border-bottom: 1px solid #E3E3E3; padding: 3px 10px 3px 0; vertical-align: top; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
.share { display: inline-block; height: 9px; background: #332288; vertical-align: middle; }
.share.input { background: #117733; } .share.delivery { background: #DDCC77; } .share.gap { background: #BBBBBB; }
img { max-width: 100%; height: auto; display: block; margin: 8px 0; }
ol li { margin: 3px 0; }
.note { color: #6A3D00; font-size: 12.5px; }
footer { margin-top: 34px; color: #777777; font-size: 11.5px; }
"""

_CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"


def _e(value: Any) -> str:
    """Escape any value for HTML text or attribute use (control characters and lone surrogates made visible)."""
    return html.escape(printable(value), quote=True)


def _s(seconds: float) -> str:
    if seconds is None or not math.isfinite(seconds):
        return "n/a"
    if abs(seconds) >= 1:
        return f"{seconds:.3f} s"
    return f"{seconds * 1e3:.2f} ms"


def _pct(x: float) -> str:
    return "n/a" if x is None or not math.isfinite(x) else f"{100 * x:.1f} %"


def _png(fig: Any, dpi: int = 100) -> str:
    """Render a matplotlib Figure to a PNG data URI, then drop its contents."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    fig.clear()
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _img(uri: str, alt: str) -> str:
    return f'<img src="{uri}" alt="{_e(alt)}">'


def _table(head: list[tuple[str, bool]], rows: Iterable[list[str]]) -> str:
    """``head``: (title, numeric); cells in ``rows`` must already be escaped."""
    th = "".join(f'<th class="num">{_e(h)}</th>' if num else f"<th>{_e(h)}</th>" for h, num in head)
    body = []
    for row in rows:
        cells = "".join(
            f'<td class="num">{c}</td>' if head[i][1] else f"<td>{c}</td>" for i, c in enumerate(row)
        )
        body.append(f"<tr>{cells}</tr>")
    return f"<table><thead><tr>{th}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _figure(value: str, what: str) -> str:
    return f'<div class="figure"><span class="value">{_e(value)}</span><span class="what">{_e(what)}</span></div>'


def _x(value: float) -> str:
    if math.isnan(value):
        return "n/a"
    return "unbounded" if math.isinf(value) else f"{value:.2f}x"


@dataclass(frozen=True)
class _Page:
    """What every section's HTML may need besides its figures."""

    analysis: Any
    dpi: int = 100
    window_s: tuple[float, float] | None = None


# -- the HTML of each built-in section (named in pipeprobe.report.SECTIONS) -----------------------------
def verdict_html(fig: Any, page: _Page) -> str:
    """The opening box: what sets the pace, and what freeing each side would buy."""
    v, a = fig
    r = a.run
    cards = ""
    if a.batches:
        cards = ('<div class="figures">'
                 + _figure(_x(v.input_free_speedup), f"whole run faster with the input free (Amdahl's ceiling "
                                                     f"{_x(v.input_ceiling)})")
                 + _figure(_x(v.step_free_speedup), f"whole run faster with the step free (Amdahl's ceiling "
                                                    f"{_x(v.step_ceiling)})")
                 + _figure(f"{_pct(v.input_share)} / {_pct(v.step_share)}", "critical path: input side / step side")
                 + "</div>")
    note = f'<p class="note">{_e(v.note)}</p>' if v.note else ""
    box = (f'<div class="pace {_e(v.pace.replace(" ", "-"))}"><span class="heading">{_e(v.heading)}</span>'
           f"{cards}{note}</div>")
    facts = ('<div class="figures">' + _figure(_s(a.wall_s), "wall time") + _figure(f"{a.batches:,}", "batches")
             + _figure(f"{len(r.spans):,}", "spans") + _figure(_pct(a.stalls.fraction), "of wall time stalled")
             + "</div>")
    notes = ""
    if r.problems:
        notes = '<ul class="note">' + "".join(f"<li>{_e(p)}</li>" for p in r.problems) + "</ul>"
    return box + facts + notes


def _at_stake(seconds: float) -> str:
    return f' <span class="sub">[{seconds:.3f} s at stake]</span>' if seconds > 0 else ""


def actions_html(a: Any, page: _Page) -> str:
    if not a.actions:
        return "<h2>What to try first</h2><p>Nothing stands out.</p>"
    items = "".join(f"<li>{_e(x.text)}{_at_stake(x.seconds)}</li>" for x in a.actions[:3])
    return f"<h2>What to try first</h2><ol>{items}</ol>"


def ceilings_html(fig: Any, page: _Page) -> str:
    """Amdahl ceilings next to the replayed speed-ups, as a table and a chart (the report's one replay)."""
    c, _ = fig
    if c is None:
        return ""
    if isinstance(c, str):
        return f'<h2>What a faster stage would buy</h2><p class="note">{_e(c)}</p>'
    from . import plot

    rows = [[_e(r.stage), _e(_pct(r.share)), _e(_x(r.amdahl_ceiling)), _e(_x(r.free_speedup)),
             _e(_x(r.speedup_2x)), _e(_x(r.speedup_4x)), _e(r.next_critical or "-")] for r in c.stages]
    workers = (f"More loader workers can help: {c.advice.more_workers} &mdash; {_e(c.advice.reason)}."
               if c.advice is not None else "")
    return (
        "<h2>What a faster stage would buy</h2>"
        "<p>Amdahl's law gives the ceiling 1 / (1 &minus; p) from the stage's share p of the critical path, "
        "assuming nothing else moves; the replay re-runs the recorded pipeline with the stage free, 2x or 4x "
        "faster, so it sees the next stage take over and the cores the workers share.</p>"
        + _table([("stage", False), ("share", True), ("Amdahl ceiling", True), ("replay free", True),
                  ("replay 2x", True), ("replay 4x", True), ("then critical", False)], rows)
        + f"<p>{workers}</p>"
        + (f'<p class="note">{_e(model_check_text(c.model_check, "these speed-ups"))}</p>'
           if c.model_check is not None and c.model_check.flagged else "")
        + _img(_png(plot.draw_ceilings(c).figure, page.dpi), "speed-up ceilings per stage")
    )


def stalls_html(a: Any, page: _Page) -> str:
    s = a.stalls
    if not a.batches:
        return "<h2>Stalls</h2><p>None measured: no batch reached probe.watch().</p>"
    from . import plot

    parts = ["<h2>Stalls</h2>", '<div class="figures">' + _figure(_s(s.total_s), "total stall")
             + _figure(_pct(s.fraction), "of wall time") + _figure(_pct(s.steady_fraction), "steady state")
             + _figure(_s(s.warmup_extra_s), f"more stall in warm-up than steady batches (first "
                                             f"{s.warmup_batches} batch(es) per epoch)")
             + "</div>"]
    pb = s.per_batch
    worst = pb[pb["wait_s"] > 0].sort_values("wait_s", ascending=False).head(8)
    if len(worst):
        parts.append("<p>Longest waits, and what the critical path ran meanwhile:</p>")
        parts.append(_table([("batch", True), ("waited", True), ("cause", False)],
                            ([_e(int(w.batch_id)), _e(f"{1e3 * w.wait_s:.2f} ms"), _e(w.blame_text or "-")]
                             for w in worst.itertuples())))
    parts.append(_img(_png(plot.draw_stall_fraction(a).figure, page.dpi), "stall fraction per batch"))
    return "".join(parts)


def critical_html(a: Any, page: _Page) -> str:
    cp = a.critical
    rows = []
    for row in cp.shares.itertuples():
        width = max(0.0, min(100.0, 100 * float(row.share)))
        side = str(row.side) if str(row.side) in ("input", "delivery", "gap") else "consumer"
        rows.append([_e(row.label), _e(f"{row.seconds:.3f} s"), _e(_pct(row.share)),
                     f'<span class="share {side}" style="width:{width * 2:.1f}px"></span>'])
    out = (f"<h2>Critical path</h2><p>Where the {_e(_s(a.wall_s))} of wall time went: each moment is given to "
           "what the critical path ran then (the longest chain of recorded work that ends with the last step).</p>"
           + _table([("on the path", False), ("time", True), ("share", True), ("", False)], rows))
    if len(cp.lanes):
        out += _table([("thread", False), ("time", True), ("share", True)],
                      ([_e(x.lane), _e(f"{x.seconds:.3f} s"), _e(_pct(x.share))] for x in cp.lanes.itertuples()))
    return out


def restarts_html(r: Any, page: _Page) -> str:
    """The restart cost of new loader workers at each epoch (shown only when worth naming)."""
    if r is None or not r.worth_naming:
        return ""
    from .whatif.restart import format_restarts

    lines = format_restarts(r)
    return "<h2>Worker restarts</h2>" + "".join(f"<p>{_e(x.strip())}</p>" for x in lines)


def stages_html(a: Any, page: _Page) -> str:
    t = a.stages.table
    parts: list[str] = []
    if len(t):
        from . import plot

        head = [("stage", False)] + [((f"{n} {u}" if u not in ("", "%") else n), True) for n, u in STAGE_COLUMNS]
        parts.append("<h2>Stages</h2>" + _table(head, ([_e(x.stage)] + [_e(c) for c in stage_cells(x)]
                                                       for x in t.itertuples())))
        parts.append(_img(_png(plot.draw_stage_durations(a.run).figure, page.dpi), "span durations per stage"))
    sl = a.stages.slowest
    if len(sl):
        parts.append("<h2>Slowest samples</h2>" + _table(
            [("stage", False), ("slowest samples", False), ("their share of the stage's time", True)],
            ([_e(x.stage), _e(", ".join(str(i) for i in list(x.sample_ids)[:12])
                              + (", ..." if len(x.sample_ids) > 12 else "")),
              _e(f"{_pct(x.share)} ({x.samples} of {x.of_samples} samples)")] for x in sl.itertuples())))
    st = a.stages
    busy = "unknown" if not math.isfinite(st.core_busy_in_stalls) else _pct(st.core_busy_in_stalls)
    parts.append(f"<p>CPU: {_e(st.cores)} cores, busy {_e(busy)} during stalls. More loader workers can "
                 f"help: <b>{_e(st.more_workers)}</b> &mdash; {_e(st.more_workers_reason)}</p>")
    return "".join(parts)


def ranks_html(fig: Any, page: _Page) -> str:
    view, count = fig
    if view is None:
        return ""
    if view.straggler_rank is None:
        lead = "<p>No straggler: the ranks arrived together at the gradient synchronisation.</p>"
    else:
        stage = f", stage {view.straggler_stage}" if view.straggler_stage else ""
        lead = (f"<p>Straggler: <b>rank {_e(view.straggler_rank)}</b> (cause: {_e(view.straggler_cause)}"
                f"{_e(stage)}); its input stall is {_e(_pct(view.straggler_stall_fraction))} of its time. "
                f"Job-wide cost: the fastest rank waited {_e(_s(view.straggler_cost_s))}; all ranks together "
                f"{_e(f'{view.idle_rank_s:.3f}')} rank-seconds.</p>")
    missing = (f'<p class="note">Ranks missing: {_e(", ".join(str(r) for r in view.missing_ranks))}</p>'
               if view.missing_ranks else "")
    rows = ([_e(int(r.rank)), _e(int(r.last_steps)), _e(f"{r.caused_s:.3f} s"), _e(f"{r.waited_s:.3f} s"),
             _e(_pct(r.stall_fraction))] for r in view.ranks.itertuples(index=False))
    return (f"<h2>Ranks ({_e(count)})</h2>" + lead + missing
            + _table([("rank", True), ("last in steps", True), ("caused", True), ("waited", True),
                      ("stall", True)], rows))


def timeline_html(a: Any, page: _Page) -> str:
    from . import plot

    return ("<h2>Timeline</h2><p>One lane per thread; the consumer's stalls shaded; the critical path in black; "
            "CPU and memory below on the same time axis.</p>"
            + _img(_png(plot.draw_overview(a.run, window_s=page.window_s, path=a.critical), page.dpi),
                   "pipeline timeline"))


def cost_html(c: Any, page: _Page) -> str:
    """What recording cost: per process, spans x the measured per-span cost; stages too short to time per item."""
    if not c.measured:
        return (f"<h2>What recording cost</h2><p>{c.spans:,} spans. The per-span cost was not measured when "
                "this run was recorded, so there is no estimate.</p>")
    rows = ([_e(p.role), _e(p.pid), _e(f"{p.spans:,}"),
             _e("not measured" if math.isnan(p.span_cost_ns) else f"{p.span_cost_ns / 1e3:.2f} us"),
             _e(_s(p.added_s)), _e(f"{100 * p.wall_share:.2f} %")] for p in c.processes.itertuples(index=False))
    short = "".join(f"<li>{_e(r.stage)}: median {_e(f'{1e6 * r.p50_s:.1f} us')}, under "
                    f"{_e(f'{1e6 * r.limit_s:.1f} us')}; time it per batch</li>" for r in c.too_short.itertuples())
    return ("<h2>What recording cost</h2>"
            + _table([("process", False), ("pid", True), ("spans", True), ("per span", True), ("added", True),
                      ("of wall", True)], rows)
            + (f"<p>Too short to time per item:</p><ul>{short}</ul>" if short else ""))


def _text_html(name: str, lines: list[str]) -> str:
    """A section without HTML of its own: its text lines under its name."""
    if not lines:
        return ""
    return f"<h2>{_e(name)}</h2><pre>{chr(10).join(_e(x) for x in lines)}</pre>"  # lines escaped one by one


# -- the page -------------------------------------------------------------------------------------------
def _as_report(run: Any) -> Report:
    from .analysis import Analysis, analyze

    if isinstance(run, Report):
        return run
    return Report(run if isinstance(run, Analysis) else analyze(run))


def _subtitle(a: Any) -> str:
    r = a.run
    started = r.header.get("anchor_wall_ns")
    when = (datetime.fromtimestamp(int(started) / 1e9, tz=timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")
            if isinstance(started, int) else "unknown time")
    return (f'<p class="sub">run folder {_e(r.run_dir)} &middot; recorded {_e(when)} on '
            f"{_e(r.header.get('host', '?'))} &middot; {_e(r.header.get('cores', '?'))} cores</p>")


def render_report(run: Any, *, window_s: tuple[float, float] | None = None, dpi: int = 100) -> str:
    """Return the HTML report of a run as one self-contained page.

    Parameters
    ----------
    run : Run, Analysis, Report or path-like
        A loaded run, its :func:`pipeprobe.analyze` result, a made
        :class:`~pipeprobe.report.Report` (its figures are reused), or a run folder.
    window_s : (float, float), optional
        Time window of the timeline picture; the whole run by default.
    dpi : int
        Resolution of the embedded pictures.

    Returns
    -------
    str
        The page, starting with ``<!DOCTYPE html>``.

    Raises
    ------
    RunNotFoundError, TraceFormatError
        When given a folder that :func:`pipeprobe.load` cannot read.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for batch in probe.watch([[0], [1]]):
    ...         with probe.step():
    ...             pass
    >>> page = render_report(d)
    >>> page.startswith("<!DOCTYPE html>"), "<script" in page
    (True, False)
    """
    report = _as_report(run)
    a = report.analysis
    page = _Page(a, dpi, window_s)
    parts = [f"<h1>What paces this run</h1>{_subtitle(a)}"]
    for sec, fig in report.parts:
        parts.append(sec.html(fig, page) if sec.html is not None else _text_html(sec.name, sec.text(fig)))
    body = "\n".join(p for p in parts if p)
    title = f"What paces {a.run.run_dir.name or a.run.run_dir}: {report.figures('verdict')[0].heading}" \
        if any(sec.name == "verdict" for sec, _ in report.parts) else f"pipeprobe: {a.run.run_dir}"
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_e(title)}</title><style>{_CSS}</style></head>\n<body>\n{body}\n"
        f"<footer>pipeprobe {_e(__version__)}</footer>\n</body></html>\n"
    )


def _check_target(out: Path) -> None:
    """Refuse a target that exists and is not a regular file (a folder, a link, a device, a pipe)."""
    try:
        st = os.lstat(out)
    except FileNotFoundError:
        return
    if stat.S_ISREG(st.st_mode):
        return
    what = ("a folder" if stat.S_ISDIR(st.st_mode) else "a link" if stat.S_ISLNK(st.st_mode)
            else "not a regular file")
    raise OutputFileError(f"cannot write the report to {str(out)!r}: it is {what}; give a file name such as "
                          f"{str(out / 'report.html') if stat.S_ISDIR(st.st_mode) else 'report.html'!r}")


def _write_fresh(folder: Path, name: str, page: str) -> Path:
    """Write ``page`` to a new file in ``folder`` under a fresh name, opened exclusively."""
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=folder)
    except OSError as exc:
        why = "the file system is read-only" if exc.errno == errno.EROFS else (exc.strerror or str(exc))
        raise OutputFileError(f"cannot write the report in {str(folder)!r}: {why}; choose another folder") from None
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(page)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
    except BaseException:
        os.unlink(tmp)
        raise
    return Path(tmp)


def write_report(run: Any, path: str | os.PathLike, **kwargs: Any) -> Path:
    """Write :func:`render_report` of ``run`` to ``path`` (UTF-8) and return the path.

    The page is written next to ``path`` under a fresh name opened
    exclusively, then renamed over ``path``; a ``path`` that exists and is
    not a regular file (a folder, a link, a device) is refused and left as it is.

    Parameters
    ----------
    run : Run, Analysis, Report or path-like
    path : path-like
        The ``.html`` file to write; its folder must exist.
    **kwargs
        Passed to :func:`render_report`.

    Returns
    -------
    Path

    Raises
    ------
    FileNotFoundError
        The folder of ``path`` does not exist.
    OutputFileError
        ``path`` is a folder, a link or another non-regular file, or its
        folder cannot be written (read-only, no permission).

    Examples
    --------
    >>> import pipeprobe, tempfile, os
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for batch in probe.watch([[0]]):
    ...         pass
    >>> write_report(d, os.path.join(d, "report.html")).stat().st_size > 1000
    True
    """
    out = Path(path)
    if not out.parent.is_dir():
        raise FileNotFoundError(f"cannot write {str(out)!r}: folder {str(out.parent)!r} does not exist; create it first")
    _check_target(out)
    tmp = _write_fresh(out.parent, out.name, render_report(run, **kwargs))
    try:
        _check_target(out)  # it may have changed while the page was drawn
        os.replace(tmp, out)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return out
