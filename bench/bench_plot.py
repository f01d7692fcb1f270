"""Timeline render time for large runs: merged pixel columns vs one rectangle per span.

Writes synthetic runs (numpy only, see tests/_synth.py) of 100,000 and
1,000,000 spans, loads them, and times, as medians of repeated runs side by
side in one process:

* ``layout``: :func:`pipeprobe.plot.layout_timeline` (lanes, merging);
* ``draw``: :func:`pipeprobe.plot.draw_timeline` plus rendering a PNG with Agg;
* ``per-span``: the same lanes drawn naively, one rectangle per span in one
  PolyCollection, plus the PNG (the cost the merging avoids).

    python bench/bench_plot.py [--repeats R] [--spans N ...] [--per-span-max N]
"""

from __future__ import annotations

import argparse
import io
import statistics
import sys
import tempfile
import time
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
_ROOT = Path(__file__).resolve().parents[1]
sys.path[:0] = [str(_ROOT), str(_ROOT / "tests")]  # this checkout's pipeprobe and test helpers
import numpy as np  # noqa: E402
from _synth import write_many_spans  # noqa: E402
from matplotlib.collections import PolyCollection  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

import pipeprobe  # noqa: E402
from pipeprobe import plot  # noqa: E402


def _png(fig: Figure) -> int:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    return len(buf.getvalue())


def draw_merged(run: pipeprobe.Run) -> int:
    ax = plot.draw_timeline(run)
    return _png(ax.figure)


def draw_per_span(run: pipeprobe.Run) -> int:
    """Every span as its own rectangle: the naive picture, for comparison."""
    sp = run.spans[run.spans["stage"] != "wait"]
    lanes = sp.groupby(["rank", "pid", "tid"], sort=True).ngroup().to_numpy()
    x0 = sp["start_s"].to_numpy()
    x1 = sp["end_s"].to_numpy()
    y = lanes.astype(float)
    v = np.stack([np.column_stack([x0, y - 0.3]), np.column_stack([x0, y + 0.3]),
                  np.column_stack([x1, y + 0.3]), np.column_stack([x1, y - 0.3])], axis=1)
    codes = sp["stage"].cat.codes.to_numpy()
    colours = np.array([matplotlib.colors.to_rgba(c) for c in plot.PALETTE])[codes % len(plot.PALETTE)]
    fig = Figure(figsize=(11, 3.5))
    ax = fig.add_subplot()
    ax.add_collection(PolyCollection(v, facecolors=colours, edgecolors="none", linewidths=0))
    ax.set_xlim(0, run.wall_s)
    ax.set_ylim(lanes.max() + 0.5, -0.5)
    return _png(fig)


def median_s(fn, arg, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn(arg)
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--spans", type=int, nargs="+", default=[100_000, 1_000_000])
    ap.add_argument("--per-span-max", type=int, default=1_000_000,
                    help="skip the per-span drawing above this many spans (it is slow)")
    args = ap.parse_args()
    print(f"{'spans':>10} {'load s':>8} {'layout s':>9} {'draw s':>8} {'per-span s':>11} {'ratio':>7}")
    with tempfile.TemporaryDirectory() as tmp:
        for n in args.spans:
            d = write_many_spans(Path(tmp) / f"run{n}", n_spans=n, workers=4)
            t = time.perf_counter()
            run = pipeprobe.load(d)
            load_s = time.perf_counter() - t
            lay_s = median_s(lambda r: plot.layout_timeline(r, resolution_px=900), run, args.repeats)
            merged_s = median_s(draw_merged, run, args.repeats)
            if n <= args.per_span_max:
                naive_s = median_s(draw_per_span, run, max(1, args.repeats // 2))
                naive, ratio = f"{naive_s:11.2f}", f"{naive_s / merged_s:6.1f}x"
            else:
                naive, ratio = f"{'skipped':>11}", f"{'':>7}"
            print(f"{len(run.spans):>10,} {load_s:8.2f} {lay_s:9.2f} {merged_s:8.2f} {naive} {ratio}")


if __name__ == "__main__":
    main()
