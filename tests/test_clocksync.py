"""Clock offsets between ranks: the round-trip bound, a real gloo exchange, and how load uses them."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest

import pipeprobe
from pipeprobe import tracefile as tf
from pipeprobe.record._clocksync import offsets_from_stamps

sys.path.insert(0, str(Path(__file__).parent))
from _synth import write_ranks  # noqa: E402


class TestRoundTripBound:
    def test_worked_example(self) -> None:
        """One round: offset = ((t2 - t1) + (t3 - t4)) / 2 and error bound = delay / 2 (RFC 5905 on-wire formulas)."""
        # Rank 0 reads a=0, b=10; rank 1 (clock 1000 ns ahead) reads a=1002, b=1008.
        # As NTP: t1=0 (send), t2=1002, t3=1008 (peer stamps), t4=10 (receive)
        # offset = ((1002-0) + (1008-10)) / 2 = 1000; delay = (10-0) - (1008-1002) = 4 -> but our
        # bound is the one-sided interval [a1 - b0, b1 - a0] = [992, 1008]: midpoint 1000, half width 8.
        off, unc = offsets_from_stamps(np.array([[[0, 10]], [[1002, 1008]]]))
        assert [0, 1000] == off.tolist()
        assert [0, 8] == unc.tolist()

    def test_random_delays_always_bracket_the_true_offset(self) -> None:
        """Whatever the delays, the true offset lies within offset ± uncertainty (the bound is never violated)."""
        rng = np.random.default_rng(7)
        for _ in range(200):
            ranks, rounds = 4, 6
            truth = rng.integers(-10**12, 10**12, ranks)
            truth[0] = 0
            stamps = np.zeros((ranks, rounds, 2), np.int64)
            t = 0
            for k in range(rounds):
                enter = t + rng.integers(0, 50_000, ranks)  # true times each rank reads a
                done = enter.max() + rng.integers(1, 50_000, ranks)  # no one leaves before all entered
                stamps[:, k, 0] = enter + truth
                stamps[:, k, 1] = done + truth
                t = done.max() + 1000
            off, unc = offsets_from_stamps(stamps)
            assert (np.abs(off - truth) <= unc).all()


def _exchange(tmp_path: Path, shift_s: float) -> list[dict]:
    from _launch import launch

    launch("_clock_job.py", [str(tmp_path), str(shift_s)])
    return [json.loads((tmp_path / f"clock-r{r}.json").read_text()) for r in (0, 1)]


@pytest.mark.slow
class TestRealExchange:
    def test_two_gloo_ranks_measure_a_known_shift(self, tmp_path: Path) -> None:
        """Rank 1's clock shifted by 5 s: the measured offset is 5 s within its uncertainty, and small (< 50 ms)."""
        pytest.importorskip("torch")
        r0, r1 = _exchange(tmp_path, 5.0)
        cs = r1["clock_sync"]
        assert abs(cs["offset_ns"] - 5_000_000_000) <= cs["uncertainty_ns"]
        assert cs["uncertainty_ns"] < 50_000_000
        assert r0["run_id"] == r1["run_id"] == "job-of-rank-0"  # everyone takes rank 0's id
        assert 0 == r0["clock_sync"]["offset_ns"]


class TestLoadAlignment:
    def test_measured_offsets_put_hosts_on_one_axis(self, tmp_path: Path) -> None:
        """Rank 1 on another host with a monotonic clock 7 s ahead: its synchronised step ends line up with rank 0's."""
        shift = 7_000_000_000
        d = tmp_path / "r"
        write_ranks(d, {1: 20.0}, skip=(1,), host="cell-a",
                    header_extra={"clock_sync": {"reference_rank": 0, "offset_ns": 0, "uncertainty_ns": 0}})
        write_ranks(d, {1: 20.0}, skip=(0,), host="cell-b", mono_offset_ns=shift,
                    header_extra={"clock_sync": {"reference_rank": 0, "offset_ns": shift, "uncertainty_ns": 40_000}})
        run = pipeprobe.load(d)
        assert [] == run.problems
        assert "measured-offsets" == run.clock["method"]
        assert 40e-6 == run.clock["uncertainty_s"]
        ends = run.batches.pivot(index="batch_id", columns="rank", values="step_end_s")
        assert np.allclose(ends[0], ends[1], atol=1e-9)

    def test_wall_clock_disagreeing_with_measured_offset_is_reported(self, tmp_path: Path) -> None:
        """Measured offsets are used, and a wall clock 4 s off is named in a warning with both files."""
        shift = 7_000_000_000
        d = tmp_path / "r"
        write_ranks(d, {}, skip=(1,), host="cell-a",
                    header_extra={"clock_sync": {"reference_rank": 0, "offset_ns": 0, "uncertainty_ns": 0}})
        write_ranks(d, {}, skip=(0,), host="cell-b", mono_offset_ns=shift,
                    header_extra={"clock_sync": {"reference_rank": 0, "offset_ns": shift, "uncertainty_ns": 0},
                                  "anchor_wall_ns": 1_700_000_004_000_000_000})
        with pytest.warns(UserWarning, match=r"run-r1.json \(cell-b\) is 4.00 s ahead of that of run-r0.json"):
            run = pipeprobe.load(d)
        assert "measured-offsets" == run.clock["method"]

    def test_wall_clocks_seconds_apart_are_reported(self, tmp_path: Path) -> None:
        """Two hosts without measured offsets whose step ends differ by 3 s: a warning names both run headers."""
        d = tmp_path / "r"
        write_ranks(d, {}, skip=(1,), host="cell-a")
        write_ranks(d, {}, skip=(0,), host="cell-b")
        for path in d.glob("*-r1*.json"):  # cell-b's wall clock reads 3 s ahead
            h = tf.read_json(path)
            h["anchor_wall_ns"] += 3_000_000_000
            tf.write_json_atomic(path, h)
        with pytest.warns(UserWarning) as seen:
            run = pipeprobe.load(d)
        assert "wall-anchor" == run.clock["method"]
        text = [str(w.message) for w in seen]
        assert any("run-r1.json" in m and "run-r0.json" in m and "3.00 s" in m for m in text), text
