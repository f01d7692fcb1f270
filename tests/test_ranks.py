"""Cross-rank view: straggler rank, its cause and stage, job-wide cost; bad multi-rank folders."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

import pipeprobe
from pipeprobe.errors import TraceFormatError
from pipeprobe.ranks import format_rank_view, rank_view

sys.path.insert(0, str(Path(__file__).parent))
from _synth import stage, step, wait, write_ranks, write_run  # noqa: E402


class TestStraggler:
    def test_late_input_names_rank_cause_stage_and_cost(self, tmp_path: Path) -> None:
        """Rank 2 gets each batch 30 ms late: it is the straggler by input, in stage decode; cost = 4 x 30 ms.

        Hand-checkable (critical path of each synchronised step, Kelley and Walker 1959): the
        step cannot end before its latest rank arrives, so the fastest rank waits 30 ms per step.
        """
        run = pipeprobe.load(write_ranks(tmp_path / "r", {2: 30.0}, ranks=3, steps=4))
        view = rank_view(run)
        assert (2, "input", "decode") == (view.straggler_rank, view.straggler_cause, view.straggler_stage)
        assert [2] * 4 == view.steps["last_rank"].tolist()
        assert 0.120 == pytest.approx(view.straggler_cost_s, abs=1e-9)
        assert 0.240 == pytest.approx(view.idle_rank_s, abs=1e-9)  # ranks 0 and 1 each wait 4 x 30 ms
        # rank 2 waits 35 of every 45 ms (5 ms base wait + 30 late, then a 10 ms step)
        assert 35 / 45 == pytest.approx(view.straggler_stall_fraction, abs=1e-9)
        assert "straggler: rank 2" in format_rank_view(view)

    def test_balanced_ranks_have_no_straggler(self, tmp_path: Path) -> None:
        """Ranks that arrive together cost nothing and no rank is named."""
        view = rank_view(pipeprobe.load(write_ranks(tmp_path / "r", {}, steps=4)))
        assert (None, 0.0) == (view.straggler_rank, view.straggler_cost_s)
        assert {"none"} == set(view.steps["cause"])

    def test_slow_synchronisation_is_blamed_on_the_network(self, tmp_path: Path) -> None:
        """All ranks arrive together but one step's synchronisation takes 40 ms longer: cause 'network'."""
        d = tmp_path / "r"
        for r in range(2):
            rows = []
            t = 0.0
            for k in range(5):
                sync = 50.0 if k == 3 else 10.0
                rows += [wait(t, t + 5, k), step(t + 5, t + 5 + sync, k)]
                t += 5 + sync
            write_run(d, {100 + r: rows}, rank=r, world_size=2, run_id="job")
        view = rank_view(pipeprobe.load(d))
        assert ["none", "none", "none", "network", "none"] == view.steps["cause"].tolist()
        assert 0.040 == pytest.approx(view.steps["network_s"].iloc[3], abs=1e-9)
        assert view.straggler_rank is None

    def test_pool_reads_ranks_in_parallel_with_the_same_result(self, tmp_path: Path) -> None:
        """Reading 8 ranks in a process pool gives the in-process answer, and reports progress per rank."""
        d = write_ranks(tmp_path / "r", {5: 12.0}, ranks=8, steps=6)
        calls = []
        pooled = rank_view(d, processes=2, progress=lambda done, total: calls.append((done, total)))
        local = rank_view(pipeprobe.load(d))
        assert [(i, 8) for i in range(1, 9)] == calls
        assert (local.straggler_rank, local.straggler_stage) == (pooled.straggler_rank, pooled.straggler_stage)
        assert local.straggler_cost_s == pytest.approx(pooled.straggler_cost_s)
        assert np.allclose(local.ranks["waited_s"], pooled.ranks["waited_s"])


class TestInTheReport:
    def test_several_ranks_get_a_section_in_text_json_and_html(self, tmp_path: Path) -> None:
        """Rank 1 late by 30 ms at each of 4 steps: the report names it; the cost is 4 x 30 ms (analytic)."""
        from pipeprobe.html import render_report
        from pipeprobe.report import Report, format_report, report_dict

        r = Report(pipeprobe.analyze(write_ranks(tmp_path / "r", {1: 30.0}, steps=4)))
        text, d = format_report(r), report_dict(r)["ranks"]
        assert ((1, "input", pytest.approx(0.12)), True, True) == (
            (d["straggler_rank"], d["straggler_cause"], d["straggler_cost_s"]),
            "ranks at the gradient synchronisation" in text, "<h2>Ranks (2)</h2>" in render_report(r))

    def test_one_rank_has_no_section_and_says_so(self, simple_run_dir: Path) -> None:
        """One rank: no ranks section in the text, and the JSON says there is no cross-rank view."""
        from pipeprobe.report import Report, format_report, report_dict

        r = Report(pipeprobe.analyze(simple_run_dir))
        assert ({"count": 1, "cross_rank_view": False}, False) == (
            report_dict(r)["ranks"], "gradient synchronisation" in format_report(r))


class TestBadFolders:
    def test_missing_rank_is_named(self, tmp_path: Path) -> None:
        """World size 4 with rank 2 absent: a warning names run-r2.json; the view lists it as missing."""
        d = write_ranks(tmp_path / "r", {1: 10.0}, ranks=4, skip=(2,))
        with pytest.warns(UserWarning, match=r"world size is 4 but 1 rank\(s\) left no run header \(run-r2.json"):
            run = pipeprobe.load(d)
        view = rank_view(run)
        assert [2] == view.missing_ranks
        assert 1 == view.straggler_rank

    def test_ranks_of_different_runs_are_refused(self, tmp_path: Path) -> None:
        """Rank headers with different run ids in one folder: an error naming each run's files."""
        d = tmp_path / "r"
        write_ranks(d, {}, skip=(1,), run_id="tuesday")
        write_ranks(d, {}, skip=(0,), run_id="wednesday")
        with pytest.raises(TraceFormatError, match=r"run 'tuesday': run-r0.json; run 'wednesday': run-r1.json"):
            pipeprobe.load(d)

    def test_process_file_of_another_run_is_skipped(self, tmp_path: Path) -> None:
        """A span file whose process header names another run is left out, with a warning naming it."""
        d = write_ranks(tmp_path / "r", {}, ranks=2)
        write_run(tmp_path / "other", {555: [stage("decode", 0, 1, sample=0, epoch=0)]}, rank=1, run_id="other-run",
                  main_pid=1)
        for suffix in (".json", ".bin"):
            (d / f"spans-r1-p555{suffix}").write_bytes((tmp_path / "other" / f"spans-r1-p555{suffix}").read_bytes())
        with pytest.warns(UserWarning, match=r"spans-r1-p555.json: belongs to run 'other-run'"):
            run = pipeprobe.load(d)
        assert 555 not in set(run.spans["pid"])

    def test_span_file_without_its_rank_header_is_skipped(self, tmp_path: Path) -> None:
        """Span files of a rank with no run header are left out with a warning (they belong to another run)."""
        d = write_ranks(tmp_path / "r", {}, ranks=2)
        write_run(tmp_path / "other", {777: [stage("decode", 0, 1, sample=0, epoch=0)]}, rank=5)
        for suffix in (".json", ".bin"):
            (d / f"spans-r5-p777{suffix}").write_bytes((tmp_path / "other" / f"spans-r5-p777{suffix}").read_bytes())
        with pytest.warns(UserWarning, match=r"spans-r5-p777.bin: there is no run header run-r5.json"):
            run = pipeprobe.load(d)
        assert 777 not in set(run.spans["pid"])


@pytest.mark.slow
class TestRealDataParallelJob:
    def test_slow_loader_rank_is_found_and_its_cost_measured(self, tmp_path: Path) -> None:
        """2 gloo ranks with DistributedDataParallel; rank 1 decodes each photo 10 ms slower.

        The view must name rank 1 and stage 'decode', and its job-wide cost must be within 10 %
        of the time rank 0 really waited: its backward() minus rank 1's, summed over steps,
        measured in the job with perf_counter outside pipeprobe (DDP's backward blocks until the
        gradient all-reduce has every rank's gradients).
        """
        pytest.importorskip("torch")
        from _launch import launch

        out = tmp_path / "run"
        launch("_ddp_job.py", [str(out), "1", "30", "10"])
        run = pipeprobe.load(out)
        assert run.header["run_id"] == pipeprobe.tracefile.read_json(out / "run-r1.json")["run_id"]
        assert "exchange" == run.header["run_id_source"]
        view = rank_view(run)
        assert (1, "input", "decode") == (view.straggler_rank, view.straggler_cause, view.straggler_stage)
        waited = float((np.loadtxt(out / "backward-r0.txt") - np.loadtxt(out / "backward-r1.txt")).sum())
        assert waited > 0.8  # 30 steps x 4 photos x 10 ms, less what overlaps
        assert abs(view.straggler_cost_s - waited) <= 0.10 * waited, (view.straggler_cost_s, waited)
        assert view.straggler_stall_fraction > 0.5
        self._check_report(run, view)

    @staticmethod
    def _check_report(run, view) -> None:
        """`pipeprobe report` on the job: the ranks section in text, JSON and HTML names the straggler."""
        from pipeprobe.html import render_report
        from pipeprobe.report import Report, format_report, report_dict

        r = Report(pipeprobe.analyze(run))
        text, d, page = format_report(r), report_dict(r)["ranks"], render_report(r)
        assert ((2, True, 1, "input", "decode"), True, True) == (
            (d["count"], d["cross_rank_view"], d["straggler_rank"], d["straggler_cause"], d["straggler_stage"]),
            "straggler: rank 1 (cause: input, stage 'decode')" in text, "<b>rank 1</b>" in page)
        assert (pytest.approx(view.straggler_cost_s), [0, 1]) == (d["straggler_cost_s"],
                                                                   [x["rank"] for x in d["per_rank"]])
