"""Loader workers' start and stop costs in the replay (pipeprobe.whatif._lifecycle).

The synthetic runs (tests/_synth.loader_life_rows) start and stop workers
as torch's DataLoader does (from its source, torch.utils.data.dataloader,
from memory: ``_MultiProcessingDataLoaderIter.__init__`` starts the worker
processes one after another inside ``iter()``; without persistent workers
the ``next()`` that ends an epoch shuts them down, one after another): the
loop pays a fixed time per worker made and per worker stopped, each
worker then starts on its own. The expected wall times are worked out by
hand (docstrings) or are the synthetic run of the changed configuration
itself (the rerun).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from _synth import loader_life_rows, step, wait, write_run

import pipeprobe
from pipeprobe.whatif._lifecycle import UNKNOWN_START_NOTE, with_lifecycle
from pipeprobe.whatif.engine import replay
from pipeprobe.whatif.plan import build_plan, plan_from_durations

#: Several epochs of a loader-bound job: 6 batches of 20 ms tasks per epoch, 2 ms steps, 5 ms worker start,
#: 3 ms per worker made and 4 ms per worker stopped in the loop, a worker's first task 4 ms longer.
GRID = dict(epochs=3, batches_per_epoch=6, first_extra_ms=4.0)


def _record(tmp_path, workers, *, persistent=False, header=None, **kw):
    rows, end = loader_life_rows(workers, persistent=persistent, **kw)
    name = f"w{workers}{'p' if persistent else ''}"
    return pipeprobe.load(write_run(tmp_path / name, rows, end_ms=end, cores=8, header_extra=header))


def _rerun_s(workers, *, persistent=False, **kw):
    return loader_life_rows(workers, persistent=persistent, **kw)[1] / 1e3


def _predict(run, workers, **kw):
    """The prediction for ``workers`` workers at torch's default prefetch (2 batches per worker)."""
    return pipeprobe.whatif(run, workers=workers, prefetch=max(1, 2 * workers),
                            recorded_prefetch=max(1, 2 * _workers_of(run)), **kw)


def _workers_of(run):
    return int((run.processes["role"] == "worker").any() and run.processes["slot"].max())


class TestHandWorked:
    def test_one_worker_run_predicts_two_workers(self, tmp_path):
        """1 worker recorded, 2 epochs of two 20 ms tasks and 2 ms steps; forks 3 ms, start 5 ms, stop 4 ms.
        By hand, 2 workers: forks to 6, worker 0 starts at 6 + 5 - 3 = 8 and worker 1 at 11; batches ready at
        28 and 31, steps end 30 and 33; stop 8 ms and forks 6 ms: next ask at 47; ready 69 and 72, steps end
        74; stop 8 ms: 82 ms (the recorded run took 108 ms; without the start and stop costs the replay
        said 72 ms)."""
        run = _record(tmp_path, 1)
        assert 0.108 == pytest.approx(run.wall_s)
        assert 0.082 == pytest.approx(_predict(run, 2).predicted_wall_s)

    def test_the_costs_it_measures(self, tmp_path):
        """From that 1-worker run: start 5 ms after the ask, 3 ms per worker made, 4 ms per worker stopped,
        first task 4 ms longer than the others (the run's own numbers, hand-worked)."""
        lc = build_plan(_record(tmp_path, 1, first_extra_ms=4.0)).lifecycle
        assert (True, True) == (lc.known, lc.restarts)
        assert [0.005, 0.003, 0.004, 0.004] == pytest.approx([lc.boot_s[0], lc.fork_s, lc.stop_s,
                                                              lc.first_excess_s])

    def test_no_workers_with_timed_starts(self, tmp_path):
        """A run that loaded in the loop (2 epochs, 88 ms by hand: 4 x (20 + 2)) whose probe timed a worker
        start (3 ms to make it, first batch 25 ms = 5 ms start + 20 ms task, 4 ms to stop) predicts the
        hand-worked 82 ms of 2 workers (test_one_worker_run_predicts_two_workers)."""
        header = {"worker_start": {"starts": 3, "iter_s": 0.003, "first_batch_s": 0.025, "stop_s": 0.004}}
        run = _record(tmp_path, 0, header=header)
        assert 0.088 == pytest.approx(run.wall_s)
        assert 0.082 == pytest.approx(_predict(run, 2).predicted_wall_s)

    def test_no_workers_with_the_batchs_way_timed(self, tmp_path):
        """The same run, its probe having also timed a batch's way from the worker to the waiting loop
        (2 ms from the collate's end; the first batch 27 ms = 5 ms start + 20 ms task + 2 ms): by hand, 2
        workers deliver each batch 2 ms after its task ends: ready 30 and 33, steps end 32 and 35; stop and
        forks 14 ms: ask at 49; workers start at 51 and 54, batches ready 73 and 76, steps end 78; stop
        8 ms: 86 ms."""
        header = {"worker_start": {"starts": 3, "iter_s": 0.003, "first_batch_s": 0.027, "stop_s": 0.004,
                                   "latency_s": 0.002, "handoff_s": 0.001, "collate_s": 0.0005}}
        p = _predict(_record(tmp_path, 0, header=header), 2)
        assert 0.086 == pytest.approx(p.predicted_wall_s)

    def test_no_workers_without_timed_starts_says_so(self, tmp_path):
        """An older run folder without the timed start: the prediction says the start-up cost is unknown
        and replays the workers as free to start (by hand: per epoch both 20 ms tasks at once, then two
        2 ms steps: 2 x 24 = 48 ms)."""
        p = _predict(_record(tmp_path, 0), 2)
        assert UNKNOWN_START_NOTE in p.notes
        assert 0.048 == pytest.approx(p.predicted_wall_s)


class TestRerun:
    @pytest.mark.parametrize("recorded", [1, 2])
    @pytest.mark.parametrize("workers", [0, 1, 2, 3])
    def test_new_workers_each_epoch(self, tmp_path, recorded, workers):
        """Non-persistent workers over 3 epochs: the prediction equals the synthetic rerun with that many
        workers (the life cycle of torch's loader, tests/_synth.loader_life_rows)."""
        run = _record(tmp_path, recorded, **GRID)
        assert _rerun_s(workers, **GRID) == pytest.approx(_predict(run, workers).predicted_wall_s)

    @pytest.mark.parametrize("recorded", [1, 2])
    @pytest.mark.parametrize("workers", [1, 2, 3])
    def test_persistent_workers(self, tmp_path, recorded, workers):
        """Persistent workers recorded: started once (forks and start in the first epoch only, no stop in
        the loop); the prediction equals the synthetic rerun."""
        run = _record(tmp_path, recorded, persistent=True, **GRID)
        expected = _rerun_s(workers, persistent=True, **GRID)
        assert expected == pytest.approx(_predict(run, workers).predicted_wall_s)

    @pytest.mark.parametrize("workers", [1, 2, 3])
    def test_keeping_the_workers(self, tmp_path, workers):
        """New workers each epoch recorded (1 worker), predicted with persistent workers: equals the
        synthetic rerun with persistent workers (no stop at the end, warm first tasks after epoch 0)."""
        run = _record(tmp_path, 1, **GRID)
        expected = _rerun_s(workers, persistent=True, **GRID)
        assert expected == pytest.approx(_predict(run, workers, persistent_workers=True).predicted_wall_s)


class TestUnchanged:
    def test_same_worker_count_replays_as_recorded(self, tmp_path):
        """A 1-worker plan replayed with 1 worker is the plan itself (the life cycle changes nothing)."""
        plan = build_plan(_record(tmp_path, 1, **GRID), prefetch=2)
        assert plan is with_lifecycle(plan, 1)

    def test_costs_off_give_the_old_replay(self, tmp_path):
        """With the costs off (lifecycle=None) 1 -> 2 workers replays as before: no forks, stops or
        per-worker starts (by hand, the hand-worked run: 72 ms)."""
        plan = replace(build_plan(_record(tmp_path, 1), prefetch=2), lifecycle=None)
        assert 0.072 == pytest.approx(replay(plan, workers=2, prefetch=4).wall_s)


class TestStepCoresWithoutWorkers:
    def test_a_run_without_workers_gives_the_steps_cores(self, tmp_path):
        """A run that loaded in the loop, each 10 ms step using 2 cores (20 ms process CPU) under a 2-thread
        pool: the thread check has nothing to compare (skipped), yet the replay runs the step on 2 threads
        (its CPU over its wall time, hand-worked), as the step will when workers are added."""
        rows = [r for b in range(6) for r in (wait(12 * b, 12 * b + 2, b), step(12 * b + 2, 12 * b + 12, b,
                                                                             cpu_ms=20.0))]
        pools = {"usable_cores": 2, "pools": [{"api": "blas", "library": "openblas", "threads": 2}],
                 "torch_intra_op": None, "error": None}
        d = write_run(tmp_path, {1: rows}, cores=2, header_extra={"threads": pools, "step_cpu": "process"})
        plan = build_plan(pipeprobe.load(d))
        assert ("the loader ran no worker processes", 2.0) == (plan.threads.skipped, plan.step_width)


class TestBadHeader:
    @pytest.mark.parametrize("field", [
        "fast", {"starts": 3, "iter_s": "0.003", "first_batch_s": 0.025, "stop_s": 0.004},
        {"starts": 3, "iter_s": -1.0, "first_batch_s": 0.025, "stop_s": 0.004},
        {"starts": 3, "iter_s": 0.003, "first_batch_s": float("nan"), "stop_s": 0.004},
        {"starts": 3, "iter_s": 0.003, "first_batch_s": True, "stop_s": 0.004},
        {"starts": 3, "iter_s": 0.003, "first_batch_s": 0.025}])
    def test_a_damaged_worker_start_is_taken_as_unknown(self, tmp_path, field):
        """A worker_start field of the wrong type or out of range: the prediction says the start-up cost is
        unknown and replays as without it (the hand-worked 48 ms of test_no_workers_without_timed_starts)."""
        p = _predict(_record(tmp_path, 0, header={"worker_start": field}), 2)
        assert (True, 0.048) == (UNKNOWN_START_NOTE in p.notes, pytest.approx(p.predicted_wall_s))


class TestEngineStartsWorkers:
    @pytest.mark.parametrize("policy", ["first-free", "round-robin"])
    def test_a_restarted_worker_runs_one_task_at_a_time(self, policy):
        """1 worker, 2 epochs of two 10 ms tasks and 1 ms steps, 5 ms between a worker's tasks, a new worker
        process ready 3 ms after each epoch's first ask. By hand: tasks 3-13 and 18-28, steps end 14 and
        29; epoch 1 asks at 29, its worker starts at 32: tasks 32-42 and 47-57 (the old process's 'free
        again' at 33 starts nothing), steps end 43 and 58 ms."""
        plan = plan_from_durations([0.010] * 4, [0.001] * 4, epoch=[0, 0, 1, 1], workers=1, prefetch=2,
                                   policy=policy)
        plan = replace(plan, worker_gap_s=0.005, epoch_worker_start_s=np.array([[0.003], [0.003]]))
        r = replay(plan)
        assert [3, 18, 32, 47] == pytest.approx((r.start_s * 1e3).tolist())
        assert 0.058 == pytest.approx(r.wall_s)


class TestEpochBarrier:
    def test_a_worker_starting_before_the_loops_first_ask_keeps_the_barrier(self, tmp_path):
        """2 workers made 6 ms apart, each starting 5 ms after it was made: worker 0 takes its first task
        1 ms before the loop's first ask of the epoch (torch hands out the first indices inside iter()),
        yet no epoch's task starts before the loop took the last batch of the epoch before: the loader
        keeps the epoch barrier (hand-worked from the synthetic run)."""
        run = _record(tmp_path, 2, fork_ms=6.0, early=True, **GRID)
        first_tasks = run.spans[run.spans["stage"] == "load"].groupby("epoch")["start_s"].min()
        first_asks = run.batches.groupby("epoch")["wait_start_s"].min()
        assert [True, True, True] == (first_tasks < first_asks).tolist()
        assert build_plan(run, prefetch=4).epoch_barrier


class TestLoopWorkAfterTheLastStep:
    def test_the_stop_cost_is_bounded_by_the_time_between_epochs(self, tmp_path):
        """The 1-worker hand-worked run, its script running 500 ms after the last step (saving a model):
        one worker's stop is taken as at most the loop's 7 ms per worker between epochs (stop and start
        together), not 504 ms. By hand the prediction at 2 workers: 82 + 500 - 3 (no start counted) + 7
        - 4 (the stop taken as 7 ms) = 582 + 4 = 586 ms, against the rerun's 582 ms."""
        rows, end = loader_life_rows(1)
        run = pipeprobe.load(write_run(tmp_path / "w1", rows, end_ms=end + 500, cores=8))
        assert 0.586 == pytest.approx(_predict(run, 2).predicted_wall_s)
        assert 0.582 == pytest.approx(_rerun_s(2) + 0.5)
