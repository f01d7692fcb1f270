"""Tests of the per-stage ceilings (pipeprobe.whatif.ceilings) and their report section.

Outside references: Amdahl's law (Amdahl 1967), exact for a serial
pipeline; the bottleneck law (Denning and Buzen 1978) for the worker count
that keeps up with the step; hand-computed schedules.
"""

from __future__ import annotations

import math

import pytest
from _synth import many_stage_names_run

import pipeprobe
from pipeprobe.analysis import analyze
from pipeprobe.report import format_report, report_dict
from pipeprobe.whatif.ceilings import ceilings, format_ceilings
from pipeprobe.whatif.plan import plan_from_durations


class TestSerialPipeline:
    def test_formula_and_replay_agree_when_nothing_overlaps(self, simple_run_dir):
        """In a serial pipeline Amdahl's law is exact (Amdahl 1967): decode's 1/3 share caps at 1.5x,
        and the replay with decode free gives 1.5x too."""
        c = ceilings(pipeprobe.load(simple_run_dir))
        decode = next(r for r in c.stages if r.stage == "decode")
        assert 1 / 3 == pytest.approx(decode.share)
        assert 1.5 == pytest.approx(decode.amdahl_ceiling)
        assert 1.5 == pytest.approx(decode.free_speedup)
        # 2x: 1 / (2/3 + 1/6) = 1.2x by the formula; the replay of a serial run agrees
        assert 1.2 == pytest.approx(decode.speedup_2x)
        assert pipeprobe.amdahl_speedup(1 / 3, 4) == pytest.approx(decode.speedup_4x)

    def test_next_critical_stage(self, simple_run_dir):
        """With decode free, the step leads the path."""
        c = ceilings(pipeprobe.load(simple_run_dir))
        assert "step" == next(r for r in c.stages if r.stage == "decode").next_critical

    def test_stages_sorted_by_share(self, simple_run_dir):
        """The largest share comes first (the step: 30 of 54 ms)."""
        c = ceilings(pipeprobe.load(simple_run_dir))
        assert ["step", "decode", "augment"] == [r.stage for r in c.stages]


class TestOverlappedPipeline:
    def test_replay_stays_under_the_ceiling_for_a_hidden_stage(self):
        """A loader hidden behind the step: making it free cannot beat Amdahl's ceiling for its share."""
        plan = plan_from_durations([0.005] * 40, [0.01] * 40, workers=2, prefetch=4, cores=8)
        c = ceilings(plan)
        task = next(r for r in c.stages if r.stage == "task")
        assert task.free_speedup <= task.amdahl_ceiling * (1 + 1e-9)
        assert task.free_speedup == pytest.approx(1.0, abs=0.02)

    def test_ceilings_carry_the_worker_advice(self):
        """30 ms tasks behind a 10 ms step need 3 workers: loader throughput m / 30 ms must reach
        1 / 10 ms (bottleneck law, Denning and Buzen 1978); the ceilings show the one worker advice."""
        plan = plan_from_durations([0.03] * 200, [0.01] * 200, workers=1, prefetch=8, cores=1,
                                   epoch_barrier=False)
        c = ceilings(plan)
        assert (3, "yes") == (c.advice.workers, c.advice.more_workers)
        assert c.advice.reason in " ".join(format_ceilings(c, width=10_000))

    def test_infinite_ceiling_is_written_as_inf(self):
        """A stage that is the whole critical path has no ceiling; the text says inf."""
        c = ceilings(plan_from_durations([0.01] * 4, [0.0] * 4, workers=0, prefetch=1, cores=1),
                     shares={"task": 1.0})
        assert math.inf == c.stages[0].amdahl_ceiling
        assert "inf" in format_ceilings(c)[2]


class TestReportSection:
    def test_report_has_the_ceilings(self, simple_run_dir):
        """The stall report shows the ceilings and explains formula versus replay."""
        text = format_report(analyze(simple_run_dir))
        assert "Speed-up ceilings" in text and "Why they differ" in text
        assert max(len(line) for line in text.splitlines()) <= 100

    def test_json_report_has_the_ceilings(self, simple_run_dir):
        """The JSON report carries the same numbers, without infinities."""
        d = report_dict(analyze(simple_run_dir))["ceilings"]
        assert {"decode", "augment", "step"} == {r["stage"] for r in d["stages"]}


class TestManyStageNames:
    @pytest.mark.parametrize("names", [2_000, pytest.param(20_000, marks=pytest.mark.slow)])  # writing: ~8 s
    def test_replays_a_few_stages_and_counts_the_rest(self, tmp_path, names):
        """Thousands of stage names: the ceilings replay MAX_CEILING_STAGES of them and account for every other
        name (a row, a member of the '(other stages)' row, or counted as left out) instead of replaying all."""
        from pipeprobe.whatif.ceilings import MAX_CEILING_STAGES
        from pipeprobe.whatif.limits import OTHER_STAGES
        from pipeprobe.whatif.plan import build_plan

        plan = build_plan(pipeprobe.load(many_stage_names_run(tmp_path / "run", names)))
        c = ceilings(plan)
        rows = [r.stage for r in c.stages]
        in_other_row = len(plan.folded_stages) if OTHER_STAGES in rows else 0
        assert MAX_CEILING_STAGES == len(rows)
        assert names + 1 == len(rows) - (OTHER_STAGES in rows) + in_other_row + c.stages_left_out  # + the step
        assert f"{c.stages_left_out} more stages" in " ".join(format_ceilings(c))

    def test_all_stages_on_request(self):
        """max_stages=None replays every stage of the plan."""
        stages = {f"s{i}": [0.001] * 8 for i in range(12)}
        plan = plan_from_durations(None, [0.01] * 8, stages=stages, workers=1, prefetch=2, cores=4)
        c = ceilings(plan, max_stages=None)
        assert (13, 0) == (len(c.stages), c.stages_left_out)


class TestModelCheck:
    def test_a_replay_that_misses_the_run_is_said_next_to_the_ceilings(self):
        """Ceilings are predictions too: when the unchanged replay misses the measured wall time by more
        than 5 %, the section says so in text and JSON (this plan replays to 0.13 s by hand; measured 0.15 s)."""
        from dataclasses import replace

        plan = plan_from_durations([0.03] * 10, [0.01] * 10, workers=3, prefetch=3, cores=4)
        c = ceilings(replace(plan, measured_wall_s=0.15))
        text = " ".join(format_ceilings(c, width=400))
        assert (True, True) == (c.model_check.flagged, c.to_dict()["model_check"]["flagged"])
        assert "check: the replay of the recorded configuration is -13.3 % off the measured wall time" in text
        assert "so read these speed-ups as rough" in text

    def test_a_replay_that_meets_the_run_adds_no_line(self):
        """A replay within 5 % of the measured run leaves the section as it was."""
        from dataclasses import replace

        plan = plan_from_durations([0.03] * 10, [0.01] * 10, workers=3, prefetch=3, cores=4)
        c = ceilings(replace(plan, measured_wall_s=0.13))
        assert (False, []) == (c.model_check.flagged,
                               [ln for ln in format_ceilings(c, width=400) if ln.strip().startswith("check:")])

    def test_the_report_replaying_only_the_first_batches_makes_no_check(self):
        """A replay of the first batches has no measured wall time of its own: no check, not a false one."""
        from pipeprobe.whatif.ceilings import _head

        plan = plan_from_durations([0.03] * 10, [0.01] * 10, workers=3, prefetch=3, cores=4)
        assert None is ceilings(_head(plan, 4)).model_check
