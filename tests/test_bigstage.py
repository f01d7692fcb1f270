"""One stage's numbers worked out a part at a time (pipeprobe._bigstage) against pandas over all of them at once.

The reference is pandas' own group-by (count, sum, mean, max, quantile) of the whole column, with the layout
the in-memory stage table gives it (a dropped row at the end: compensated sums, pandas 3.1 ``group_sum``), and
:func:`pipeprobe.stagestats._slowest` / ``_own_time`` over all pieces at once. Equality is exact (``==``).
"""

from __future__ import annotations

import math
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import pipeprobe._bigstage
import pipeprobe._pathspill
import pipeprobe._spill
import pipeprobe.sliced
from pipeprobe._bigstage import kahan, order_statistics, piece_numbers, quantiles, span_numbers
from pipeprobe._spill import Spill
from pipeprobe.stagestats import _own_time, _slowest

_FLOATS = st.one_of(st.floats(0.0, 10.0), st.sampled_from([0.0, 1e-9, 0.005, 0.008, 1e6, 0.1]),
                    st.floats(-1e3, 1e3))


def _split(values: np.ndarray, cuts: list[int]) -> list[np.ndarray]:
    """``values`` cut at ``cuts`` (empty parts included)."""
    edges = sorted(min(len(values), c) for c in cuts)
    return [values[a:b] for a, b in zip([0, *edges], [*edges, len(values)], strict=True)]


def _grouped(values: np.ndarray) -> pd.core.groupby.SeriesGroupBy:
    """The values as one stage of the in-memory stage table groups them when stages are not one rising block."""
    key = pd.Categorical.from_codes(np.r_[np.zeros(len(values), np.int64), -1], categories=["s"])
    return pd.Series(np.r_[values, 0.0]).groupby(key, sort=False, observed=True)


class TestKahan:
    @settings(max_examples=300, deadline=None)
    @given(st.lists(_FLOATS, min_size=1, max_size=60), st.lists(st.integers(0, 60), max_size=5))
    def test_continued_over_parts_is_pandas_group_sum_and_mean(self, values: list[float], cuts: list[int]) -> None:
        """The sum carried from part to part is pandas' group-by sum and mean of all values (pandas 3.1 group_sum)."""
        v = np.array(values)
        state = (0.0, 0.0)
        for part in _split(v, cuts):
            state = kahan(part, state)
        g = _grouped(v)
        assert (g.sum().iloc[0], g.mean().iloc[0]) == (state[0], state[0] / len(v))

    def test_nan_is_skipped_and_infinity_kept(self) -> None:
        """NaN is skipped and an infinite value gives infinity, as pandas' sum does (pandas GH 53606)."""
        v = np.array([1.0, np.nan, 2.5, np.inf, 3.0])
        assert _grouped(v).sum().iloc[0] == kahan(v[2:], kahan(v[:2]))[0] == math.inf


class TestOrderStatistics:
    @settings(max_examples=300, deadline=None)
    @given(st.lists(_FLOATS, min_size=1, max_size=80), st.lists(st.integers(0, 80), max_size=4), st.integers(1, 9))
    def test_quantiles_are_pandas_group_quantiles(self, values: list[float], cuts: list[int], limit: int) -> None:
        """Percentiles from a few values at a time are pandas' group-by quantiles (Hyndman and Fan 1996, def. 7)."""
        v = np.array(values)
        expected = _grouped(v).quantile([0.5, 0.95, 0.99]).to_numpy().tolist()
        assert expected == quantiles(lambda: iter(_split(v, cuts)), len(v), limit=limit)

    def test_ties_one_value_and_nan(self) -> None:
        """All values equal, one value, and NaN among them give numpy's sorted order statistics (numpy.sort)."""
        same = np.full(50, 0.25)
        v = np.array([3.0, np.nan, 1.0, 2.0])
        assert ([0.25, 0.25], [7.0], [1.0, 3.0]) == (
            order_statistics(lambda: (same[:20], same[20:]), [0, 49], limit=3),
            order_statistics(lambda: (np.zeros(0), np.array([7.0])), [0], limit=1),
            order_statistics(lambda: (v[:1], v[1:]), [0, 2], limit=1))

    def test_narrows_a_large_stretch(self) -> None:
        """On 200,000 exponential values read 1,000 at a time the percentiles are numpy's sort (numpy.quantile, linear)."""
        v = np.random.default_rng(5).exponential(0.25, 200_000)
        parts = lambda: (v[i:i + 1000] for i in range(0, len(v), 1000))  # noqa: E731
        assert np.quantile(v, [0.5, 0.95, 0.99]).tolist() == quantiles(parts, len(v), limit=1000)


class TestSpanNumbers:
    @settings(max_examples=100, deadline=None)
    @given(st.lists(st.tuples(_FLOATS, st.one_of(st.just(math.nan), st.floats(0.0, 5.0))), min_size=1, max_size=40),
           st.lists(st.integers(0, 40), max_size=4))
    def test_are_the_stage_tables_numbers(self, rows: list[tuple[float, float]], cuts: list[int]) -> None:
        """count, total, mean, max, p50/p95/p99 and CPU time part by part are pandas' over all spans at once."""
        dur, cpu = np.array([r[0] for r in rows]), np.array([r[1] for r in rows])
        g = _grouped(dur)
        q = g.quantile([0.5, 0.95, 0.99]).to_numpy()
        key = pd.Categorical.from_codes(np.r_[np.zeros(len(cpu), np.int64), -1], categories=["s"])
        expected = {"count": len(dur), "total_s": g.sum().iloc[0], "mean_s": g.mean().iloc[0], "max_s": g.max().iloc[0],
                    "p50_s": q[0], "p95_s": q[1], "p99_s": q[2],
                    "cpu_s": pd.Series(np.r_[cpu, 0.0]).groupby(key, observed=True).sum(min_count=1).iloc[0]}
        got = span_numbers(lambda: ({"dur_s": d, "cpu_s": c} for d, c in zip(_split(dur, cuts), _split(cpu, cuts),
                                                                               strict=True)))
        assert pd.Series(expected).equals(pd.Series(got))


def _pieces(seed: int, n: int, threads: int, samples: int) -> pd.DataFrame:
    """Pieces of one stage on a few threads, in time order per thread, with repeated samples and tied seconds."""
    rng = np.random.default_rng(seed)
    thread = rng.integers(0, threads, n).astype(np.int32)
    start = np.cumsum(rng.integers(0, 3, n)).astype(np.float64)  # ties in start too
    dur = rng.choice([0.0, 0.001, 0.002, 0.25, 1e-7, 3.0], n) + rng.choice([0.0, 1e-3], n) * rng.random(n)
    sample = rng.integers(-1, samples, n)
    return pd.DataFrame({"thread": thread, "start_s": start, "dur_s": dur, "sample_id": sample})


def _spilled(folder: Path, p: pd.DataFrame, parts: int) -> Spill:
    """The pieces appended as the slices append them: later times first, one part per stretch of time."""
    s = Spill(folder, "pieces", {"label": np.int32, "sample_id": np.int64, "thread": np.int32,
                                 "start_s": np.float64, "dur_s": np.float64})
    for chunk in np.array_split(np.arange(len(p)), parts)[::-1]:
        q = p.iloc[chunk]
        s.append(np.full(len(q), 7), {"label": np.zeros(len(q), np.int32), **{c: q[c].to_numpy() for c in q}})
    return s


def _in_memory(p: pd.DataFrame) -> tuple[float, pd.DataFrame, bool]:
    """own_s and slowest samples of the pieces all at once (thread, then start; the stage not one rising block),
    and whether pandas adds each sample's pieces compensated there (the samples seen twice not one block each)."""
    p = p.iloc[np.lexsort((p["start_s"], p["thread"]))]
    frame = pd.DataFrame({"stage": pd.Categorical.from_codes(np.r_[np.zeros(len(p), np.int64), -1], ["s"]),
                          "label": pd.Categorical.from_codes(np.r_[np.zeros(len(p), np.int64), -1], ["s"]),
                          "sample_id": np.r_[p["sample_id"].to_numpy(), -1], "dur_s": np.r_[p["dur_s"].to_numpy(), 0.0]})
    sample = p["sample_id"].to_numpy()
    sample = sample[sample >= 0]
    codes, uniques = pd.factorize(sample)
    again = np.bincount(codes, minlength=len(uniques))[codes] > 1
    c = codes[again]
    split = bool(len(c) and (np.diff(c) < 0).any())
    return _own_time(frame)["own_s"].iloc[0], _slowest(frame), split


class TestPieceNumbers:
    @settings(max_examples=60, deadline=None)
    @given(st.integers(0, 10_000), st.integers(1, 120), st.integers(1, 4), st.integers(1, 50), st.integers(1, 6),
           st.integers(1, 40))
    def test_own_time_and_slowest_samples_are_the_in_memory_ones(self, seed: int, n: int, threads: int,
                                                                 samples: int, parts: int, chunk: int) -> None:
        """Own time and slowest samples (ids, ties by id, seconds, share) a part and a share of samples at a time
        are stagestats' over all pieces at once."""
        p = _pieces(seed, n, threads, samples)
        own, slow, split = _in_memory(p)
        with tempfile.TemporaryDirectory() as d, pytest.MonkeyPatch.context() as mp:
            mp.setattr(pipeprobe._bigstage, "CHUNK", chunk)
            got = piece_numbers(_spilled(Path(d), p, parts), 7, split, Path(d), "s")
        assert got is not None
        assert own == got[0]
        pd.testing.assert_frame_equal(slow.reset_index(drop=True), got[1].reset_index(drop=True), check_exact=True)

    def test_pieces_out_of_time_order_are_left_to_the_whole_stage(self, tmp_path: Path) -> None:
        """A thread whose pieces of a later part start before the previous part's: no piecewise result (None)."""
        p = _pieces(1, 40, 1, 10)
        p["start_s"] = p["start_s"].to_numpy()[::-1].copy()
        assert piece_numbers(_spilled(tmp_path, p, 3), 7, False, tmp_path, "s") is None


def test_large_stages_of_the_sliced_analysis_go_piece_by_piece(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """With a group of one row, the 4-worker run's stages are built a part at a time and the stage table is the
    in-memory analysis' (pipeprobe.analyze, exact)."""
    from _synth import write_many_spans

    run = write_many_spans(tmp_path / "run", 1500, workers=4, batch_size=8)
    used = []
    real = pipeprobe.sliced.piece_numbers
    monkeypatch.setattr(pipeprobe.sliced, "piece_numbers", lambda *a: used.append(real(*a)) or used[-1])
    monkeypatch.setattr(pipeprobe._spill, "GROUP_ROWS", 1)
    monkeypatch.setattr(pipeprobe._bigstage, "CHUNK", 50)
    s = pipeprobe.sliced.analyze_sliced(run, slice_batches=3)
    a = pipeprobe.analyze(run)
    assert (4, True) == (len(used), all(u is not None for u in used))
    pd.testing.assert_frame_equal(a.stages.table, s.stages.table, check_exact=True)
    pd.testing.assert_frame_equal(a.stages.slowest, s.stages.slowest, check_exact=True)


class TestRunningSums:
    @settings(max_examples=300, deadline=None)
    @given(st.lists(st.tuples(st.integers(0, 4), _FLOATS), min_size=1, max_size=60), st.lists(st.integers(0, 60), max_size=4),
           st.booleans())
    def test_are_pandas_group_sums_or_say_they_are_not(self, rows: list[tuple[int, float]], cuts: list[int],
                                                       sort: bool) -> None:
        """Part by part, the sums are pandas' group-by sums of all rows (first seen first, or sorted), and
        ``compensated`` is False exactly where pandas adds one value after another (pandas 3.1 ops.is_monotonic)."""
        from pipeprobe._pathspill import _RunningSums

        key, values = np.array([r[0] for r in rows]), np.array([r[1] for r in rows])
        r = _RunningSums(sorted_keys=sort)
        for k, v in zip(_split(key, cuts), _split(values, cuts), strict=True):
            r.add(k, v)
        g = pd.Series(values).groupby(key, sort=sort)
        expected = g.sum()
        got_keys, got = r.result()
        assert (g._grouper.is_monotonic, expected.index.tolist()) == (r.blocks is not False, got_keys.tolist())
        if r.compensated:
            assert expected.to_numpy().tolist() == got.tolist()


def test_the_path_shares_are_summed_part_by_part(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """On the 4-worker run the path's shares and stage seconds come from the running sums, its lanes (each one
    block) from a second reading added up as numpy adds a block, and all equal the in-memory analysis'
    (pipeprobe.analyze, exact)."""
    from _synth import write_many_spans

    run = write_many_spans(tmp_path / "run", 1500, workers=4, batch_size=8)
    at_once = []
    real = pipeprobe._pathspill.PathStore._summed_in_blocks
    monkeypatch.setattr(pipeprobe._pathspill.PathStore, "_summed_in_blocks",
                        lambda self, which, *a: at_once.append(which) or real(self, which, *a))
    monkeypatch.setattr(pipeprobe._pathspill, "BLOCK_LEAF", 128)
    s = pipeprobe.sliced.analyze_sliced(run, slice_batches=3)
    a = pipeprobe.analyze(run)
    assert ["lanes"] == at_once
    pd.testing.assert_frame_equal(a.critical.shares, s.critical.shares, check_exact=True)
    pd.testing.assert_frame_equal(a.critical.lanes, s.critical.lanes, check_exact=True)
    pd.testing.assert_frame_equal(a.stages.table, s.stages.table, check_exact=True)


class TestBlockSum:
    @settings(max_examples=200, deadline=None)
    @given(st.integers(1, 3000), st.integers(0, 10_000), st.integers(1, 9), st.sampled_from([128, 200, 1000]))
    def test_is_numpys_reduceat_of_the_whole_block(self, n: int, seed: int, parts: int, leaf: int) -> None:
        """A block given part by part, numpy adding at most ``leaf`` values at once, sums as numpy's
        ``add.reduceat`` of all of it (numpy pairwise summation; pandas 3.1 sums a rising group with it)."""
        from pipeprobe._pathspill import _BlockSum

        rng = np.random.default_rng(seed)
        v = rng.exponential(1.0, n) * rng.choice([1e-6, 1.0, 1e4], n)
        with pytest.MonkeyPatch.context() as mp:
            mp.setattr(pipeprobe._pathspill, "BLOCK_LEAF", leaf)
            b = _BlockSum(n)
            for part in np.array_split(v, parts):
                b.add(part)
        assert np.add.reduceat(v, np.zeros(1, np.intp))[0] == b.result()
