"""The step pool's threads that run on after a step: recorded at the waits, estimated, and replayed."""

from __future__ import annotations

import threading
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from _synth import step, wait, write_run

import pipeprobe
from pipeprobe.threads import check_threads
from pipeprobe.whatif.engine import replay
from pipeprobe.whatif.plan import plan_from_durations

OPENMP_2 = {"pools": [{"api": "openmp", "library": "libgomp", "threads": 2}], "usable_cores": 2}


def _burn(seconds: float, spent: list[float]) -> None:
    t = time.thread_time()
    while time.thread_time() - t < seconds:
        pass
    spent.append(time.thread_time() - t)


class TestRecording:
    def test_wait_holds_the_cpu_other_threads_used(self, tmp_path: Path) -> None:
        """Each wait's others_cpu_s holds a helper thread's CPU during it (the helper's own clock), the wait spans none."""
        spent: list[float] = []

        def batches():
            for i in range(4):
                helper = threading.Thread(target=_burn, args=(0.02, spent))
                helper.start()
                helper.join()
                yield i

        with pipeprobe.Probe(tmp_path / "run", report=False, sample_interval_s=30.0) as probe:
            for _ in probe.watch(batches()):
                with probe.step():
                    pass
        run = pipeprobe.load(tmp_path / "run")
        others = run.batches["others_cpu_s"].to_numpy()
        extra = others - np.array(spent)
        waits = run.spans[run.spans["stage"] == "wait"]
        assert (True, True, "other-threads") == (bool((extra >= -1e-4).all() and (extra < 0.01).all()),
                                                 bool(waits["cpu_s"].isna().all()), run.header["wait_cpu"])

    def test_no_other_thread_no_cpu(self, tmp_path: Path) -> None:
        """A loop whose process runs no other thread while it waits records (almost) no such CPU."""
        with pipeprobe.Probe(tmp_path / "run", report=False, sample_interval_s=30.0) as probe:
            for _ in probe.watch(range(4)):
                time.sleep(0.005)
        others = pipeprobe.load(tmp_path / "run").batches["others_cpu_s"].to_numpy()
        assert [True] * 4 == list(others < 0.002)


def _spin_run(tmp_path: Path, wait_ms: float, others_ms: float, threads: int = 2) -> Path:
    """Five batches: each wait (after the first) saw ``others_ms`` of the process's other threads' CPU."""
    rows, t = [], 0.0
    for b in range(5):
        rows.append(wait(t, t + wait_ms, b, cpu_ms=others_ms if b else 0.0))
        rows.append(step(t + wait_ms, t + wait_ms + 10.0, b, cpu_ms=10.0 * threads))
        t += wait_ms + 10.0
    pools = {**OPENMP_2, "pools": [{"api": "openmp", "library": "libgomp", "threads": threads}]}
    return write_run(tmp_path, {1: rows}, cores=2, header_extra={"threads": pools, "step_cpu": "process",
                                                                  "wait_cpu": "other-threads"})


class TestEstimate:
    def test_mean_over_the_waits(self, tmp_path: Path) -> None:
        """Waits reading 0, 4, 0 and 8 ms of other threads' CPU (the kernel's tick steps): 3 ms a step, the mean."""
        rows, t = [], 0.0
        for b, others in enumerate([0.0, 0.0, 4.0, 0.0, 8.0]):
            rows += [wait(t, t + 20.0, b, cpu_ms=others), step(t + 20.0, t + 30.0, b, cpu_ms=20.0)]
            t += 30.0
        d = write_run(tmp_path, {1: rows}, cores=2, header_extra={"threads": OPENMP_2, "step_cpu": "process",
                                                                   "wait_cpu": "other-threads"})
        assert 0.003 == pytest.approx(check_threads(pipeprobe.load(d)).spin_s, abs=1e-9)

    def test_spin_that_ends_inside_the_wait(self, tmp_path: Path) -> None:
        """Waits of 20 ms with 4 ms of the other pool thread's CPU: it spins 4 ms after each step (hand-worked)."""
        check = check_threads(pipeprobe.load(_spin_run(tmp_path, 20.0, 4.0)))
        assert 0.004 == pytest.approx(check.spin_s, abs=1e-9)

    def test_spin_shared_by_the_pool_threads(self, tmp_path: Path) -> None:
        """A pool of 4 threads: 12 ms of other threads' CPU is 4 ms for each of the 3 beside the loop (hand-worked)."""
        check = check_threads(pipeprobe.load(_spin_run(tmp_path, 20.0, 12.0, threads=4)))
        assert 0.004 == pytest.approx(check.spin_s, abs=1e-9)

    def test_spin_longer_than_every_wait(self, tmp_path: Path) -> None:
        """Waits of 3 ms filled with spin: 3 ms is what the run shows (a lower bound)."""
        check = check_threads(pipeprobe.load(_spin_run(tmp_path, 3.0, 3.0)))
        assert 0.003 == pytest.approx(check.spin_s, abs=1e-9)

    def test_plan_carries_the_spin(self, tmp_path: Path) -> None:
        """The replay plan runs the pool's one other thread for the spin after each step, and the step's two
        threads in lockstep (they used 2 cores: 20 ms of CPU in 10 ms steps)."""
        from pipeprobe.whatif.plan import build_plan

        plan = build_plan(pipeprobe.load(_spin_run(tmp_path, 20.0, 4.0)))
        assert (0.004, 1.0, 2.0) == (pytest.approx(plan.spin_s, abs=1e-9), plan.spin_threads, plan.step_together)

    def test_probe_threads_in_long_waits_are_no_spin(self, tmp_path: Path) -> None:
        """1 ms of other threads' CPU in each 100 ms wait (1 % of the waiting, as the resource sampler takes):
        the pool does not count as spinning, and the replay shares the cores evenly."""
        from pipeprobe.whatif.plan import build_plan

        plan = build_plan(pipeprobe.load(_spin_run(tmp_path, 100.0, 1.0)))
        assert (False, 0.0, 1.0) == (plan.threads.spins, plan.spin_s, plan.step_together)

    def test_pool_that_sleeps_shares_the_cores(self, tmp_path: Path) -> None:
        """A pool whose threads ran nothing after the steps (a passive wait policy) is replayed under plain
        processor sharing."""
        from pipeprobe.whatif.plan import build_plan

        plan = build_plan(pipeprobe.load(_spin_run(tmp_path, 20.0, 0.0)))
        assert (0.0, 1.0) == (plan.spin_s, plan.step_together)


class TestContention:
    def test_lockstep_pool_slowed_by_its_share_and_its_partners(self) -> None:
        """A 2-thread pool in lockstep on [0, 10] beside a task on [0, 5], 2 cores: 3 threads want 2 cores on
        [0, 5], so the pool runs 2 x 3/2 = 3 times slower there and at full speed after: mean 2; the task
        1.5 (hand-worked; processor sharing, Kleinrock 1976, with co-scheduling, Ousterhout 1982)."""
        from pipeprobe.whatif._contention import _segments_mean_slowdown

        slow = _segments_mean_slowdown(np.array([0.0, 0.0]), np.array([10.0, 5.0]), np.array([2.0, 1.0]), 2.0,
                                       np.array([2.0, 1.0]))
        assert [2.0, 1.5] == pytest.approx(slow.tolist(), abs=1e-12)


class TestReplay:
    """Processor sharing (Kleinrock 1976, ch. 4) worked by hand on one core: 10 ms CPU-bound loader tasks, a
    2 ms CPU-bound step."""

    def _plan(self, workers: int, spin_s: float):
        plan = plan_from_durations([0.010] * 3, [0.002] * 3, task_cpu_s=[0.010] * 3, step_cpu_s=[0.002] * 3,
                                   workers=workers, prefetch=1, cores=1)
        return replace(plan, spin_s=spin_s, spin_threads=1.0)

    def test_spin_takes_the_workers_share(self, tmp_path: Path) -> None:
        """One worker: 36 ms without spin; a 4 ms spin after each step halves the worker's speed for 8 ms of
        each of the first two batches' waits: 44 ms (hand-worked)."""
        base, spun = replay(self._plan(1, 0.0)).wall_s, replay(self._plan(1, 0.004)).wall_s
        assert (0.036, 0.044) == (pytest.approx(base, abs=1e-9), pytest.approx(spun, abs=1e-9))

    def test_next_step_ends_the_spin(self, tmp_path: Path) -> None:
        """No workers, a 30 ms spin: the loop's own 10 ms load runs at half speed beside it (20 ms), then the
        step puts the pool to work and runs alone: 10 + 2 + 2 x (20 + 2) = 56 ms (hand-worked)."""
        spun = replay(self._plan(0, 0.030)).wall_s
        assert 0.056 == pytest.approx(spun, abs=1e-9)


class TestReport:
    def test_report_names_the_spin(self, tmp_path: Path) -> None:
        """The threads section says how long the pool ran on after each step; the JSON holds it."""
        from pipeprobe.report import format_report, report_dict

        rep = pipeprobe.analyze(_spin_run(tmp_path, 20.0, 4.0))
        text = format_report(rep)
        assert (True, 0.004) == ("after each step the pool's other thread ran on for 4.0 ms" in " ".join(
            text.split()), pytest.approx(report_dict(rep)["threads"]["spin_s"], abs=1e-9))


class TestTogether:
    """A 2-thread step beside one CPU-bound worker on 2 cores (hand-worked): 30 ms loader tasks, a 10 ms step
    that keeps both threads busy, two batches."""

    def _plan(self, together: float):
        plan = plan_from_durations([0.030] * 2, [0.010] * 2, task_cpu_s=[0.030] * 2, step_cpu_s=[0.010] * 2,
                                   workers=1, prefetch=1, cores=2)
        return replace(plan, step_width=2.0, step_together=together)

    def test_pool_shares_the_cores_evenly(self) -> None:
        """Processor sharing (Kleinrock 1976): 3 threads on 2 cores run at 2/3, the step takes 15 ms beside
        the worker's second task, which ends at 65 ms; the last step alone: 75 ms."""
        assert 0.075 == pytest.approx(replay(self._plan(1.0)).wall_s, abs=1e-9)

    def test_pool_that_runs_only_together(self) -> None:
        """Co-scheduling (Ousterhout 1982): both step threads hold a core 1/3 of the time (hypergeometric:
        2/3 x 1/2), so the first step takes 30 ms; the worker at 2/3 meanwhile ends at 70 ms; the last step
        alone: 80 ms."""
        assert 0.080 == pytest.approx(replay(self._plan(2.0)).wall_s, abs=1e-9)
