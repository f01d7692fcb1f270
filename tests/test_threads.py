"""The thread check, the step's threads in the replay, and the range on predictions (pipeprobe/threads.py, whatif)."""

from __future__ import annotations

import threading
import time
from dataclasses import replace
from pathlib import Path

import pytest
import simpy
from _synth import stage, step, wait, write_run

import pipeprobe
from pipeprobe.report import format_report, report_dict
from pipeprobe.threads import check_threads, ps_step_slowdown, step_threads
from pipeprobe.whatif._cores import cpu_speed
from pipeprobe.whatif.engine import replay
from pipeprobe.whatif.plan import plan_from_durations

POOLS = {"usable_cores": 2, "pools": [{"api": "blas", "library": "openblas", "threads": 2}],
         "torch_intra_op": None, "error": None}


def _contended_run(tmp_path: Path, busy_step_ms: float, facts: bool = True, pools: dict = POOLS) -> Path:
    """Six 10 ms steps alone, then six beside a worker's CPU-bound 'decode' of the next batch (``busy_step_ms`` each).

    Each step used 2 cores (process CPU twice its wall time) when alone.
    """
    main, worker, t = [], [], 0.0
    for b in range(12):
        busy = b >= 6
        dur = busy_step_ms if busy else 10.0
        main += [wait(t, t + 1.0, b), step(t + 1.0, t + 1.0 + dur, b, cpu_ms=2 * dur if not busy else dur)]
        if busy:
            worker.append(stage("decode", t + 1.0, t + 1.0 + dur, batch=b + 1, cpu_ms=dur))  # the next batch
        t += 1.0 + dur
    extra = {"threads": pools, "step_cpu": "process"} if facts else None
    return write_run(tmp_path, {1: main, 2: worker}, cores=2, header_extra=extra)


class TestProcessorSharing:
    def test_step_threads_beside_a_worker(self) -> None:
        """Two busy step threads and one CPU-bound worker on two cores: each thread gets 2/3 of a core.

        Source: processor sharing, every runnable thread gets cores / threads (Kleinrock 1976, ch. 4).
        """
        assert 1.5 == pytest.approx(ps_step_slowdown(2, 2.0, 1.0, 2))

    def test_threads_that_fit_are_not_slowed(self) -> None:
        """A one-thread step beside one worker on two cores runs at full speed (analytic: they fit)."""
        assert 1.0 == ps_step_slowdown(1, 1.0, 1.0, 2)

    def test_common_speed_counts_every_thread_of_a_task(self) -> None:
        """A task on two threads and a one-thread task, all CPU, on two cores: speed 2/3 (Kleinrock 1976)."""
        assert 2 / 3 == pytest.approx(cpu_speed([1.0, 1.0], 2, widths=[2.0, 1.0]))

    @pytest.mark.parametrize("us, cores", [([1.0, 1.0, 1.0], 2.0), ([0.5, 0.5, 1.0, 0.3], 1.5), ([0.9] * 5, 2.0)])
    def test_check_and_replay_solve_alike(self, us: list[float], cores: float) -> None:
        """The thread check's speed solver agrees with the replay's (one model of processor sharing)."""
        from pipeprobe.threads import _common_speed

        assert cpu_speed(us, cores) == pytest.approx(_common_speed(us, cores), rel=1e-6)

    def test_replay_runs_the_step_on_its_threads(self) -> None:
        """A two-thread step shares two cores with a worker: 75 ms, against 70 ms on one thread.

        Worked example (processor sharing, Kleinrock 1976): task 0 alone 0-30 ms; step 0 (10 ms on 2
        threads) and task 1 share two cores at speed 2/3 until 45 ms; task 1 ends alone at 65 ms; step 1
        runs alone to 75 ms. On one thread step and task fit: 30 + 30 + 10 = 70 ms.
        """
        plan = plan_from_durations([0.03] * 2, [0.01] * 2, task_cpu_s=[0.03] * 2, step_cpu_s=[0.01] * 2,
                                   workers=1, prefetch=1, cores=2)
        assert (0.075, 0.07) == (round(replay(replace(plan, step_width=2.0)).wall_s, 9),
                                 round(replay(plan).wall_s, 9))


def simpy_round_robin_makespan(task_s: list[float], step_s: list[float], step_threads: int, cores: int,
                               quantum_s: float = 1e-4) -> float:
    """One worker (prefetch 1) and a step on ``step_threads`` threads, every thread round-robin on ``cores``.

    Each step thread burns the step's alone-time; a thread gives up its core after ``quantum_s`` and
    queues again, so as the quantum shrinks the cores are shared as processor sharing shares them.
    """
    env = simpy.Environment()
    cpu = simpy.Resource(env, capacity=cores)

    def burn(work: float):
        left = work
        while left > 1e-12:
            with cpu.request() as req:
                yield req
                dt = min(quantum_s, left)
                yield env.timeout(dt)
                left -= dt

    ready = [env.event() for _ in task_s]
    taken = [env.event() for _ in task_s]

    def worker():
        for i, t in enumerate(task_s):
            yield from burn(t)
            ready[i].succeed()
            yield taken[i]  # prefetch 1: the next request goes out when the loop takes this batch

    def consumer():
        for i, s in enumerate(step_s):
            yield ready[i]
            taken[i].succeed()
            yield env.all_of([env.process(burn(s)) for _ in range(step_threads)])

    env.process(worker())
    done = env.process(consumer())
    env.run(done)
    return env.now


class TestAgainstSimPy:
    @pytest.mark.parametrize("threads", [1, 2, 3])
    def test_step_on_threads_matches_round_robin(self, threads: int) -> None:
        """The replay of a step on 1-3 threads beside a CPU-bound worker on 2 cores matches a SimPy model.

        Source: SimPy, threads taking turns on a 2-core resource in 0.1 ms slices; round robin with a
        vanishing quantum is processor sharing (Kleinrock 1976, ch. 4).
        """
        task, step_ = [0.03, 0.02, 0.03, 0.025, 0.03], [0.01, 0.015, 0.01, 0.02, 0.01]
        plan = plan_from_durations(task, step_, task_cpu_s=task, step_cpu_s=step_, workers=1, prefetch=1, cores=2)
        expected = simpy_round_robin_makespan(task, step_, threads, 2)
        assert expected == pytest.approx(replay(replace(plan, step_width=float(threads))).wall_s, rel=0.01)


class TestThreadCheck:
    def test_flags_oversubscription_and_its_cost(self, tmp_path: Path) -> None:
        """Steps 20 ms beside a busy worker against 10 ms alone: 2x, 60 ms lost, 1.5x explained, advice given.

        Worked example: 2 step threads + 1 worker > 2 cores; processor sharing (Kleinrock 1976) gives
        each of the 3 threads 2/3 of a core, so 1.5x.
        """
        c = check_threads(pipeprobe.load(_contended_run(tmp_path, 20.0)))
        got = (c.skipped, c.oversubscribed, c.busy_steps, c.idle_steps, c.slowdown, round(c.cost_s, 6),
               c.explained_slowdown, c.step_cores)
        assert (None, True, 6, 6, pytest.approx(2.0), 0.06, pytest.approx(1.5), pytest.approx(2.0)) == got
        assert "give the step 1 thread beside 1 worker on 2 cores" in c.advice

    def test_report_says_so(self, tmp_path: Path) -> None:
        """The report's threads section names the oversubscription, its cost and the fix."""
        text = format_report(pipeprobe.analyze(_contended_run(tmp_path, 20.0)))
        section = text[text.index("threads  "):]
        assert ["oversubscribed", "cost 0.060 s", "fix: give the step 1 thread"] == \
            [w for w in ["oversubscribed", "cost 0.060 s", "fix: give the step 1 thread"] if w in section]

    def test_html_page_shows_the_section_line_by_line(self, tmp_path: Path) -> None:
        """The HTML report shows the threads section's lines with real line breaks (common practice: <pre>)."""
        from pipeprobe.html import render_report

        page = render_report(pipeprobe.analyze(_contended_run(tmp_path, 20.0)))
        section = page[page.index("<h2>threads</h2>"):]
        section = section[:section.index("</pre>")]
        assert (True, False) == ("\n  fix: give the step 1 thread" in section, "\\x0a" in section)

    def test_old_run_folder_skips_the_check(self, tmp_path: Path) -> None:
        """A run folder without thread facts: the check says it was skipped; report and what-if still work."""
        d = _contended_run(tmp_path, 20.0, facts=False)
        data = report_dict(pipeprobe.analyze(d))
        prediction = pipeprobe.whatif(d, workers=2)
        assert ("the run folder has no thread facts (recorded before pipeprobe 0.2.0)", None) == \
            (data["threads"]["skipped"], prediction.wall_range_s)

    @pytest.mark.parametrize("threads, why", [
        ("many", "the run header's thread facts are not an object"),
        ({"pools": None, "torch_intra_op": None, "error": "OSError: x"}, "could not be read when the run was recorded"),
        ({"pools": None, "torch_intra_op": None, "error": None}, "threadpoolctl was not installed"),
    ])
    def test_unreadable_thread_facts_skip_the_check(self, tmp_path: Path, threads: object, why: str) -> None:
        """Thread facts that are damaged or missing pools: skipped, saying why; the rest of the report works."""
        d = write_run(tmp_path, {1: [wait(0, 1, 0), step(1, 11, 0, cpu_ms=10)]}, cores=2,
                      header_extra={"threads": threads, "step_cpu": "process"})
        data = report_dict(pipeprobe.analyze(d))
        assert (True, 1) == (why in data["threads"]["skipped"], data["batches"])

    @pytest.mark.parametrize("header, expected", [
        ({}, None),
        ({"threads": {"pools": None, "torch_intra_op": 3}}, 3),
        ({"threads": {"pools": [{"threads": True}, {"threads": "8"}, {"threads": 4}]}}, 4),
        ({"threads": {"pools": [{"api": "openmp", "library": "openmp", "threads": 4}], "torch_intra_op": 1}}, 1),
        ({"threads": "many"}, None),
    ])
    def test_step_threads_read_defensively(self, header: dict, expected: int | None) -> None:
        """Thread facts in a header are read only where they are whole numbers in range (common practice)."""
        assert expected == step_threads(header)


ONE_THREAD = {**POOLS, "pools": [{"api": "blas", "library": "openblas", "threads": 1}]}


OPENMP = {**POOLS, "pools": [{"api": "openmp", "library": "openmp", "threads": 2}]}


def _inline_run(tmp_path: Path, pools: dict = OPENMP) -> Path:
    """Eight 10 ms steps, each after a 5 ms 'crop' in the loop (no loader workers); the step used 2 cores."""
    main, t = [], 0.0
    for b in range(8):
        main += [wait(t, t + 5.0, b), stage("crop", t, t + 5.0, batch=b, cpu_ms=5.0),
                 step(t + 5.0, t + 15.0, b, cpu_ms=20.0)]
        t += 15.0
    return write_run(tmp_path, {1: main}, cores=2, header_extra={"threads": pools, "step_cpu": "process"})


class TestBesideOtherProcesses:
    """A run without loader workers whose step's thread pool shared the cores with other processes' work.

    On our steps job (bench/realjobs/steps.py, 2 cores, one core kept busy by other work) the step's
    OpenMP pool of 2 threads took 7.0-7.4 s, against 1.3-1.5 s with 1 thread and 1.5-2.0 s with
    OMP_WAIT_POLICY=PASSIVE (measured 2026-12-04, README "The step's threads").
    """

    def test_other_processes_oversubscribe_the_steps_pool(self, tmp_path: Path) -> None:
        """2 step threads + 1 core of other work > 2 cores: flagged, with the thread count that fits (2 - 1)."""
        c = check_threads(pipeprobe.load(_inline_run(tmp_path)), background_cores=1.0)
        assert (None, True, 0) == (c.skipped, c.oversubscribed, c.workers)
        assert c.advice.startswith("give the step 1 thread while other processes keep 1.0 of the 2 cores busy")
        assert "OMP_WAIT_POLICY=PASSIVE" in c.advice

    @pytest.mark.parametrize("background", [0.0, 0.2])
    def test_a_quiet_machine_keeps_the_check_skipped(self, tmp_path: Path, background: float) -> None:
        """No other work (or less than a quarter core beyond the cores): nothing to compare, the check is skipped."""
        c = check_threads(pipeprobe.load(_inline_run(tmp_path)), background_cores=background)
        assert ("the loader ran no worker processes", False) == (c.skipped, c.oversubscribed)

    def test_the_steps_action_carries_the_fix(self, tmp_path: Path) -> None:
        """The step's own action names the thread fix (no separate action without a measured cost)."""
        from pipeprobe.analysis import Action, thread_actions

        c = check_threads(pipeprobe.load(_inline_run(tmp_path)), background_cores=1.0)
        got = thread_actions([Action("step", "Make the step faster", 0.1)], c)
        assert (["step"], True) == ([a.kind for a in got], c.advice in got[0].text)

    def test_passive_hint_only_for_an_openmp_pool(self, tmp_path: Path) -> None:
        """The waiting policy is OpenMP's: a BLAS-only pool's fix does not name it."""
        c = check_threads(pipeprobe.load(_inline_run(tmp_path, POOLS)), background_cores=1.0)
        assert (True, False) == (c.oversubscribed, "OMP_WAIT_POLICY" in c.advice)


class TestThreadAction:
    """The thread fix among the top actions (issue #11 §2), at stake what the steps lost."""

    def test_oversubscribed_run_gets_the_fix_ranked_by_its_cost(self, tmp_path: Path) -> None:
        """2 step threads + 1 busy worker on 2 cores: the fix is an action, 60 ms at stake (worked example
        above: 6 steps 10 ms slower), in order of time at stake among the others."""
        a = pipeprobe.analyze(_contended_run(tmp_path, 20.0))
        fix = [x for x in a.actions if x.kind == "threads"]
        assert (1, 0.06) == (len(fix), round(fix[0].seconds, 6))
        assert "give the step 1 thread beside 1 worker on 2 cores" in fix[0].text
        assert sorted((x.seconds for x in a.actions), reverse=True) == [x.seconds for x in a.actions]

    def test_report_actions_carry_the_sections_fix(self, tmp_path: Path) -> None:
        """The report's action list (text and JSON) holds the fix its threads section gives, word for word."""
        from pipeprobe.report import build_report

        report = build_report(pipeprobe.analyze(_contended_run(tmp_path, 20.0)))
        data = report_dict(report)
        fix = [x for x in data["actions"] if x["kind"] == "threads"]
        text = format_report(report)
        top = " ".join(text[text.index("top actions"):text.index("Speed-up ceilings")].split())
        assert (1, 0.06, True) == (len(fix), round(fix[0]["seconds"], 6), data["threads"]["advice"] in fix[0]["text"])
        assert "give the step 1 thread beside 1 worker on 2 cores" in top

    @pytest.mark.parametrize("facts, pools", [(True, ONE_THREAD), (False, POOLS)])
    def test_no_fix_when_threads_fit_or_facts_missing(self, tmp_path: Path, facts: bool, pools: dict) -> None:
        """One step thread + one worker fit 2 cores, and a run without thread facts: no thread action."""
        a = pipeprobe.analyze(_contended_run(tmp_path, 20.0, facts=facts, pools=pools))
        data = report_dict(a)
        assert ([], []) == ([x for x in a.actions if x.kind == "threads"],
                            [x for x in data["actions"] if x["kind"] == "threads"])


    def test_a_one_thread_step_leaves_the_worker_count_to_the_worker_advice(self, tmp_path: Path) -> None:
        """One step thread, one busy worker and a core of other work on 2 cores: oversubscribed, but the thread
        check names no worker count (on a loaded demo it said "try 1" beside the worker advice's "3 workers");
        the worker advice decides the count, by replay."""
        c = check_threads(pipeprobe.load(_contended_run(tmp_path, 20.0, pools=ONE_THREAD)), background_cores=1.0)
        assert (True, "") == (c.oversubscribed, c.advice)


class TestRange:
    def test_unexplained_slowdown_gives_a_range(self, tmp_path: Path) -> None:
        """Steps 2x slower beside a worker where sharing explains 1.5x: the prediction is a range around it."""
        p = pipeprobe.whatif(_contended_run(tmp_path, 20.0), workers=2)
        low, high = p.wall_range_s
        assert (True, True) == (low <= p.predicted_wall_s <= high, high > p.predicted_wall_s)
        assert "processor sharing explains 1.50x" in p.range_reason

    def test_explained_slowdown_keeps_one_number(self, tmp_path: Path) -> None:
        """Steps 1.5x slower beside a worker, as sharing explains, and the same workers: one number."""
        p = pipeprobe.whatif(_contended_run(tmp_path, 15.0))
        assert (None, "") == (p.wall_range_s, p.range_reason)


class TestRecording:
    def test_step_cpu_counts_every_thread(self, tmp_path: Path) -> None:
        """The step's CPU time is the process's: a helper thread's 50 ms of CPU count while the loop sleeps."""

        def burn() -> None:
            t = time.thread_time()
            while time.thread_time() - t < 0.05:
                pass

        with pipeprobe.Probe(tmp_path / "run", report=False) as probe:
            for _ in probe.watch([0]):
                with probe.step():
                    helper = threading.Thread(target=burn)
                    helper.start()
                    helper.join()
        run = pipeprobe.load(tmp_path / "run")
        steps = run.spans[run.spans["stage"] == "step"]
        facts = run.header["threads"]
        assert (True, "process", True) == (float(steps["cpu_s"].iloc[0]) >= 0.05, run.header["step_cpu"],
                                           facts["usable_cores"] >= 1)


class TestDemo:
    def test_demo_limits_its_blas_threads(self, tmp_path: Path) -> None:
        """`pipeprobe demo` runs its step on one BLAS thread by default, recorded in the run header."""
        from pipeprobe.demo import run_demo

        run_demo(out=tmp_path / "d", batches=4, workers=1, prefetch=2, image_size=32, batch_size=4, quiet=True)
        pools = pipeprobe.load(tmp_path / "d").header["threads"]["pools"]
        assert [1] == sorted({p["threads"] for p in pools if p["api"] == "blas"})

    def test_negative_step_threads_is_refused(self, capsys: pytest.CaptureFixture[str]) -> None:
        """A negative --step-threads ends with exit code 2 and one line (common practice for CLI usage errors)."""
        from pipeprobe.cli import main

        with pytest.raises(SystemExit) as exc:
            main(["demo", "--step-threads", "-1"])
        assert 2 == exc.value.code


class TestWorkerCountedOnce:
    def test_nested_stages_do_not_count_a_worker_twice(self, tmp_path: Path) -> None:
        """A worker busy in 'decode' with 'resize' inside it is one busy worker, not two: its CPU-weighted load
        beside the steps is 1.0 (hand-worked: one CPU-bound thread; the innermost stage gets each instant)."""
        main, worker, t = [], [], 0.0
        for b in range(12):
            busy = b >= 6
            main += [wait(t, t + 1.0, b), step(t + 1.0, t + 11.0, b, cpu_ms=10.0 if busy else 20.0)]
            if busy:
                worker += [stage("decode", t + 1.0, t + 11.0, batch=b + 1, cpu_ms=10.0),
                           stage("resize", t + 3.0, t + 9.0, cpu_ms=6.0)]
            t += 11.0
        d = write_run(tmp_path, {1: main, 2: worker}, cores=2, header_extra={"threads": POOLS, "step_cpu": "process"})
        check = check_threads(pipeprobe.load(d))
        assert (1, pytest.approx(1.0)) == (check.workers, check.worker_load)


class TestAffinity:
    """A process pinned to some of the machine's cores (as batch schedulers do) can use only those."""

    def test_header_records_the_cores_the_process_may_use(self, tmp_path: Path) -> None:
        """A probe in a process pinned to core 0 records 1 usable core and its id (the process's own affinity)."""
        import subprocess
        import sys

        code = ("import os, pipeprobe; os.sched_setaffinity(0, {0})\n"
                f"with pipeprobe.Probe({str(tmp_path / 'run')!r}, report=False) as probe:\n"
                "    for _ in probe.watch(range(2)):\n        pass\n")
        subprocess.run([sys.executable, "-c", code], check=True, timeout=120)
        facts = pipeprobe.load(tmp_path / "run").header["threads"]
        assert (1, [0]) == (facts["usable_cores"], facts["affinity"])

    def test_other_cores_busy_take_nothing_from_the_run(self, tmp_path: Path) -> None:
        """8 cores, the run pinned to cores 0 and 1, other jobs keeping cores 2 to 7 busy: the replay gives the
        run its 2 cores, none of them taken (common practice: a cpuset confines a job to its cores)."""
        from _synth import write_resources

        from pipeprobe.whatif.plan import build_plan

        rows = []
        for b in range(6):
            rows += [stage("decode", 30 * b, 30 * b + 20, sample=b, batch=b, cpu_ms=20.0),
                     wait(30 * b, 30 * b + 20, b), step(30 * b + 20, 30 * b + 30, b, cpu_ms=10.0)]
        pools = {"pools": [], "usable_cores": 2, "affinity": [0, 1]}
        d = write_run(tmp_path, {1: rows}, cores=8, header_extra={"threads": pools, "step_cpu": "process"})
        write_resources(d, [(t, 0, core, 100.0 if core >= 2 else 50.0) for t in (0, 60, 120, 180)
                            for core in range(8)] + [(t, 1, -1, 100.0) for t in (0, 60, 120, 180)])
        plan = build_plan(pipeprobe.load(d))
        assert (2, 0.0) == (plan.cores, plan.background_cores)
