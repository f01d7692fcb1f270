"""Recording: stage timers, the loader watch, the step timer, and process handling."""

from __future__ import annotations

import multiprocessing as mp
import os
import sys
import threading
import time
import traceback
import warnings
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest

import pipeprobe
from pipeprobe import stage
from pipeprobe.errors import PipeprobeError, ProbeStateError, StageNameError, StageTargetError


@stage("decode")
def _decode(sample_id: int) -> int:
    time.sleep(0.001)
    return sample_id * 2


def _pool_batch(sample_ids: list[int]) -> list[int]:
    """A loader task run in a pool worker: decode + augment each sample."""
    out = []
    for sid in sample_ids:
        out.append(_decode(sid))
        with stage("augment", sample=sid):
            time.sleep(0.0005)
    return out


def _user_spans(run: pipeprobe.Run, name: str):
    return run.spans[run.spans["stage"] == name]


class TestStageForms:
    def test_block_form_records_sample_and_duration(self, tmp_path: Path) -> None:
        """A `with stage(...)` block is recorded with its sample id and a duration that covers the body and
        no more than the job's own clock around the block saw (a loaded machine stretches both alike)."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
            t0 = time.monotonic_ns()
            with stage("augment", sample=7):
                time.sleep(0.01)
            own_s = (time.monotonic_ns() - t0) / 1e9
        spans = _user_spans(pipeprobe.load(tmp_path / "r"), "augment")
        assert [7] == spans["sample_id"].tolist()
        assert 0.01 <= spans["dur_s"].iloc[0] <= own_s

    def test_decorator_takes_first_int_argument_as_sample(self, tmp_path: Path) -> None:
        """A decorated function called with an int first argument records it as the sample id."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
            results = [_decode(i) for i in (3, 4, 5)]
        assert [6, 8, 10] == results
        spans = _user_spans(pipeprobe.load(tmp_path / "r"), "decode")
        assert [3, 4, 5] == spans["sample_id"].tolist()

    def test_decorated_method_skips_self(self, tmp_path: Path) -> None:
        """On a method, the int after `self` is the sample id (e.g. a dataset's __getitem__)."""

        class Parts:
            @stage("fetch")
            def __getitem__(self, index: int) -> int:
                return index

        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
            Parts()[11]
        assert [11] == _user_spans(pipeprobe.load(tmp_path / "r"), "fetch")["sample_id"].tolist()

    def test_probe_stage_method_is_the_same_timer(self, tmp_path: Path) -> None:
        """`probe.stage` and `pipeprobe.stage` record into the same run."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
            with probe.stage("read", sample=1, batch=0):
                pass
        spans = _user_spans(pipeprobe.load(tmp_path / "r"), "read")
        assert [(1, 0)] == list(zip(spans["sample_id"], spans["batch_id"]))

    def test_nested_spans_are_both_recorded_and_contained(self, tmp_path: Path) -> None:
        """Nested stages each get a span, the inner one inside the outer one."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
            with stage("load", sample=1):
                with stage("decode", sample=1):
                    time.sleep(0.002)
        spans = pipeprobe.load(tmp_path / "r").spans.set_index("stage")
        assert spans.loc["load", "start_s"] <= spans.loc["decode", "start_s"]
        assert spans.loc["decode", "end_s"] <= spans.loc["load", "end_s"]

    def test_cpu_time_is_recorded_and_can_be_switched_off(self, tmp_path: Path) -> None:
        """A span's CPU time is the thread CPU its body used (checked against the OS thread clock,
        time.thread_time, around the body); sleeping costs almost none; cpu_time=False records none."""

        def busy(seconds: float) -> None:
            end = time.perf_counter() + seconds
            while time.perf_counter() < end:
                pass

        with pipeprobe.Probe(tmp_path / "on", report=False, sample_interval_s=0):
            with stage("busy"):
                c0 = time.thread_time()
                busy(0.05)
                used_s = time.thread_time() - c0
            with stage("idle"):
                time.sleep(0.05)
        s = pipeprobe.load(tmp_path / "on").spans.set_index("stage")
        # the span's CPU read brackets the body's own reads: at least their difference, a little more
        assert used_s - 1e-6 <= s.loc["busy", "cpu_s"] <= used_s + 0.005
        assert s.loc["idle", "cpu_s"] < 0.2 * s.loc["idle", "dur_s"]
        with pipeprobe.Probe(tmp_path / "off", report=False, sample_interval_s=0, cpu_time=False):
            with stage("busy"):
                busy(0.01)
        assert pipeprobe.load(tmp_path / "off").spans["cpu_s"].isna().all()

    def test_stage_is_free_and_silent_without_a_probe(self, tmp_path: Path) -> None:
        """With no probe active, stage timers run the body and record nothing."""
        with stage("decode", sample=1):
            value = 5
        assert 5 == value
        assert 6 == _decode(3)


class TestErrors:
    def test_user_exception_passes_through_unchanged(self, tmp_path: Path) -> None:
        """An exception in a stage reaches the caller with its type, value and frames, and is flagged."""

        def inner() -> None:
            raise KeyError("missing part photo")

        @stage("decode")
        def decode(sample_id: int) -> None:
            inner()

        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
            with pytest.raises(KeyError) as block_info:
                with stage("augment", sample=1):
                    inner()
            with pytest.raises(KeyError) as deco_info:
                decode(2)
        for info in (block_info, deco_info):
            assert "'missing part photo'" == str(info.value)
            assert "inner" == traceback.extract_tb(info.value.__traceback__)[-1].name
        spans = pipeprobe.load(tmp_path / "r").spans.set_index("stage")
        assert bool(spans.loc["augment", "error"]) and bool(spans.loc["decode", "error"])

    @pytest.mark.parametrize("name", [3, None, "", "step", "wait", b"decode"])
    def test_bad_stage_name_is_a_value_error_at_once(self, tmp_path: Path, name: object) -> None:
        """A non-string, empty or reserved stage name raises ValueError immediately."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
            with pytest.raises(ValueError):
                stage(name)  # type: ignore[arg-type]

    def test_bad_ids_are_value_errors(self, tmp_path: Path) -> None:
        """A sample or batch id that is not an int raises ValueError."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
            with pytest.raises(ValueError):
                stage("decode", sample="7")  # type: ignore[arg-type]
            with pytest.raises(ValueError):
                stage("decode", batch=1.5)  # type: ignore[arg-type]

    def test_out_dir_that_is_a_file_is_rejected(self, tmp_path: Path) -> None:
        """Giving a file as out_dir raises ValueError before anything runs."""
        target = tmp_path / "file.txt"
        target.write_text("not a folder")
        with pytest.raises(ValueError, match="is a file"):
            pipeprobe.Probe(target)

    def test_folder_with_a_run_is_not_overwritten(self, tmp_path: Path) -> None:
        """A folder that already holds a run is refused, so nothing recorded is lost."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
            pass
        with pytest.raises(ValueError, match="already holds"):
            pipeprobe.Probe(tmp_path / "r")

    def test_two_probes_at_once_are_refused(self, tmp_path: Path) -> None:
        """A second probe in the same process raises ProbeStateError; the first keeps recording."""
        with pipeprobe.Probe(tmp_path / "a", report=False, sample_interval_s=0):
            with pytest.raises(ProbeStateError):
                pipeprobe.Probe(tmp_path / "b")
            with stage("decode", sample=1):
                pass
        assert 1 == len(_user_spans(pipeprobe.load(tmp_path / "a"), "decode"))


    @pytest.mark.parametrize("name", ["dec\ud800ode", "\udfff"])
    def test_unencodable_stage_name_is_refused_where_it_is_named(self, tmp_path: Path, name: str) -> None:
        """A name with a lone surrogate raises StageNameError at the stage() call, probe or not (RFC 3629, sec. 3)."""
        with pytest.raises(UnicodeEncodeError):  # the outside fact: UTF-8 cannot encode surrogates
            name.encode("utf-8")
        with pytest.raises(StageNameError, match="lone surrogate"):
            stage(name)
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
            with pytest.raises(StageNameError) as info:
                stage(name)(len)
        assert isinstance(info.value, ValueError) and isinstance(info.value, PipeprobeError)
        assert ["wait", "step"] == pipeprobe.load(tmp_path / "r").header["stages"]

    def test_generator_and_async_functions_are_refused(self) -> None:
        """Decorating a generator or async function raises StageTargetError (a call there only creates the work)."""
        def gen():
            yield 1

        async def coro():
            return 1

        async def agen():
            yield 1

        for fn in (gen, coro, agen):
            with pytest.raises(StageTargetError, match="with pipeprobe.stage"):
                stage("decode")(fn)
        assert issubclass(StageTargetError, TypeError)


class TestProbesOneAfterAnother:
    def test_a_reused_thread_pool_records_everything_under_each_probe(self, tmp_path: Path) -> None:
        """Pool threads that recorded under a first probe record all their spans under a second (ground truth: 200 calls each)."""
        def work(i: int) -> None:
            with stage("decode", sample=i):
                pass

        with ThreadPoolExecutor(4) as pool:
            for name in ("a", "b", "c"):
                with pipeprobe.Probe(tmp_path / name, report=False, sample_interval_s=0):
                    list(pool.map(work, range(200)))
        for name in ("a", "b", "c"):
            spans = _user_spans(pipeprobe.load(tmp_path / name), "decode")
            assert list(range(200)) == sorted(spans["sample_id"].astype(int))

    def test_closing_a_failed_probe_leaves_the_next_one_recording(self, tmp_path: Path) -> None:
        """A probe that failed at start, closed after a newer probe began, does not stop the newer one."""
        blocker = tmp_path / "file"
        blocker.write_text("a file where a folder should go")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            failed = pipeprobe.Probe(blocker / "run", report=False, sample_interval_s=0)
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
            failed.close()
            with stage("decode", sample=5):
                pass
        assert [5] == _user_spans(pipeprobe.load(tmp_path / "r"), "decode")["sample_id"].tolist()
        # the failed probe's flush thread was retired when the next probe started (regression: it flushed on)
        assert [] == [t.name for t in threading.enumerate() if t.name == "pipeprobe-flush"]


class TestRunFolder:
    def test_chdir_during_the_run_keeps_recording(self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
        """A relative run folder is fixed at start: an os.chdir() mid-run loses nothing and warns nothing."""
        (tmp_path / "elsewhere").mkdir()
        monkeypatch.chdir(tmp_path)
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            with pipeprobe.Probe("rel/run", report=False, sample_interval_s=0.01, flush_interval_s=0.01) as probe:
                with stage("decode", sample=0):
                    pass
                os.chdir(tmp_path / "elsewhere")
                time.sleep(0.05)
                with stage("decode", sample=1):
                    pass
        assert tmp_path / "rel" / "run" == probe.run_dir
        assert [] == [str(w.message) for w in seen if "pipeprobe" in str(w.message)]
        run = pipeprobe.load(tmp_path / "rel" / "run")
        assert [0, 1] == _user_spans(run, "decode")["sample_id"].tolist()
        assert run.header["closed"]
        assert not list((tmp_path / "elsewhere").iterdir())

    def test_a_flush_before_the_run_header_finds_the_folder(self, tmp_path: Path,
                                                            monkeypatch: pytest.MonkeyPatch) -> None:
        """A main thread held up after the recorder started (a loaded machine) loses nothing: the flush thread's
        first write finds the run folder there, so recording goes on without a warning."""
        from pipeprobe.record import _probe, _recorder

        flushed = threading.Event()
        real_flush, real_open_run = _recorder._Recorder.flush, _probe.Probe._open_run

        def flush(rec, lock_timeout_s: float = -1) -> None:
            real_flush(rec, lock_timeout_s)
            flushed.set()

        def open_run_after_a_flush(probe, sample_interval_s: float) -> None:
            flushed.wait(60)  # the flush thread's first write came before the folder step
            real_open_run(probe, sample_interval_s)

        monkeypatch.setattr(_recorder._Recorder, "flush", flush)
        monkeypatch.setattr(_probe.Probe, "_open_run", open_run_after_a_flush)
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            with pipeprobe.Probe(tmp_path / "new" / "run", report=False, sample_interval_s=0, flush_interval_s=0.01):
                with stage("decode", sample=0):
                    pass
        assert flushed.is_set()
        assert [] == [str(w.message) for w in seen if "pipeprobe" in str(w.message)]
        assert [0] == _user_spans(pipeprobe.load(tmp_path / "new" / "run"), "decode")["sample_id"].tolist()


def _batches(n: int, size: int):
    for b in range(n):
        ids = list(range(b * size, (b + 1) * size))
        for sid in ids:
            _decode(sid)
        yield ids


class TestWatch:
    def test_in_process_generator_links_spans_to_batches_and_steps(self, tmp_path: Path) -> None:
        """Samples made by a plain generator belong to the batch it yields, and each batch to its step."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
            for _batch in probe.watch(_batches(4, 3)):
                with probe.step():
                    time.sleep(0.002)
        run = pipeprobe.load(tmp_path / "r")
        decode = _user_spans(run, "decode")
        assert (decode["sample_id"] // 3).tolist() == decode["batch_id"].tolist()
        steps = _user_spans(run, "step")
        assert [0, 1, 2, 3] == steps["batch_id"].tolist()
        assert [0, 1, 2, 3] == run.batches["batch_id"].tolist()

    def test_wait_is_the_time_the_consumer_waited(self, tmp_path: Path) -> None:
        """The recorded stall of a batch covers the loader's production time for it."""

        def slow():
            for b in range(3):
                time.sleep(0.02)
                yield b

        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
            for _ in probe.watch(slow()):
                pass
        waits = pipeprobe.load(tmp_path / "r").batches["wait_s"]
        assert (waits >= 0.02).all() and (waits < 0.5).all()

    def test_batch_ids_run_across_epochs(self, tmp_path: Path) -> None:
        """Every iteration of a watched loader is an epoch; batch ids keep counting."""
        data = [[0, 1], [2, 3], [4, 5]]
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
            watched = probe.watch(data, samples=lambda b: b)
            for _ in range(2):
                for _batch in watched:
                    with probe.step():
                        pass
        b = pipeprobe.load(tmp_path / "r").batches
        assert list(range(6)) == b["batch_id"].tolist()
        assert [0, 0, 0, 1, 1, 1] == b["epoch"].tolist()
        assert [2] * 6 == b["samples"].tolist()

    def test_explicit_epoch_and_batch(self, tmp_path: Path) -> None:
        """An explicit epoch and an explicit batch on a stage use the consumer numbering."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
            for _ in probe.watch([1, 2], epoch=5):
                pass
            with stage("log", batch=1):
                pass
        run = pipeprobe.load(tmp_path / "r")
        assert [5, 5] == run.batches["epoch"].tolist()
        log = _user_spans(run, "log")
        assert (1, 5) == (int(log["batch_id"].iloc[0]), int(log["epoch"].iloc[0]))

    def test_loader_exception_passes_through(self, tmp_path: Path) -> None:
        """An exception raised by the loader reaches the training loop unchanged."""

        def broken():
            yield 1
            raise OSError("camera disconnected")

        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
            with pytest.raises(OSError, match="camera disconnected"):
                for _ in probe.watch(broken()):
                    pass
        assert 1 == len(pipeprobe.load(tmp_path / "r").batches)

    def test_a_raising_samples_callable_is_named_and_recording_goes_on(self, tmp_path: Path) -> None:
        """A samples= callable that raises costs that batch its ids and one warning naming it; nothing else."""
        def ids_of(batch: list[int]) -> list[int]:
            if batch[0] == 2:
                raise KeyError("no ids here")
            return batch

        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
                for _batch in probe.watch([[0, 1], [2, 3], [4, 5], [2, 9]], samples=ids_of):
                    with probe.step():
                        pass
        ours = [str(w.message) for w in seen if "pipeprobe" in str(w.message)]
        assert 1 == len(ours) and "samples= callable" in ours[0] and "KeyError" in ours[0]
        run = pipeprobe.load(tmp_path / "r")
        assert 4 == len(run.batches) and 4 == int((run.spans["stage"] == "step").sum())
        assert [0, 1, 4, 5] == sorted(run.samples["sample_id"].astype(int))

    def test_consumer_side_stage_belongs_to_current_batch(self, tmp_path: Path) -> None:
        """A stage in the training loop after delivery (e.g. a host-to-device copy) gets that batch."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
            for _ in probe.watch(["a", "b"]):
                with stage("to_device"):
                    pass
        assert [0, 1] == _user_spans(pipeprobe.load(tmp_path / "r"), "to_device")["batch_id"].tolist()


def _run_pool(method: str, out: Path) -> pipeprobe.Run:
    ctx = mp.get_context(method)
    chunks = [list(range(b * 4, b * 4 + 4)) for b in range(5)]
    with pipeprobe.Probe(out, report=False, sample_interval_s=0) as probe:
        with ctx.Pool(2) as pool:
            for _ in range(2):
                for _batch in probe.watch(pool.imap(_pool_batch, chunks), samples=lambda b: [x // 2 for x in b]):
                    with probe.step():
                        time.sleep(0.002)
            pool.close()
            pool.join()
    return pipeprobe.load(out)


class TestProcesses:
    @pytest.mark.parametrize("method", ["fork", "spawn"])
    def test_pool_worker_spans_link_to_batch_and_step(self, tmp_path: Path, method: str) -> None:
        """Spans recorded in pool workers are each linked to the batch, epoch and step that consumed them."""
        run = _run_pool(method, tmp_path / method)
        worker = run.spans[run.spans["role"] == "worker"]
        assert 2 * 5 * 4 * 2 == len(worker)  # epochs x batches x samples x (decode, augment)
        assert 2 == worker["pid"].nunique() or 1 == worker["pid"].nunique()
        assert (worker["sample_id"] // 4 + 5 * worker["epoch"]).tolist() == worker["batch_id"].tolist()
        steps = run.spans[run.spans["stage"] == "step"].set_index("batch_id")
        linked = worker.join(steps[["start_s"]].rename(columns={"start_s": "step_start_s"}), on="batch_id")
        assert (linked["end_s"] <= linked["step_start_s"]).all()

    def test_pool_closed_by_its_with_block_loses_nothing(self, tmp_path: Path) -> None:
        """Leaving `with Pool(...)` (which terminates workers while they may be flushing on exit)
        keeps every worker span, and never hangs (regression: the SIGTERM used to cut the exit flush)."""
        for k in range(4):
            out = tmp_path / f"r{k}"
            with pipeprobe.Probe(out, report=False, sample_interval_s=0) as probe:
                with mp.get_context("fork").Pool(2) as pool:
                    chunks = [list(range(b * 4, b * 4 + 4)) for b in range(6)]
                    for _batch in probe.watch(pool.imap(_pool_batch, chunks), samples=lambda b: [x // 2 for x in b]):
                        pass
            worker = pipeprobe.load(out).spans
            worker = worker[worker["role"] == "worker"]
            assert 6 * 4 * 2 == len(worker)

    def test_threads_record_their_own_lanes(self, tmp_path: Path) -> None:
        """Spans from several threads keep their own thread ids and are all kept."""

        def work(base: int) -> None:
            for i in range(50):
                with stage("decode", sample=base + i):
                    pass

        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
            threads = [threading.Thread(target=work, args=(k * 100,)) for k in range(3)]
            for t in threads:
                t.start()
            for t in threads:
                t.join()
        decode = _user_spans(pipeprobe.load(tmp_path / "r"), "decode")
        assert 150 == len(decode)
        assert 3 == decode["tid"].nunique()
        assert sorted(k * 100 + i for k in range(3) for i in range(50)) == sorted(decode["sample_id"])

    def test_full_buffers_spill_without_losing_spans(self, tmp_path: Path) -> None:
        """With a tiny buffer, every span still reaches the file exactly once."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0, buffer_spans=16):
            for i in range(1000):
                with stage("decode", sample=i):
                    pass
        decode = _user_spans(pipeprobe.load(tmp_path / "r"), "decode")
        assert list(range(1000)) == sorted(decode["sample_id"])

    def test_resource_sampler_sees_main_process_and_cores(self, tmp_path: Path) -> None:
        """The sampler records CPU and RSS of the main process and per-core CPU."""
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0.05):
            time.sleep(0.3)
        res = pipeprobe.load(tmp_path / "r").resources
        main = res[res["core"] == -1]
        assert (main["rss_bytes"] > 0).all() and len(main) >= 3
        assert set(range(len(res[res["pid"] == 0]["core"].unique()))) == set(res[res["pid"] == 0]["core"])

    def test_probe_survives_pickling_into_a_spawned_worker(self, tmp_path: Path) -> None:
        """A probe passed to a spawned worker records there into the same run."""
        ctx = mp.get_context("spawn")
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
            p = ctx.Process(target=_probe_child, args=(probe,))
            p.start()
            p.join(60)
        spans = _user_spans(pipeprobe.load(tmp_path / "r"), "child")
        assert [42] == spans["sample_id"].tolist()
        assert ["worker"] == spans["role"].astype(str).tolist()


def _probe_child(probe) -> None:
    with probe.stage("child", sample=42):
        pass


class TestTorchDataLoader:
    @pytest.mark.parametrize("workers", [0, 2])
    def test_dataloader_batches_know_their_samples(self, tmp_path: Path, workers: int) -> None:
        """Wrapping a torch DataLoader records which sample ids formed each batch and links dataset spans."""
        torch = pytest.importorskip("torch")
        from torch.utils.data import DataLoader, Dataset

        class Parts(Dataset):
            def __len__(self) -> int:
                return 24

            @stage("decode")
            def __getitem__(self, index: int):
                return torch.tensor([index])

        loader = DataLoader(Parts(), batch_size=4, shuffle=True, num_workers=workers)
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
            delivered = []
            for _ in range(2):
                for batch in probe.watch(loader):
                    delivered.append(sorted(batch.flatten().tolist()))
                    with probe.step():
                        pass
        run = pipeprobe.load(tmp_path / "r")
        recorded = run.samples.groupby("batch_id")["sample_id"].apply(sorted).tolist()
        assert delivered == recorded
        decode = _user_spans(run, "decode")
        assert 48 == len(decode)
        membership = set(zip(run.samples["batch_id"], run.samples["sample_id"]))
        assert all((b, s) in membership for b, s in zip(decode["batch_id"], decode["sample_id"]))


def test_span_cost_is_measured_per_process_without_recording_anything(tmp_path: Path) -> None:
    """Each process header holds its per-span cost (a float, ns); the calibration spans never reach the run."""
    import json

    with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
        with mp.get_context("fork").Pool(1) as pool:
            for _batch in probe.watch(pool.imap(_pool_batch, [[0, 1]]), samples=lambda b: [x // 2 for x in b]):
                with stage("decode", sample=7):
                    pass
            pool.close()
            pool.join()
    headers = [json.loads(p.read_text()) for p in sorted((tmp_path / "r").glob("spans-r0-p*.json"))]
    assert ["main", "worker"] == sorted(h["role"] for h in headers)
    assert all(isinstance(h["span_cost_ns"], float) and h["span_cost_ns"] > 0 for h in headers)
    run = pipeprobe.load(tmp_path / "r")
    # exactly the spans the job made: 1 + 2 decodes, 2 augments (the calibration's 2,000 are not among them)
    assert {"decode": 3, "augment": 2} == {k: int(v) for k, v in run.spans["stage"].value_counts().items()
                                          if k in ("decode", "augment")}


def test_span_cost_leaves_out_time_the_thread_was_off_the_cpu(monkeypatch: pytest.MonkeyPatch) -> None:
    """A calibration whose thread is off the CPU for a while in each block (a loaded machine) still gives
    what a span costs the thread, against the same process's undisturbed figure. A sleeping thread uses no
    CPU time (common practice: the thread CPU clock counts running time only); 20 ms off the CPU per block
    of 400 spans would add 50,000 ns to each span on a wall clock."""
    from pipeprobe.record import _spans

    quiet_ns = _spans.calibrate_span_cost_ns(True)
    real_stage = _spans._calibration_stage

    def stage_off_cpu_once_per_block(codes, span_type, name, sample, batch):
        if sample == 0:
            time.sleep(0.02)
        return real_stage(codes, span_type, name, sample, batch)

    monkeypatch.setattr(_spans, "_calibration_stage", stage_off_cpu_once_per_block)
    per_block = _spans.CALIBRATION_SPANS // 5
    off_cpu_per_span_ns = 0.02e9 / per_block
    disturbed_ns = _spans.calibrate_span_cost_ns(True)
    assert disturbed_ns < quiet_ns + off_cpu_per_span_ns / 2, (quiet_ns, disturbed_ns)


def test_recorded_file_is_48_bytes_per_span(tmp_path: Path) -> None:
    """A span costs 48 bytes on disk (the issue's limit), plus fixed headers."""
    with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0):
        for i in range(500):
            with stage("decode", sample=i):
                pass
    (bin_file,) = (tmp_path / "r").glob("spans-*.bin")
    assert 16 + 48 * 500 == bin_file.stat().st_size
    assert np.dtype(pipeprobe.tracefile.SPAN_RECORD).itemsize == 48
    assert sys.byteorder in ("little", "big")


_LIGHT_CHILD = r'''
import os, sys
import pipeprobe
if sys.argv[2] == "worker":  # a loader worker joins the parent's run through the environment
    os.environ["PIPEPROBE_RUN_DIR"] = sys.argv[1]
    with pipeprobe.stage("decode", sample=1):
        pass
    pipeprobe.record._recorder.RECORDER.stop()
else:
    with pipeprobe.Probe(sys.argv[1], report=False, sample_interval_s=0.01) as probe:
        for batch in probe.watch([[1, 2]], samples=lambda b: b):
            with pipeprobe.stage("decode", sample=1):
                pass
            with probe.step():
                pass
print(" ".join(sorted({m.split(".")[0] for m in sys.modules} & {"pandas", "matplotlib", "numpy"})))
'''


class TestLayers:
    @pytest.mark.parametrize("role", ["main", "worker"])
    def test_recording_imports_neither_pandas_nor_matplotlib(self, tmp_path: Path, role: str) -> None:
        """A fresh process that imports pipeprobe and records (as the main process or a worker) loads numpy only."""
        import subprocess

        (tmp_path / "r").mkdir()
        env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
        env.pop("PIPEPROBE_RUN_DIR", None)
        res = subprocess.run([sys.executable, "-c", _LIGHT_CHILD, str(tmp_path / "r"), role], env=env,
                             capture_output=True, text=True, timeout=60)
        assert 0 == res.returncode, res.stderr
        assert "numpy" == res.stdout.strip()
        files = list((tmp_path / "r").glob("spans-r0-p*.bin"))
        assert [16 + 48 * (1 if role == "worker" else 5)] == [f.stat().st_size for f in files]  # the span(s) landed

    def test_public_names_resolve_lazily_and_keep_their_meaning(self) -> None:
        """Every name in pipeprobe.__all__ is in dir() and resolves; functions named like modules stay functions."""
        import importlib

        assert set(pipeprobe.__all__) <= set(dir(pipeprobe))
        for name, module in (("load", "load"), ("whatif", "whatif"), ("compare", "compare"),
                             ("ceilings", "whatif.ceilings")):
            importlib.import_module(f"pipeprobe.{module}")
            assert callable(getattr(pipeprobe, name)) and not isinstance(getattr(pipeprobe, name), type(sys))
        assert all(getattr(pipeprobe, name) is not None for name in pipeprobe.__all__)
        with pytest.raises(AttributeError):
            pipeprobe.no_such_name  # noqa: B018

    def test_close_prints_the_same_report_as_the_report_module(self, tmp_path: Path, capsys) -> None:
        """With report=True, close() prints what pipeprobe.report prints for the folder (the facade's printer)."""
        from pipeprobe.report import print_close_report

        with pipeprobe.Probe(tmp_path / "r", sample_interval_s=0) as probe:
            for _batch in probe.watch(_batches(3, 2)):
                with probe.step():
                    time.sleep(0.002)
        printed = capsys.readouterr().out
        print_close_report(tmp_path / "r")
        assert capsys.readouterr().out == printed
        assert printed.strip()
