"""Pictures: timeline lanes, stall band, critical path, distributions, ceilings, resources, sweep.

The image checks render with matplotlib's Agg backend and read pixels back,
so they fail when what a reader sees is wrong, not only when the numbers
behind it are.
"""

from __future__ import annotations

import math
import subprocess
import sys
from pathlib import Path

import matplotlib
import matplotlib.pyplot as plt
import numpy as np
import pytest
from _synth import Row, member, stage, step, wait, write_many_spans, write_run
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

import pipeprobe
from pipeprobe import plot
from pipeprobe.whatif.ceilings import Ceilings, StageCeiling

# The hand-built run below (times in ms). Two loader workers make batches of
# two samples (decode then augment per sample); the consumer waits, then steps.
#   batch 0: worker 1, ready at 10; consumer waits 0-10, steps 10-18
#   batch 1: worker 2, ready at 14; consumer asks at 18, gets it at 18.5, steps 18.5-26
#   batch 2: worker 1, ready at 30; consumer waits 26-30, steps 30-38
#   batch 3: worker 2, ready at 44; consumer waits 38-44, steps 44-52
# Stall: 10 + 0.5 + 4 + 6 = 20.5 ms.  Cycles (ask to next ask; last: to step end):
# 18, 8, 12, 14 ms.
STALL_MS = 20.5
WAITS_MS = [10.0, 0.5, 4.0, 6.0]
CYCLES_MS = [18.0, 8.0, 12.0, 14.0]


def _two_worker_rows() -> dict[int, list[Row]]:
    main = []
    for b, (w0, w1, s1) in enumerate([(0, 10, 18), (18, 18.5, 26), (26, 30, 38), (38, 44, 52)]):
        main.append(wait(w0, w1, b))
        main += [member(w1, 2 * b + k, b) for k in range(2)]
        main.append(step(w1, s1, b))

    def worker(plan: list[tuple[int, float, float]]) -> list[Row]:
        rows = []
        for sample, start, decode_ms in plan:
            rows.append(stage("decode", start, start + decode_ms, sample=sample))
            rows.append(stage("augment", start + decode_ms, start + decode_ms + 1, sample=sample))
        return rows

    return {
        100: main,
        201: worker([(0, 0, 4), (1, 5, 4), (4, 20, 4), (5, 25, 4)]),
        202: worker([(2, 0, 6), (3, 7, 6), (6, 32, 5), (7, 38, 5)]),
    }


@pytest.fixture
def plot_two_worker_run(tmp_path: Path) -> pipeprobe.Run:
    """The hand-built two-worker run above, loaded."""
    return pipeprobe.load(write_run(tmp_path / "two", _two_worker_rows(), end_ms=52))


def _fixed_axes(width_px: int = 800, lanes: int = 3) -> tuple[Figure, matplotlib.axes.Axes]:
    """A figure whose axes spans exactly ``width_px`` pixels, starting on a pixel edge."""
    fig = Figure(figsize=(10, 1 + lanes), dpi=100)
    ax = fig.add_axes((0.1, 0.2, width_px / 1000, 0.7))
    return fig, ax


def _stall_seconds_seen(ax: matplotlib.axes.Axes, lane: int) -> float:
    """Read the stall band back from the rendered pixels: seconds of shading along one lane.

    Samples the pixel row between the top of the stall band and the top of
    the span bars, where only the band is drawn, and turns each pixel's
    colour into the fraction of it that is shaded (white = 0, the stall
    colour = 1; antialiased edges fall between).
    """
    fig = ax.figure
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    img = np.asarray(canvas.buffer_rgba())[..., :3].astype(float)
    lo, hi = ax.get_xlim()
    y = lane - 0.5 * (plot._BAND_HALF + plot._BAR_HALF)
    (x0, yd), (x1, _) = ax.transData.transform([(lo, y), (hi, y)])
    row = int(img.shape[0] - yd)
    pixels = img[row, int(math.ceil(x0)) + 1: int(math.floor(x1)) - 1, 1]  # green channel
    stall_g = 255 * matplotlib.colors.to_rgb(plot.STALL_COLOUR)[1]
    shaded = np.clip((255.0 - pixels) / (255.0 - stall_g), 0.0, 1.0)
    return float(shaded.sum()) * (hi - lo) / (x1 - x0)


class TestTimelineLanes:
    def test_one_lane_per_thread_consumer_first(self, plot_two_worker_run: pipeprobe.Run) -> None:
        """Lanes are the consumer, then workers in the order they started, named as in the critical-path table."""
        lay = plot.layout_timeline(plot_two_worker_run)
        assert ["main (pid 100)", "worker 1 (pid 201)", "worker 2 (pid 202)"] == [x.label for x in lay.lanes]
        assert [True, False, False] == [x.is_consumer for x in lay.lanes]

    def test_each_lane_draws_its_spans(self, plot_two_worker_run: pipeprobe.Run) -> None:
        """The picture holds one rectangle per span in each lane: 4 steps, 8 and 8 worker spans (by hand)."""
        fig, ax = _fixed_axes()
        plot.draw_timeline(plot_two_worker_run, ax=ax, resolution_px=800)
        drawn = {c.get_gid(): len(c.get_paths()) for c in ax.collections if c.get_gid()}
        assert {"pipeprobe:bars:0": 4, "pipeprobe:bars:1": 8, "pipeprobe:bars:2": 8} == {
            k: v for k, v in drawn.items() if k.startswith("pipeprobe:bars")
        }
        assert [4, 8, 8] == [lane.exact for lane in plot.layout_timeline(plot_two_worker_run).lanes]

    def test_shaded_stall_area_equals_measured_stall(self, plot_two_worker_run: pipeprobe.Run) -> None:
        """The rose band on the consumer lane covers the measured stall time, read back from pixels, within 1 %."""
        measured = float(plot_two_worker_run.batches["wait_s"].sum())
        assert pytest.approx(STALL_MS / 1e3, rel=1e-9) == measured  # the hand count above
        fig, ax = _fixed_axes()
        plot.draw_timeline(plot_two_worker_run, ax=ax, window_s=(-0.002, 0.054), resolution_px=800)
        assert pytest.approx(measured, rel=0.01) == _stall_seconds_seen(ax, lane=0)
        assert 0.0 == pytest.approx(_stall_seconds_seen(ax, lane=1), abs=1e-6)

    def test_merged_stalls_keep_their_area(self, tmp_path: Path) -> None:
        """With stalls shorter than a pixel, the per-column shading still adds up to the stall time within 1 %."""
        run = pipeprobe.load(write_many_spans(tmp_path / "many", n_spans=60_000, workers=2, batch_size=8))
        fig, ax = _fixed_axes(lanes=3)
        plot.draw_timeline(run, ax=ax, resolution_px=800)
        lay = plot.layout_timeline(run, resolution_px=800)
        assert len(lay.stall_columns) > 100  # the merging path is the one under test
        measured = float(run.batches["wait_s"].sum())
        assert pytest.approx(measured, rel=1e-9) == lay.stall_s
        assert pytest.approx(measured, rel=0.01) == _stall_seconds_seen(ax, lane=0)

    def test_merged_columns_keep_each_stages_time(self, tmp_path: Path) -> None:
        """Merging spans into pixel columns loses no time: per stage, shares x column width = summed durations."""
        run = pipeprobe.load(write_many_spans(tmp_path / "many", n_spans=30_000, workers=2))
        lay = plot.layout_timeline(run, resolution_px=500)
        assert len(lay.columns) > 0
        merged = lay.columns.groupby("stage")["share"].sum() * lay.pixel_s
        exact = (lay.bars["end_s"] - lay.bars["start_s"]).groupby(lay.bars["stage"]).sum()
        shown = merged.add(exact, fill_value=0.0).rename(lambda k: lay.stages[k])
        spans = run.spans[run.spans["stage"] != "wait"]
        expected = spans.groupby(spans["stage"].astype(str))["dur_s"].sum()
        assert list(expected.sort_index().index) == list(shown.sort_index().index)
        assert expected.sort_index().to_numpy() == pytest.approx(shown.sort_index().to_numpy(), rel=1e-9)

    def test_window_keeps_only_spans_inside(self, plot_two_worker_run: pipeprobe.Run) -> None:
        """A window from 0 to 12 ms shows the spans that overlap it: 1 step, 4 and 3 worker spans (by hand)."""
        lay = plot.layout_timeline(plot_two_worker_run, window_s=(0.0, 0.012))
        assert [1, 4, 3] == [lane.spans for lane in lay.lanes]
        assert pytest.approx(0.010 + 0.0) == lay.stall_s
        assert (0.0, 0.012) == lay.window_s

    @pytest.mark.parametrize("window", [(0.01, 0.01), (0.02, 0.01)])
    def test_empty_or_reversed_window_is_refused(self, plot_two_worker_run: pipeprobe.Run, window) -> None:
        """A window whose end is not after its start raises ValueError with the window in the message."""
        with pytest.raises(ValueError, match="window_s"):
            plot.layout_timeline(plot_two_worker_run, window_s=window)

    def test_critical_path_overlay_follows_the_path(self, plot_two_worker_run: pipeprobe.Run) -> None:
        """The black overlay runs through the critical path's nodes, on their own lanes, for their durations."""
        from pipeprobe.critical import critical_path
        from pipeprobe.timeline import build_timeline

        cp = critical_path(build_timeline(plot_two_worker_run))
        fig, ax = _fixed_axes()
        plot.draw_timeline(plot_two_worker_run, ax=ax, path=cp, resolution_px=800)
        (lines,) = [c for c in ax.collections if c.get_gid() == "pipeprobe:path"]
        segs = lines.get_segments()
        nodes = cp.path[cp.path["end_s"] > cp.path["start_s"]]
        assert pytest.approx(float(nodes["dur_s"].sum())) == sum(s[1][0] - s[0][0] for s in segs)
        lanes = {"main": 0, "worker 1": 1, "worker 2": 2}
        assert [float(lanes[x]) for x in nodes["lane"]] == [s[0][1] for s in segs]


    def test_windowed_run_path_is_the_analysis_own(self, tmp_path: Path) -> None:
        """A windowed run is drawn on the condensed axis with the analysis' path: 50 ms drawn, none of the gap
        (two stretches worked by hand in tests/test_stretches.py)."""
        from test_stretches import _two_stretches

        d = _two_stretches(tmp_path)
        cp = pipeprobe.analyze(d).critical
        fig, ax = _fixed_axes()
        plot.draw_timeline(pipeprobe.load(d), ax=ax, path=True, resolution_px=800)
        (lines,) = [c for c in ax.collections if c.get_gid() == "pipeprobe:path"]
        nodes = cp.path[cp.path["end_s"] > cp.path["start_s"]]
        drawn = sorted((round(s[0][0], 9), round(s[1][0], 9)) for s in lines.get_segments())
        want = sorted((round(a, 9), round(b, 9)) for a, b in zip(nodes["start_s"], nodes["end_s"], strict=True))
        assert (want, "recorded time, the gaps between recorded stretches cut out (s)") == (drawn, ax.get_xlabel())
        assert 0.05 == pytest.approx(ax.get_xlim()[1], abs=1e-9)

    def test_two_rank_lanes_have_one_name_everywhere(self, tmp_path: Path) -> None:
        """On a 2-rank run the timeline, the pixel layout, the drawn labels and the resource legend name lanes alike."""
        from pipeprobe.critical import critical_path
        from pipeprobe.timeline import build_timeline

        rows = _two_worker_rows()
        for rank in (0, 1):
            write_run(tmp_path / "job", rows, rank=rank, world_size=2, run_id="job", mono_offset_ns=1000 * rank)
        run = pipeprobe.load(tmp_path / "job")
        expected = {f"rank {r} {name}" for r in (0, 1) for name in ("main", "worker 1", "worker 2")}
        tl = build_timeline(run)
        assert expected == set(tl.nodes["lane"].astype(str))
        assert set(critical_path(tl).lanes["lane"]) <= expected
        labels = [lane.label for lane in plot.layout_timeline(run).lanes]
        assert expected == {label.rsplit(" (pid", 1)[0] for label in labels}
        fig, ax = _fixed_axes(lanes=6)
        plot.draw_timeline(run, ax=ax, resolution_px=800)
        assert labels == [t.get_text() for t in ax.get_yticklabels()]
        from pipeprobe.plot._style import _process_names

        assert {"rank 0 main", "rank 0 worker 1", "rank 0 worker 2"} == set(
            name for (r, _), name in _process_names(run).items() if r == 0)


class TestFigures:
    def test_importing_pipeprobe_does_not_import_matplotlib(self) -> None:
        """Recording code never pays matplotlib's import cost: only pipeprobe.plot loads it."""
        code = "import sys, pipeprobe, pipeprobe.analysis; print('matplotlib' in sys.modules)"
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                             cwd=Path(__file__).parents[1])
        assert "False" == out.stdout.strip()

    def test_backend_is_the_non_interactive_one(self) -> None:
        """The suite draws with Agg (set in conftest), as on a headless CI machine."""
        assert "agg" == matplotlib.get_backend().lower()

    def test_no_figure_is_left_open(self, plot_two_worker_run: pipeprobe.Run) -> None:
        """Drawing every picture, with and without an Axes, leaves pyplot's open-figure count unchanged."""
        before = len(plt.get_fignums())
        run = plot_two_worker_run
        c = Ceilings([StageCeiling("decode", 0.5, 2.0, 1.6, 1.3, 1.45, "step")], 1.0, 1.0, 2, None)
        made = [
            plot.draw_timeline(run, path=True),
            plot.draw_stall_fraction(run),
            plot.draw_stage_durations(run),
            plot.draw_resources(run),
            plot.draw_overview(run),
            plot.draw_ceilings(c),
            plot.draw_sweep(run, values=[1, 2]),
        ]
        assert 7 == len(made)
        assert before == len(plt.get_fignums())
        fig, ax = plt.subplots()
        plot.draw_timeline(run, ax=ax)
        plot.draw_stall_fraction(run, ax=ax)
        plt.close(fig)
        assert before == len(plt.get_fignums())

    @pytest.mark.parametrize("batches", [0, 1])
    def test_empty_and_one_batch_runs_draw(self, tmp_path: Path, batches: int) -> None:
        """A run with no batch or one batch draws every picture without error or warning."""
        import warnings

        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
            for _ in probe.watch([[0]] * batches):
                with probe.step():
                    pass
        run = pipeprobe.load(tmp_path / "r")
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            axes = [plot.draw_timeline(run), plot.draw_stall_fraction(run), plot.draw_stage_durations(run),
                    plot.draw_ceilings(run)]
            figs = [plot.draw_resources(run), plot.draw_overview(run)]
        assert [batches] == [len(run.batches)]
        assert 4 == len(axes) and 2 == len(figs)

    def test_axes_are_labelled_with_units(self, plot_two_worker_run: pipeprobe.Run) -> None:
        """Every time or size axis says its unit."""
        run = plot_two_worker_run
        assert "time since run start (s)" == plot.draw_timeline(run).get_xlabel()
        assert "span duration (ms)" == plot.draw_stage_durations(run).get_xlabel()
        assert "stall (% of batch cycle)" == plot.draw_stall_fraction(run).get_ylabel()
        fig = plot.draw_resources(run)
        assert ["core", "CPU (%,\n100 = 1 core)", "resident\nmemory (MiB)"] == [a.get_ylabel() for a in fig.axes[:3]]


class TestStallFraction:
    def test_bars_are_wait_over_cycle(self, plot_two_worker_run: pipeprobe.Run) -> None:
        """Each batch's bar is its wait over its cycle: 10/18, 0.5/8, 4/12, 6/14 (by hand)."""
        ax = plot.draw_stall_fraction(plot_two_worker_run, rolling_batches=2)
        heights = [p.get_height() for p in ax.patches if p.get_label() != "warm-up batches"
                   and type(p).__name__ == "Rectangle" and p.get_width() < 1.5]
        expected = [100 * w / c for w, c in zip(WAITS_MS, CYCLES_MS, strict=True)]
        assert expected == pytest.approx(heights)
        (line,) = [x for x in ax.lines if x.get_label().startswith("rolling")]
        # rolling over 2 batches: stall seconds over cycle seconds of the window
        assert pytest.approx(100 * (10 + 0.5) / (18 + 8)) == line.get_ydata()[1]

    def test_warmup_batches_are_marked(self, plot_two_worker_run: pipeprobe.Run) -> None:
        """The first batch per worker process of the epoch (2 here) lies in the warm-up band."""
        ax = plot.draw_stall_fraction(plot_two_worker_run)
        bands = [p for p in ax.patches if p.get_label() == "warm-up batches"]
        assert 1 == len(bands)
        band = bands[0].get_extents().transformed(ax.transData.inverted())
        assert (-0.5, 1.5) == (pytest.approx(band.x0, abs=0.02), pytest.approx(band.x1, abs=0.02))


class TestStageDurations:
    def test_slowest_samples_are_named(self, tmp_path: Path) -> None:
        """A 40 ms decode among 1 ms ones is labelled with its sample id, and the long tail turns the axis to log."""
        rows = [stage("decode", 2 * i, 2 * i + (40 if i == 7 else 1), sample=i) for i in range(20)]
        rows[7] = stage("decode", 100, 140, sample=7)
        main = [wait(0, 141, 0)] + [member(141, i, 0) for i in range(20)]
        run = pipeprobe.load(write_run(tmp_path / "tail", {1: main, 2: rows}))
        ax = plot.draw_stage_durations(run, slowest=1)
        texts = " ".join(t.get_text() for t in ax.texts)
        assert "1: sample 7 40 ms" in texts
        assert "log" == ax.get_xscale()

    def test_short_tail_stays_linear(self, plot_two_worker_run: pipeprobe.Run) -> None:
        """Durations within a factor of 30 of each other keep a linear axis."""
        assert "linear" == plot.draw_stage_durations(plot_two_worker_run).get_xscale()


class TestCeilings:
    def test_bars_show_each_speedup_side_by_side(self) -> None:
        """Four bars per stage start at 1x and end at the Amdahl ceiling and the replayed 2x, 4x, free speed-ups."""
        # Amdahl's law (Amdahl 1967): p = 0.5 gives a ceiling of 1 / (1 - 0.5) = 2.
        c = Ceilings([StageCeiling("decode", 0.5, 1 / (1 - 0.5), 1.6, 1.3, 1.45, "step"),
                      StageCeiling("augment", 0.2, 1.25, 1.2, 1.1, 1.15, "decode")],
                     1.0, 1.0, 2, None)
        ax = plot.draw_ceilings(c)
        ends = sorted(round(p.get_x() + p.get_width(), 6) for p in ax.patches if p.get_x() == pytest.approx(1.0))
        assert sorted([2.0, 1.3, 1.45, 1.6, 1.25, 1.1, 1.15, 1.2]) == ends
        assert ["decode\n50.0 % of path", "augment\n20.0 % of path"] == [t.get_text() for t in ax.get_yticklabels()]

    def test_unbounded_ceiling_reaches_the_edge(self) -> None:
        """A stage holding the whole path has no finite ceiling: its bar runs to the right edge, marked ∞."""
        c = Ceilings([StageCeiling("step", 1.0, math.inf, 2.0, 1.5, 1.8, "")], 1.0, 1.0, 2, None)
        ax = plot.draw_ceilings(c)
        assert "∞" in [t.get_text() for t in ax.texts]


class TestSweep:
    def test_curve_and_measured_point(self, plot_two_worker_run: pipeprobe.Run) -> None:
        """The curve passes through each prediction; the measured run sits at its recorded worker count."""
        from pipeprobe.whatif import sweep

        preds = sweep(plot_two_worker_run, [{"workers": w} for w in (1, 2, 3)])
        ax = plot.draw_sweep(preds)
        curve, point = ax.lines[0], ax.lines[1]
        assert [1.0, 2.0, 3.0] == list(curve.get_xdata())
        assert [p.predicted_wall_s for p in preds] == pytest.approx(list(curve.get_ydata()))
        assert preds[0].recorded["workers"] == point.get_xdata()[0]
        assert pytest.approx(plot_two_worker_run.wall_s) == point.get_ydata()[0]


class TestResources:
    def test_strip_shares_the_timeline_axis(self, tmp_path: Path) -> None:
        """In the overview, the resource panels show the same time window as the timeline."""
        import time

        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0.02) as probe:
            for _ in probe.watch(range(6)):
                with probe.step():
                    t = time.perf_counter()
                    while time.perf_counter() - t < 0.03:
                        pass
        run = pipeprobe.load(tmp_path / "r")
        fig = plot.draw_overview(run, window_s=(0.05, 0.15))
        assert [(0.05, 0.15)] * 4 == [tuple(pytest.approx(v) for v in a.get_xlim()) for a in fig.axes[:4]]
        cpu_lines = [x for x in fig.axes[2].lines if x.get_label().startswith("main")]
        assert 1 == len(cpu_lines)


@pytest.mark.slow
class TestMillionSpans:
    def test_timeline_of_a_million_spans_renders(self, tmp_path: Path) -> None:
        """A 1,000,000-span run draws as a bounded number of rectangles and keeps its stall area."""
        run = pipeprobe.load(write_many_spans(tmp_path / "m", n_spans=1_000_000, workers=4))
        assert len(run.spans) > 1_000_000
        fig, ax = _fixed_axes(lanes=5)
        plot.draw_timeline(run, ax=ax, resolution_px=800)
        rects = sum(len(c.get_paths()) for c in ax.collections)
        lay = plot.layout_timeline(run, resolution_px=800)
        assert rects <= len(lay.lanes) * 800 * (len(lay.stages) + 1)
        assert sum(x.spans for x in lay.lanes) == int((run.spans["stage"] != "wait").sum())
        assert pytest.approx(float(run.batches["wait_s"].sum()), rel=0.01) == _stall_seconds_seen(ax, lane=0)
