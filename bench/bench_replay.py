"""Speed of the what-if replay: spans replayed per second, and a 20-scenario sweep.

Writes synthetic runs of about ``--spans`` stage spans with numpy (no
recording; the shape of a recorded run: worker processes that load each
batch's samples one after the other through read, decode and augment, and
a consumer that steps), then times

* building the replay plan from the loaded run (once per sweep);
* one replay of the recorded configuration, with and without CPU
  contention (median of ``--repeat``): spans per second per scenario;
* a sweep of 20 scenarios (stage factors, workers, prefetch, cores), from
  loading the run to the last prediction.

Two batch sizes are timed: 32 samples per batch (events are per batch, so
few events per span) and 1 sample per batch (the worst case: one batch, and
so one set of events, per three spans).

    python bench/bench_replay.py [--spans N] [--repeat N]

Targets (issue 4): at least 200,000 spans per second per scenario; the
20-scenario sweep of a 100,000-span run in under 15 s.
"""

from __future__ import annotations

import argparse
import math
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from _synth import many_stage_names_run, write_many_spans  # noqa: E402

import pipeprobe  # noqa: E402
from pipeprobe.whatif import sweep  # noqa: E402
from pipeprobe.whatif.engine import replay  # noqa: E402
from pipeprobe.whatif.plan import build_plan  # noqa: E402

SCENARIOS = (
    [{"faster": {s: k}} for s in ("read", "decode", "augment") for k in (2.0, 4.0, math.inf)]
    + [{"workers": w} for w in (1, 2, 8)]
    + [{"prefetch": p} for p in (1, 2, 16)]
    + [{"cores": 1}, {"cores": 2, "workers": 8}]
    + [{"faster": {"step": 2.0}}, {"offload": {"decode": 4.0}}, {"faster": {"decode": 2.0, "augment": 2.0}}]
)
assert len(SCENARIOS) == 20


def timed(fn, repeat: int) -> tuple[float, object]:
    out, times = None, []
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), out


def bench(spans: int, batch_size: int, repeat: int) -> None:
    with tempfile.TemporaryDirectory() as d:
        write_many_spans(d, spans, workers=4, batch_size=batch_size, step_ms=1.0)
        load_s, run = timed(lambda: pipeprobe.load(d), 1)
        plan_s, plan = timed(lambda: build_plan(run), repeat)
        n = plan.spans
        base_s, _ = timed(lambda: replay(plan), repeat)
        busy_s, _ = timed(lambda: replay(plan, cores=1, workers=4), repeat)
        t0 = time.perf_counter()
        preds = sweep(pipeprobe.load(d), SCENARIOS)
        sweep_s = time.perf_counter() - t0
    print(f"{n:>9,d} spans, {plan.batches:>7,d} batches of {batch_size:>2d}:  load {load_s:6.3f} s  "
          f"plan {plan_s:6.3f} s")
    print(f"    replay, no contention      {base_s:7.4f} s  = {n / base_s:>12,.0f} spans/s per scenario")
    print(f"    replay, workers=4 cores=1   {busy_s:6.4f} s  = {n / busy_s:>12,.0f} spans/s per scenario "
          "(no CPU times in this trace: nothing to share)")
    print(f"    sweep of {len(preds)} scenarios, load included: {sweep_s:6.3f} s "
          f"({sweep_s / len(preds):.4f} s per scenario)")


def bench_cpu_contention(batches: int, repeat: int) -> None:
    """Replay with CPU times and more CPU-bound workers than cores: the processor-sharing path."""
    import numpy as np

    from pipeprobe.whatif.plan import plan_from_durations

    rng = np.random.default_rng(0)
    task, step = rng.exponential(0.001, batches), rng.exponential(0.0003, batches)
    plan = plan_from_durations(task, step, task_cpu_s=0.9 * task, step_cpu_s=step, workers=4, prefetch=8, cores=2)
    busy_s, _ = timed(lambda: replay(plan), repeat)
    print(f"{batches:>9,d} batches with CPU times, 4 workers on 2 cores: replay {busy_s:.3f} s = "
          f"{batches / busy_s:,.0f} batches/s (x 3 spans per batch = {3 * batches / busy_s:,.0f} spans/s)")


def bench_many_stage_names(repeat: int) -> None:
    """The ceilings section of the report on runs with thousands of distinct stage names (issue 14, item 6)."""
    from pipeprobe.whatif.ceilings import ceilings

    for names in (500, 2_000, 20_000):
        with tempfile.TemporaryDirectory() as d:
            run = pipeprobe.load(many_stage_names_run(d, names))
            secs, c = timed(lambda run=run: ceilings(build_plan(run)), repeat)
        print(f"{names:>9,d} stage names, 40 batches: plan + ceilings {secs:6.3f} s "
              f"({len(c.stages)} stages replayed, {c.stages_left_out:,d} counted as left out)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--spans", type=int, default=100_000)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()
    for batch_size in (32, 1):
        bench(args.spans, batch_size, args.repeat)
    bench_cpu_contention(args.spans // 3, args.repeat)
    bench_many_stage_names(args.repeat)


if __name__ == "__main__":
    main()
