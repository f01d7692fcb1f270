"""Cost of the live status line: per-span cost with it off and on, side by side in one run.

The status line runs in its own thread and reads the span files; the hot
path is the same code either way. This measures what the thread's reading
costs the recording loop on a shared machine: per-span cost of the block
form (CPU time off) in probes without the line and with it (every 0.05 s,
100 times the default rate), alternating, medians. Also the median time
one status line takes to read and format, on a run of the given size.

    python bench/bench_live.py [--spans N] [--repeats R]
"""

from __future__ import annotations

import argparse
import contextlib
import io
import statistics
import tempfile
from pathlib import Path
from time import perf_counter_ns

import pipeprobe
from pipeprobe._live import LiveLine


def loop_block(n: int) -> None:
    stage = pipeprobe.stage
    for i in range(n):
        with stage("decode", sample=i):
            pass


def per_span_ns(root: Path, tag: str, n: int, live: float | bool) -> float:
    """Record ``n`` spans in a fresh probe; the per-span cost in ns."""
    with contextlib.redirect_stderr(io.StringIO()), pipeprobe.Probe(root / tag, report=False, cpu_time=False, sample_interval_s=0, flush_interval_s=0.05,
                         live=live) as probe:
        for _ in probe.watch([[0]]):
            pass
        t = perf_counter_ns()
        loop_block(n)
        return (perf_counter_ns() - t) / n


def line_cost_ms(run_dir: Path, repeats: int) -> float:
    """Median time to read a whole written run from scratch and format one line."""
    times = []
    for _ in range(repeats):
        live = LiveLine(run_dir, 0, 5.0, lambda: 0, stream=io.StringIO())
        t = perf_counter_ns()
        live.line(perf_counter_ns(), 0, 0, 0)
        times.append((perf_counter_ns() - t) / 1e6)
    return statistics.median(times)


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--spans", type=int, default=200_000)
    p.add_argument("--repeats", type=int, default=9)
    a = p.parse_args()
    off, on, ratios = [], [], []
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        for r in range(a.repeats):  # alternate, so drift in machine load hits both alike
            x = per_span_ns(root, f"off{r}", a.spans, False)
            y = per_span_ns(root, f"on{r}", a.spans, 0.05)
            off.append(x)
            on.append(y)
            ratios.append(y / x)
        print(f"per span, live line off:            {statistics.median(off):7.1f} ns (median of {a.repeats})")
        print(f"per span, live line on every 0.05 s: {statistics.median(on):7.1f} ns")
        print(f"median pair ratio on/off:            {statistics.median(ratios):7.3f}")
        print(f"one status line from a cold read of {a.spans:,} spans: {line_cost_ms(root / 'on0', 5):.1f} ms")


if __name__ == "__main__":
    main()
