"""The text and JSON of the report's built-in sections, and the number and line formats they share.

:mod:`pipeprobe.report` lists the sections (:data:`~pipeprobe.report.SECTIONS`)
and holds the steps that replay the run; :mod:`pipeprobe.html` draws their
HTML. Each function here turns one section's figures (the
:class:`~pipeprobe.analysis.Analysis`, or what the section's compute step
returned) into text lines or JSON keys. Text lines fit in :data:`WIDTH`
columns once :func:`fit` has made them printable.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

from ._jsonnum import json_number
from ._text import printable
from .critical import GAP, PACE_SPEEDUP
from .stalls import sample_words

if TYPE_CHECKING:  # pragma: no cover
    from .analysis import Analysis
    from .pace import Verdict
    from .report import Report

#: Columns the text report fits in.
WIDTH = 100
#: Value of the ``schema`` key of the JSON report.
SCHEMA_VERSION = "pipeprobe-report/2"


# -- number and line formats (one place for each) ------------------------------------------------------
def pct(x: float | None) -> str:
    return "   n/a" if x is None or not math.isfinite(x) else f"{100 * x:5.1f} %"


def speedup(x: float) -> str:
    if math.isnan(x):
        return "n/a"
    return "unbounded" if math.isinf(x) else f"{x:.2f}x"


def fit(line: str) -> str:
    line = printable(line)
    return line if len(line) <= WIDTH else line[: WIDTH - 3] + "..."


def wrap(text: str, indent: str, first: str = "") -> list[str]:
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
def verdict_text(v: Verdict, a: Analysis) -> list[str]:
    run = a.run
    lines = [f"pipeprobe  {run.run_dir}",
             f"  {a.wall_s:.3f} s wall, {a.batches} batches, {len(run.spans)} spans, {len(run.processes)} process(es)",
             f"  pace  {v.heading}"]
    if a.batches:
        lines.append(f"    critical path: input side {100 * v.input_share:.0f} %, step side {100 * v.step_share:.0f} %")
        lines.append(f"    input free: run {speedup(v.input_free_speedup)} faster (replayed); "
                     f"Amdahl's ceiling {speedup(v.input_ceiling)}")
        lines.append(f"    step free: run {speedup(v.step_free_speedup)} faster (replayed); "
                     f"Amdahl's ceiling {speedup(v.step_ceiling)}")
    if v.note:
        lines += wrap(v.note, "      ", "    note: ")
    for p in run.problems[:3]:
        lines.append(f"  note: {p}")
    return lines


def verdict_data(v: Verdict, a: Analysis) -> dict[str, Any]:
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


# -- actions -------------------------------------------------------------------------------------------
def action_text(a: Analysis) -> list[str]:
    if not a.actions:
        return ["top actions  nothing stands out"]
    lines = ["top actions"]
    for i, act in enumerate(a.actions[:3], start=1):
        at = f" [{act.seconds:.3f} s at stake]" if act.seconds > 0 else ""
        lines += wrap(printable(act.text) + at, "     ", f"  {i}. ")
    return lines


def action_data(a: Analysis) -> dict[str, Any]:
    return {"actions": [{"kind": x.kind, "text": x.text, "seconds": json_number(x.seconds)} for x in a.actions[:3]]}


# -- stalls --------------------------------------------------------------------------------------------
def _worst_stalls(a: Analysis, n: int) -> Any:
    pb = a.stalls.per_batch
    return pb[pb["wait_s"] > 0].sort_values("wait_s", ascending=False).head(n)


#: The blame of an epoch's first wait that fell on its loader workers starting (``worst_stalls``' ``blame``).
WORKERS_STARTING = "workers starting"
#: Its words: the first epoch's workers, and those a later epoch started anew.
_FIRST_WORKERS = "loader workers starting"
_NEW_WORKERS = "new loader workers starting (persistent_workers=False)"


def restart_blame(a: Analysis, restarts: Any) -> Analysis:
    """``a`` with each epoch's first wait blamed on its loader workers starting, where the replay measured restarts.

    No span covers a worker process starting, so the critical path gives
    that time to the unrecorded gap. When the run's workers were started
    anew for later epochs (:attr:`~pipeprobe.whatif.restart.WorkerRestarts.restarts`),
    the first wait of each epoch (per rank) that the gap holds longest is
    the wait for those workers: its blame becomes :data:`WORKERS_STARTING`.

    Parameters
    ----------
    a : Analysis
    restarts : WorkerRestarts or None
        The report's :func:`~pipeprobe.whatif.restart.worker_restarts`; None (no replay): ``a`` unchanged.

    Returns
    -------
    Analysis

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> from pipeprobe._example_runs import write_example_run
    >>> a = pipeprobe.analyze(write_example_run(tempfile.mkdtemp(), batches=3, decode_ms=2, step_ms=1))
    >>> restart_blame(a, None) is a
    True
    """
    from dataclasses import replace

    from .stretches import epoch_start_recorded

    pb = a.stalls.per_batch
    if restarts is None or not restarts.restarts or pb.empty:
        return a
    first_id = pb.groupby(["rank", "epoch"], sort=False)["batch_id"].transform("min")
    first_epoch = pb.groupby("rank", sort=False)["epoch"].transform("min")
    named = ((pb["batch_id"] == first_id) & (pb["blame"].astype(str) == GAP) & (pb["wait_s"] > 0)
             & epoch_start_recorded(pb)).to_numpy(bool)
    if not named.any():
        return a
    later = (pb["epoch"] > first_epoch).to_numpy(bool)
    blame, words = pb["blame"].to_numpy(object).copy(), pb["blame_text"].to_numpy(object).copy()
    blame[named] = WORKERS_STARTING
    words[named & later] = _NEW_WORKERS
    words[named & ~later] = _FIRST_WORKERS
    pb = pb.assign(blame=blame, blame_text=words)
    return replace(a, stalls=replace(a.stalls, per_batch=pb))


def stall_text(a: Analysis) -> list[str]:
    s = a.stalls
    if not a.batches:
        return ["stalls  none measured: no batch reached probe.watch()"]
    lines = [
        f"stalls  {s.total_s:.3f} s = {pct(s.fraction).strip()} of wall;  steady state "
        f"{pct(s.steady_fraction).strip()}",
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


def stall_data(a: Analysis) -> dict[str, Any]:
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
def critical_text(a: Analysis) -> list[str]:
    cp = a.critical
    lines = [f"critical path  {cp.node_count} nodes over {len(cp.batches)} batches; where the wall time went:"]
    for row in cp.shares.head(8).itertuples():
        bar = "#" * int(round(30 * row.share))
        lines.append(f"  {printable(row.label)[:28]:<28} {row.seconds:10.3f} s {pct(row.share)}  {bar}")
    if len(cp.shares) > 8:
        rest = cp.shares.iloc[8:]
        lines.append(f"  {'(' + str(len(rest)) + ' more)':<28} {rest['seconds'].sum():10.3f} s "
                     f"{pct(float(rest['share'].sum()))}")
    if len(cp.lanes):
        lanes = ", ".join(f"{r.lane} {100 * r.share:.0f} %" for r in cp.lanes.head(5).itertuples())
        lines.append(f"  threads on the path: {lanes}")
    return lines


def critical_data(a: Analysis) -> dict[str, Any]:
    cp = a.critical
    return {
        "critical_path": [{"stage": str(r.label), "kind": str(r.kind), "side": str(r.side), "seconds": r.seconds,
                           "share": r.share} for r in cp.shares.itertuples()],
        "critical_path_lanes": [{"lane": str(r.lane), "seconds": r.seconds, "share": r.share}
                                for r in cp.lanes.itertuples()],
        "critical_path_nodes": int(cp.node_count),
        "critical_path_batches": len(cp.batches),
    }


# -- stages --------------------------------------------------------------------------------------------
#: Columns of the stage table, in the order text and HTML both show them: (title, unit).
STAGE_COLUMNS = [("count", ""), ("total", "s"), ("own", "s"), ("mean", "ms"), ("p50", "ms"), ("p95", "ms"), ("p99", "ms"),
                 ("cpu/wall", ""), ("on path", "%")]


def stage_cells(r: Any) -> list[str]:
    """One row of the stage table as text cells, in :data:`STAGE_COLUMNS` order."""
    ratio = "n/a" if not math.isfinite(r.cpu_ratio) else f"{r.cpu_ratio:.2f}"
    return [f"{int(r.count)}", f"{r.total_s:.3f}", f"{r.own_s:.3f}", f"{1e3 * r.mean_s:.2f}", f"{1e3 * r.p50_s:.2f}",
            f"{1e3 * r.p95_s:.2f}", f"{1e3 * r.p99_s:.2f}", ratio, pct(r.critical_share).strip()]


def stage_text(a: Analysis) -> list[str]:
    t = a.stages.table
    if t.empty:
        return ["stages  none recorded"]
    widths = [7, 8, 8, 8, 7, 7, 7, 8, 8]
    head = " ".join(f"{(n + ' ' + u).strip() if u not in ('', '%') else n:>{w}}" for (n, u), w in
                    zip(STAGE_COLUMNS, widths, strict=True))
    lines = [f"{'stages':<18} {head}"]
    for r in t.head(10).itertuples():
        cells = " ".join(f"{c:>{w}}" for c, w in zip(stage_cells(r), widths, strict=True))
        lines.append(f"  {printable(r.stage)[:16]:<16} {cells}")
    lines += nesting_note(t)
    for r in _notable_tails(a).itertuples():
        lines.append(f"  slowest: {r.samples} of {r.of_samples} '{r.stage}' samples cost "
                     f"{100 * r.share:.0f} % of its time ({sample_words(list(r.sample_ids), int(r.samples))})")
    st = a.stages
    busy = "unknown" if not math.isfinite(st.core_busy_in_stalls) else f"{100 * st.core_busy_in_stalls:.0f} %"
    lines += wrap(f"{st.cores} cores, busy during stalls: {busy}. More workers can help: {st.more_workers} - "
                   f"{printable(st.more_workers_reason)}", "  ", "  cpu  ")
    return lines


def nesting_note(t: Any) -> list[str]:
    """What 'total' and 'own' mean, when stages ran inside other stages (nothing otherwise)."""
    nested = t[t["own_s"] < t["total_s"] - 1e-9]
    if nested.empty:
        return []
    return wrap("total: whole spans, stages inside included; own: the time outside them, shown on the path as "
                + ", ".join(f"'{printable(x)}'" for x in nested["label"].head(3)), "  ", "  note  ")


def _notable_tails(a: Analysis) -> Any:
    sl = a.stages.slowest
    sl = sl[sl["share"] >= 2 * sl["samples"] / sl["of_samples"].clip(lower=1)]
    return sl.sort_values("share", ascending=False).head(3)


def stage_data(a: Analysis) -> dict[str, Any]:
    st = a.stages
    return {
        "stages": [
            {"stage": str(r.stage), "count": int(r.count), "total_s": r.total_s, "mean_s": r.mean_s, "p50_s": r.p50_s,
             "p95_s": r.p95_s, "p99_s": r.p99_s, "max_s": r.max_s, "cpu_s": r.cpu_s, "cpu_ratio": r.cpu_ratio,
             "critical_s": r.critical_s, "critical_share": r.critical_share, "own_s": r.own_s, "label": str(r.label)}
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
def ranks_compute(report: Report) -> Any:
    from .ranks import rank_count, rank_view

    run = report.analysis.run
    return (rank_view(run) if rank_count(run) > 1 else None), rank_count(run)


def ranks_text(fig: tuple[Any, int]) -> list[str]:
    from .ranks import format_rank_view

    view, _ = fig
    return [] if view is None else format_rank_view(view).splitlines()


def ranks_data(fig: tuple[Any, int]) -> dict[str, Any]:
    from .ranks import rank_view_dict

    view, count = fig
    if view is None:
        return {"ranks": {"count": count, "cross_rank_view": False}}
    return {"ranks": {"count": count, "cross_rank_view": True, **rank_view_dict(view)}}


# -- what recording cost -------------------------------------------------------------------------------
def cost_compute(report: Report) -> Any:
    from .probecost import recording_cost

    a = report.analysis
    return recording_cost(a.run, a.stages.table, a.wall_s)


def cost_text(c: Any) -> list[str]:
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


def cost_data(c: Any) -> dict[str, Any]:
    return {"recording_cost": {
        "spans": c.spans, "measured": c.measured,
        "processes": [dict(p._asdict()) for p in c.processes.itertuples(index=False)],
        "too_short": [dict(r._asdict()) for r in c.too_short.itertuples(index=False)],
    }}


# -- what to run next ----------------------------------------------------------------------------------
#: Longest run folder the "next" commands quote in full (longer ones: RUN_DIR, the folder named at the top).
_NEXT_PATH_MAX = 40


def next_text(a: Analysis, advice: Any = None) -> list[str]:
    """The commands to try next; the worker line is the worker advice's count (none when it says keep them)."""
    if not a.batches:
        return []
    run = printable(a.run.run_dir)
    run = run if len(run) <= _NEXT_PATH_MAX else "RUN_DIR"  # a command cut at 100 columns would mislead
    top = next((str(r.label) for r in a.critical.shares.itertuples() if r.side == "input" and r.kind == "stage"),
               "step")
    workers = ([f"  pipeprobe whatif {run} --workers {advice.workers} --prefetch {advice.prefetch}   # the worker "
                "advice"] if advice is not None and advice.workers != advice.recorded_workers else [])
    return ["next",
            f"  pipeprobe whatif {run} --faster {printable(top)}=2   # what a faster stage would buy",
            *workers,
            f"  pipeprobe report {run} --html report.html   # charts and the timeline",
            "  notebooks/walkthrough.ipynb   # the same steps in a notebook"]


# -- a script recorded by pipeprobe run (script.json: byloader.py) ------------------------------------
#: What the report says 'step' is in a run recorded by ``pipeprobe run`` (the step there was not timed).
SCRIPT_STEP_NOTE = ("'step' here is the loop's time between taking a batch and asking for the next one; nothing "
                    "timed the training step itself (see README: Recording a script without editing it)")


def script_lines(table: Any, training: str | None, command: list[str], *, every_loader: bool) -> list[str]:
    """The head of the report on a ``pipeprobe run`` folder: the command, what 'step' means, the loader table.

    Parameters
    ----------
    table : DataFrame
        :func:`pipeprobe.byloader.loader_table` of the whole run.
    training : str or None
        The training loader's name.
    command : list of str
        The recorded command line.
    every_loader : bool
        The report below covers every loader (``pipeprobe report RUN``);
        false: the training loader alone (the report ``pipeprobe run`` prints).

    Examples
    --------
    >>> import pandas as pd
    >>> t = pd.DataFrame({"loader": ["train"], "batches": [3], "epochs": [1], "stall_s": [0.5], "loop_s": [1.5],
    ...                   "stall_share": [0.25]})
    >>> script_lines(t, "train", ["python", "fit.py"], every_loader=True)[-1]
    '  train (training)                        3       1     0.500     1.500       25.0 %'
    """
    lines = [f"pipeprobe run  {' '.join(str(c) for c in command)}"[:WIDTH], *wrap(SCRIPT_STEP_NOTE, "  ", "  "),
             f"  {'loader':<32} {'batches':>8} {'epochs':>7} {'stall s':>9} {'loop s':>9} {'stall share':>12}"]
    for row in table.itertuples(index=False):
        name = f"{row.loader} (training)" if row.loader == training else str(row.loader)
        lines.append(f"  {printable(name)[:32]:<32} {row.batches:>8} {row.epochs:>7} {row.stall_s:>9.3f} "
                     f"{row.loop_s:>9.3f} {100 * row.stall_share:>10.1f} %")
    if len(table) > 1 and every_loader:
        lines.append(f"  the report below covers the {len(table)} loaders together; pipeprobe run printed the "
                     "training loader's own")
    elif len(table) > 1:
        lines.append(f"  the report below covers {training} alone; pipeprobe report RUN covers every loader")
    return lines


def script_compute(report: Report) -> Any:
    """``(table, training, command, step meaning)`` of a ``pipeprobe run`` folder; None for other runs."""
    from .byloader import loader_table, read_script_info
    from .errors import TraceFormatError

    run = report.analysis.run
    try:
        info = read_script_info(run.run_dir)
        if info is None:
            return None
        train = info.get("training_loader")
        train = str(train) if train is not None else None
        table = loader_table(run, info["loaders"], train)
    except TraceFormatError as exc:
        return str(exc)
    except (KeyError, TypeError, ValueError) as exc:  # a loader entry without a name or with odd epochs
        return f"{run.run_dir}/script.json: a loader entry is not readable ({exc!r}); record the script again"
    command = [str(c) for c in info.get("command", [])] if isinstance(info.get("command"), list) else []
    return table, train, command, str(info.get("step", ""))


def script_text(fig: Any) -> list[str]:
    if fig is None:
        return []
    if isinstance(fig, str):
        return [f"pipeprobe run  {fig}"]
    table, train, command, _ = fig
    return script_lines(table, train, command, every_loader=True)


def script_data(fig: Any) -> dict[str, Any]:
    if not isinstance(fig, tuple):
        return {"script": None}
    table, train, command, meaning = fig
    return {"script": {"command": command, "step": meaning or SCRIPT_STEP_NOTE, "training_loader": train,
                       "loaders": table.to_dict("records")}}


# -- the recording window (a long job recorded in stretches: stretches.py) -------------------------------
def window_text(a: Analysis) -> list[str]:
    from .stretches import window_words

    words = window_words(a.run)
    return ["recording window", *(line for w in words for line in wrap(w, "  ", "  "))] if words else []


def window_data(a: Analysis) -> dict[str, Any]:
    window = a.run.header.get("window")
    if not isinstance(window, dict):
        return {"window": None}
    keys = ("stretch", "first_batch", "last_batch", "batches", "start_s", "wall_s")
    return {"window": {"spec": window.get("spec"), "every_batches": window.get("every_batches"),
                       "period_s": window.get("period_s"),
                       "stretches": [{k: r[k] for k in keys} for r in window.get("stretches", [])]}}
