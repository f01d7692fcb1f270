"""Why it is slow: per-stage statistics, slowest samples, the CPU view."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest
from _synth import pool_schedule, simple_pipeline, stage, write_resources, write_run

import pipeprobe
from pipeprobe.analysis import analyze
from pipeprobe.stagestats import STAGE_COLUMNS, core_busy_during_stalls, stage_stats


class TestTable:
    def test_counts_totals_and_percentiles(self, tmp_path):
        """count/total/mean and p50/p95/p99 agree with numpy.percentile (linear, Hyndman and Fan's type 7)."""
        durs = [1, 2, 3, 4, 100, 7, 8, 9, 10, 11]
        rows = []
        t = 0.0
        for i, d in enumerate(durs):
            rows.append(stage("decode", t, t + d, sample=i, epoch=0))
            t += d
        st = stage_stats(pipeprobe.load(write_run(tmp_path / "r", {100: rows})))
        assert list(STAGE_COLUMNS) == list(st.table.columns)
        row = st.table.set_index("stage").loc["decode"]
        ms = np.array(durs) / 1e3
        assert (10, pytest.approx(ms.sum()), pytest.approx(ms.mean())) == (row["count"], row["total_s"], row["mean_s"])
        for q in (50, 95, 99):
            assert pytest.approx(np.percentile(ms, q)) == row[f"p{q}_s"]

    def test_critical_share_of_each_stage(self, simple_run_dir):
        """Hand check: decode is 18 of 54 ms on the critical path."""
        a = analyze(simple_run_dir)
        row = a.stages.table.set_index("stage").loc["decode"]
        assert pytest.approx(18 / 54) == row["critical_share"]

    def test_cpu_ratio_tells_computing_from_waiting(self, tmp_path):
        """A busy loop has CPU/wall near 1, a sleep near 0 (thread CPU time, common practice): each stage's ratio
        is the one the job reads on its own clocks around it (a loaded machine deschedules the busy loop, which
        lowers both alike), and a sleep stays under 0.2. Records again (at most twice) if the two disagree."""
        for attempt in range(3):
            ratio, own = self._record_spin_and_nap(tmp_path / f"r{attempt}")
            if all(abs(ratio[k] - own[k]) < 0.1 for k in own):
                break
        assert {k: True for k in own} == {k: abs(ratio[k] - own[k]) < 0.1 for k in own}, (ratio, own)
        assert ratio["nap"] < 0.2

    @staticmethod
    def _record_spin_and_nap(d) -> tuple[dict[str, float], dict[str, float]]:
        """``(cpu_ratio per stage from the stage table, thread CPU / wall per stage on the job's own clocks)``."""
        cpu_ns, wall_ns = {"spin": 0, "nap": 0}, {"spin": 0, "nap": 0}

        def timed(name, body) -> None:
            c0, w0 = time.thread_time_ns(), time.monotonic_ns()
            with pipeprobe.stage(name):
                body()
            cpu_ns[name] += time.thread_time_ns() - c0
            wall_ns[name] += time.monotonic_ns() - w0

        def spin() -> None:
            end = time.thread_time() + 0.02
            while time.thread_time() < end:
                pass

        with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
            for _ in probe.watch([[0], [1]]):
                timed("spin", spin)
                timed("nap", lambda: time.sleep(0.02))
        t = stage_stats(pipeprobe.load(d)).table.set_index("stage")
        return ({k: float(t.loc[k, "cpu_ratio"]) for k in cpu_ns}, {k: cpu_ns[k] / wall_ns[k] for k in cpu_ns})


class TestSlowest:
    def test_heavy_tail_share(self, tmp_path):
        """Hand check: one sample of 100 taking 10x the others costs 10/109 of the stage's time."""
        rows = []
        t = 0.0
        for i in range(100):
            d = 10.0 if i == 37 else 1.0
            rows.append(stage("decode", t, t + d, sample=i, epoch=0))
            t += d
        st = stage_stats(pipeprobe.load(write_run(tmp_path / "r", {100: rows})))
        tail = st.tail_of("decode")
        assert (1, 100, [37]) == (tail["samples"], tail["of_samples"], tail["sample_ids"])
        assert pytest.approx(10 / 109) == tail["share"]

    def test_samples_summed_and_ties_to_the_lower_id(self, tmp_path):
        """Hand check: 199 samples, 2 listed; a sample's two spans add up (6 ms), a 5 ms tie goes to the lower id."""
        rows, t = [], 0.0
        for i in [i for i in range(198) if i != 3] + [7]:  # 197 samples of 1 ms, sample 7 twice 3 ms
            d = 3.0 if i == 7 else 1.0
            rows.append(stage("decode", t, t + d, sample=i, epoch=0, tid=1))
            t += d
        # the same instants on two threads: durations equal to the last bit
        rows += [stage("decode", t, t + 5.0, sample=s, epoch=0, tid=tid) for s, tid in ((2**40, 2), (3, 3))]
        tail = stage_stats(pipeprobe.load(write_run(tmp_path / "r", {100: rows}))).tail_of("decode")
        assert (2, 199, [7, 3]) == (tail["samples"], tail["of_samples"], tail["sample_ids"])
        assert pytest.approx(11 / 212) == tail["share"]


class TestCpuView:
    def _run(self, tmp_path, pct):
        procs, end = pool_schedule([[[4000]], [[4000]]], [1000, 1000], workers=1)
        d = write_run(tmp_path / "r", procs, end_ms=end)
        # samples every 2 ms; both cores at pct while the loop stalls (0-4 ms, 5-8 ms), idle otherwise
        rows = []
        for t in range(2, 12, 2):
            p = pct if t <= 8 else 0.0
            rows += [(t, 0, 0, p), (t, 0, 1, p)]
        write_resources(d, rows)
        return pipeprobe.load(d)

    def test_core_busy_weighted_by_stall_overlap(self, tmp_path):
        """Hand check: every sample covering a stall reads 60 % -> 0.6 busy during stalls."""
        assert pytest.approx(0.6) == core_busy_during_stalls(self._run(tmp_path, 60.0))

    def test_saturated_cores_mean_no_more_workers(self, tmp_path):
        """With every core busy while the loop waits, more workers cannot help on this machine."""
        a = analyze(self._run(tmp_path, 100.0))
        assert (True, "no") == (a.stages.cores_saturated, a.stages.more_workers)
        assert "cores" in a.stages.more_workers_reason

    def test_idle_cores_mean_more_workers(self, tmp_path):
        """With idle cores while the loop waits, more workers can help."""
        a = analyze(self._run(tmp_path, 20.0))
        assert (False, "yes") == (a.stages.cores_saturated, a.stages.more_workers)

    def test_step_bound_needs_no_workers(self, tmp_path):
        """When the step sets the pace, the answer is no, whatever the cores do."""
        a = analyze(write_run(tmp_path / "r", simple_pipeline(decode_ms=0.01, augment_ms=0.0, step_ms=10.0)))
        assert "no" == a.stages.more_workers

    def test_unknown_without_resource_samples(self, simple_run_dir):
        """No resource samples: the answer is 'unknown', not a guess."""
        a = analyze(simple_run_dir)
        assert ("unknown", True) == (a.stages.more_workers, math.isnan(a.stages.core_busy_in_stalls))


class TestGroupSums:
    @pytest.mark.parametrize("seed", range(8))
    def test_same_numbers_as_pandas_group_sum(self, seed):
        """Per (label, sample) key the slowest-samples sums equal pandas' groupby(sort=False).sum(), bit for bit
        (pandas, the reference implementation; singletons, repeats, every key once, NaN, -0.0 and inf)."""
        import pandas as pd

        from pipeprobe.stagestats import _group_sums

        rng = np.random.default_rng(seed)
        n = 500
        key = rng.integers(0, 40 + 60 * seed, n).astype(np.int64)
        if seed >= 6:  # every key once, as one piece per sample and label gives
            key = rng.choice(10 * n, n, replace=False).astype(np.int64)
        v = rng.exponential(1.0, n) * 10.0 ** rng.integers(-9, 9, n)
        v[rng.integers(0, n, 4)] = np.nan
        v[rng.integers(0, n, 3)] = -0.0
        v[rng.integers(0, n, 2)] = np.inf
        ref = pd.Series(v).groupby(key, sort=False).sum()
        keys, sums = _group_sums(key, v)
        assert (ref.index.to_numpy(np.int64).tolist(), ref.to_numpy().tobytes()) == (keys.tolist(), sums.tobytes())
