"""The analysis in slices (pipeprobe.sliced) against the in-memory analysis and networkx.

The in-memory analysis (pipeprobe.analyze) is the reference: on every run
shape below the sliced analysis must give the same critical-path shares,
lanes, stalls (totals, per epoch, per batch with blame) and stage table
(with the slowest samples), compared exactly, not approximately.
"""

from __future__ import annotations

import tempfile
import warnings
from pathlib import Path

import networkx as nx
import numpy as np
import pandas as pd
import pytest
from _recorded import record_sleep_run
from _synth import (
    pool_schedule,
    simple_pipeline,
    stage,
    three_epoch_rows,
    write_many_spans,
    write_ranks,
    write_run,
)
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import pipeprobe
import pipeprobe._slicereader
import pipeprobe._spill
import pipeprobe.sliced
from pipeprobe._grouplayout import Blocks
from pipeprobe._spill import Spill, key_groups
from pipeprobe.sliced import analyze_sliced, slice_batches_for, slice_edges
from pipeprobe.timeline import build_timeline


def _frames_equal(expected: pd.DataFrame, actual: pd.DataFrame) -> list[str]:
    try:
        pd.testing.assert_frame_equal(expected.reset_index(drop=True), actual.reset_index(drop=True),
                                      check_exact=True, check_dtype=False, check_categorical=False)
    except AssertionError as exc:
        return [str(exc)[:400]]
    return []


def differences(run_dir: Path, slice_batches: int) -> list[str]:
    """What differs between the in-memory and the sliced analysis of a run (empty: they agree exactly)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the same warnings, issued by each
        a = pipeprobe.analyze(run_dir)
        s = analyze_sliced(run_dir, slice_batches=slice_batches)
    out = _frames_equal(a.critical.shares, s.critical.shares) + _frames_equal(a.critical.lanes, s.critical.lanes)
    for name in ("total_s", "fraction", "steady_s", "steady_fraction", "warmup_s", "warmup_batches"):
        if getattr(a.stalls, name) != getattr(s.stalls, name):
            out.append(f"stalls.{name}: {getattr(a.stalls, name)} != {getattr(s.stalls, name)}")
    out += _frames_equal(a.stalls.per_epoch, s.stalls.per_epoch)
    plain = [c for c in a.stalls.per_batch.columns if c != "blame_sample_ids"]
    out += _frames_equal(a.stalls.per_batch[plain], s.stalls.per_batch[plain])
    if [list(x) for x in a.stalls.per_batch["blame_sample_ids"]] != [list(x) for x in s.stalls.per_batch["blame_sample_ids"]]:
        out.append("stalls.per_batch.blame_sample_ids differ")
    out += _frames_equal(a.stages.table, s.stages.table) + _frames_equal(a.stages.slowest, s.stages.slowest)
    if (a.stages.more_workers, a.stages.more_workers_reason) != (s.stages.more_workers, s.stages.more_workers_reason):
        out.append("stages.more_workers differs")
    return out


def _pool_run(d: Path, seed: int, batches: int = 24, workers: int = 3) -> Path:
    rng = np.random.default_rng(seed)
    procs, end = pool_schedule(rng.integers(50, 900, (batches, 4, 3)).tolist(),
                               rng.integers(100, 2000, batches).tolist(), workers=workers, collate_us=120,
                               jitter_us=[0, 2000, 0, 50], delivery_us=rng.integers(0, 300, batches).tolist())
    return write_run(d, procs, end_ms=end + 1)


def _nested_run(d: Path) -> Path:
    """simple_pipeline with an epoch timer around all of it, a stage inside each step and one inside each decode."""
    rows = simple_pipeline(10, 2)[100] + [stage("epoch", 0.0, 179.5)]
    for b in range(10):
        rows += [stage("forward", 18.0 * b + 8.5, 18.0 * b + 12.0, batch=b), stage("inner", 18.0 * b + 0.5, 18.0 * b + 2.0)]
    return write_run(d, {100: rows})


RUNS = {
    "one producer in the training thread": lambda d: write_run(d, simple_pipeline(12, 3)),
    "new workers each epoch": lambda d: write_run(d, three_epoch_rows(False)),
    "persistent workers": lambda d: write_run(d, three_epoch_rows(True)),
    "four workers, many spans": lambda d: write_many_spans(d, 1500, workers=4, batch_size=8),
    "two ranks, one late": lambda d: write_ranks(d, {1: 3.0}, ranks=2, steps=12),
    "worker pool with idle gaps and collate": lambda d: _pool_run(d, 1),
    "stages inside stages, an epoch timer around all": _nested_run,
}


class TestSameNumbers:
    @pytest.mark.parametrize("slice_batches", [1, 3])
    @pytest.mark.parametrize("shape", list(RUNS))
    def test_synthetic_runs_agree_exactly(self, tmp_path: Path, shape: str, slice_batches: int) -> None:
        """Sliced and in-memory analysis agree exactly (shares, stalls, stage table) on the synthetic runs."""
        assert [] == differences(RUNS[shape](tmp_path / "run"), slice_batches)

    def test_recorded_run_agrees_exactly(self, tmp_path: Path) -> None:
        """On a run recorded for real (sleeps in a generator loader) the two agree exactly, one batch a slice."""
        assert [] == differences(record_sleep_run(tmp_path / "run"), 1)

    def test_recorded_pool_run_agrees_exactly(self, analysis_pool_run: Path) -> None:
        """On a run recorded with a real 2-worker process pool the two agree exactly, one batch a slice."""
        assert [] == differences(analysis_pool_run, 1)

    @pytest.mark.slow
    @settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(st.integers(0, 10_000), st.integers(4, 16), st.integers(1, 4), st.integers(1, 6))
    def test_generated_pool_runs_agree_exactly(self, seed: int, batches: int, workers: int, slice_batches: int) -> None:
        """On generated worker-pool runs (random durations, idle gaps, deliveries) the two agree exactly."""
        with tempfile.TemporaryDirectory() as d:
            assert [] == differences(_pool_run(Path(d) / "run", seed, batches, workers), slice_batches)

    @pytest.mark.slow
    @settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(st.integers(2, 3), st.integers(3, 14), st.floats(0.0, 9.0), st.integers(1, 5))
    def test_generated_rank_runs_agree_exactly(self, ranks: int, steps: int, late_ms: float, slice_batches: int) -> None:
        """On generated data-parallel runs (a late rank, several ranks) the two agree exactly."""
        with tempfile.TemporaryDirectory() as d:
            run = write_ranks(Path(d) / "run", {ranks - 1: late_ms}, ranks=ranks, steps=steps)
            assert [] == differences(run, slice_batches)


class TestBoundedMemory:
    @pytest.mark.parametrize("shape", list(RUNS))
    def test_one_stage_at_a_time_agrees_exactly(self, tmp_path: Path, shape: str,
                                                monkeypatch: pytest.MonkeyPatch) -> None:
        """With the stage table built one stage at a time (as on a large run) the two still agree exactly."""
        monkeypatch.setattr(pipeprobe._spill, "GROUP_ROWS", 1)
        assert [] == differences(RUNS[shape](tmp_path / "run"), 2)

    @pytest.mark.slow
    @settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(st.integers(0, 10_000), st.integers(4, 16), st.integers(1, 4), st.integers(1, 6))
    def test_generated_runs_one_stage_at_a_time_agree_exactly(self, seed: int, batches: int, workers: int,
                                                              slice_batches: int) -> None:
        """On generated worker-pool runs, the stage table built one stage at a time agrees exactly."""
        with tempfile.TemporaryDirectory() as d, pytest.MonkeyPatch.context() as mp:
            mp.setattr(pipeprobe._spill, "GROUP_ROWS", 1)
            assert [] == differences(_pool_run(Path(d) / "run", seed, batches, workers), slice_batches)

    @pytest.mark.parametrize("shape", list(RUNS))
    def test_delivery_search_in_small_stretches_agrees_exactly(self, tmp_path: Path, shape: str,
                                                               monkeypatch: pytest.MonkeyPatch) -> None:
        """With the membership rows searched 3 at a time for a span's later delivery, the two still agree exactly."""
        monkeypatch.setattr(pipeprobe._slicereader, "SEARCH_ROWS", 3)
        assert [] == differences(RUNS[shape](tmp_path / "run"), 1)

    @settings(max_examples=100, deadline=None)
    @given(st.integers(0, 10_000), st.integers(1, 60), st.integers(1, 30), st.integers(1, 7))
    def test_delivery_search_is_merge_asof_of_all_rows(self, seed: int, rows: int, spans: int, stretch: int) -> None:
        """The latest first delivery found a few rows at a time is pandas' merge_asof (forward) over all rows."""
        from pipeprobe._slicereader import RunScan, latest_first_delivery

        rng = np.random.default_rng(seed)
        sm = pd.DataFrame({"rank": rng.integers(0, 2, rows).astype(np.int32), "batch_id": np.zeros(rows, np.int32),
                           "sample_id": rng.integers(0, 5, rows), "ready_s": np.sort(rng.integers(0, 20, rows) / 2)})
        end, rank, sample = rng.integers(0, 22, spans) / 2, rng.integers(0, 2, spans), rng.integers(0, 5, spans)
        left = pd.DataFrame({"end_s": end, "rank": rank.astype(np.int32), "sample_id": sample}).sort_values("end_s")
        got = pd.merge_asof(left, sm, left_on="end_s", right_on="ready_s", by=["rank", "sample_id"],
                            direction="forward")["ready_s"]
        expected = float(got.max()) if got.notna().any() else -np.inf
        scan = RunScan(root=Path("."), header={}, axis=None, files=[], batches=sm.iloc[:0], samples=sm,
                       processes=sm.iloc[:0], threads=sm.iloc[:0], resources=sm.iloc[:0])
        with pytest.MonkeyPatch.context() as mp:
            mp.setattr(pipeprobe._slicereader, "SEARCH_ROWS", stretch)
            assert expected == latest_first_delivery(scan, end, rank, sample)

    def test_spill_files_are_deleted(self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
        """The numbers kept on disk during the analysis are gone when it returns."""
        run = _pool_run(tmp_path / "run", 2)
        monkeypatch.setattr(tempfile, "tempdir", str(tmp_path / "tmp"))
        (tmp_path / "tmp").mkdir()
        seen = []
        table = pipeprobe.sliced._table

        def looking(*args: object) -> pd.DataFrame:
            seen.extend(p.name for p in (tmp_path / "tmp").rglob("*") if p.is_file())
            return table(*args)

        monkeypatch.setattr(pipeprobe.sliced, "_table", looking)
        analyze_sliced(run, slice_batches=2)
        assert ([], True) == (list((tmp_path / "tmp").iterdir()), "pieces.dur_s" in seen)

    def test_spill_files_are_deleted_after_an_error(self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
        """An error inside the analysis passes through unchanged and leaves no spill files behind."""
        run = _pool_run(tmp_path / "run", 2)
        monkeypatch.setattr(tempfile, "tempdir", str(tmp_path / "tmp"))
        (tmp_path / "tmp").mkdir()
        seen = []

        def failing(*args: object) -> pd.DataFrame:
            seen.extend(p.name for p in (tmp_path / "tmp").rglob("*") if p.is_file())
            raise MemoryError("out of memory in the stage table")

        monkeypatch.setattr(pipeprobe.sliced, "_table", failing)
        with pytest.raises(MemoryError, match="out of memory in the stage table"):
            analyze_sliced(run, slice_batches=2)
        assert ([], True) == (list((tmp_path / "tmp").iterdir()), "spans.dur_s" in seen)

    def test_full_disk_is_one_line_saying_what_to_do(self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                     capsys: pytest.CaptureFixture) -> None:
        """A disk too full for the spilled numbers: exit 2 and one line naming TMPDIR."""
        import errno

        from pipeprobe.cli import main

        run = _pool_run(tmp_path / "run", 2)

        def full(path: object, mode: str = "r") -> object:
            if "a" in mode:
                raise OSError(errno.ENOSPC, "No space left on device", str(path))
            return open(path, mode)

        monkeypatch.setattr(pipeprobe._spill, "open", full, raising=False)
        assert 2 == main(["report", str(run), "--slice-batches", "2", "--quiet"])
        err = capsys.readouterr().err.strip().splitlines()
        assert (1, True) == (len(err), "No space left on device" in err[0] and "set TMPDIR" in err[0])

    def test_spill_reads_back_each_key_in_order(self, tmp_path: Path) -> None:
        """A key's rows come back in the order appended, the parts from the last appended (as a list would)."""
        rng = np.random.default_rng(4)
        s = Spill(tmp_path, "x", {"v": np.float64})
        parts = [(rng.integers(0, 5, 40), rng.random(40)) for _ in range(6)]
        for key, v in parts:
            s.append(key, {"v": v})
        expected = [v[key == k].tolist() for key, v in parts[::-1] for k in (1, 3) if (key == k).any()]
        got = s.read([1, 3])
        assert sum(expected, []) == got["v"].tolist()

    def test_key_groups_keep_shared_labels_together(self) -> None:
        """Groups stay within the row budget, except a key alone, and keys joined by a label share a group."""
        groups = key_groups({0: 5, 1: 2, 2: 2, 3: 9, 4: 1}, [(1, 10), (4, 10)], budget=5)
        assert [[0], [1, 4, 2], [3]] == groups


def _rising_by_definition(seq: list[int]) -> bool:
    """Every code one contiguous block and -1 only in front: pandas' group ids by first appearance rise."""
    blocks = [c for i, c in enumerate(seq) if i == 0 or seq[i - 1] != c]
    return len(blocks) == len(set(blocks)) and (-1 not in blocks or blocks[0] == -1)


def _in_tmp(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A fresh folder that the analysis' temporary folders go to."""
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path / "tmp"))
    (tmp_path / "tmp").mkdir()
    return tmp_path / "tmp"


class TestPathOnDisk:
    @pytest.mark.parametrize("shape", list(RUNS))
    def test_path_read_from_disk_is_the_in_memory_path(self, tmp_path: Path, shape: str) -> None:
        """critical.path, built from the files on request, is the whole-run analysis' path, numbered along it."""
        d = RUNS[shape](tmp_path / "run")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            expected = pipeprobe.analyze(d).critical.path
            with analyze_sliced(d, slice_batches=2) as s:
                got = s.critical.path
        n = len(expected)
        text = {c: lambda f, c=c: f[c].astype(str) for c in ("kind", "stage", "side", "lane")}  # categories: those used
        expected = expected.assign(node=np.arange(n), pred=np.arange(n) - 1, span=-1, **text)
        pd.testing.assert_frame_equal(expected.reset_index(drop=True), got.assign(**text), check_exact=True)

    @pytest.mark.parametrize("shape", list(RUNS))
    def test_segments_read_from_disk_are_the_in_memory_segments(self, tmp_path: Path, shape: str) -> None:
        """critical.segments, built from the files on request, are the whole run's pieces, nodes numbered along
        the path (they tile the run: critical path method)."""
        d = RUNS[shape](tmp_path / "run")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            a = pipeprobe.analyze(d).critical
            with analyze_sliced(d, slice_batches=1) as s:
                got = s.critical.segments
        along = np.searchsorted(a.path["node"].to_numpy(), a.segments["node"].to_numpy())
        expected = a.segments.assign(node=np.where(a.segments["node"].to_numpy() < 0, -1, along))
        pd.testing.assert_frame_equal(expected, got, check_exact=True)

    def test_node_count_and_ends_without_reading_the_path(self, tmp_path: Path) -> None:
        """node_count, length_s, head_s and batches answer from the files as the in-memory path does."""
        d = _pool_run(tmp_path / "run", 6)
        a = pipeprobe.analyze(d).critical
        with analyze_sliced(d, slice_batches=2) as s:
            c = s.critical
            got = (c.node_count, c.length_s, c.head_s, c.batches)
            assert None is c._path
        assert (a.node_count, a.length_s, a.head_s, a.batches) == got

    def test_closed_analysis_says_to_read_the_path_first(self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
        """After close, a path read before stays; one not read is a ValueError saying to read it first; no file is left."""
        tmp = _in_tmp(tmp_path, monkeypatch)
        s = analyze_sliced(_pool_run(tmp_path / "run", 2), slice_batches=2)
        path = s.critical.path
        s.close()
        with pytest.raises(ValueError, match="read critical.path and critical.segments before closing"):
            _ = s.critical.segments
        assert ([], True) == (list(tmp.iterdir()), s.critical.path is path)

    def test_files_stay_while_the_analysis_is_kept(self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
        """A kept analysis holds only its path's files; they go when it is garbage-collected."""
        import gc

        tmp = _in_tmp(tmp_path, monkeypatch)
        s = analyze_sliced(_pool_run(tmp_path / "run", 2), slice_batches=2)
        kept = sorted(p.name.split(".")[0] for p in tmp.rglob("*") if p.is_file())
        del s
        gc.collect()
        assert ({"path"}, []) == (set(kept), list(tmp.iterdir()))

    @pytest.mark.parametrize("where", ["_spilled_path", "summarise_stalls", "_walk_back"])
    def test_no_file_left_after_an_error(self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, where: str) -> None:
        """An error in the walk, the path's sums or the stalls passes through unchanged and leaves no file."""
        tmp = _in_tmp(tmp_path, monkeypatch)
        run = _pool_run(tmp_path / "run", 2)

        def failing(*args: object, **kwargs: object) -> None:
            raise KeyboardInterrupt(f"stopped in {where}")

        monkeypatch.setattr(pipeprobe.sliced, where, failing)
        with pytest.raises(KeyboardInterrupt, match=f"stopped in {where}"):
            analyze_sliced(run, slice_batches=2)
        assert [] == list(tmp.iterdir())


def _blame_of(pairs: pd.DataFrame, rows: int) -> pd.DataFrame:
    from pipeprobe.stalls import _blame

    b = pd.DataFrame({"wait_start_s": np.zeros(rows), "ready_s": np.ones(rows)})
    got = _blame(b, lambda b, stalled: pairs, {"collate"})
    return got.assign(blame_sample_ids=[tuple(x) for x in got["blame_sample_ids"]])


class TestStallSums:
    @settings(max_examples=150, deadline=None)
    @given(st.integers(0, 10_000), st.integers(1, 8), st.integers(1, 80), st.integers(1, 4))
    def test_few_rows_per_stall_blame_as_all_pairs(self, seed: int, rows: int, n: int, sets: int) -> None:
        """Stalls summed a set of whole stalls at a time give _blame's blame of all pairs at once, bit for bit, both
        when each (stall, label, lane) is one block of pairs (pandas adds with ufunc.reduceat) and when not
        (compensated, Kahan 1965), with more samples in a stall than the blame names (the rest counted), and
        with labels and lanes kept as categories sorted as their text."""
        from pipeprobe._pathspill import _StallSums

        rng = np.random.default_rng(seed)
        row = np.sort(rng.integers(0, rows, n))
        label = rng.choice(["decode", "read", "collate", "unexplained gap"], n)
        if seed % 2:  # one label per stall: every group one block
            label = np.array(["decode", "read", "collate", "unexplained gap"])[row % 4]
        pairs = pd.DataFrame({"row": row, "label": label.astype(object),
                              "lane": rng.choice(["worker 1", "worker 2"], n).astype(object),
                              "sec": rng.choice([0.1, 0.7, 1e-3 / 3, 0.005000000000000001], n),
                              "sample": rng.integers(-1, 6 if seed % 3 else 40, n), "order": np.arange(n)})
        text = sorted({*pairs["label"], *pairs["lane"], "unused"})
        sums = _StallSums(text if seed % 4 < 2 else None)  # labels and lanes as sorted categories, or as text
        cuts = np.unique(np.r_[0, rng.integers(0, rows + 1, sets - 1), rows + 1])
        for lo, hi in zip(cuts[:-1], cuts[1:], strict=True):  # sets of whole stalls, in any order
            sums.add(pairs[(row >= lo) & (row < hi)])
        pd.testing.assert_frame_equal(_blame_of(pairs, rows), _blame_of(sums.pairs(), rows), check_exact=True)


class TestGroupLayout:
    @settings(max_examples=200, deadline=None)
    @given(st.lists(st.lists(st.integers(-1, 3), max_size=6), max_size=5))
    def test_blocks_follow_the_joined_sequence(self, parts: list[list[int]]) -> None:
        """Blocks, fed parts from the last, says what the joined sequence is (pandas 3.1 groupby ops.is_monotonic)."""
        b = Blocks()
        for p in parts[::-1]:
            b.prepend(np.array(p, np.int64))
        assert _rising_by_definition(sum(parts, [])) == b.rising

    @pytest.mark.parametrize(("seq", "expected"), [([0] * 6, 0.039), ([-1] + [0] * 6, 0.039),
                                                   ([0] * 6 + [-1], 0.03900000000000001),
                                                   ([0, 1] + [0] * 5, 0.03900000000000001)])
    def test_pandas_adds_rising_groups_another_way(self, seq: list[int], expected: float) -> None:
        """The premise: pandas adds six decode times of a real run to 0.039 when the group ids rise, and
        compensated (Kahan 1965; math.fsum gives the same here) to 0.03900000000000001 when not (pandas 3.1 ops.py)."""
        it = iter([0.005, 0.008, 0.005000000000000001, 0.008, 0.0050000000000000044, 0.008])
        values = [next(it) if c == 0 else 5.0 for c in seq]
        key = pd.Categorical.from_codes(seq, categories=["a", "b"])
        assert expected == pd.Series(values).groupby(key, sort=False, observed=True).sum()["a"]


class TestCriticalPath:
    def test_attribution_covers_the_longest_path(self, tmp_path: Path) -> None:
        """The joined path's attribution adds up to networkx's longest path through the whole timeline (networkx)."""
        d = _pool_run(tmp_path / "run", 7)
        g = build_timeline(pipeprobe.load(d)).to_networkx()
        s = analyze_sliced(d, slice_batches=1)
        assert pytest.approx(nx.dag_longest_path_length(g, weight="weight"), abs=1e-9) == float(
            s.critical.shares["seconds"].sum())

    def test_path_is_a_chain_in_time(self, tmp_path: Path) -> None:
        """Each node of the joined path starts no earlier than the one before it ended (critical path method)."""
        path = analyze_sliced(_pool_run(tmp_path / "run", 3), slice_batches=1).critical.path
        assert True is bool((path["start_s"].to_numpy()[1:] >= path["end_s"].to_numpy()[:-1]).all())


class TestSlices:
    def test_edges_at_every_nth_request(self) -> None:
        """Slices begin where the consumer asked for every n-th batch of the lowest rank."""
        b = pd.DataFrame({"rank": [0, 0, 0, 1, 1, 1], "wait_start_s": [0.0, 1.0, 2.0, 0.5, 1.5, 2.5]})
        assert [-np.inf, 1.0, 2.0, np.inf] == slice_edges(b, 1).tolist()

    def test_one_slice_when_it_holds_every_batch(self, tmp_path: Path) -> None:
        """A slice larger than the run reads the run as one slice."""
        assert 1 == analyze_sliced(write_run(tmp_path / "r", simple_pipeline(4)), slice_batches=100).slices

    def test_zero_batches_per_slice_is_refused(self) -> None:
        """A slice of no batches is a ValueError that says what is allowed."""
        with pytest.raises(ValueError, match="at least 1"):
            slice_edges(pd.DataFrame({"rank": [0], "wait_start_s": [0.0]}), 0)

    def test_default_slice_size(self) -> None:
        """By default a slice holds about 300,000 spans."""
        assert 3_000 == slice_batches_for(30_000_000, 300_000)


class TestCommandLine:
    def test_report_in_slices_shows_the_same_shares(self, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
        """`pipeprobe report --slice-batches N --json` gives the in-memory critical-path seconds per label."""
        import json

        from pipeprobe.cli import main

        d = _pool_run(tmp_path / "run", 5)
        assert 0 == main(["report", str(d), "--slice-batches", "2", "--json", "--quiet"])
        got = json.loads(capsys.readouterr().out)
        shares = pipeprobe.analyze(d).critical.shares
        assert dict(zip(shares["label"], shares["seconds"])) == {r["label"]: r["seconds"] for r in got["critical_path"]}

    def test_html_with_slices_is_refused(self, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
        """--html with --slice-batches exits 2 with one line saying what to do."""
        from pipeprobe.cli import main

        d = write_run(tmp_path / "r", simple_pipeline(4))
        assert 2 == main(["report", str(d), "--slice-batches", "2", "--html", str(tmp_path / "r.html")])
        err = capsys.readouterr().err.strip().splitlines()
        assert 1 == len(err) and "--slice-batches 0" in err[0]
