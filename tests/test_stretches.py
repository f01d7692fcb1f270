"""Stretches: a windowed run analysed one recorded window at a time, never across the gaps."""

from __future__ import annotations

from pathlib import Path

import networkx as nx
import pytest

import pipeprobe
from pipeprobe.report import format_report
from pipeprobe.stretches import condense, stretch_table, timeline_and_path
from tests._synth import member, stage, step, wait, write_run

_WINDOW = {"window": {"spec": "0:2,5:7", "every_batches": 0, "period_s": 0.0, "batches": [[0, 2], [5, 7]]}}


def _two_stretches(tmp_path: Path) -> Path:
    """Batches 0-1 (0 to 26 ms) and 5-6 (1000 to 1024 ms); nothing recorded between.

    Stretch 0: the consumer decodes each sample in its wait (3 ms), then steps (10 ms): waits 0-3 and
    13-16, steps 3-13 and 16-26; wall 26 ms, stall 6 ms, path decode 6 + step 20.
    Stretch 1: a worker began decoding sample 5 at 995 ms, before the loop asked for batch 5 at 1000;
    the loop waits 1000-1008, steps 1008-1012, decodes sample 6 in its wait 1012-1020 and steps
    1020-1024; wall 24 ms, stall 16 ms, path decode 8 (cut at the stretch start) + 8 = 16, step 8.
    """
    main = [
        stage("decode", 0, 3, sample=0, batch=0, epoch=0), wait(0, 3, 0), step(3, 13, 0),
        stage("decode", 13, 16, sample=1, batch=1, epoch=0), wait(13, 16, 1), step(16, 26, 1),
        wait(1000, 1008, 5), member(1008, 5, 5), step(1008, 1012, 5),
        stage("decode", 1012, 1020, sample=6, batch=6, epoch=0), wait(1012, 1020, 6), step(1020, 1024, 6),
    ]
    worker = [stage("decode", 995, 1008, sample=5)]
    return write_run(tmp_path, {100: main, 200: worker}, end_ms=1030, header_extra=_WINDOW)


class TestStretchTable:
    def test_extent_is_the_loops_time(self, tmp_path: Path) -> None:
        """A stretch runs from the loop asking for its first batch to its last step, prefetch left out."""
        table = stretch_table(pipeprobe.load(_two_stretches(tmp_path)))
        got = [(int(r.first_batch), int(r.last_batch), int(r.batches), round(r.start_s * 1e3, 6),
                round(r.end_s * 1e3, 6), round(r.offset_s * 1e3, 6)) for r in table.itertuples()]
        assert [(0, 1, 2, 0.0, 26.0, 0.0), (5, 6, 2, 1000.0, 1024.0, 26.0)] == got


class TestAnalysis:
    def test_wall_and_stall_are_summed_over_stretches(self, tmp_path: Path) -> None:
        """Wall 26 + 24 = 50 ms and stall 6 + 16 = 22 ms: fraction 0.44 (worked by hand in _two_stretches)."""
        a = pipeprobe.analyze(_two_stretches(tmp_path))
        assert (50.0, 22.0, 0.44) == (round(a.wall_s * 1e3, 6), round(a.stalls.total_s * 1e3, 6),
                                     round(a.stalls.fraction, 6))

    def test_critical_path_never_crosses_the_gap(self, tmp_path: Path) -> None:
        """The path gives decode 6 + 16 = 22 ms and step 20 + 8 = 28 ms of 50, and no unexplained gap
        (critical path method per stretch, worked by hand)."""
        a = pipeprobe.analyze(_two_stretches(tmp_path))
        got = {str(r.label): round(r.seconds * 1e3, 6) for r in a.critical.shares.itertuples()}
        assert {"decode": 22.0, "step": 28.0} == got

    def test_prefetched_span_keeps_its_length_in_stage_figures(self, tmp_path: Path) -> None:
        """Sample 5's decode counts 13 ms in the stage statistics though only 8 ms lie in the stretch."""
        a = pipeprobe.analyze(_two_stretches(tmp_path))
        decode = a.run.spans[(a.run.spans["stage"] == "decode") & (a.run.spans["sample_id"] == 5)]
        assert [13.0] == [round(x * 1e3, 6) for x in decode["dur_s"]]

    def test_last_cycle_of_a_stretch_ends_with_its_step(self, tmp_path: Path) -> None:
        """Batch 1's cycle runs to the end of its own step (13 ms), not to batch 5's wait after the gap."""
        pb = pipeprobe.analyze(_two_stretches(tmp_path)).stalls.per_batch
        assert [13.0, 13.0, 12.0, 12.0] == [round(x * 1e3, 6) for x in pb["cycle_s"]]

    def test_blame_of_the_prefetched_batch(self, tmp_path: Path) -> None:
        """Batch 5's stall is blamed on the worker's decode of sample 5, which ran on the path."""
        pb = pipeprobe.analyze(_two_stretches(tmp_path)).stalls.per_batch
        row = pb[pb["batch_id"] == 5].iloc[0]
        assert ("decode", [5]) == (row["blame"], list(row["blame_sample_ids"]))

    def test_each_stretch_path_is_its_longest_path(self, tmp_path: Path) -> None:
        """Per stretch, the path length equals networkx's longest path through that stretch's timeline
        (networkx dag_longest_path_length on the weight_s graph)."""
        run = condense(pipeprobe.load(_two_stretches(tmp_path)))
        timeline, critical = timeline_and_path(run)
        for row in run.header["window"]["stretches"]:
            nodes = timeline.nodes
            mine = nodes[(nodes["start_s"] >= row["offset_s"] - 1e-12)
                         & (nodes["end_s"] <= row["offset_s"] + row["wall_s"] + 1e-12)]
            g = nx.DiGraph()
            ids = set(mine["node"].tolist())
            g.add_nodes_from(ids)
            for s, d in zip(timeline.edges["src"], timeline.edges["dst"]):
                if s in ids and d in ids:
                    g.add_edge(s, d, weight=float(nodes.loc[d, "weight_s"]))
            heads = [v for v in ids if g.in_degree(v) == 0]
            for v in heads:
                g.add_edge("origin", v, weight=float(nodes.loc[v, "weight_s"]))
            on_path = critical.segments[(critical.segments["start_s"] >= row["offset_s"] - 1e-12)
                                        & (critical.segments["end_s"] <= row["offset_s"] + row["wall_s"] + 1e-12)]
            assert round(nx.dag_longest_path_length(g), 9) == round(float(on_path["seconds"].sum()), 9)

    def test_unwindowed_run_is_unchanged(self, tmp_path: Path) -> None:
        """A run recorded without a window is analysed as one piece: condense returns it as it is."""
        run = pipeprobe.load(write_run(tmp_path, {100: [wait(0, 3, 0), step(3, 13, 0)]}))
        assert run is condense(run)


@pytest.mark.parametrize("workers", [0, 2])
def test_real_windowed_job_report(tmp_path: Path, workers: int) -> None:
    """A real torch job recorded with window '2:5,9:12' analyses as 2 stretches of 3 batches; the report
    names the recorded batches."""
    torch = pytest.importorskip("torch")
    from torch.utils.data import DataLoader, TensorDataset

    loader = DataLoader(TensorDataset(torch.arange(64.0)), batch_size=4, num_workers=workers,
                        multiprocessing_context="fork" if workers else None)
    with pipeprobe.Probe(tmp_path, report=False, sample_interval_s=0.01, window="2:5,9:12") as probe:
        for (x,) in probe.watch(loader):
            with probe.step():
                (x * 2).sum()
    a = pipeprobe.analyze(tmp_path)
    rows = a.run.header["window"]["stretches"]
    assert [(2, 4), (9, 11)] == [(r["first_batch"], r["last_batch"]) for r in rows]
    assert round(sum(r["wall_s"] for r in rows), 9) == round(a.wall_s, 9)
    assert round(a.wall_s, 9) == round(float(a.critical.shares["seconds"].sum()), 9)
    from pipeprobe.html import render_report
    from pipeprobe.report import report_dict

    window = report_dict(a)["window"]
    assert ("2:5,9:12", [2, 9]) == (window["spec"], [r["first_batch"] for r in window["stretches"]])
    assert "  Window 2:5,9:12 (fixed batch ranges): 6 of 16 batches recorded, in 2 stretches" in render_report(a, dpi=40)


def test_window_opened_mid_epoch_has_no_warmup(tmp_path: Path) -> None:
    """Batch 0 opens its epoch (warm-up); batch 5 follows unrecorded batch 4, so it is no warm-up batch."""
    pb = pipeprobe.analyze(_two_stretches(tmp_path)).stalls.per_batch
    assert [True, False, False, False] == pb["warmup"].tolist()


class TestOddInput:
    def test_window_that_never_opened(self, tmp_path: Path) -> None:
        """A window that took no batch analyses to an empty run whose report says nothing was recorded."""
        with pipeprobe.Probe(tmp_path, report=False, sample_interval_s=0, window="100:") as probe:
            for _ in probe.watch(range(5)):
                with probe.step():
                    pass
        a = pipeprobe.analyze(tmp_path)
        text = format_report(a)
        assert (0, 0.0) == (a.batches, a.stalls.total_s)
        assert "Window 100:: no batch was recorded." in text

    def test_hostile_window_field(self, tmp_path: Path) -> None:
        """A header whose window field holds the wrong types is read as data: the report prints, no crash."""
        bad = {"window": {"spec": "\x1b[31mred", "every_batches": "x", "period_s": [1], "stretches": "junk"}}
        d = write_run(tmp_path, {100: [wait(0, 3, 4), step(3, 13, 4)]}, header_extra=bad)
        text = format_report(pipeprobe.analyze(d))
        line = next(x for x in text.splitlines() if x.startswith("  Window"))
        assert "  Window \\x1b[31mred (fixed batch ranges): 1 batch recorded, in 1 stretch: batches 4." == line
