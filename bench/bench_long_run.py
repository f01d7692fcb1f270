"""A long run: record 10,000,000 spans; print RSS growth and the hot-path cost early vs late.

The recording runs in a child process so nothing else shares its memory.
RSS is read after the first million spans and at the end; the per-span
cost is the median over blocks of 100,000 spans, first million vs last
million (target: RSS growth under 50 MB, no slowdown over time).

    python bench/bench_long_run.py [--spans N]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
from _faultlab import child_env  # noqa: E402

CHILD = r'''
import json, statistics, sys
from time import perf_counter_ns
import psutil
import pipeprobe
n, block = int(sys.argv[2]), 100_000
proc = psutil.Process()
costs, rss = [], {}
with pipeprobe.Probe(sys.argv[1], report=False, sample_interval_s=0) as probe:
    stage = pipeprobe.stage
    for k in range(n // block):
        t = perf_counter_ns()
        for _ in range(block):
            with stage("decode"):
                pass
        costs.append((perf_counter_ns() - t) / block)
        if (k + 1) * block == 1_000_000 or k == 0:
            rss["early"] = proc.memory_info().rss
    rss["late"] = proc.memory_info().rss
ten = max(1, len(costs) // 10)
print(json.dumps({"early_ns": statistics.median(costs[:ten]), "late_ns": statistics.median(costs[-ten:]),
                  "rss_early": rss["early"], "rss_late": rss["late"], "blocks": len(costs)}))
'''


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--spans", type=int, default=10_000_000)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as d:
        res = subprocess.run([sys.executable, "-c", CHILD, str(Path(d) / "run"), str(args.spans)],
                             env=child_env(), capture_output=True, text=True, check=True)
        size = sum(p.stat().st_size for p in (Path(d) / "run").iterdir())
    r = json.loads(res.stdout)
    growth = (r["rss_late"] - r["rss_early"]) / 2**20
    print(f"spans recorded             {args.spans:,}")
    print(f"trace on disk              {size / 2**20:.0f} MiB")
    print(f"RSS after first 1M spans   {r['rss_early'] / 2**20:.1f} MiB")
    print(f"RSS at the end             {r['rss_late'] / 2**20:.1f} MiB")
    print(f"RSS growth                 {growth:+.1f} MiB (target < 50)")
    print(f"per-span cost, first 10 %  {r['early_ns']:.0f} ns (median of 100k-span blocks)")
    print(f"per-span cost, last 10 %   {r['late_ns']:.0f} ns")
    print(f"late / early               {r['late_ns'] / r['early_ns']:.2f}")


if __name__ == "__main__":
    main()
