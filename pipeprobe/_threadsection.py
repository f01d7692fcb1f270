"""The report's "threads" section: the thread check in text and JSON (private; see :mod:`pipeprobe.threads`)."""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

from ._jsonnum import json_ready
from ._sections import fit, wrap

if TYPE_CHECKING:  # pragma: no cover
    from .report import Report
    from .threads import ThreadCheck

__all__ = ["threads_compute", "threads_text", "threads_data"]


def threads_compute(report: Report) -> ThreadCheck:
    from .threads import check_threads

    plan = report.replay_plan  # its estimate of the cores other processes kept busy
    return check_threads(report.analysis.run, plan.background_cores if plan is not None else 0.0)


def _pools(c: ThreadCheck) -> str:
    return ", ".join(f"{p['library'] or p['api']} {p['threads']}" for p in c.pools) or "none seen"


def _spin_text(c: ThreadCheck) -> list[str]:
    """The step pool's threads that ran on after each step, when they did."""
    if not c.spins:
        return []
    n = max(1, c.step_threads - 1)
    return wrap(f"after each step the pool's {'other thread' if n == 1 else f'{n} other threads'} ran on for "
                f"{1e3 * c.spin_s:.1f} ms (spinning while the loop waited: CPU loader workers cannot use; the "
                "replay counts it)", "    ", "  ")


def threads_text(c: ThreadCheck) -> list[str]:
    """The section's lines: skipped (and why), or the pools, the load, what it cost and the fix."""
    if c.skipped is not None:
        return [fit(f"threads  check skipped: {c.skipped}"), *_spin_text(c)]
    head = "oversubscribed" if c.oversubscribed else "the threads fit the cores"
    if c.workers == 0:
        return _beside_others_text(c, head)
    lines = [fit(f"threads  {head}: the step on up to {c.step_threads} thread(s), {c.workers} worker(s), "
                 f"{c.cores} cores")]
    lines += wrap(f"pools: {_pools(c)}; the step used {c.step_cores:.2f} cores alone; workers "
                  f"{c.worker_load:.2f} busy during their steps"
                  + (f"; other processes kept {c.background_cores:.1f} cores busy" if c.background_cores >= 0.05
                     else ""), "    ", "  ")
    if not math.isnan(c.slowdown) and c.slowdown <= 1.0:
        lines.append(fit(f"  steps were no slower with busy workers ({1e3 * c.busy_step_s:.1f} ms, {c.busy_steps} "
                         f"steps) than with idle ones ({1e3 * c.idle_step_s:.1f} ms, {c.idle_steps})"))
    elif not math.isnan(c.slowdown):
        lines += wrap(f"step median {1e3 * c.busy_step_s:.1f} ms with busy workers ({c.busy_steps} steps), "
                      f"{1e3 * c.idle_step_s:.1f} ms with idle ones ({c.idle_steps}): {c.slowdown:.2f}x, processor "
                      f"sharing explains {c.explained_slowdown:.2f}x; cost {c.cost_s:.3f} s "
                      f"({100 * c.cost_s / c.wall_s if c.wall_s > 0 else 0.0:.1f} % of wall)", "    ", "  ")
    else:
        lines.append(fit(f"  too few steps with busy ({c.busy_steps}) and idle ({c.idle_steps}) workers to "
                         "compare the step's time"))
    lines += _spin_text(c)
    if c.is_unexplained:
        lines += wrap("the step slowed down more than sharing the cores explains (threads waiting for each "
                      "other): what-if predictions of this run come with a range", "    ", "  ")
    if c.advice:
        lines += wrap(f"fix: {c.advice}", "    ", "  ")
    return lines


def _beside_others_text(c: ThreadCheck, head: str) -> list[str]:
    """A run without loader workers whose step's threads shared the cores with other processes."""
    lines = [fit(f"threads  {head}: the step on up to {c.step_threads} thread(s), no loader workers, {c.cores} "
                 "cores")]
    lines += wrap(f"pools: {_pools(c)}; the step used {c.step_cores:.2f} cores; other processes kept "
                  f"{c.background_cores:.1f} cores busy (the run has no steps without them to say what it cost)",
                  "    ", "  ")
    return lines + _spin_text(c) + wrap(f"fix: {c.advice}", "    ", "  ")


def threads_data(c: ThreadCheck) -> dict[str, Any]:
    """The section's JSON key ``threads``."""
    return {"threads": json_ready({
        "skipped": c.skipped, "cores": c.cores, "step_threads": c.step_threads, "step_cores": c.step_cores,
        "pools": list(c.pools), "workers": c.workers, "worker_load": c.worker_load,
        "oversubscribed": c.oversubscribed, "busy_steps": c.busy_steps, "idle_steps": c.idle_steps,
        "busy_step_s": c.busy_step_s, "idle_step_s": c.idle_step_s, "slowdown": c.slowdown,
        "explained_slowdown": c.explained_slowdown, "unexplained": c.unexplained, "cost_s": c.cost_s,
        "advice": c.advice, "background_cores": c.background_cores, "spin_s": c.spin_s,
        "spin_share": c.spin_share, "spins": c.spins})}
