"""End-to-end overhead of full recording on the demo: recorded vs bare, in wall time and CPU time.

Runs the demo alternately with and without recording (same data, same
seed, same settings), each run in a fresh process, and prints the median
of each and their ratio, twice: in wall time, and in CPU seconds of the
whole process tree (the run's process and every loader worker it started,
user + system time, from ``getrusage(RUSAGE_CHILDREN)`` after the run's
process is reaped). On a shared machine wall-clock pairs scatter by a few
per cent from run to run; CPU seconds scatter far less, so they are the
figure to hold against the 1 % target. Recording includes every stage span
in the workers, the watch, the step timer, CPU time and the resource
sampler.

    python bench/bench_overhead.py [--pairs N] [--batches N]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent

CHILD = r'''
import json, sys
from pipeprobe.demo import run_demo
res = run_demo(out=sys.argv[1], batches=int(sys.argv[2]), quiet=True, record=sys.argv[3] == "1")
print(json.dumps({"wall_s": res.wall_s}))
'''


def one_run(out: str, batches: int, record: bool) -> tuple[float, float]:
    """``(wall_s, cpu_s)`` of one demo run in a fresh process; CPU of the whole process tree."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    # One BLAS thread: more would spin against the loader workers for the cores, and that spinning,
    # not recording, would dominate both figures (see the README's Speed notes).
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""),
               OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    res = subprocess.run([sys.executable, "-c", CHILD, out, str(batches), "1" if record else "0"], env=env,
                         capture_output=True, text=True, check=True, timeout=600)
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu_s = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return json.loads(res.stdout.strip().splitlines()[-1])["wall_s"], cpu_s


def _line(name: str, bare: list[float], recorded: list[float], unit: str) -> str:
    b, r = statistics.median(bare), statistics.median(recorded)
    ratios = [x / y for x, y in zip(recorded, bare)]
    return (f"  {name:<10} bare {b:.3f} {unit}, recorded {r:.3f} {unit}: {100 * (r / b - 1):+.2f} % by medians, "
            f"{100 * (statistics.median(ratios) - 1):+.2f} % median pair ratio "
            f"(pairs: {', '.join(f'{100 * (x - 1):+.1f}' for x in ratios)} %)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pairs", type=int, default=6)
    ap.add_argument("--batches", type=int, default=60)
    args = ap.parse_args()
    runs: dict[bool, list[tuple[float, float]]] = {False: [], True: []}
    with tempfile.TemporaryDirectory() as d:
        one_run(f"{d}/warm", 10, True)  # warm the page cache and the demo's photo set
        for i in range(args.pairs):
            order = (False, True) if i % 2 == 0 else (True, False)
            for record in order:
                runs[record].append(one_run(f"{d}/r{i}-{int(record)}", args.batches, record))
    print(f"demo, {args.batches} batches, {args.pairs} alternating pairs, each run in a fresh process")
    print(_line("wall", [w for w, _ in runs[False]], [w for w, _ in runs[True]], "s"))
    print(_line("CPU tree", [c for _, c in runs[False]], [c for _, c in runs[True]], "s"))


if __name__ == "__main__":
    main()
