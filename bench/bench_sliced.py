"""Benchmark: the analysis of a large run in slices (``pipeprobe.sliced``), its time and peak memory.

Writes a synthetic run (``tests/_synth.write_many_spans``: 4 loader
workers x read/decode/augment per sample, one consumer) of each size asked
for, analyses it in slices in a fresh process per size, and prints the
spans, the seconds, the peak resident set size (``VmHWM`` of that
process: its ``ru_maxrss`` would also hold the peak of this one, which
wrote the run, as Linux folds it in at ``exec``) and the slices. Target (issue #15): a 30-million-span run within
8 GiB, and memory that grows far slower than the spans. With ``--compare``
it also runs the in-memory analysis on each run (a second fresh process)
and says whether the critical-path shares, stalls and stage table agree.

Run: ``python bench/bench_sliced.py [--spans 3e6 10e6 30e6] [--slice-batches N] [--compare] [--keep DIR]``
The runs go to a temporary folder under /tmp and are deleted after each size.
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))

_CHILD = r"""
import json, resource, sys, time, warnings
sys.path.insert(0, {root!r})
warnings.simplefilter("ignore")
mode, run_dir, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
t = time.perf_counter()
if mode == "sliced":
    from pipeprobe.sliced import analyze_sliced
    a = analyze_sliced(run_dir, slice_batches=n or None)
    slices = a.slices
else:
    import pipeprobe
    a = pipeprobe.analyze(run_dir)
    slices = 0
sec = time.perf_counter() - t
sh = a.critical.shares
try:  # this process's own peak: ru_maxrss also holds the parent's peak, folded in when this child exec'd
    with open("/proc/self/status") as f:
        peak_kib = next(int(line.split()[1]) for line in f if line.startswith("VmHWM:"))
except (OSError, StopIteration):
    peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
out = {{"seconds": sec, "rss_gib": peak_kib / 2**20, "slices": slices,
       "shares": dict(zip(sh["label"], sh["seconds"].tolist())), "stall_s": a.stalls.total_s,
       "table": a.stages.table.drop(columns=["label"]).to_json(), "fraction": a.stalls.fraction}}
print(json.dumps(out))
"""


def measure(mode: str, run_dir: Path, slice_batches: int) -> dict:
    """One analysis in a fresh interpreter (its peak RSS is that analysis's alone)."""
    code = _CHILD.format(root=str(ROOT))
    got = subprocess.run([sys.executable, "-c", code, mode, str(run_dir), str(slice_batches)], check=True,
                         capture_output=True, text=True, env={"PIPEPROBE_PROGRESS": "0", "PATH": "/usr/bin:/bin"})
    return json.loads(got.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--spans", type=float, nargs="+", default=[3e6, 10e6, 30e6])
    ap.add_argument("--slice-batches", type=int, default=0, help="0: the default for the run's size")
    ap.add_argument("--compare", action="store_true", help="also run the in-memory analysis and compare")
    args = ap.parse_args()
    from _synth import write_many_spans

    print(f"{'spans':>12} {'seconds':>8} {'peak GiB':>9} {'slices':>7}  agrees with in-memory")
    for n in args.spans:
        tmp = Path(tempfile.mkdtemp(prefix="bench_sliced_", dir="/tmp"))
        try:
            t = time.perf_counter()
            run_dir = write_many_spans(tmp / "run", int(n))
            spans = sum((p.stat().st_size - 16) // 48 for p in run_dir.glob("spans-*.bin"))
            written = time.perf_counter() - t
            s = measure("sliced", run_dir, args.slice_batches)
            agree = ""
            if args.compare:
                m = measure("memory", run_dir, 0)
                same = all(s[k] == m[k] for k in ("shares", "stall_s", "fraction", "table"))
                agree = f"{'yes' if same else 'NO'} (in memory: {m['seconds']:.1f} s, {m['rss_gib']:.2f} GiB)"
            print(f"{spans:>12,} {s['seconds']:>8.1f} {s['rss_gib']:>9.2f} {s['slices']:>7}  {agree}"
                  f"   (run written in {written:.0f} s)", flush=True)
        finally:
            shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
