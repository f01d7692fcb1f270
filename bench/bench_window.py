"""A long job recorded through a window, checked against the same job recorded whole and its own clock.

A small real torch job (map-style dataset of invented inspection frames,
a DataLoader with 2 workers, a timed step) measures its own wait in
``next()`` for every batch. It runs alternately recorded whole and recorded
with ``window="20:40,70:90"`` (two stretches, one per epoch). Printed per pair:

* recorded stall of the window batches against the job's own measurement
  of the same batches in the same run (they should agree within a few %);
* the windowed analysis's stall fraction against the whole recording's
  over the same batches (stall over their cycles), which differ only by
  run-to-run scatter, and the critical-path shares of both (the whole
  recording's include its worker start-ups between epochs);
* the stretches' wall against the job's own clock for the same batches.

    python bench/bench_window.py [--pairs N]
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

WINDOW = "20:40,70:90"
_JOB = r'''
import json, sys, time
import torch
from torch.utils.data import DataLoader, Dataset
import pipeprobe

class InspectionFrames(Dataset):
    def __len__(self):
        return 400
    def __getitem__(self, i):
        with pipeprobe.stage("decode", sample=i):
            x = torch.randn(64, 64)
            time.sleep(0.002 + 0.004 * (i % 5 == 0))
        return x.mean(), torch.tensor(i % 3)

out, window = sys.argv[1], sys.argv[2] or None
torch.set_num_threads(1)
loader = DataLoader(InspectionFrames(), batch_size=8, num_workers=2, shuffle=True)
asked, waited = {}, {}
with pipeprobe.Probe(out, report=False, window=window, sample_interval_s=0.05) as probe:
    b = 0
    for _ in range(2):
        it = iter(probe.watch(loader))
        while True:
            t0 = time.perf_counter()
            try:
                next(it)
            except StopIteration:
                break
            asked[b], waited[b] = t0, time.perf_counter() - t0
            with probe.step():
                time.sleep(0.006)
            b += 1
    asked[b] = time.perf_counter()
json.dump({"asked": asked, "waited": waited}, open(out + ".own.json", "w"))
'''


def _in_window(b: int) -> bool:
    return 20 <= b < 40 or 70 <= b < 90


def _figures(run_dir: Path) -> dict[str, float]:
    import pipeprobe

    own = json.loads(Path(str(run_dir) + ".own.json").read_text())
    asked = {int(k): v for k, v in own["asked"].items()}
    waited = {int(k): v for k, v in own["waited"].items()}
    a = pipeprobe.analyze(run_dir)
    pb = a.stalls.per_batch
    sel = pb[[_in_window(int(b)) for b in pb["batch_id"]]]
    own_wall = sum(asked[b + 1] - asked[b] for b in range(100) if _in_window(b))
    return {
        "recorded_stall_s": float(sel["wait_s"].sum()),
        "own_stall_s": sum(v for b, v in waited.items() if _in_window(b)),
        "stall_fraction": float(sel["wait_s"].sum() / sel["cycle_s"].sum()),
        "wall_s": a.wall_s, "own_wall_s": own_wall,
        "fetch_share": a.critical.share_of("fetch"), "gap_share": a.critical.share_of("unexplained gap"),
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pairs", type=int, default=3)
    args = ap.parse_args()
    rows: dict[str, list[dict[str, float]]] = {"whole": [], "window": []}
    with tempfile.TemporaryDirectory() as d:
        job = Path(d) / "job.py"
        job.write_text(_JOB)
        for i in range(args.pairs):
            for kind, window in (("whole", ""), ("window", WINDOW)):
                out = Path(d) / f"{kind}{i}"
                t = time.perf_counter()
                subprocess.run([sys.executable, str(job), str(out), window], check=True)
                rows[kind].append(_figures(out))
                print(f"pair {i} {kind:<6} {time.perf_counter() - t:5.1f} s  " +
                      "  ".join(f"{k} {v:.4f}" for k, v in rows[kind][-1].items()), flush=True)
    print(f"medians of {args.pairs} runs each; stall figures over batches {WINDOW} in both (the whole recording: "
          "those batches only); path shares over all that was analysed (the whole recording: the whole run)")
    for key in ("recorded_stall_s", "own_stall_s", "stall_fraction", "fetch_share", "gap_share"):
        w, h = (statistics.median(r[key] for r in rows[k]) for k in ("window", "whole"))
        print(f"  {key:<18} window {w:8.4f}   whole {h:8.4f}")
    ratio = statistics.median(r["recorded_stall_s"] / r["own_stall_s"] for r in rows["window"])
    walls = statistics.median(r["wall_s"] / r["own_wall_s"] for r in rows["window"])
    print(f"  windowed run: recorded stall / job's own = {ratio:.3f}; stretches' wall / job's own clock = {walls:.3f}")


if __name__ == "__main__":
    main()
