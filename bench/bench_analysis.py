"""Benchmark: merge + critical path + stall analysis of about 1,000,000 spans.

Writes a synthetic run (4 loader workers x read/decode/augment per sample,
one consumer; ``tests/_synth.write_many_spans``), then times, per repeat:
``load`` (merge), ``build_timeline`` + ``critical_path`` (critical path),
and ``stall_summary`` (stalls). Prints the median of the repeats and the
peak memory: Python/numpy allocations traced by tracemalloc in one extra
run, and the process's peak resident set size. Target: at most 10 s on
the 2-core development machine.

Run: ``python bench/bench_analysis.py [--spans N] [--repeats R]``
"""

from __future__ import annotations

import argparse
import gc
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
from pipeprobe.critical import critical_path  # noqa: E402
from pipeprobe.stalls import stall_summary  # noqa: E402
from pipeprobe.timeline import build_timeline  # noqa: E402


def one(run_dir: Path) -> dict[str, float]:
    t0 = time.perf_counter()
    run = pipeprobe.load(run_dir)
    t1 = time.perf_counter()
    tl = build_timeline(run)
    cp = critical_path(tl)
    t2 = time.perf_counter()
    stall_summary(run, cp)
    t3 = time.perf_counter()
    return {"merge": t1 - t0, "critical path": t2 - t1, "stalls": t3 - t2, "total": t3 - t0,
            "spans": len(run.spans), "path nodes": len(cp.path)}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--spans", type=int, default=1_000_000)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        run_dir = write_many_spans(Path(tmp) / "run", n_spans=args.spans)
        results = []
        for _ in range(args.repeats):
            gc.collect()
            results.append(one(run_dir))
        gc.collect()
        tracemalloc.start()
        one(run_dir)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
    rss_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    first = results[0]
    print(f"spans loaded: {first['spans']:,} (stage spans + waits + steps); critical path: {first['path nodes']:,} nodes")
    for key in ("merge", "critical path", "stalls", "total"):
        vals = [r[key] for r in results]
        print(f"  {key:<14} median {statistics.median(vals):6.2f} s   (runs: {', '.join(f'{v:.2f}' for v in vals)})")
    print(f"  peak traced allocations {peak / 2**20:,.0f} MiB; peak RSS of the process {rss_mib:,.0f} MiB")
    print(f"  target: total <= 10 s -> {'met' if statistics.median(r['total'] for r in results) <= 10 else 'MISSED'}")


if __name__ == "__main__":
    main()
