"""Benchmark: the analysis of a large run, phase by phase, with the peak resident memory.

Writes a synthetic run (4 loader workers x read/decode/augment per sample,
one consumer; ``tests/_synth.write_many_spans``), then times, per repeat,
each phase of ``pipeprobe report --json``: ``load`` (merge), ``build_timeline``
(timeline), ``critical_path``, ``stall_summary`` (stalls), ``stage_stats``
(stage table) and the report's replays and Amdahl ceilings. Prints the
median of the repeats, the process's peak resident set size, and
optionally (``--traced``) the peak of the Python/numpy allocations traced
by tracemalloc in one extra run. Targets (issue #15), on the 2-core
development machine: at 10 M spans, at most 60 s and 4 GiB peak resident
memory for the whole report.

Run: ``python bench/bench_analysis.py [--spans N] [--repeats R] [--traced] [--run DIR] [--plain-malloc]``
"""

from __future__ import annotations

import argparse
import gc
import io
import resource
import statistics
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from _synth import write_many_spans  # noqa: E402

import pipeprobe  # noqa: E402
from pipeprobe import analysis as _analysis  # noqa: E402
from pipeprobe.cli import keep_freed_memory  # noqa: E402
from pipeprobe.critical import critical_path  # noqa: E402
from pipeprobe.report import Report, print_report  # noqa: E402
from pipeprobe.stagestats import stage_stats  # noqa: E402
from pipeprobe.stalls import stall_summary  # noqa: E402
from pipeprobe.timeline import build_timeline  # noqa: E402

PHASES = ("merge", "timeline", "critical path", "stalls", "stage table", "replays+ceilings", "total")
TARGET_SPANS, TARGET_S, TARGET_GIB = 10_000_000, 60.0, 4.0


def _held_gib() -> float:
    """Resident memory now (Linux /proc; NaN elsewhere)."""
    try:
        return int(Path("/proc/self/statm").read_text().split()[1]) * resource.getpagesize() / 2**30
    except (OSError, IndexError, ValueError):
        return float("nan")


def one(run_dir: Path) -> dict[str, float]:
    """One report, as ``pipeprobe report --json`` makes it, timed phase by phase (with the peak and held memory)."""
    marks = [time.perf_counter()]
    memory: list[tuple[float, float]] = []

    def mark() -> None:
        marks.append(time.perf_counter())
        memory.append((resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20, _held_gib()))

    run = pipeprobe.load(run_dir)
    mark()
    tl = build_timeline(run)
    mark()
    cp = critical_path(tl)
    mark()
    st = stall_summary(run, cp)
    mark()
    stages = stage_stats(run, cp, st, input_on_path=cp.input_share >= _analysis._SIDE_WORTH)
    actions = _analysis.suggest_actions(cp, st, stages, workers_restart=_analysis.workers_restarted(run))
    mark()
    analysis = _analysis.Analysis(run=run, timeline=tl, critical=cp, stalls=st, stages=stages,
                                  actions=tuple(actions))
    print_report(Report(analysis), io.StringIO(), as_json=True)
    mark()
    out = {name: b - a for name, a, b in zip(PHASES, marks, marks[1:])}
    out.update(total=marks[-1] - marks[0], spans=len(run.spans), nodes=cp.node_count, memory=memory)
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--spans", type=int, default=1_000_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--traced", action="store_true", help="one extra run under tracemalloc (slow)")
    ap.add_argument("--run", type=Path, help="analyse this run folder instead of writing one")
    ap.add_argument("--plain-malloc", action="store_true",
                    help="leave glibc's defaults (the CLI's report process keeps freed memory: cli.keep_freed_memory)")
    args = ap.parse_args()
    if not args.plain_malloc:
        print(f"glibc keeps freed memory, as in `pipeprobe report`: {keep_freed_memory()}")
    with tempfile.TemporaryDirectory() as tmp:
        run_dir = args.run or write_many_spans(Path(tmp) / "run", n_spans=args.spans)
        results = []
        for _ in range(args.repeats):
            gc.collect()
            results.append(one(run_dir))
        rss_gib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
        peak = None
        if args.traced:
            gc.collect()
            tracemalloc.start()
            one(run_dir)
            peak = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
    first = results[0]
    print(f"spans loaded: {first['spans']:,} (stage spans + waits + steps); critical path: {first['nodes']:,} nodes")
    for key in PHASES:
        vals = [r[key] for r in results]
        print(f"  {key:<17} median {statistics.median(vals):6.2f} s   (runs: {', '.join(f'{v:.2f}' for v in vals)})")
    print("  memory after each phase of the first repeat (GiB): "
          + ", ".join(f"{k} peak {p:.2f} held {h:.2f}" for k, (p, h) in zip(PHASES, first["memory"])))
    print(f"  peak RSS of the process {rss_gib:.2f} GiB ({rss_gib * 2**30 / max(1, first['spans']):.0f} bytes a span)")
    if peak is not None:
        print(f"  peak traced allocations {peak / 2**30:.2f} GiB")
    total = statistics.median(r["total"] for r in results)
    if first["spans"] >= TARGET_SPANS:
        met = total <= TARGET_S and rss_gib <= TARGET_GIB
        print(f"  target at {TARGET_SPANS:,} spans: <= {TARGET_S:.0f} s and <= {TARGET_GIB:.0f} GiB -> "
              f"{'met' if met else 'MISSED'}")


if __name__ == "__main__":
    main()
