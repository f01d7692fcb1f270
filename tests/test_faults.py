"""Faults injected into recorded jobs: kills, signals, failing stages and workers, full disks.

Anything that kills or signals runs in a child process; the test process is
never signalled. Promises under test (README, 'Reliability'): a killed
process loses at most about one flush interval of spans; a signal loses
nothing recorded before it and keeps the user's handlers; user exceptions
pass through unchanged; pipeprobe's own failures become one RuntimeWarning
and training goes on.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import threading
import time
import traceback
import warnings
from pathlib import Path

import numpy as np
import pytest

import pipeprobe
from pipeprobe import stage

sys.path.insert(0, str(Path(__file__).parent))
from _faultlab import (  # noqa: E402
    FAULT_CHILD,
    HANG_GUARD_S,
    SECOND_PROBE_CHILD,
    SIGNAL_CHILD,
    SPILL_SIGNAL_CHILD,
    child_env,
    kill_trial,
    read_progress,
    wait_for,
)

FLUSH_S = 0.2
# Scheduling slack on a shared 2-core machine: a flusher thread may run late.
SLACK_S = 0.6


def run_child(code: str, *args: str, timeout_s: float = HANG_GUARD_S) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-c", code, *args], env=child_env(), capture_output=True, text=True, timeout=timeout_s
    )


def load_quiet(run_dir: Path) -> pipeprobe.Run:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pipeprobe.load(run_dir)


class TestKill:
    @pytest.mark.slow
    @pytest.mark.parametrize("target", ["main", "worker"])
    @pytest.mark.parametrize("seed", [1, 2])
    def test_sigkill_loses_at_most_one_flush_interval(self, tmp_path: Path, target: str, seed: int) -> None:
        """A SIGKILLed training process or loader worker leaves a loadable trace missing at most the last flush."""
        for attempt in range(3):  # a loaded machine may hold the flush thread back; record again before judging
            out = kill_trial(tmp_path, seed + 10 * attempt, target, flush_s=FLUSH_S)
            if out.loss_s <= FLUSH_S + SLACK_S:
                break
        assert "" == out.load_error
        assert out.done > 20  # the job really ran before the kill
        assert 0 == out.invented
        assert out.batches_ok
        assert out.loss_s <= FLUSH_S + SLACK_S, out

    @pytest.mark.slow
    def test_killed_run_analyses_with_incomplete_batches_marked(self, tmp_path: Path) -> None:
        """A run killed mid-way analyses without error; batches it never finished are not invented."""
        analysis = pytest.importorskip("pipeprobe.analysis")
        out = kill_trial(tmp_path, 3, "main", flush_s=FLUSH_S)
        assert "" == out.load_error
        run = load_quiet(tmp_path / "run-main-3")
        assert not run.header.get("closed")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            result = analysis.analyze(run)
        b = run.batches
        # Every batch in the table was delivered; only the last may lack a step.
        assert np.arange(len(b)).tolist() == b["batch_id"].tolist()
        assert b["step_s"].iloc[:-1].notna().all()
        assert len(b) <= out.done + 1
        assert result.run is run


class TestSecondProbe:
    @staticmethod
    def _trial(tmp_path: Path, flush_s: float) -> tuple[int, float, int]:
        """Kill the second-probe job after ten flush intervals: ``(spans done, loss_s, spans in the first run)``."""
        tmp_path.mkdir()
        run_a, run_b, progress = tmp_path / "a", tmp_path / "b", tmp_path / "progress.txt"
        child = subprocess.Popen([sys.executable, "-c", SECOND_PROBE_CHILD, str(run_a), str(run_b), str(progress),
                                  str(flush_s)], env=child_env(), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        try:
            lines = wait_for(progress, lambda ls: any(k == "ready" for k, *_ in ls), HANG_GUARD_S)
            t_ready = lines[0][3]
            # ten flush intervals of the second probe, then the kill
            wait_for(progress, lambda ls: ls[-1][3] - t_ready > 10 * flush_s * 1e9, HANG_GUARD_S)
            t_kill = time.monotonic_ns()
            child.kill()
            child.wait(timeout=HANG_GUARD_S)
        finally:
            if child.poll() is None:
                child.kill()
                child.wait()
        done = {i: t for k, _, i, t in read_progress(progress) if k == "decode" and t <= t_kill}
        run = load_quiet(run_b)
        kept = set(run.spans.loc[run.spans["stage"] == "decode", "sample_id"].astype(int))
        lost = [t for i, t in done.items() if i not in kept]
        loss_s = (t_kill - min(lost, default=t_kill)) / 1e9
        return len(done), loss_s, int((load_quiet(run_a).spans["stage"] == "decode").sum())

    @pytest.mark.slow
    def test_second_probe_flushes_periodically_before_a_kill(self, tmp_path: Path) -> None:
        """A second probe in one process writes every flush interval: a SIGKILL loses at most the last one."""
        flush_s = 0.1
        for attempt in range(3):  # a loaded machine may hold the flush thread back; record again before judging
            done, loss_s, first_run = self._trial(tmp_path / f"a{attempt}", flush_s)
            if loss_s <= flush_s + SLACK_S:
                break
        assert done > 100
        # README, Reliability: a killed process loses at most its last flush interval (plus scheduling slack).
        assert loss_s <= flush_s + SLACK_S
        assert 10 == first_run


class TestSignals:
    def _signal_run(self, tmp_path: Path, mode: str, signum: int) -> tuple[subprocess.Popen, list, Path]:
        run_dir, progress = tmp_path / "run", tmp_path / "progress.txt"
        child = subprocess.Popen(
            [sys.executable, "-c", SIGNAL_CHILD, str(run_dir), str(progress), mode],
            env=child_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        )
        try:
            wait_for(progress, lambda ls: sum(k == "decode" for k, *_ in ls) >= 50, HANG_GUARD_S)
            child.send_signal(signum)
            child.wait(timeout=HANG_GUARD_S)
        finally:
            if child.poll() is None:
                child.kill()
                child.wait()
        return child, read_progress(progress), run_dir

    def _assert_nothing_lost(self, lines: list, run_dir: Path) -> None:
        done = {i for k, _, i, _ in lines if k == "decode"}
        run = load_quiet(run_dir)
        kept = set(run.spans.loc[run.spans["stage"] == "decode", "sample_id"].astype(int))
        assert set() == done - kept  # every span announced before the signal is on disk
        assert len(kept - done) <= 1  # at most the span that closed as the signal came

    @pytest.mark.parametrize("mode", ["user-exit", "default"])
    def test_sigterm_flushes_then_keeps_what_the_signal_did(self, tmp_path: Path, mode: str) -> None:
        """SIGTERM still does what it did without pipeprobe (the user's handler, or death) and loses no span."""
        child, lines, run_dir = self._signal_run(tmp_path, mode, signal.SIGTERM)
        expected_rc = 7 if mode == "user-exit" else -signal.SIGTERM
        assert expected_rc == child.returncode, child.stderr.read()
        self._assert_nothing_lost(lines, run_dir)

    def test_sigint_raises_keyboardinterrupt_in_user_code(self, tmp_path: Path) -> None:
        """Ctrl-C still raises KeyboardInterrupt where the loop was, and the spans before it are kept."""
        child, lines, run_dir = self._signal_run(tmp_path, "default", signal.SIGINT)
        out = child.stdout.read()
        assert 0 == child.returncode, child.stderr.read()
        assert out.startswith("KeyboardInterrupt <module>")
        assert "work" in out.split() or "<module>" == out.split()[1]
        self._assert_nothing_lost(lines, run_dir)

    @pytest.mark.slow
    def test_signal_storm_during_buffer_spills_does_not_hang(self, tmp_path: Path) -> None:
        """Signals arriving while a full buffer is being written never deadlock the job (regression)."""
        code = r'''
import signal, sys, time
import pipeprobe
hits = []
signal.signal(signal.SIGTERM, lambda s, f: hits.append(s))
with pipeprobe.Probe(sys.argv[1], report=False, sample_interval_s=0, buffer_spans=16, flush_interval_s=0.05) as p:
    print("ready", flush=True)
    t, n = time.monotonic(), 0
    while time.monotonic() - t < 2.0:
        with pipeprobe.stage("x"):
            n += 1
print(n, len(hits), flush=True)
'''
        child = subprocess.Popen([sys.executable, "-c", code, str(tmp_path / "run")], env=child_env(),
                                 stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        try:
            assert "ready" == child.stdout.readline().strip()
            t = time.monotonic()
            while time.monotonic() - t < 1.5 and child.poll() is None:
                child.send_signal(signal.SIGTERM)
                time.sleep(0.003)
            out, err = child.communicate(timeout=20)
        finally:
            if child.poll() is None:
                child.kill()
                child.wait()
        assert 0 == child.returncode, err
        n, hits = map(int, out.split())
        # Standard signals that arrive while one is pending merge into one (POSIX), and a signal
        # that lands while pipeprobe is writing waits for the write: fewer handler calls than sends.
        assert hits > 10
        assert n == int((load_quiet(tmp_path / "run").spans["stage"] == "x").sum())

    @pytest.mark.parametrize(
        ("mode", "signame", "expected_rc"),
        [("default", "SIGTERM", -signal.SIGTERM), ("user-exit", "SIGTERM", 7), ("user-raise", "SIGTERM", 7),
         ("default", "SIGINT", None)],
    )
    def test_signal_during_a_spill_loses_nothing(self, tmp_path: Path, mode: str, signame: str,
                                                 expected_rc: int | None) -> None:
        """A signal landing while a full buffer is being written waits for the write: all 48 spans are kept."""
        res = run_child(SPILL_SIGNAL_CHILD, str(tmp_path / "run"), mode, signame)
        if expected_rc is None:  # Ctrl-C: KeyboardInterrupt raised in the loop, as without pipeprobe
            assert "KeyboardInterrupt" in res.stderr, res.stderr
        else:
            assert expected_rc == res.returncode, res.stderr
        assert "" == res.stdout
        spans = load_quiet(tmp_path / "run").spans
        # 3 spills of 16 spans each had begun when the signal came (buffer_spans=16, exact count)
        assert list(range(48)) == sorted(spans.loc[spans["stage"] == "decode", "sample_id"].astype(int))

    def test_user_handlers_are_restored_on_close(self, tmp_path: Path) -> None:
        """The user's SIGTERM/SIGINT handlers are back in place after the probe closes (no signal is sent)."""
        def mine(signum, frame):  # never called
            raise AssertionError("not expected")

        before = signal.signal(signal.SIGTERM, mine)
        before_int = signal.getsignal(signal.SIGINT)
        try:
            with pipeprobe.Probe(tmp_path / "run", report=False, sample_interval_s=0):
                assert mine is not signal.getsignal(signal.SIGTERM)  # flushes first, then calls mine
            assert mine is signal.getsignal(signal.SIGTERM)
            assert before_int is signal.getsignal(signal.SIGINT)
        finally:
            signal.signal(signal.SIGTERM, before)


LOST_SIGTERM_CHILD = """
import os, signal, sys, time
import pipeprobe
with pipeprobe.Probe(sys.argv[1], report=False, sample_interval_s=0, flush_interval_s=30) as probe:
    pid = os.fork()
    if pid == 0:
        for i in range(5):
            with pipeprobe.stage("load", sample=i):
                pass
        w = signal.set_wakeup_fd(-1)
        signal.set_wakeup_fd(w)
        os.write(w, bytes([signal.SIGTERM]))  # a SIGTERM whose Python handler never got to run
        time.sleep(20)
        os._exit(0)
    t0 = time.monotonic()
    _, status = os.waitpid(pid, 0)
    print(os.WTERMSIG(status) if os.WIFSIGNALED(status) else -1, round(time.monotonic() - t0, 3))
"""


LOST_SIGTERM_AFTER_CLOSE = """
import os, signal, sys, time
import pipeprobe
from pipeprobe.record import _recorder
probe = pipeprobe.Probe(sys.argv[1], report=False, sample_interval_s=0, flush_interval_s=30)
pid = os.fork()
if pid == 0:
    for i in range(5):
        with pipeprobe.stage("load", sample=i):
            pass
    t0 = time.monotonic()
    while _recorder.RECORDER.on and time.monotonic() - t0 < 60:  # until this worker answers the close request
        time.sleep(0.01)
    time.sleep(0.5)  # the answer's acknowledgement is written; the pool stays open
    w = signal.set_wakeup_fd(-1)
    signal.set_wakeup_fd(w)
    os.write(w, bytes([signal.SIGTERM]))  # a SIGTERM whose Python handler never got to run
    time.sleep(20)
    os._exit(0)
t0 = time.monotonic()
while not os.path.exists(f"{sys.argv[1]}/spans-r0-p{pid}.json") and time.monotonic() - t0 < 60:
    time.sleep(0.01)  # the worker registered (its first flush): the close asks it to answer
probe.close()
_, status = os.waitpid(pid, 0)
print(os.WTERMSIG(status) if os.WIFSIGNALED(status) else -1)
"""


LOST_SIGTERM_SPAWNED = """
import multiprocessing as mp, os, signal, sys, time
import pipeprobe


def child(sent):
    for i in range(5):
        with pipeprobe.stage("load", sample=i):
            pass
    w = signal.set_wakeup_fd(-1)
    signal.set_wakeup_fd(w)
    with open(sent, "w") as f:
        f.write(repr(time.monotonic()))
    os.write(w, bytes([signal.SIGTERM]))  # a SIGTERM whose Python handler never got to run
    time.sleep(20)


if __name__ == "__main__":
    with pipeprobe.Probe(sys.argv[1], report=False, sample_interval_s=0, flush_interval_s=30):
        p = mp.get_context("spawn").Process(target=child, args=(sys.argv[2],))
        p.start()
        p.join(60)
        print(p.exitcode, time.monotonic())
"""


class TestLostSignal:
    def test_worker_ends_when_its_sigterm_handler_never_runs(self, tmp_path):
        """A forked worker whose SIGTERM reached the wakeup pipe but never its Python handler (the main
        thread had already blocked, as a pool worker waiting on the queue lock Pool.terminate holds) still
        ends within a second, its spans written first. Without pipeprobe the default action would have ended
        it; CPython runs handlers only in the main thread between bytecodes (Python docs, signal module)."""
        for attempt in range(3):  # a loaded machine may hold the flush thread back; record again before judging
            run_dir = tmp_path / f"run{attempt}"
            out = run_child(LOST_SIGTERM_CHILD, str(run_dir))
            assert 0 == out.returncode, out.stderr
            sig, waited_s = out.stdout.split()
            if float(waited_s) < 2.0:
                break
        assert int(signal.SIGKILL) == int(sig)
        assert float(waited_s) < 2.0
        spans = load_quiet(run_dir).spans
        assert 5 == int((spans["stage"] == "load").sum())

    def test_spawned_worker_ends_when_its_sigterm_handler_never_runs(self, tmp_path):
        """The same for a spawned worker (it joins the run through the environment, not a fork hook): it ends
        within 2 s of the lost SIGTERM (the watch answers on the flush thread's next tick, 0.25 s or so; the
        margin is for a loaded machine), its spans written first."""
        script = tmp_path / "spawned.py"
        script.write_text(LOST_SIGTERM_SPAWNED)
        for attempt in range(3):  # a loaded machine may hold the flush thread back; record again before judging
            run_dir, sent = tmp_path / f"run{attempt}", tmp_path / f"sent{attempt}"
            out = subprocess.run([sys.executable, str(script), str(run_dir), str(sent)],
                                 env=child_env(), capture_output=True, text=True, timeout=HANG_GUARD_S)
            assert 0 == out.returncode, out.stderr
            exitcode, ended_at = out.stdout.split()
            waited_s = float(ended_at) - float(sent.read_text())
            if waited_s < 2.0:
                break
        assert -int(signal.SIGKILL) == int(exitcode)
        assert waited_s < 2.0
        spans = load_quiet(run_dir).spans
        assert 5 == int((spans["stage"] == "load").sum())

    def test_worker_that_answered_the_close_still_ends_on_a_lost_sigterm(self, tmp_path):
        """A forked worker that outlived the probe (it answered the close request, its pool still open) still
        ends on a SIGTERM its handler never saw, with the spans it flushed at close in the trace. Before the
        fix its flush thread stopped with the answer and Pool.terminate() waited for it forever (it slept its
        20 s out here and exited 0); CPython runs handlers only in the main thread (Python docs, signal module)."""
        out = run_child(LOST_SIGTERM_AFTER_CLOSE, str(tmp_path / "run"))
        assert 0 == out.returncode, out.stderr
        spans = load_quiet(tmp_path / "run").spans
        assert (int(signal.SIGKILL), 5) == (int(out.stdout.strip()), int((spans["stage"] == "load").sum()))

    @pytest.mark.slow
    def test_with_pool_exits_every_time(self, tmp_path):
        """Leaving `with Pool(2)` under a probe (Pool.terminate sends SIGTERM to workers blocked on the task
        queue's lock) ends 60 times in a row; before the wakeup-pipe watch it hung within 15-50 tries."""
        code = """
import multiprocessing as mp, sys, time, pipeprobe
def load(i):
    with pipeprobe.stage("load", sample=i):
        time.sleep(0.002)
    return [i]
for k in range(60):
    with pipeprobe.Probe(f"{sys.argv[1]}/{k}", report=False, sample_interval_s=0.02) as probe:
        with mp.get_context("fork").Pool(2) as pool:
            for _ in probe.watch(pool.imap(load, range(10)), samples=lambda ids: ids):
                with probe.step():
                    time.sleep(0.004)
print("done")
"""
        out = run_child(code, str(tmp_path), timeout_s=240)
        assert "done" == out.stdout.strip(), out.stderr


class TestUserExceptions:
    @staticmethod
    def _frames(exc: BaseException) -> list[tuple[str, str]]:
        return [(f.filename, f.name) for f in traceback.extract_tb(exc.__traceback__)]

    @staticmethod
    def _fail(x: int) -> int:
        raise ValueError(f"bad part {x}")

    def _catch(self, fn) -> BaseException:
        try:
            fn()
        except BaseException as exc:  # noqa: BLE001
            return exc
        raise AssertionError("no exception")

    def test_block_form_passes_the_exception_through_unchanged(self, tmp_path: Path) -> None:
        """A stage that raises gives the caller the same exception object, same traceback, marked in the trace."""
        def body():
            with stage("decode", sample=3):
                self._fail(3)

        plain = self._catch(body)
        with pipeprobe.Probe(tmp_path / "run", report=False, sample_interval_s=0):
            probed = self._catch(body)
        assert type(plain) is type(probed)
        assert str(plain) == str(probed)
        assert self._frames(plain) == self._frames(probed)
        run = load_quiet(tmp_path / "run")
        assert [True] == run.spans.loc[run.spans["stage"] == "decode", "error"].tolist()

    def test_decorator_form_adds_no_frame_but_its_own_wrapper(self, tmp_path: Path) -> None:
        """The decorated stage re-raises the very exception; only pipeprobe's wrapper frame is added."""
        raised = []

        @stage("augment")
        def augment(i: int) -> int:
            exc = KeyError(i)
            raised.append(exc)
            raise exc

        with pipeprobe.Probe(tmp_path / "run", report=False, sample_interval_s=0):
            got = self._catch(lambda: augment(5))
        assert raised[0] is got
        user = [f for f in self._frames(got) if "pipeprobe" not in f[0]]
        assert "augment" == user[-1][1]
        run = load_quiet(tmp_path / "run")
        assert [(5, True)] == list(zip(run.spans["sample_id"], run.spans["error"], strict=True))

    @pytest.mark.parametrize("exc_type", [KeyboardInterrupt, SystemExit, GeneratorExit])
    def test_base_exceptions_pass_through(self, tmp_path: Path, exc_type: type) -> None:
        """KeyboardInterrupt, SystemExit and GeneratorExit raised in a stage reach the caller as they are."""
        with pipeprobe.Probe(tmp_path / "run", report=False, sample_interval_s=0):
            with pytest.raises(exc_type):
                with stage("read"):
                    raise exc_type()

    def test_loader_timeout_passes_through_and_is_marked(self, tmp_path: Path) -> None:
        """A loader that gives up waiting (the user's own timeout) raises as before; that wait is marked as failed."""
        import queue
        import threading

        q: queue.Queue = queue.Queue()

        def producer() -> None:  # delivers two batches, then hangs
            for b in range(2):
                with stage("decode", sample=b):
                    time.sleep(0.005)
                q.put([b])

        def batches():
            while True:
                yield q.get(timeout=0.3)

        threading.Thread(target=producer, daemon=True).start()
        got = []
        with pipeprobe.Probe(tmp_path / "run", report=False, sample_interval_s=0) as probe:
            with pytest.raises(queue.Empty):
                for batch in probe.watch(batches(), samples=lambda ids: ids):
                    with probe.step():
                        got.append(batch)
        assert [[0], [1]] == got
        run = load_quiet(tmp_path / "run")
        waits = run.spans[run.spans["stage"] == "wait"].sort_values("start_s")
        assert [False, False, True] == waits["error"].tolist()
        assert [0, 1] == run.batches["batch_id"].tolist()

    @pytest.mark.slow
    def test_dataloader_worker_dying_mid_batch(self, tmp_path: Path) -> None:
        """A torch DataLoader worker that os._exit()s mid-batch fails the loop as it would without pipeprobe."""
        pytest.importorskip("torch")
        code = r'''
import os, sys, time
import torch.utils.data as tud
import pipeprobe
class Parts(tud.Dataset):
    def __len__(self):
        return 200
    def __getitem__(self, i):
        with pipeprobe.stage("decode", sample=i):
            time.sleep(0.008)
            if i == 121:
                os._exit(3)  # the worker dies mid-batch, skipping every exit hook
        return i
def train(probe):
    loader = tud.DataLoader(Parts(), batch_size=4, num_workers=2)
    for batch in (probe.watch(loader) if probe else loader):
        pass
for with_probe in (False, True):
    try:
        if with_probe:
            with pipeprobe.Probe(sys.argv[1], report=False, flush_interval_s=0.2, sample_interval_s=0) as probe:
                train(probe)
        else:
            train(None)
    except Exception as exc:
        print(type(exc).__name__, str(exc).split("(pid")[0].strip(), flush=True)
'''
        res = run_child(code, str(tmp_path / "run"), timeout_s=120)
        lines = res.stdout.strip().splitlines()
        assert 2 == len(lines), res.stderr
        assert lines[0] == lines[1]  # same exception type and message with and without the probe
        run = load_quiet(tmp_path / "run")
        assert np.arange(len(run.batches)).tolist() == run.batches["batch_id"].tolist()
        assert run.spans.loc[run.spans["stage"] == "wait", "error"].iloc[-1]
        # The dead worker flushed every 0.2 s before dying, so both workers show.
        assert 2 == run.spans.loc[run.spans["stage"] == "decode", "pid"].nunique()



def _hash_id(i: int) -> int:
    """An unsigned 64-bit id above int64, as a hash of the sample would give."""
    return 2**64 - 1 - i


@pipeprobe.stage("decode")
def _decode_hashed(sample_hash: int) -> int:
    return sample_hash & 1


def _hashed_batches(n: int):
    """Batches of 2 samples whose ids are 64-bit hashes, decoded in a loader thread before delivery."""
    for b in range(n):
        ids = [_hash_id(2 * b), _hash_id(2 * b + 1)]
        loader = threading.Thread(target=lambda ids=ids: [_decode_hashed(i) for i in ids])
        loader.start()
        loader.join()
        yield ids


class TestLargeIds:
    def test_ids_beyond_the_record_fields_never_raise_and_follow_the_rule(self, tmp_path: Path) -> None:
        """Ids beyond int64/int32 raise nothing, warn nothing, lose no span: stored by the documented rule."""
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            # buffer_spans=16 makes the user's loop spill buffers full of such ids; 0.01 s flushes, the flush thread
            with pipeprobe.Probe(tmp_path / "run", report=False, sample_interval_s=0, buffer_spans=16,
                                 flush_interval_s=0.01) as probe:
                for _ in probe.watch(_hashed_batches(2), samples=lambda b: b, epoch=2**31):
                    for i in range(40):
                        with stage("augment", sample=2**64 + i, batch=2**40):
                            pass
                    time.sleep(0.03)
        assert [] == [str(w.message) for w in seen if "pipeprobe" in str(w.message)]
        run = load_quiet(tmp_path / "run")
        sp = run.spans
        mask = 2**63 - 1  # the rule in docs/trace-format.md, worked with Python's own ints
        expected_augment = sorted(((2**64 + i) & mask) for i in range(40)) * 2
        assert sorted(expected_augment) == sorted(sp.loc[sp["stage"] == "augment", "sample_id"].astype(int))
        assert [2**31 - 2] * 2 == run.batches["epoch"].astype(int).tolist()  # clipped to the largest epoch held
        # hashed ids link the loader thread's spans to their batches through the membership rows, like any id
        decode = sp[sp["stage"] == "decode"].sort_values("start_s")
        assert [_hash_id(i) & mask for i in range(4)] == decode["sample_id"].astype(int).tolist()
        assert [0, 0, 1, 1] == decode["batch_id"].astype(int).tolist()


class TestOwnFailures:
    @pytest.mark.parametrize("fault", ["fsize", "removed", "replaced"])
    def test_one_warning_and_training_goes_on(self, tmp_path: Path, fault: str) -> None:
        """A full disk or a run folder removed mid-run gives exactly one RuntimeWarning; the loop still finishes."""
        run_dir = tmp_path / "run"
        res = run_child(FAULT_CHILD, str(run_dir), fault, "20000")
        assert 0 == res.returncode, res.stderr
        report = json.loads(res.stdout)
        assert 20000 == report["done"]
        ours = [m for c, m in report["warnings"] if "pipeprobe" in m]
        assert 1 == len(ours), report["warnings"]
        assert "RuntimeWarning" == [c for c, m in report["warnings"] if "pipeprobe" in m][0]
        assert ours[0].startswith("pipeprobe stopped recording")

    def test_full_disk_leaves_a_readable_prefix(self, tmp_path: Path) -> None:
        """What was written before the disk filled loads: whole records, the first samples in order."""
        run_dir = tmp_path / "run"
        res = run_child(FAULT_CHILD, str(run_dir), "fsize", "20000")
        assert 0 == res.returncode, res.stderr
        run = load_quiet(run_dir)
        ids = np.sort(run.spans.loc[run.spans["stage"] == "decode", "sample_id"].to_numpy())
        limit = (64 * 1024 - 16) // 48
        assert 100 < len(ids) <= limit
        assert np.arange(len(ids)).tolist() == ids.tolist()

    def test_unusable_out_dir_at_start(self, tmp_path: Path) -> None:
        """An out_dir that cannot be created gives one RuntimeWarning at start; the loop runs unrecorded."""
        blocker = tmp_path / "file"
        blocker.write_text("a file where a folder should go")
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            total = 0
            with pipeprobe.Probe(blocker / "run", report=False, sample_interval_s=0) as probe:
                for batch in probe.watch([[1, 2], [3, 4]]):
                    with probe.step():
                        total += sum(batch)
        assert 10 == total
        ours = [w for w in seen if "pipeprobe" in str(w.message)]
        assert [RuntimeWarning] == [w.category for w in ours]
        assert [blocker] == list(tmp_path.iterdir())


@pytest.mark.slow
def test_long_run_memory_stays_bounded(tmp_path: Path) -> None:
    """A million spans grow the process by well under the 50 MB target (bench/bench_long_run.py runs 10 million)."""
    code = r'''
import sys, psutil
import pipeprobe
proc = psutil.Process()
with pipeprobe.Probe(sys.argv[1], report=False, sample_interval_s=0, flush_interval_s=0.2) as probe:
    for i in range(1_000_000):
        with pipeprobe.stage("decode"):
            pass
        if i == 100_000:
            early = proc.memory_info().rss
    late = proc.memory_info().rss
print(early, late)
'''
    res = run_child(code, str(tmp_path / "run"), timeout_s=300)
    assert 0 == res.returncode, res.stderr
    early, late = map(int, res.stdout.split())
    assert late - early < 30 * 2**20


class _HalfWriter:
    """A span file whose next write stores only half its bytes, as a filling disk does."""

    def __init__(self, fh) -> None:
        self.fh = fh
        self.short = True

    def write(self, data: bytes) -> int:
        if self.short:
            self.short = False
            return self.fh.write(data[: len(data) // 2 + 7])  # 5 records and a bit
        return self.fh.write(data)

    def __getattr__(self, name: str):
        return getattr(self.fh, name)


def test_short_write_stops_recording_before_records_misalign(tmp_path: Path) -> None:
    """A write that stores part of a chunk stops recording, so later records cannot land misaligned."""
    from pipeprobe.record._recorder import RECORDER

    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        with pipeprobe.Probe(tmp_path / "run", report=False, sample_interval_s=0, flush_interval_s=60) as probe:
            for i in range(10):
                with probe.stage("decode", sample=i):
                    pass
            RECORDER.flush()
            RECORDER.span_file = _HalfWriter(RECORDER.span_file)
            for i in range(10, 20):
                with probe.stage("decode", sample=i):
                    pass
            RECORDER.flush()
            for i in range(20, 30):
                with probe.stage("decode", sample=i):
                    pass
    assert 1 == sum(w.category is RuntimeWarning and "pipeprobe" in str(w.message) for w in seen)
    with pytest.warns(UserWarning, match="truncated final record"):
        run = pipeprobe.load(tmp_path / "run")
    ids = run.spans.loc[run.spans["stage"] == "decode", "sample_id"].tolist()
    assert list(range(15)) == ids
