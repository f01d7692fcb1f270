"""Predicted against real: what-if predictions from run A checked by running B for real, on the demo.

For each scenario the demo is run in configuration A and in configuration B
(alternately, ``--reps`` times each, every run in a fresh process with one
BLAS thread, started when the machine is quiet if it gets quiet within
60 s), the what-if replay predicts B's wall time from each A run, and the
tables compare the median prediction with the median measured wall time of
B, over all runs and over the runs during which other processes used less
than a quarter core (the replay keeps the other load of run A; it cannot
know what other jobs will do during run B):

  (i)   workers 1 -> 2
  (ii)  a stage made cheaper: augmentations crop,flip,rotate,jitter -> crop,flip
        (the factor for ``--faster augment=K`` is timed on 64 photos, each right after
        its decode and resize, as the stage runs in the loader)
  (iii) prefetch 1 -> 4
  (iv)  a stage removed: no augmentations (predicted with augment made free)

    python bench/bench_predict.py [--reps N] [--batches N]

The step's BLAS library is held to one thread: with its default two threads
on a 2-core machine it spins against the loader workers, which slows steps
tenfold in a way no CPU-time trace shows (see the README, "Predicted against real reruns").
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import json  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from _synth import wait_for_quiet_cpu  # noqa: E402

import pipeprobe  # noqa: E402
from pipeprobe.whatif import whatif  # noqa: E402
from pipeprobe.whatif.plan import build_plan  # noqa: E402

#: A run counts as quiet when the machine's other processes used less than this many cores.
QUIET_CORES = 0.25

FULL = ["crop", "flip", "rotate", "jitter"]


def run_demo_process(out: Path, **kwargs) -> pipeprobe.Run:
    """Run the demo in a fresh process, on a quiet machine when there is one within 60 s; return the run."""
    wait_for_quiet_cpu(max_wait_s=60.0)
    code = ("import json, sys; from pipeprobe.demo import run_demo; "
            "run_demo(out=sys.argv[1], quiet=True, **json.loads(sys.argv[2]))")
    subprocess.run([sys.executable, "-c", code, str(out), json.dumps(kwargs)], check=True, timeout=600)
    return pipeprobe.load(out)


def augment_factor(fewer: list[str], photos: int = 64) -> float:
    """How many times faster the augment stage gets with ``fewer`` augmentations (median of 5 timings).

    Each photo is timed right after its own read, decode and resize, as the
    stage runs in the loader: timed on its own in a tight loop, with warm
    caches, augment looks about 1.5 times cheaper next to the fewer
    augmentations than it is in the pipeline.
    """
    from pipeprobe.demo.images import read_labels
    from pipeprobe.demo.pipeline import augment_image, decode_jpeg, read_bytes, resize_square, sample_rng
    from pipeprobe.demo.sample import demo_parts_dir

    files, _ = read_labels(demo_parts_dir())

    def timed(aug: list[str]) -> float:
        total = 0.0
        for i, f in enumerate(files[:photos]):
            image = resize_square(decode_jpeg(read_bytes(f)), 96)
            t0 = time.perf_counter()
            augment_image(image, aug, sample_rng(0, 0, i))
            total += time.perf_counter() - t0
        return total

    ratios = [timed(FULL) / timed(fewer) for _ in range(5)]
    return statistics.median(ratios)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=3, help="runs of A and of B per scenario (3)")
    ap.add_argument("--batches", type=int, default=60, help="batches per demo run (60)")
    args = ap.parse_args()
    few = ["crop", "flip"]
    k_few = augment_factor(few)
    base = dict(batches=args.batches, workers=2, prefetch=4)
    scenarios = [
        ("(i) workers 1 -> 2", dict(base, workers=1), dict(base, workers=2),
         dict(workers=2, recorded_workers=1, recorded_prefetch=4)),
        (f"(ii) augment 4 -> 2 kinds (x{k_few:.2f})", dict(base), dict(base, augment=few),
         dict(faster={"augment": k_few}, recorded_prefetch=4)),
        ("(iii) prefetch 1 -> 4", dict(base, prefetch=1), dict(base), dict(prefetch=4, recorded_prefetch=1)),
        ("(iv) augment removed", dict(base), dict(base, augment=[]),
         dict(faster={"augment": float("inf")}, recorded_prefetch=4)),
    ]
    rows = []
    with tempfile.TemporaryDirectory() as d:
        run_demo_process(Path(d) / "warm", batches=10)
        for n, (name, a_kw, b_kw, scen) in enumerate(scenarios):
            preds, meas = [], []  # (seconds, background cores)
            for r in range(args.reps):
                order = ("a", "b") if r % 2 == 0 else ("b", "a")
                for which in order:
                    run = run_demo_process(Path(d) / f"s{n}-{which}{r}", **(a_kw if which == "a" else b_kw))
                    bg = build_plan(run).background_cores
                    if which == "a":
                        preds.append((whatif(run, **scen).predicted_wall_s, bg, run.wall_s))
                    else:
                        meas.append((run.wall_s, bg))
            rows.append((name, preds, meas))
            print(f"  done {name}", file=sys.stderr)
    print(f"demo, {args.batches} batches, {args.reps} alternating runs of A and B per scenario, "
          f"{os.cpu_count()} cores")
    for title, keep in (("all runs", lambda bg: True), (f"quiet runs (other load < {QUIET_CORES} core)",
                                                           lambda bg: bg < QUIET_CORES)):
        print(f"\n{title}")
        print(f"{'scenario':<34} {'predicted s':>11} {'measured s':>10} {'error':>8}   runs A/B")
        errs = []
        for name, preds, meas in rows:
            p = [x[0] for x in preds if keep(x[1])]
            m = [x[0] for x in meas if keep(x[1])]
            if not p or not m:
                print(f"{name:<34} {'-':>11} {'-':>10} {'-':>8}   {len(p)}/{len(m)}")
                continue
            pm, mm = statistics.median(p), statistics.median(m)
            errs.append(abs(pm / mm - 1))
            print(f"{name:<34} {pm:>11.3f} {mm:>10.3f} {100 * (pm / mm - 1):>+7.1f} %   {len(p)}/{len(m)}")
        if errs:
            print(f"median |error| {100 * statistics.median(errs):.1f} %, max {100 * max(errs):.1f} %")
    print("\nevery run: A wall s (other load, cores) -> predicted B; B wall s (other load)")
    for name, preds, meas in rows:
        print(f"  {name}: A " + ", ".join(f"{w:.2f} ({bg:.2f}) -> {p:.2f}" for p, bg, w in preds)
              + "; B " + ", ".join(f"{w:.2f} ({bg:.2f})" for w, bg in meas))


if __name__ == "__main__":
    main()
