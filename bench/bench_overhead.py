"""End-to-end overhead of full recording on the demo: instrumented vs bare.

Runs the demo alternately with and without recording in one script (same
data, same seed, same settings), and prints the median wall time of each
and their ratio. Recording includes every stage span in the workers, the
watch, the step timer, CPU time and the resource sampler.

    python bench/bench_overhead.py [--pairs N] [--batches N]
"""

from __future__ import annotations

import argparse
import statistics
import tempfile

from pipeprobe.demo import run_demo


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pairs", type=int, default=5)
    ap.add_argument("--batches", type=int, default=60)
    args = ap.parse_args()
    bare: list[float] = []
    recorded: list[float] = []
    with tempfile.TemporaryDirectory() as d:
        run_demo(out=f"{d}/warm", batches=10, quiet=True)  # warm caches and imports
        for i in range(args.pairs):
            order = (False, True) if i % 2 == 0 else (True, False)
            for record in order:
                res = run_demo(out=f"{d}/r{i}-{record}", batches=args.batches, quiet=True, record=record)
                (recorded if record else bare).append(res.wall_s)
    b, r = statistics.median(bare), statistics.median(recorded)
    print(f"demo, {args.batches} batches, {args.pairs} alternating pairs")
    print(f"  bare      median wall {b:.3f} s  (all: {', '.join(f'{x:.3f}' for x in bare)})")
    print(f"  recorded  median wall {r:.3f} s  (all: {', '.join(f'{x:.3f}' for x in recorded)})")
    ratios = [x / y for x, y in zip(recorded, bare)]
    print(f"  overhead  {100 * (r / b - 1):+.2f} % of wall (median of pair ratios {100 * (statistics.median(ratios) - 1):+.2f} %)")


if __name__ == "__main__":
    main()
