"""Tests of the one worker advice (pipeprobe.whatif.advice) and of the report parts that read it.

Outside references: the bottleneck law of operational analysis (Denning and
Buzen 1978; Lazowska et al. 1984, Quantitative System Performance, ch. 5):
with D seconds of CPU per batch on c cores a batch takes at least D / c;
hand-worked schedules.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import pipeprobe
from pipeprobe.analysis import Action
from pipeprobe.report import build_report, format_report, report_dict
from pipeprobe.whatif.advice import advised_actions, worker_advice
from pipeprobe.whatif.plan import build_plan, plan_from_durations


class TestDecision:
    def test_bottleneck_law_gives_the_count(self):
        """30 ms tasks behind a 10 ms step: m / 30 ms >= 1 / 10 ms needs m = 3 (bottleneck law)."""
        plan = plan_from_durations([0.03] * 200, [0.01] * 200, workers=1, prefetch=2, cores=8, epoch_barrier=False)
        a = worker_advice(plan)
        assert ("yes", 3, False) == (a.more_workers, a.workers, a.cores_limit)

    def test_cores_hold_more_workers_back(self):
        """CPU-bound: 40 ms of CPU per batch on 2 cores takes at least 20 ms per batch (bottleneck law), so
        more workers give at most 30 / 20 = 1.5x here, while unlimited cores would allow 3 workers and 3x."""
        n = 200
        plan = plan_from_durations([0.03] * n, [0.01] * n, task_cpu_s=[0.03] * n, step_cpu_s=[0.01] * n,
                                   workers=1, prefetch=2, cores=2, epoch_barrier=False)
        a = worker_advice(plan)
        assert ("yes", True, 3) == (a.more_workers, a.cores_limit, a.unlimited_workers)
        assert a.speedup <= 1.5 * 1.01
        assert 1.5 == pytest.approx(a.speedup, rel=0.06)
        assert "cores hold it back" in a.reason

    def test_workers_restarted_every_epoch_cost_their_stops(self):
        """30 ms tasks behind a 10 ms step, 3 epochs of 20 batches, each worker started at every epoch costing
        the loop 50 ms to stop. By hand (bottleneck law per epoch, plus the stops): max(20 x 30 / w, 20 x 10)
        ms + (w - 1) x 50 ms is 600, 350, 310, 350, 400 ms for w = 1..5 (ceil(20 / 3) = 7 tasks of 30 ms
        for w = 3): three workers. More workers are slower here even on unlimited cores, so the count is
        found by a scan, not a bisection against 64 workers (which replay slower than one)."""
        from dataclasses import replace

        from pipeprobe.whatif._lifecycle import WorkerLifecycle

        plan = plan_from_durations([0.03] * 60, [0.01] * 60, epoch=[0] * 20 + [1] * 20 + [2] * 20, workers=1,
                                   prefetch=2, cores=8)
        plan = replace(plan, lifecycle=WorkerLifecycle(True, True, boot_s=(0.0,), fork_s=0.0, stop_s=0.05))
        a = worker_advice(plan)
        assert ("yes", 3, 3) == (a.more_workers, a.workers, a.unlimited_workers)

    def test_step_paced_run_gets_no(self):
        """5 ms tasks on 2 workers behind a 10 ms step: the step sets the pace, more workers gain nothing."""
        plan = plan_from_durations([0.005] * 100, [0.01] * 100, workers=2, prefetch=4, cores=8)
        a = worker_advice(plan)
        assert ("no", False) == (a.more_workers, a.cores_limit)
        assert a.workers <= 2

    def test_fewer_workers_when_they_do_as_well(self):
        """8 workers for 5 ms tasks behind a 10 ms step: one worker keeps up (5 ms <= 10 ms), so the advice is 1."""
        plan = plan_from_durations([0.005] * 100, [0.01] * 100, workers=8, prefetch=16, cores=16)
        a = worker_advice(plan)
        assert ("no", 1) == (a.more_workers, a.workers)
        assert "Fewer workers" in advised_actions([], a)[0].text

    def test_a_run_that_barely_waits_gets_no(self):
        """Workers only remove waiting: a run that waited 2 % of its time cannot get 5 % faster (common
        practice), whatever the replay of it says; the advice then names the measured 2 %."""
        from dataclasses import replace

        plan = plan_from_durations([0.03] * 100, [0.01] * 100, workers=1, prefetch=2, cores=8)
        plan = replace(plan, measured_wall_s=3.0, measured_stall_s=0.06)
        a = worker_advice(plan)
        assert ("no", 1) == (a.more_workers, a.workers)
        assert "2.0 %" in a.reason and "Do not add workers" not in "".join(x.text for x in advised_actions([], a))

    @settings(max_examples=25, deadline=None)
    @given(task_ms=st.lists(st.integers(1, 40), min_size=4, max_size=30), step_ms=st.integers(1, 20),
           workers=st.integers(0, 4), cores=st.integers(1, 4), cpu=st.booleans())
    def test_statements_agree(self, task_ms, step_ms, workers, cores, cpu):
        """Consistent by construction: "yes" means faster by 5 % with less stall; "no" never moves to more workers."""
        n = len(task_ms)
        task = [t / 1e3 for t in task_ms]
        plan = plan_from_durations(task, [step_ms / 1e3] * n, task_cpu_s=task if cpu else None,
                                   step_cpu_s=[step_ms / 1e3] * n if cpu else None, workers=workers,
                                   prefetch=max(1, 2 * workers), cores=cores)
        a = worker_advice(plan)
        if a.more_workers == "yes":
            assert (True, True, True) == (a.workers > workers, a.speedup >= 1.05, a.stall_left < a.stall_now)
        else:
            assert a.workers <= workers
            assert a.stall_left <= a.stall_now + 1e-12 or a.workers < workers


class TestActions:
    def test_old_worker_action_is_replaced(self):
        """The action list keeps one worker action, the advice's, sorted by the time at stake."""
        plan = plan_from_durations([0.03] * 100, [0.01] * 100, workers=1, prefetch=2, cores=8)
        acts = advised_actions([Action("workers", "Do not add workers: old", 0.0), Action("stage", "x", 0.5)],
                               worker_advice(plan))
        assert ["workers", "stage"] == [a.kind for a in acts]
        assert acts[0].text.startswith("Add loader workers: 3 workers")


class TestReportAgrees:
    def test_text_json_html_and_actions_read_one_advice(self, tmp_path):
        """Every part of the report that speaks of workers says what the one advice says."""
        from pipeprobe._example_runs import write_example_run
        from pipeprobe.html import render_report

        d = write_example_run(tmp_path / "run", batches=6, decode_ms=6, step_ms=2)
        report = build_report(pipeprobe.analyze(d))
        advice = report.worker_advice
        assert advice == worker_advice(build_plan(report.analysis.run))
        data = report_dict(report)
        assert (advice.more_workers, advice.reason) == (data["cpu"]["more_workers"], data["cpu"]["more_workers_reason"])
        assert advice.workers == data["ceilings"]["advice"]["workers"]
        assert [advice.reason] == [x["text"].split(": ", 1)[1] for x in data["actions"] if x["kind"] == "workers"]
        text = format_report(report)
        assert f"--workers {advice.workers} --prefetch {advice.prefetch}" in text
        assert "more can help: yes" in text and "More workers can help: yes" in text
        assert advice.reason.split(",")[0] in render_report(report)
        assert not math.isnan(advice.stall_now)
