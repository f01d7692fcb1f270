"""Start-up of a spawned loader worker that records: time and memory, before and after lazy imports.

A training script that imports pipeprobe at the top starts a worker with
the ``spawn`` method; the worker re-imports the script, joins the run
through the environment and records one stage. Measured per worker: the
time from ``Process.start()`` until its first span is recorded, its peak
resident memory at that point, and whether pandas or matplotlib were
loaded. Two source trees run in alternating pairs in one run: this
checkout, and a baseline revision exported with ``git archive`` (by
default the last commit before the recording layer stopped importing the
analysis side).

    python bench/bench_worker_start.py [--baseline-rev REV] [--pairs N]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tarfile
import tempfile
from io import BytesIO
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent

# The training script: a probe in the parent, one spawned worker that records.
SCRIPT = r'''
import json, multiprocessing as mp, resource, sys, time
import pipeprobe

def work(q):
    with pipeprobe.stage("decode", sample=0):
        pass
    heavy = sorted({m.split(".")[0] for m in sys.modules} & {"pandas", "matplotlib"})
    q.put((time.monotonic_ns(), resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024, heavy))

if __name__ == "__main__":
    ctx = mp.get_context("spawn")
    with pipeprobe.Probe(sys.argv[1], report=False, sample_interval_s=0):
        q = ctx.Queue()
        t0 = time.monotonic_ns()
        p = ctx.Process(target=work, args=(q,))
        p.start()
        t1, rss, heavy = q.get(timeout=120)
        p.join()
    print(json.dumps({"start_s": (t1 - t0) / 1e9, "rss_bytes": rss, "heavy": heavy}))
'''


def export_tree(rev: str, dest: Path) -> Path:
    """Write ``pipeprobe/`` as of ``rev`` under ``dest``; return ``dest``."""
    data = subprocess.run(["git", "-C", str(REPO), "archive", rev, "pipeprobe"], check=True,
                          capture_output=True).stdout
    with tarfile.open(fileobj=BytesIO(data)) as tar:
        tar.extractall(dest, filter="data")
    return dest


def one_worker(tree: Path, script: Path, run_dir: Path) -> dict:
    env = dict(os.environ, PYTHONPATH=str(tree))
    env.pop("PIPEPROBE_RUN_DIR", None)
    env.pop("PIPEPROBE_OPTIONS", None)
    res = subprocess.run([sys.executable, str(script), str(run_dir)], env=env, capture_output=True, text=True,
                         timeout=300, check=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


def import_s(tree: Path) -> float:
    """Seconds ``import pipeprobe`` adds to a fresh interpreter (its own clock, inside the process)."""
    code = "import time; t = time.perf_counter(); import pipeprobe; print(time.perf_counter() - t)"
    env = dict(os.environ, PYTHONPATH=str(tree))
    # cwd: "python -c" puts the working folder first on sys.path, which would shadow the tree
    res = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120,
                         check=True, cwd=str(tree))
    return float(res.stdout)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--baseline-rev", default="a776c4c")
    ap.add_argument("--pairs", type=int, default=7)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        script = tmp / "train.py"
        script.write_text(SCRIPT)
        trees = {"before": export_tree(args.baseline_rev, tmp / "before"), "after": REPO}
        results: dict[str, list[dict]] = {"before": [], "after": []}
        for i in range(args.pairs):
            order = ("before", "after") if i % 2 == 0 else ("after", "before")
            for name in order:
                row = one_worker(trees[name], script, tmp / f"run-{name}-{i}")
                row["import_s"] = import_s(trees[name])
                results[name].append(row)
    print(f"spawned worker that records one stage, {args.pairs} alternating pairs (baseline {args.baseline_rev})")
    print(f"{'tree':8} {'start-up median':>16} {'peak RSS median':>16} {'import pipeprobe':>17}  heavy modules loaded")
    med = {}
    for name, rows in results.items():
        start = statistics.median(r["start_s"] for r in rows)
        rss = statistics.median(r["rss_bytes"] for r in rows) / 2**20
        imp = statistics.median(r["import_s"] for r in rows)
        heavy = sorted({m for r in rows for m in r["heavy"]}) or ["none"]
        med[name] = (start, rss)
        print(f"{name:8} {start * 1e3:13.0f} ms {rss:12.1f} MiB {imp * 1e3:14.0f} ms  {', '.join(heavy)}")
    (sb, rb), (sa, ra) = med["before"], med["after"]
    print(f"after/before: start-up {sa / sb:.2f}x, peak RSS {ra / rb:.2f}x ({rb - ra:+.1f} MiB saved per worker)")


if __name__ == "__main__":
    main()
