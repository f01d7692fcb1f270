"""Merging a run folder into frames: time axis, linking, damaged and empty runs."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from _synth import member, stage, step, wait, write_run

import pipeprobe
from pipeprobe import tracefile as tf
from pipeprobe.errors import RunNotFoundError, TraceFormatError
from pipeprobe.load import BATCH_COLUMNS, SPAN_COLUMNS


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
