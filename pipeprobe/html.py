"""The one-file HTML report: ``pipeprobe report RUN_DIR --html report.html``.

:func:`render_report` returns a complete HTML page; :func:`write_report`
writes it. The page stands alone: its pictures are PNG images inside the
file (``data:`` URIs), its style sheet is inline, it holds no script and
fetches nothing (a Content-Security-Policy that allows only inline styles
and ``data:`` images says so to the browser too). Every text that comes
from the trace (stage names, thread names, the run folder, load problems)
is HTML-escaped, so a stage named ``<script>`` shows as text.
"""

from __future__ import annotations

import base64
import html
import io
import math
import os
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable

from . import __version__
from .load import Run

__all__ = ["render_report", "write_report"]

_CSS = """
body { font-family: "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; color: #1d1d1d; background: #ffffff;
       margin: 0 auto; max-width: 1160px; padding: 18px 28px 40px; line-height: 1.45; font-size: 14px; }
h1 { font-size: 21px; margin: 0 0 2px; font-weight: 600; }
h2 { font-size: 16px; margin: 30px 0 8px; padding-bottom: 3px; border-bottom: 2px solid #332288; font-weight: 600; }
.sub { color: #555555; font-size: 12.5px; margin: 0; }
.verdict { margin: 16px 0 6px; padding: 10px 14px; border-left: 6px solid #332288; background: #F3F1F8; }
.verdict b { font-size: 18px; letter-spacing: 0.02em; }
.verdict.input-bound { border-left-color: #CC6677; background: #FBF0F2; }
.verdict.balanced { border-left-color: #DDCC77; background: #FBF8EC; }
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
    """Escape any value for HTML text or attribute use."""
    return html.escape(str(value), quote=True)


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


def _analysis(run: Any) -> Any:
    from .analysis import Analysis, analyze

    if isinstance(run, Analysis):
        return run
    return analyze(run)


def _x(value: float) -> str:
    return "unbounded" if not math.isfinite(value) else f"{value:.2f}x"


def _ceilings_section(analysis: Any, dpi: int) -> str:
    """Amdahl ceilings next to the replayed speed-ups, as a table and a chart."""
    from . import plot
    from .errors import PipeprobeError
    from .whatif.ceilings import ceilings

    try:
        c = ceilings(analysis.run, analysis=analysis)
    except PipeprobeError as exc:  # e.g. no batches to replay
        return f"<h2>Speed-up ceilings</h2><p class=\"note\">No replay: {_e(exc)}</p>"
    rows = [
        [_e(r.stage), _e(_pct(r.share)), _e(_x(r.amdahl_ceiling)), _e(_x(r.speedup_2x)), _e(_x(r.speedup_4x)),
         _e(_x(r.free_speedup)), _e(r.next_critical or "-")]
        for r in c.stages
    ]
    if c.workers_to_hide is None:
        workers = "No loader worker count up to 64 hides the input behind the step in the replay."
    else:
        where = ("this machine has the cores for it" if c.has_cores
                 else f"this machine's {c.cores} cores are not enough for it")
        workers = (f"Loader workers needed to hide the input behind the step: {c.workers_to_hide} "
                   f"(recorded: {c.workers}); {where}.")
    return (
        "<h2>Speed-up ceilings</h2>"
        "<p>How much faster the whole run could get if one stage got faster. Amdahl's law gives the ceiling "
        "1 / (1 &minus; p) from the stage's share p of the critical path, assuming nothing else moves; the "
        "replay re-runs the recorded pipeline with the stage 2x faster, 4x faster or free, so it sees the "
        "next stage take over and the cores the workers share.</p>"
        + _table([("stage", False), ("share of path", True), ("Amdahl ceiling", True), ("replay 2x", True),
                  ("replay 4x", True), ("replay free", True), ("then critical", False)], rows)
        + f"<p>{_e(workers)}</p>"
        + _img(_png(plot.draw_ceilings(c).figure, dpi), "speed-up ceilings per stage")
    )


def render_report(run: Any, *, window_s: tuple[float, float] | None = None, dpi: int = 100) -> str:
    """Return the HTML report of a run as one self-contained page.

    Parameters
    ----------
    run : Run, Analysis or path-like
        A loaded run, its :func:`pipeprobe.analyze` result, or a run folder.
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
    from . import plot

    if not isinstance(run, Run) and not hasattr(run, "verdict"):
        from .load import load

        run = load(run)
    a = _analysis(run)
    r = a.run
    s = a.stalls
    cp = a.critical
    parts: list[str] = []
    started = r.header.get("anchor_wall_ns")
    when = (
        datetime.fromtimestamp(int(started) / 1e9, tz=timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")
        if isinstance(started, int) else "unknown time"
    )
    parts.append(f"<h1>Input pipeline report</h1><p class=\"sub\">run folder {_e(r.run_dir)} &middot; "
                 f"recorded {_e(when)} on {_e(r.header.get('host', '?'))} &middot; "
                 f"{_e(r.header.get('cores', '?'))} cores</p>")
    parts.append(
        f'<div class="verdict {_e(a.verdict.word.replace(" ", "-"))}"><b>{_e(a.verdict.word)}</b>'
        f"<br>{_e(a.verdict.reason)}</div>"
    )
    parts.append('<div class="figures">'
                 + _figure(_s(a.wall_s), "wall time")
                 + _figure(f"{a.batches:,}", "batches")
                 + _figure(f"{len(r.spans):,}", "spans")
                 + _figure(_pct(s.fraction), "of wall time stalled")
                 + _figure(_pct(s.steady_fraction), "stalled in steady state")
                 + "</div>")
    if a.actions:
        items = "".join(f"<li>{_e(x.text)} <span class=\"sub\">({_e(_s(x.seconds))} at stake)</span></li>"
                        for x in a.actions[:3])
        parts.append(f"<h2>What to try first</h2><ol>{items}</ol>")

    # stalls
    parts.append("<h2>Stalls</h2>")
    parts.append('<div class="figures">'
                 + _figure(_s(s.total_s), "total stall")
                 + _figure(_pct(s.fraction), "of wall time")
                 + _figure(_pct(s.steady_fraction), "steady state (warm-up left out)")
                 + _figure(_s(s.warmup_s), f"in warm-up (first {s.warmup_batches} batch(es) per epoch)")
                 + "</div>")
    pb = s.per_batch
    worst = pb[pb["wait_s"] > 0].sort_values("wait_s", ascending=False).head(8)
    if len(worst):
        parts.append("<p>Longest waits, and what the critical path ran meanwhile:</p>")
        parts.append(_table(
            [("batch", True), ("epoch", True), ("waited", True), ("cause", False)],
            ([_e(int(w.batch_id)), _e(int(w.epoch)), _e(_s(w.wait_s)), _e(w.blame_text or "-")]
             for w in worst.itertuples()),
        ))
    if a.batches:
        parts.append(_img(_png(plot.draw_stall_fraction(a).figure, dpi), "stall fraction per batch"))

    # critical path
    parts.append("<h2>Critical path</h2>")
    parts.append(f"<p>Where the {_e(_s(a.wall_s))} of wall time went: each moment is given to what the "
                 "critical path ran then (the longest chain of recorded work that ends with the last step).</p>")
    rows = []
    for row in cp.shares.itertuples():
        width = max(0.0, min(100.0, 100 * float(row.share)))
        side = str(row.side) if str(row.side) in ("input", "delivery", "gap") else "consumer"
        rows.append([_e(row.label), _e(row.side), _e(_s(row.seconds)), _e(_pct(row.share)),
                     f'<span class="share {side}" style="width:{width * 2:.1f}px"></span>'])
    parts.append(_table([("on the path", False), ("side", False), ("time", True), ("share", True), ("", False)],
                        rows))
    if len(cp.lanes):
        parts.append(_table([("thread", False), ("time on the path", True), ("share", True)],
                            ([_e(x.lane), _e(_s(x.seconds)), _e(_pct(x.share))] for x in cp.lanes.itertuples())))

    if a.batches:
        parts.append(_ceilings_section(a, dpi))

    # stages and slowest samples
    t = a.stages.table
    if len(t):
        parts.append("<h2>Stages</h2>")
        parts.append(_table(
            [("stage", False), ("spans", True), ("total", True), ("median", True), ("p99", True),
             ("slowest", True), ("CPU / wall", True), ("on the path", True)],
            ([_e(x.stage), _e(f"{int(x.count):,}"), _e(_s(x.total_s)), _e(_s(x.p50_s)), _e(_s(x.p99_s)),
              _e(_s(x.max_s)), _e("n/a" if not math.isfinite(x.cpu_ratio) else f"{x.cpu_ratio:.2f}"),
              _e(_pct(x.critical_share))] for x in t.itertuples()),
        ))
        parts.append(_img(_png(plot.draw_stage_durations(r).figure, dpi), "span durations per stage"))
    sl = a.stages.slowest
    if len(sl):
        parts.append("<h2>Slowest samples</h2>")
        parts.append(_table(
            [("stage", False), ("slowest samples", False), ("their share of the stage's time", True)],
            ([_e(x.stage), _e(", ".join(str(i) for i in list(x.sample_ids)[:12])
                              + (", ..." if len(x.sample_ids) > 12 else "")),
              _e(f"{_pct(x.share)} ({x.samples} of {x.of_samples} samples)")] for x in sl.itertuples()),
        ))
    st = a.stages
    busy = "unknown" if not math.isfinite(st.core_busy_in_stalls) else _pct(st.core_busy_in_stalls)
    parts.append(f"<p>CPU: {_e(st.cores)} cores, busy {_e(busy)} during stalls. More loader workers can "
                 f"help: <b>{_e(st.more_workers)}</b> &mdash; {_e(st.more_workers_reason)}</p>")

    # timeline
    parts.append("<h2>Timeline</h2>")
    parts.append("<p>One lane per thread; the consumer's stalls shaded; the critical path in black; "
                 "CPU and memory below on the same time axis.</p>")
    parts.append(_img(_png(plot.draw_overview(r, window_s=window_s, path=cp), dpi), "pipeline timeline"))

    if r.problems:
        items = "".join(f"<li>{_e(p)}</li>" for p in r.problems)
        parts.append(f'<h2>Notes on the recording</h2><ul class="note">{items}</ul>')
    body = "\n".join(p for p in parts if p)
    title = f"pipeprobe report: {r.run_dir.name or r.run_dir}"
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_e(title)}</title><style>{_CSS}</style></head>\n<body>\n{body}\n"
        f"<footer>pipeprobe {_e(__version__)}</footer>\n</body></html>\n"
    )


def write_report(run: Any, path: str | os.PathLike, **kwargs: Any) -> Path:
    """Write :func:`render_report` of ``run`` to ``path`` (UTF-8) and return the path.

    Parameters
    ----------
    run : Run, Analysis or path-like
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
    page = render_report(run, **kwargs)
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_text(page, encoding="utf-8")
    os.replace(tmp, out)
    return out
