"""Merging a run folder into frames: time axis, linking, damaged and empty runs."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from _synth import member, stage, step, three_epoch_rows, wait, write_run
from hypothesis import given, settings
from hypothesis import strategies as st

import pipeprobe
from pipeprobe import tracefile as tf
from pipeprobe.errors import RunNotFoundError, TraceFormatError
from pipeprobe.load import BATCH_COLUMNS, SPAN_COLUMNS, worker_slots


def _two_epoch_worker_run(root: Path) -> Path:
    """Sample 0 and 1 decoded by a worker twice (two epochs); batch 0 = {0, 1}, batch 1 = {0, 1}."""
    main = [
        wait(0, 5, 0),
        member(5, 0, 0),
        member(5, 1, 0),
        step(5, 8, 0, epoch=None),
        wait(8, 14, 1, epoch=1),
        member(14, 0, 1, epoch=1),
        member(14, 1, 1, epoch=1),
        step(14, 17, 1, epoch=None),
    ]
    worker = [
        stage("decode", 0, 2, sample=0),
        stage("decode", 2, 4, sample=1),
        stage("decode", 6, 9, sample=0),
        stage("decode", 9, 13, sample=1),
    ]
    return write_run(root, {10: main, 11: worker})


class TestMerge:
    def test_times_are_seconds_from_run_start(self, simple_run_dir: Path) -> None:
        """Span times are seconds from the run's start anchor."""
        run = pipeprobe.load(simple_run_dir)
        first = run.spans.iloc[0]
        assert (0.0, 0.003) == (pytest.approx(first["start_s"]), pytest.approx(first["end_s"]))
        assert pytest.approx(0.054) == run.wall_s

    def test_worker_spans_link_to_the_right_epoch(self, tmp_path: Path) -> None:
        """A sample decoded in two epochs links each time to the batch delivered next."""
        run = pipeprobe.load(_two_epoch_worker_run(tmp_path / "r"))
        decode = run.spans[run.spans["stage"] == "decode"]
        assert [0, 0, 1, 1] == decode["batch_id"].tolist()
        assert [0, 0, 1, 1] == decode["epoch"].tolist()

    def test_batches_frame_joins_wait_step_and_membership(self, tmp_path: Path) -> None:
        """Each batch row has its stall, its step and its sample count."""
        b = pipeprobe.load(_two_epoch_worker_run(tmp_path / "r")).batches
        assert [0.005, 0.006] == pytest.approx(b["wait_s"].tolist())
        assert [0.003, 0.003] == pytest.approx(b["step_s"].tolist())
        assert [2, 2] == b["samples"].tolist()

    def test_columns_are_documented(self, simple_run_dir: Path) -> None:
        """The frames have exactly the documented columns, in order."""
        run = pipeprobe.load(simple_run_dir)
        assert list(SPAN_COLUMNS) == list(run.spans.columns)
        assert list(BATCH_COLUMNS) == list(run.batches.columns)

    def test_stages_in_first_start_order(self, simple_run_dir: Path) -> None:
        """`run.stages` lists the user's stages in pipeline order."""
        assert ["decode", "augment"] == pipeprobe.load(simple_run_dir).stages


class TestBadRuns:
    def test_missing_folder_is_a_clear_error(self, tmp_path: Path) -> None:
        """A folder that does not exist raises RunNotFoundError naming it."""
        with pytest.raises(RunNotFoundError, match="does not exist"):
            pipeprobe.load(tmp_path / "nope")

    def test_folder_without_run_is_a_clear_error(self, tmp_path: Path) -> None:
        """A folder with no run header raises RunNotFoundError."""
        with pytest.raises(RunNotFoundError, match="no pipeprobe run"):
            pipeprobe.load(tmp_path)

    def test_empty_run_is_well_formed(self, tmp_path: Path) -> None:
        """A probe that recorded nothing loads as empty frames with all columns."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
            pass
        run = pipeprobe.load(tmp_path / "r")
        assert (0, 0) == (len(run.spans), len(run.batches))
        assert "cpu_s" in run.spans.columns and "wait_s" in run.batches.columns
        assert [] == run.problems

    def test_truncated_final_record_is_dropped_with_a_warning(self, simple_run_dir: Path) -> None:
        """A file cut mid-record loses only that record, with a warning naming the file."""
        (path,) = simple_run_dir.glob("spans-*.bin")
        full = len(tf.read_records(path, tf.CONTENT_SPANS))
        with open(path, "r+b") as fh:
            fh.truncate(path.stat().st_size - 20)
        with pytest.warns(UserWarning, match="truncated"):
            run = pipeprobe.load(simple_run_dir)
        assert full - 1 == len(run.spans)

    def test_unclosed_run_warns(self, tmp_path: Path) -> None:
        """A run whose process was killed loads, with a warning that the end may be missing."""
        root = write_run(tmp_path / "r", {5: [wait(0, 1, 0)]}, closed=False)
        with pytest.warns(UserWarning, match="did not close cleanly"):
            run = pipeprobe.load(root)
        assert 1 == len(run.batches)

    def test_missing_process_header_skips_that_process(self, tmp_path: Path) -> None:
        """A span file without its process header is skipped and named in the problems."""
        root = _two_epoch_worker_run(tmp_path / "r")
        (root / "spans-r0-p11.json").unlink()
        with pytest.warns(UserWarning, match="spans-r0-p11"):
            run = pipeprobe.load(root)
        assert 0 == int((run.spans["stage"] == "decode").sum())
        assert 1 == len(run.problems)

    def test_foreign_file_is_skipped_not_fatal(self, tmp_path: Path) -> None:
        """A .bin that is not ours is named in a warning; the rest of the run loads."""
        root = _two_epoch_worker_run(tmp_path / "r")
        (root / "spans-r0-p11.bin").write_bytes(b"GIF89a" + bytes(100))
        with pytest.warns(UserWarning, match="not a pipeprobe trace"):
            run = pipeprobe.load(root)
        assert 2 == len(run.batches)

    def test_corrupt_run_header_is_an_error(self, tmp_path: Path) -> None:
        """An unreadable run header raises TraceFormatError naming the file."""
        root = _two_epoch_worker_run(tmp_path / "r")
        (root / "run-r0.json").write_text("{not json")
        with pytest.raises(TraceFormatError, match="run-r0.json"):
            pipeprobe.load(root)


class TestTraceFile:
    def test_records_round_trip(self, tmp_path: Path) -> None:
        """Records written after a preamble read back identical."""
        recs = np.zeros(3, dtype=tf.SPAN_RECORD)
        recs["start_ns"] = [1, 2, 3]
        recs["sample_id"] = [7, -1, 9]
        path = tmp_path / "x.bin"
        path.write_bytes(tf.preamble(tf.CONTENT_SPANS) + recs.tobytes())
        assert recs.tobytes() == tf.read_records(path, tf.CONTENT_SPANS).tobytes()

    def test_future_version_is_refused(self, tmp_path: Path) -> None:
        """A file from a newer format version is refused with a message that says what to do."""
        head = bytearray(tf.preamble(tf.CONTENT_SPANS))
        head[6] = 9
        path = tmp_path / "x.bin"
        path.write_bytes(bytes(head))
        with pytest.raises(TraceFormatError, match="upgrade pipeprobe"):
            tf.read_records(path, tf.CONTENT_SPANS)


class TestWorkerSlots:
    def test_new_worker_pids_each_epoch_fill_the_same_slots(self, tmp_path: Path) -> None:
        """With a new pair of worker processes per epoch (persistent_workers=False), there are 2 slots, not 6."""
        run = pipeprobe.load(write_run(tmp_path / "r", three_epoch_rows(persistent=False)))
        slots = dict(zip(run.processes["pid"], run.processes["slot"], strict=True))
        assert {100: 0, 201: 1, 202: 2, 203: 1, 204: 2, 205: 1, 206: 2} == slots

    def test_lanes_are_slots_as_with_persistent_workers(self, tmp_path: Path) -> None:
        """Timeline and picture show one lane per slot, the same lanes as the persistent-worker run."""
        from pipeprobe import plot
        from pipeprobe.timeline import build_timeline

        fresh = pipeprobe.load(write_run(tmp_path / "fresh", three_epoch_rows(persistent=False)))
        kept = pipeprobe.load(write_run(tmp_path / "kept", three_epoch_rows(persistent=True)))
        lanes = [set(build_timeline(r).nodes["lane"].astype(str)) for r in (fresh, kept)]
        assert [{"main", "worker 1", "worker 2"}] * 2 == lanes
        labels = [lane.label for lane in plot.layout_timeline(fresh).lanes]
        assert ["main (pid 100)", "worker 1 (pids 201, 203, 205)", "worker 2 (pids 202, 204, 206)"] == labels
        assert [6, 3, 3] == [lane.spans for lane in plot.layout_timeline(fresh).lanes]

    @settings(max_examples=200, deadline=None)
    @given(st.lists(st.tuples(st.integers(0, 50), st.integers(0, 20)), min_size=1, max_size=12))
    def test_slots_are_as_few_as_workers_alive_at_once(self, lives: list[tuple[int, int]]) -> None:
        """No two workers alive at once share a slot, and the slots used equal the largest set of workers alive
        at once: a maximum clique of the overlap graph (networkx.find_cliques as the reference; interval graphs
        are perfect, so the left-edge colouring is optimal: Hashimoto and Stevens 1971)."""
        import networkx as nx

        spans = pd.DataFrame({"rank": 0, "pid": range(1, len(lives) + 1), "role": "worker",
                              "start_s": [float(a) for a, _ in lives], "end_s": [float(a + d) for a, d in lives]})
        slots = worker_slots(spans)
        ivs = [(float(a), float(a + d), slots[(0, i + 1)]) for i, (a, d) in enumerate(lives)]
        g = nx.Graph()
        g.add_nodes_from(range(len(ivs)))
        for i, (a1, e1, s1) in enumerate(ivs):
            for j in range(i + 1, len(ivs)):
                a2, e2, s2 = ivs[j]
                if a1 < e2 and a2 < e1:  # neither had ended when the other started
                    g.add_edge(i, j)
                    assert s1 != s2
        assert max(len(c) for c in nx.find_cliques(g)) == max(slots.values())


@st.composite
def _linked_runs(draw: st.DrawFn) -> tuple[dict[int, list], list[tuple[float, int, int]]]:
    """A consumer taking 1-4 batches of drawn samples (a sample may recur), and 1-2 workers whose spans
    (on a coarse millisecond grid, so starts and ends tie often) name drawn samples."""
    n_b = draw(st.integers(1, 4))
    main: list = []
    members: list[tuple[float, int, int]] = []  # (ready_ms, sample, batch) in file order
    t = 0
    for b in range(n_b):
        ready = t + draw(st.integers(0, 3))
        main.append(wait(t, ready, b))
        for s in draw(st.lists(st.integers(0, 5), min_size=1, max_size=3)):
            main.append(member(ready, s, b))
            members.append((float(ready), s, b))
        t = ready + draw(st.integers(0, 2))
        main.append(step(ready, t, b))
    procs = {10: main}
    for pid in range(11, 11 + draw(st.integers(1, 2))):
        spans = draw(st.lists(st.tuples(st.sampled_from(["decode", "augment"]), st.integers(0, 12),
                                        st.integers(0, 3), st.integers(0, 5)), max_size=8))
        procs[pid] = [stage(name, a, a + d, sample=s) for name, a, d, s in spans]
    return procs, members


class TestMergeByTheRules:
    @settings(max_examples=60, deadline=None)
    @given(_linked_runs())
    def test_merged_spans_follow_the_documented_order_and_links(self, tmp_path_factory: pytest.TempPathFactory,
                                                                 drawn: tuple[dict[int, list], list]) -> None:
        """Run.spans is every span in time order (start, then end; ties in file order) and each worker span
        links to the first delivery at or after its end of a batch holding its sample (the rule in the load
        docstring), worked out here row by row in plain Python, by brute force (common practice: an oracle)."""
        procs, members = drawn
        run = pipeprobe.load(write_run(tmp_path_factory.mktemp("linked") / "r", procs))
        rows = []  # file order: spans-r0-p<pid>.bin sorted by name
        for pid in sorted(procs, key=lambda p: f"spans-r0-p{p}.bin"):
            for r in procs[pid]:
                if r.kind == "member":
                    continue
                batch = r.batch if r.batch is not None else -1
                if r.kind == "stage":
                    later = [(ready, i, b) for i, (ready, s, b) in enumerate(members)
                             if s == r.sample and ready >= r.end_ms]
                    batch = min(later)[2] if later else -1
                rows.append((r.start_ms / 1e3, r.end_ms / 1e3, r.stage, pid, batch))
        expected = sorted(rows, key=lambda x: (x[0], x[1]))  # sorted() is stable
        got = list(zip(run.spans["start_s"], run.spans["end_s"], run.spans["stage"].astype(str),
                       run.spans["pid"], run.spans["batch_id"], strict=True))
        assert [(pytest.approx(a), pytest.approx(b), *rest) for a, b, *rest in expected] == got
