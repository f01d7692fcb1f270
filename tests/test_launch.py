"""``pipeprobe run``: an unmodified training script recorded from the outside.

The scripts (``_plain_train.py``, ``_lightning_train.py``) know nothing of
pipeprobe; they measure their own time in ``next(loader)`` with
``time.perf_counter`` and count their own batches, and the tests compare
the recording against those measurements and against the same script run
without pipeprobe (exit codes, stdout, tracebacks, signals).
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
from pathlib import Path

import pytest

import pipeprobe
from pipeprobe.byloader import read_script_info
from pipeprobe.launch import CommandError, parse_command

sys.path.insert(0, str(Path(__file__).parent))
from _faultlab import child_env  # noqa: E402

HERE = Path(__file__).parent
PLAIN = HERE / "_plain_train.py"
LIGHTNING = HERE / "_lightning_train.py"


def pipeprobe_run(args: list[str], *, timeout: float = 240, cwd: Path | None = None) -> subprocess.CompletedProcess:
    """``python -m pipeprobe run ARGS`` as a user would start it."""
    return subprocess.run([sys.executable, "-m", "pipeprobe", "run", *args], capture_output=True, text=True,
                          env=child_env(), timeout=timeout, cwd=cwd)


def bare_run(args: list[str], *, timeout: float = 240) -> subprocess.CompletedProcess:
    """The same script without pipeprobe."""
    return subprocess.run([sys.executable, *args], capture_output=True, text=True, env=child_env(), timeout=timeout)


def training_row(run_dir: Path) -> dict:
    """The training loader's batches and stall, from the trace and script.json."""
    info = read_script_info(run_dir)
    run = pipeprobe.load(run_dir)
    train = next(e for e in info["loaders"] if e["name"] == info["training_loader"])
    mine = run.batches[run.batches["epoch"].isin(train["epochs"])]
    return {"name": train["name"], "batches": int(len(mine)), "stall_s": float(mine["wait_s"].sum())}


def record_plain(tmp_path: Path, kind: str, workers: int, *extra: str) -> tuple[subprocess.CompletedProcess, Path,
                                                                                 dict]:
    out, measured = tmp_path / "run", tmp_path / "own.json"
    done = pipeprobe_run(["--out", str(out), "--quiet", "--", sys.executable, str(PLAIN), kind, str(workers), "2",
                          str(measured), *extra])
    own = json.loads(measured.read_text()) if measured.exists() else {}
    return done, out, own


def within_5_percent(recorded: float, own: float) -> bool:
    return abs(recorded - own) <= 0.05 * own


class TestPlainScripts:
    @pytest.mark.slow
    @pytest.mark.parametrize("kind,workers", [("map", 0), ("map", 2), ("iter", 0), ("iter", 2)])
    def test_batches_and_stall_match_the_scripts_own(self, tmp_path: Path, kind: str, workers: int) -> None:
        """Training batches equal the script's count; stall within 5 % of its own time in next() (the script)."""
        pytest.importorskip("torch", reason="pipeprobe run watches torch DataLoaders")
        for attempt in range(3):  # a loaded machine may stretch one run's overhead; record again before judging
            done, out, own = record_plain(tmp_path / f"a{attempt}", kind, workers)
            assert 0 == done.returncode, done.stderr
            row = training_row(out)
            assert (f"trained {own['batches']} batches\n", own["batches"]) == (done.stdout, row["batches"])
            if within_5_percent(row["stall_s"], own["next_s"]):
                break
        assert within_5_percent(row["stall_s"], own["next_s"]), (row, own)

    def test_loaders_kept_apart_and_named(self, tmp_path: Path) -> None:
        """Training and validation loaders are named by dataset class and creation order, training first."""
        pytest.importorskip("torch", reason="pipeprobe run watches torch DataLoaders")
        done, out, own = record_plain(tmp_path, "map", 0)
        info = read_script_info(out)
        got = [(e["name"], len(e["epochs"])) for e in info["loaders"]]
        # 48 samples / 4 per batch x 2 epochs; validation 8 / 4 x 2
        assert ([("SquareDigits-0", 2), ("CheckDigits-1", 2)], "SquareDigits-0") == (got, info["training_loader"])
        assert (24, 4) == (own["batches"], own["val_batches"])
        report = done.stderr
        assert report.index("SquareDigits-0 (training)") < report.index("CheckDigits-1")
        assert "between batches" in info["step"] and "not timed" in info["step"]

    def test_names_given_by_the_user(self, tmp_path: Path) -> None:
        """--name renames a loader and --train picks the one the report covers first."""
        pytest.importorskip("torch", reason="pipeprobe run watches torch DataLoaders")
        out = tmp_path / "run"
        done = pipeprobe_run(["--out", str(out), "--quiet", "--name", "CheckDigits-1=holdout", "--train", "holdout",
                              str(PLAIN), "map", "0", "1", str(tmp_path / "own.json")])
        info = read_script_info(out)
        assert (0, "holdout") == (done.returncode, info["training_loader"])
        assert "holdout (training)" in done.stderr

    def test_names_that_match_nothing(self, tmp_path: Path) -> None:
        """A --name or --train that names no loader gets a warning listing the loaders there were."""
        pytest.importorskip("torch", reason="pipeprobe run watches torch DataLoaders")
        done = pipeprobe_run(["--out", str(tmp_path / "run"), "--quiet", "--name", "Nope-7=x", "--train", "y",
                              str(PLAIN), "map", "0", "1", str(tmp_path / "own.json")])
        warned = [x for x in done.stderr.splitlines() if x.startswith("pipeprobe: warning: ")]
        assert (0, 2) == (done.returncode, len(warned))
        assert "CheckDigits-1, SquareDigits-0" in warned[0]

    def test_stdout_and_report_place(self, tmp_path: Path) -> None:
        """stdout is the script's, byte for byte; the report goes to stderr with the run folder last."""
        pytest.importorskip("torch", reason="pipeprobe run watches torch DataLoaders")
        done, out, _ = record_plain(tmp_path, "map", 0)
        bare = bare_run([str(PLAIN), "map", "0", "2", str(tmp_path / "bare.json")])
        assert bare.stdout == done.stdout
        assert done.stderr.startswith(bare.stderr)
        assert f"pipeprobe: run folder {out.resolve()}" == done.stderr.strip().splitlines()[-1]

    def test_report_to_a_file(self, tmp_path: Path) -> None:
        """--report FILE writes the report there; stderr keeps only the notes and the run folder."""
        pytest.importorskip("torch", reason="pipeprobe run watches torch DataLoaders")
        report = tmp_path / "report.txt"
        done = pipeprobe_run(["--out", str(tmp_path / "run"), "--quiet", "--report", str(report), "--",
                              sys.executable, str(PLAIN), "map", "0", "1", str(tmp_path / "own.json")])
        assert (0, True) == (done.returncode, report.read_text().startswith("pipeprobe run  "))
        assert "stalls" not in done.stderr


@pytest.fixture(scope="module")
def recorded_script(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict]:
    """One folder recorded by pipeprobe run (2 epochs, training and validation loaders) and the script's counts."""
    pytest.importorskip("torch", reason="pipeprobe run watches torch DataLoaders")
    done, out, own = record_plain(tmp_path_factory.mktemp("script"), "map", 0)
    assert 0 == done.returncode, done.stderr
    return out, own


def report_of(run_dir: Path, *options: str) -> str:
    """``pipeprobe report RUN_DIR OPTIONS`` as a user would start it: its stdout."""
    done = subprocess.run([sys.executable, "-m", "pipeprobe", "report", str(run_dir), "--quiet", *options],
                          capture_output=True, text=True, env=child_env(), timeout=240)
    assert 0 == done.returncode, done.stderr
    return done.stdout


class TestReportOnTheFolder:
    """``pipeprobe report`` on a folder from ``pipeprobe run`` says what 'step' is there (issue #13)."""

    def test_text_says_step_is_untimed_and_lists_loaders(self, recorded_script: tuple[Path, dict]) -> None:
        """The text report opens with the untimed-step note and one row per loader, counts as the script took."""
        out, own = recorded_script
        lines = report_of(out).splitlines()
        assert "pipeprobe run  " == lines[0][:15]
        assert ("'step' here is the loop's time between taking a batch and asking for the next one;"
                in " ".join(lines[1:4]))
        rows = {x.split()[0]: int(x.split()[2 if "(training)" in x else 1]) for x in lines if "Digits-" in x}
        assert {"SquareDigits-0": own["batches"], "CheckDigits-1": own["val_batches"]} == rows

    def test_json_carries_the_step_meaning_and_loaders(self, recorded_script: tuple[Path, dict]) -> None:
        """--json has a 'script' key: the step's meaning (not timed) and each loader's batches (the script's)."""
        out, own = recorded_script
        script = json.loads(report_of(out, "--json"))["script"]
        got = {r["loader"]: r["batches"] for r in script["loaders"]}
        assert {"SquareDigits-0": own["batches"], "CheckDigits-1": own["val_batches"]} == got
        assert (True, "SquareDigits-0") == ("not timed" in script["step"], script["training_loader"])

    def test_html_carries_the_note(self, recorded_script: tuple[Path, dict], tmp_path: Path) -> None:
        """The HTML page shows the same untimed-step note and the training loader's row."""
        import html

        out, _ = recorded_script
        report_of(out, "--html", str(tmp_path / "r.html"))
        page = html.unescape((tmp_path / "r.html").read_text(encoding="utf-8"))
        assert (True, True) == ("nothing timed the training step itself" in " ".join(page.split()),
                                "SquareDigits-0 (training)" in page)

    def test_plain_run_has_no_script_part(self, simple_run_dir: Path) -> None:
        """A run recorded with a Probe (no script.json) has no script key and no untimed-step note."""
        text, data = report_of(simple_run_dir), json.loads(report_of(simple_run_dir, "--json"))
        assert (None, False) == (data["script"], "'step' here" in text)


class TestLeavingAsTheScriptWould:
    def test_a_script_that_raises(self, tmp_path: Path) -> None:
        """Exit code 1 and the very traceback Python prints without pipeprobe; the trace is kept (Python)."""
        pytest.importorskip("torch", reason="pipeprobe run watches torch DataLoaders")
        done, out, _ = record_plain(tmp_path, "map", 0, "--fail-at", "3")
        bare = bare_run([str(PLAIN), "map", "0", "2", str(tmp_path / "bare.json"), "--fail-at", "3"])
        assert (1, 1) == (bare.returncode, done.returncode)
        assert done.stderr.startswith(bare.stderr)
        assert 3 == len(pipeprobe.load(out).batches)

    def test_the_loaders_own_error(self, tmp_path: Path) -> None:
        """An error raised by the loader itself (a broken sampler) reaches the script unchanged: same exit code,
        same exception line as without pipeprobe (Python)."""
        pytest.importorskip("torch", reason="pipeprobe run watches torch DataLoaders")
        script = tmp_path / "bad_sampler.py"
        script.write_text(
            "from torch.utils.data import DataLoader, Sampler\n"
            "class Broken(Sampler):\n"
            "    def __len__(self): return 4\n"
            "    def __iter__(self): raise LookupError('sampler lost its index file')\n"
            "for batch in DataLoader(list(range(8)), sampler=Broken(), batch_size=2):\n"
            "    pass\n")
        done = pipeprobe_run(["--out", str(tmp_path / "run"), "--quiet", str(script)])
        bare = bare_run([str(script)])
        last = bare.stderr.strip().splitlines()[-1]
        assert (1, 1, "LookupError: sampler lost its index file") == (bare.returncode, done.returncode, last)
        assert last in done.stderr.splitlines()

    def test_a_script_that_exits_3(self, tmp_path: Path) -> None:
        """sys.exit(3) gives exit code 3; the bare 'pipeprobe run train.py' form works too."""
        pytest.importorskip("torch", reason="pipeprobe run watches torch DataLoaders")
        done = pipeprobe_run(["--out", str(tmp_path / "run"), "--quiet", str(PLAIN), "map", "0", "1",
                              str(tmp_path / "own.json"), "--exit", "3"])
        assert (3, "trained 12 batches\n") == (done.returncode, done.stdout)

    @pytest.mark.slow
    def test_sigint_during_training(self, tmp_path: Path) -> None:
        """SIGINT ends the script by SIGINT, as without pipeprobe (Python 3.8+: an uncaught KeyboardInterrupt
        ends the process by SIGINT); the trace is complete and closed."""
        pytest.importorskip("torch", reason="pipeprobe run watches torch DataLoaders")
        out = tmp_path / "run"
        cmd = [sys.executable, "-m", "pipeprobe", "run", "--out", str(out), "--quiet", "--", sys.executable,
               str(PLAIN), "map", "2", "1", str(tmp_path / "own.json"), "--forever"]
        proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=child_env())
        try:
            assert "training\n" == proc.stdout.readline()
            proc.send_signal(signal.SIGINT)
            _, err = proc.communicate(timeout=120)
        finally:
            proc.kill()
        assert -signal.SIGINT == proc.returncode
        assert "KeyboardInterrupt" in err
        run = pipeprobe.load(out)
        assert (True, True) == (run.header["closed"], len(run.batches) >= 2)

    def test_a_module(self, tmp_path: Path) -> None:
        """python -m MODULE ARGS: argv[0] is the module's file, as python -m gives it; its exit code passes."""
        (tmp_path / "pkgfit").mkdir()
        (tmp_path / "pkgfit" / "__init__.py").write_text("")
        (tmp_path / "pkgfit" / "fit.py").write_text("import sys\nprint(sys.argv, __name__)\nsys.exit(4)\n")
        done = pipeprobe_run(["--out", str(tmp_path / "run"), "--quiet", "--", sys.executable, "-m", "pkgfit.fit",
                              "a"], cwd=tmp_path, timeout=60)
        bare = subprocess.run([sys.executable, "-m", "pkgfit.fit", "a"], capture_output=True, text=True,
                              env=child_env(), cwd=tmp_path, timeout=60)
        assert (4, 4, bare.stdout) == (bare.returncode, done.returncode, done.stdout)

    def test_a_script_without_a_loader(self, tmp_path: Path) -> None:
        """No DataLoader: a clear message, the script's stdout and its exit code, no traceback."""
        script = tmp_path / "no_loader.py"
        script.write_text("import sys\nprint('hello', sys.argv[1:])\nsys.exit(5)\n")
        done = pipeprobe_run(["--out", str(tmp_path / "run"), "--quiet", "--", sys.executable, str(script), "x"])
        assert (5, "hello ['x']\n") == (done.returncode, done.stdout)
        assert "took no batch from a torch DataLoader" in done.stderr
        assert "Traceback" not in done.stderr


class TestBadInput:
    @pytest.mark.parametrize("args", [[], ["--"], ["--", "ls", "-l"], ["--", sys.executable, "-c", "print(1)"],
                                      ["--", sys.executable, "no_such_script.py"], ["no_such_script.py"],
                                      ["--", sys.executable]])
    def test_one_line_exit_2(self, tmp_path: Path, args: list[str]) -> None:
        """No command, not Python, -c, a missing script: one line, exit 2 (common practice), nothing run."""
        done = pipeprobe_run(args, cwd=tmp_path, timeout=60)
        lines = done.stderr.strip().splitlines()
        assert (2, 1, "") == (done.returncode, len(lines), done.stdout)
        assert lines[0].startswith("pipeprobe: error: ")
        assert not (tmp_path / "pipeprobe-runs").exists()

    def test_unwritable_out(self, tmp_path: Path) -> None:
        """An --out that cannot be made (below a file): one line, exit 2, the file untouched."""
        script = tmp_path / "s.py"
        script.write_text("print('ran')\n")
        blocker = tmp_path / "f"
        blocker.write_text("keep")
        done = pipeprobe_run(["--out", str(blocker / "run"), str(script)], timeout=60)
        assert (2, 1, "", "keep") == (done.returncode, len(done.stderr.strip().splitlines()), done.stdout,
                                      blocker.read_text())

    def test_out_holding_a_run(self, simple_run_dir: Path, tmp_path: Path) -> None:
        """An --out that already holds a run is refused; the run stays."""
        script = tmp_path / "s.py"
        script.write_text("print('ran')\n")
        before = sorted(p.name for p in simple_run_dir.iterdir())
        done = pipeprobe_run(["--out", str(simple_run_dir), str(script)], timeout=60)
        assert (2, before) == (done.returncode, sorted(p.name for p in simple_run_dir.iterdir()))


class TestParseCommand:
    def test_interpreter_options_and_module(self) -> None:
        """Interpreter options stay with the interpreter; -m MODULE becomes argv[0] (as python does)."""
        c = parse_command(["--", "python3", "-u", "-W", "ignore", "-m", "trainer", "--lr", "0.1"])
        assert ("python3", ["-u", "-W", "ignore"], "trainer", ["trainer", "--lr", "0.1"]) == (
            c.python, c.options, c.module, c.argv)

    def test_bare_script_uses_this_interpreter(self) -> None:
        """'pipeprobe run train.py' runs the script with the interpreter pipeprobe runs on."""
        c = parse_command([str(PLAIN), "map"])
        assert (sys.executable, [str(PLAIN), "map"]) == (c.python, c.argv)

    def test_errors_are_narrow(self) -> None:
        """Bad commands raise CommandError, a PipeprobeError and a ValueError."""
        with pytest.raises(CommandError) as err:
            parse_command([])
        assert isinstance(err.value, (pipeprobe.PipeprobeError, ValueError))


@pytest.mark.slow
class TestLightning:
    def test_trainer_owns_the_loop(self, tmp_path: Path) -> None:
        """pytorch-lightning's Trainer (CPU, tiny model): batches equal its training_step count, stall within 5 %
        of the script's own time in next() (the script's perf_counter around its loader's iterator)."""
        pytest.importorskip("torch", reason="pipeprobe run watches torch DataLoaders")
        pytest.importorskip("pytorch_lightning", reason="install pytorch-lightning to run the trainer test")
        for attempt in range(3):  # record again on a loaded machine before judging
            out, measured = tmp_path / f"run{attempt}", tmp_path / f"own{attempt}.json"
            done = pipeprobe_run(["--out", str(out), "--quiet", "--", sys.executable, str(LIGHTNING), str(measured)],
                                 timeout=400)
            assert 0 == done.returncode, done.stderr
            own, row = json.loads(measured.read_text()), training_row(out)
            assert (own["batches"], own["batches"], "Squares-0") == (own["next_batches"], row["batches"], row["name"])
            if within_5_percent(row["stall_s"], own["next_s"]):
                break
        assert within_5_percent(row["stall_s"], own["next_s"]), (row, own)
