"""Recording windows: the spec, and real loops that record only the chosen batches."""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import pytest

import pipeprobe
from pipeprobe import stage
from pipeprobe.errors import PipeprobeError, WindowSpecError
from pipeprobe.record._window import parse_window

sys.path.insert(0, str(Path(__file__).parent))
from _faultlab import child_env  # noqa: E402


class _FakeClock:
    """A monotonic clock in ns that the test moves by hand."""

    def __init__(self) -> None:
        self.now_ns = 0

    def __call__(self) -> int:
        return self.now_ns


class TestParse:
    @pytest.mark.parametrize("spec,expected", [
        ("200:400", [200, 399]),
        ("0:2,5:6", [0, 1, 5]),
        ("7:", [7, 9]),
        (" 3:4 ", [3]),
    ])
    def test_ranges_admit_their_batches(self, spec: str, expected: list[int]) -> None:
        """A:B admits batches A to B-1 like a Python slice; A: runs on; ranges join by commas (common practice)."""
        w = parse_window(spec)
        got = [b for b in range(500) if w.admits(b)]
        if spec == "200:400":
            assert list(range(200, 400)) == got
        elif spec == "7:":
            assert list(range(7, 500)) == got
        else:
            assert expected == got

    @pytest.mark.parametrize("spec,period_s", [("50/10m", 600.0), ("5/0.5s", 0.5), ("1/2h", 7200.0)])
    def test_duty_cycle_units(self, spec: str, period_s: float) -> None:
        """K/N with s, m or h gives the period in seconds (1 m = 60 s, 1 h = 3600 s)."""
        assert period_s == parse_window(spec).period_s

    @pytest.mark.parametrize("spec", ["", "400:200", "5:5", "abc", "10/0m", "0/1m", "3/4", "1:5,3:8", "2:,9:10",
                                      "-1:5", "5/10d", None, 200])
    def test_bad_specs_raise_one_line(self, spec) -> None:
        """A bad spec raises WindowSpecError (a PipeprobeError and ValueError) with one line saying what to write."""
        with pytest.raises(WindowSpecError) as err:
            parse_window(spec)
        assert (True, True, 0) == (isinstance(err.value, PipeprobeError), isinstance(err.value, ValueError),
                                   str(err.value).count("\n"))
        assert "e.g. 200:400 or 50/10m" in str(err.value)

    def test_duty_cycle_takes_k_batches_per_period(self) -> None:
        """2 batches in each 10 s period from the start: groups begin at 0 s, 10 s, 25 s and 31 s (worked by hand)."""
        clock = _FakeClock()
        w = parse_window("2/10s", clock=clock)
        seen = []
        for b, t_s in enumerate([0, 1, 2, 9, 10, 11, 12, 25, 26, 31]):
            clock.now_ns = int(t_s * 1e9)
            seen.append(w.admits(b))
        assert [True, True, False, False, True, True, False, True, True, True] == seen
        assert [[0, 2], [4, 6], [7, 10]] == w.recorded(10)

    def test_each_batch_is_decided_once(self) -> None:
        """A batch asked about early (by the loader's index tap) keeps that answer when the consumer asks later."""
        clock = _FakeClock()
        w = parse_window("1/10s", clock=clock)
        early = [w.admits(b) for b in range(3)]
        clock.now_ns = int(60e9)
        assert early == [w.admits(b) for b in range(3)]


def _loop(probe: pipeprobe.Probe, loader, epochs: int) -> int:
    delivered = 0
    for _ in range(epochs):
        for _batch in probe.watch(loader):
            with probe.step():
                delivered += 1
    return delivered


class TestPlainLoop:
    def test_range_records_only_its_batches(self, tmp_path: Path) -> None:
        """Probe(window='3:6') records the waits, steps and stages of batches 3 to 5 only; the header says so."""
        with pipeprobe.Probe(tmp_path, report=False, sample_interval_s=0.01, window="3:6") as probe:
            for batch in probe.watch([[i] for i in range(10)]):
                with stage("prep", sample=batch[0]):
                    time.sleep(0.002)
                with probe.step():
                    pass
        run = pipeprobe.load(tmp_path)
        assert [3, 4, 5] == run.batches["batch_id"].tolist()
        assert {"wait": 3, "step": 3, "prep": 3} == run.spans.groupby("stage", observed=True).size().to_dict()
        assert {"spec": "3:6", "every_batches": 0, "period_s": 0.0, "batches": [[3, 6]]} == run.header["window"]

    def test_resource_sampler_runs_outside_the_window(self, tmp_path: Path) -> None:
        """Resource samples cover the whole run, not just the recorded batches."""
        with pipeprobe.Probe(tmp_path, report=False, sample_interval_s=0.01, window="0:1") as probe:
            for _ in probe.watch(range(30)):
                with probe.step():
                    time.sleep(0.01)
        run = pipeprobe.load(tmp_path)
        first_step_end = float(run.batches["step_end_s"].iloc[0])
        assert run.resources["t_s"].max() > first_step_end + 0.15

    def test_duty_cycle_records_groups(self, tmp_path: Path) -> None:
        """'2/0.1s' on a loop of 20 ms batches: batches 0-1, then nothing until the next 0.1 s period, and
        at most 2 batches per period begun (a loaded machine may stretch the loop, so counts are bounds)."""
        with pipeprobe.Probe(tmp_path, report=False, sample_interval_s=0, window="2/0.1s") as probe:
            for _ in probe.watch(range(15)):
                with probe.step():
                    time.sleep(0.02)
        run = pipeprobe.load(tmp_path)
        got = run.batches["batch_id"].tolist()
        ranges = run.header["window"]["batches"]
        assert got == [b for a, e in ranges for b in range(a, e)]
        assert [0, 2] == ranges[0]
        assert ranges[1][0] > 2
        assert len(got) <= 2 * (int(run.wall_s / 0.1) + 2)

    def test_user_exception_passes_outside_the_window(self, tmp_path: Path) -> None:
        """A user exception inside a stage that is not recorded passes through unchanged."""
        with pipeprobe.Probe(tmp_path, report=False, sample_interval_s=0, window="5:6") as probe:
            for _ in probe.watch(range(2)):
                with pytest.raises(KeyError, match="mine"):
                    with stage("prep"):
                        raise KeyError("mine")

    def test_bad_window_fails_before_recording(self, tmp_path: Path) -> None:
        """Probe(window='10-20') raises WindowSpecError and leaves no run behind."""
        with pytest.raises(WindowSpecError):
            pipeprobe.Probe(tmp_path / "run", window="10-20")
        assert not (tmp_path / "run").exists()


torch = pytest.importorskip("torch")
from torch.utils.data import DataLoader, Dataset, IterableDataset  # noqa: E402


class GaugePhotos(Dataset):
    """Map-style: 24 photos of gauge dials; decode is a stage inside __getitem__."""

    def __len__(self) -> int:
        return 24

    def __getitem__(self, index: int):
        with stage("decode", sample=int(index)):
            time.sleep(0.001)
        return torch.tensor([index])


class GaugeStream(IterableDataset):
    """Iterable-style: worker w of n yields dials w, w + n, ... of 24."""

    def __iter__(self):
        info = torch.utils.data.get_worker_info()
        w, n = (info.id, info.num_workers) if info else (0, 1)
        for i in range(w, 24, n):
            time.sleep(0.001)
            yield torch.tensor([i])


def _check_only_window(run: pipeprobe.Run, recorded: list[int], batch_size: int, decode: bool) -> None:
    """Spans exist for the recorded batches only, each fetch/decode/collate linked to one of them."""
    sp = run.spans
    assert recorded == run.batches["batch_id"].tolist()
    per_stage = sp.groupby("stage", observed=True).size().to_dict()
    expected = {"wait": len(recorded), "step": len(recorded), "fetch": batch_size * len(recorded),
                "collate": len(recorded)}
    if decode:
        expected["decode"] = batch_size * len(recorded)
    assert expected == per_stage
    membership = set(zip(run.samples["batch_id"], run.samples["sample_id"]))
    worker_side = sp[sp["stage"].isin(["fetch", "collate", "decode"])]
    assert all((b, s) in membership for b, s in zip(worker_side["batch_id"], worker_side["sample_id"]))


class TestTorchLoaders:
    @pytest.mark.parametrize("workers,persistent,method", [
        (0, False, None), (2, False, "fork"), (2, True, "fork"),
        pytest.param(2, True, "spawn", marks=pytest.mark.slow),
    ])
    def test_map_dataset_records_window_batches_and_their_samples(self, tmp_path: Path, workers: int,
                                                                  persistent: bool, method: str | None) -> None:
        """Window '2:4,8:10' over 2 epochs of 6 batches: only batches 2, 3, 8, 9 and their samples' spans
        from the workers are recorded (the window reaches workers with each batch's indices)."""
        loader = DataLoader(GaugePhotos(), batch_size=4, shuffle=True, num_workers=workers,
                            persistent_workers=persistent, multiprocessing_context=method)
        with pipeprobe.Probe(tmp_path, report=False, sample_interval_s=0, window="2:4,8:10") as probe:
            assert 12 == _loop(probe, loader, epochs=2)
        _check_only_window(pipeprobe.load(tmp_path), [2, 3, 8, 9], 4, decode=True)

    @pytest.mark.parametrize("workers", [0, 2])
    def test_iterable_dataset_records_window_batches(self, tmp_path: Path, workers: int) -> None:
        """Iterable-style, window '1:3': fetch spans of batches 1 and 2 only, linked by the worker-order ids."""
        loader = DataLoader(GaugeStream(), batch_size=3, num_workers=workers,
                            multiprocessing_context="fork" if workers else None)
        with pipeprobe.Probe(tmp_path, report=False, sample_interval_s=0, window="1:3") as probe:
            assert 8 == _loop(probe, loader, epochs=1)
        _check_only_window(pipeprobe.load(tmp_path), [1, 2], 3, decode=False)


class TestRunCommand:
    def _run(self, args: list[str], cwd: Path) -> subprocess.CompletedProcess:
        return subprocess.run([sys.executable, "-m", "pipeprobe", "run", *args], capture_output=True, text=True,
                              env=child_env(), timeout=240, cwd=cwd)

    def test_window_on_an_unmodified_script(self, tmp_path: Path) -> None:
        """`pipeprobe run --window 2:6` records batches 2 to 5 of a plain script and its report says so."""
        script = Path(__file__).parent / "_plain_train.py"
        done = self._run(["--out", str(tmp_path / "run"), "--quiet", "--window", "2:6", "--", sys.executable,
                          str(script), "map", "2", "2", str(tmp_path / "own.json")], tmp_path)
        assert 0 == done.returncode, done.stderr[-2000:]
        run = pipeprobe.load(tmp_path / "run")
        assert [2, 3, 4, 5] == run.batches["batch_id"].tolist()
        assert "2:6" == run.header["window"]["spec"]
        assert "Window 2:6 (fixed batch ranges): 4 of" in done.stderr

    @pytest.mark.parametrize("spec", ["10-20", "5:2", "3/0m"])
    def test_bad_window_one_line_exit_2(self, tmp_path: Path, spec: str) -> None:
        """A bad --window: one line on stderr, exit 2 (common practice), the script not started."""
        done = self._run(["--window", spec, "--", "python", "no_such_script.py"], tmp_path)
        lines = done.stderr.strip().splitlines()
        assert (2, 1) == (done.returncode, len(lines))
        assert "window" in lines[0] and "e.g. 200:400 or 50/10m" in lines[0]

    def test_duty_cycle_reaches_workers(self, tmp_path: Path) -> None:
        """'2/0.1s' with 2 workers: the batches handed out early are decided once, so the workers' spans
        are exactly those of the batches the loop recorded. A loaded machine can stretch the loop to 50 ms a
        batch, when the window rightly takes all 12: record again (at most twice) before judging."""
        for attempt in range(3):
            loader = DataLoader(GaugePhotos(), batch_size=2, num_workers=2, multiprocessing_context="fork")
            with pipeprobe.Probe(tmp_path / f"r{attempt}", report=False, sample_interval_s=0,
                                 window="2/0.1s") as probe:
                for _ in probe.watch(loader):
                    with probe.step():
                        time.sleep(0.01)
            run = pipeprobe.load(tmp_path / f"r{attempt}")
            recorded = [b for a, e in run.header["window"]["batches"] for b in range(a, e)]
            if len(recorded) < 12:
                break
        assert len(recorded) < 12
        _check_only_window(run, recorded, 2, decode=True)
