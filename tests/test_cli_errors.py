"""Bad input on the command line: one line that says what to do, exit code 2, never a traceback.

Exit codes follow the common convention of argparse-based tools (2 = usage
error; common practice). Most cases call ``pipeprobe.cli.main`` in-process;
a few run ``python -m pipeprobe.cli`` as the user would, to see the whole
stderr.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from pipeprobe import cli

sys.path.insert(0, str(Path(__file__).parent))
from _faultlab import child_env  # noqa: E402
from _synth import simple_pipeline, write_run  # noqa: E402


def run_main(argv: list[str], capsys: pytest.CaptureFixture) -> tuple[int, str]:
    try:
        code = cli.main(argv)
    except SystemExit as exc:  # argparse errors leave through SystemExit
        code = exc.code
    return code, capsys.readouterr().err


def assert_one_line_error(code: int, err: str) -> str:
    lines = [line for line in err.splitlines() if line.strip()]
    assert 2 == code
    assert 1 == len(lines), err
    assert lines[0].startswith("pipeprobe: error: ")
    assert "Traceback" not in err
    return lines[0]


@pytest.fixture
def cli_runs(tmp_path: Path) -> dict[str, Path]:
    """A good run, an empty folder, a plain file, a folder of other files and a run with a corrupt header."""
    good = write_run(tmp_path / "good", simple_pipeline())
    empty = tmp_path / "empty"
    empty.mkdir()
    plain = tmp_path / "notes.txt"
    plain.write_text("not a run")
    other = tmp_path / "photos"
    other.mkdir()
    (other / "part-001.jpg").write_bytes(b"\xff\xd8")
    corrupt = write_run(tmp_path / "corrupt", simple_pipeline())
    (corrupt / "run-r0.json").write_text('{"format_version": 1, "anchor_mono_ns": ')
    return {"good": good, "empty": empty, "plain": plain, "other": other, "corrupt": corrupt,
            "missing": tmp_path / "no-such-run"}


class TestRunFolders:
    @pytest.mark.parametrize("kind,hint", [
        ("missing", "does not exist"),
        ("empty", "holds no pipeprobe run"),
        ("plain", "is a file"),
        ("other", "holds no pipeprobe run"),
        ("corrupt", "not valid JSON"),
    ])
    def test_report_on_a_bad_folder(self, cli_runs: dict, capsys, kind: str, hint: str) -> None:
        """'pipeprobe report' on a missing, empty, non-run or corrupt folder: one line naming it, exit 2."""
        line = assert_one_line_error(*run_main(["report", str(cli_runs[kind])], capsys))
        assert hint in line
        assert str(cli_runs[kind]) in line

    def test_report_on_a_good_run_still_works(self, cli_runs: dict, capsys) -> None:
        """The same command on a good run exits 0 (so the errors above are about the input)."""
        code, err = run_main(["report", str(cli_runs["good"])], capsys)
        assert 0 == code, err

    @pytest.mark.parametrize("argv", [
        ["report", "{missing}", "--json"],
        ["compare", "{missing}", "{good}"],
        ["compare", "{good}", "{empty}"],
        ["whatif", "{missing}", "--workers", "4"],
        ["whatif", "{corrupt}", "--workers", "4"],
    ])
    def test_other_commands_on_bad_folders(self, cli_runs: dict, capsys, argv: list[str]) -> None:
        """Every command that reads runs answers a bad folder with one line and exit 2."""
        argv = [a.format(**{k: str(v) for k, v in cli_runs.items()}) for a in argv]
        assert_one_line_error(*run_main(argv, capsys))


class TestNumbers:
    @pytest.mark.parametrize("argv", [
        ["demo", "--batches", "0"],
        ["demo", "--batches", "ten"],
        ["demo", "--workers", "-1"],
        ["demo", "--prefetch", "2.5"],
        ["demo", "--image-size", ""],
        ["demo", "--augment", "crop,blur"],
        ["demo", "--seed", "x"],
        ["compare", "{good}", "{good}", "--max-stall-increase", "-0.1"],
        ["compare", "{good}", "{good}", "--max-wall-increase", "nan"],
        ["compare", "{good}", "{good}", "--max-stage-increase", "lots"],
        ["whatif", "{good}", "--faster", "decode=0"],
        ["whatif", "{good}", "--faster", "decode=-2"],
        ["whatif", "{good}", "--faster", "decode=fast"],
        ["whatif", "{good}", "--faster", "decdoe=2"],
        ["whatif", "{good}", "--faster", "decode"],
        ["whatif", "{good}", "--workers", "-3"],
        ["whatif", "{good}", "--workers", "two"],
        ["whatif", "{good}", "--prefetch", "0"],
        ["whatif", "{good}", "--cores", "0"],
    ])
    def test_bad_numbers_and_names(self, cli_runs: dict, capsys, argv: list[str]) -> None:
        """Zero, negative, non-numeric factors and misspelt stage names: one line, exit 2, nothing run."""
        argv = [a.format(**{k: str(v) for k, v in cli_runs.items()}) for a in argv]
        line = assert_one_line_error(*run_main(argv, capsys))
        assert len(line) < 300

    def test_typo_in_stage_name_lists_the_known_ones(self, cli_runs: dict, capsys) -> None:
        """A misspelt stage in --faster names the stages the run does have."""
        line = assert_one_line_error(*run_main(["whatif", str(cli_runs["good"]), "--faster", "decdoe=2"], capsys))
        assert "decdoe" in line and "decode" in line

    @pytest.mark.parametrize("argv", [[], ["frobnicate"], ["report"], ["compare", "a"], ["report", "a", "--bogus"]])
    def test_usage_errors(self, capsys, argv: list[str]) -> None:
        """A missing or unknown command or argument is one line and exit 2."""
        assert_one_line_error(*run_main(argv, capsys))


class TestAsASubprocess:
    def _run(self, *args: str) -> subprocess.CompletedProcess:
        return subprocess.run([sys.executable, "-m", "pipeprobe.cli", *args], env=child_env(),
                              capture_output=True, text=True, timeout=120)

    def test_missing_run_dir(self, tmp_path: Path) -> None:
        """Run as the user runs it: the whole stderr is one line, exit status 2."""
        res = self._run("report", str(tmp_path / "nope"))
        assert "" == res.stdout
        line = assert_one_line_error(res.returncode, res.stderr)
        assert "pass the folder given to Probe(out_dir)" in line

    def test_damaged_run_reports_warnings_without_traceback(self, tmp_path: Path) -> None:
        """A run with a damaged span file still reports (exit 0) and stderr holds no traceback."""
        root = write_run(tmp_path / "run", simple_pipeline())
        [bin_path] = root.glob("spans-*.bin")
        bin_path.write_bytes(bin_path.read_bytes()[:-5])
        res = self._run("report", str(root))
        assert 0 == res.returncode, res.stderr
        assert "Traceback" not in res.stderr
        assert "truncated final record" in res.stderr

    def test_json_report_of_bad_folder(self, tmp_path: Path) -> None:
        """'report --json' on a bad folder prints no half JSON on stdout; the error is one line on stderr."""
        res = self._run("report", str(tmp_path), "--json")
        assert "" == res.stdout
        assert_one_line_error(res.returncode, res.stderr)


def test_load_warnings_are_one_line_each(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    """A damaged run still reports; each problem is one 'pipeprobe: warning:' line naming the file."""
    root = write_run(tmp_path / "r", simple_pipeline())
    (root / "spans-r0-p100.json").unlink()
    code, err = run_main(["report", str(root)], capsys)
    lines = [line for line in err.splitlines() if line.strip()]
    assert 0 == code
    assert 1 == len(lines), err
    assert lines[0].startswith("pipeprobe: warning: ") and "spans-r0-p100" in lines[0]


class TestHardening:
    def test_demo_out_holding_a_run_is_refused_before_recording(self, cli_runs: dict, capsys) -> None:
        """`demo --out` an existing run: one line, exit 2, the run's files untouched."""
        before = {p.name: p.read_bytes() for p in cli_runs["good"].iterdir()}
        line = assert_one_line_error(*run_main(["demo", "--out", str(cli_runs["good"])], capsys))
        assert ("already holds a recorded run" in line, before) == (
            True, {p.name: p.read_bytes() for p in cli_runs["good"].iterdir()})

    def test_demo_out_a_file_is_refused(self, cli_runs: dict, capsys) -> None:
        """`demo --out` a plain file: one line, exit 2, the file unchanged."""
        line = assert_one_line_error(*run_main(["demo", "--out", str(cli_runs["plain"])], capsys))
        assert ("is a file" in line, "not a run") == (True, cli_runs["plain"].read_text())

    def test_demo_huge_batch_size_is_one_line(self, tmp_path: Path, capsys) -> None:
        """`demo --batch-size 1000000000`: one line naming the limit, exit 2, nothing recorded."""
        line = assert_one_line_error(*run_main(["demo", "--batch-size", "1000000000", "--out",
                                                str(tmp_path / "r")], capsys))
        assert ("batch_size must be 1..", False) == (line[18:40], (tmp_path / "r").exists())

    def test_report_into_a_closed_pipe_is_quiet(self, cli_runs: dict) -> None:
        """`pipeprobe report R | head` with the reader gone: no traceback, nothing on stderr, exit 141
        (128 + SIGPIPE, what a shell reports for a command whose reader went away; common practice)."""
        p = subprocess.Popen([sys.executable, "-m", "pipeprobe", "report", str(cli_runs["good"]), "--json"],
                             env=child_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        p.stdout.close()
        err = p.stderr.read()
        assert (cli.EXIT_BROKEN_PIPE, "") == (p.wait(timeout=120), err)

    def test_control_characters_in_messages_are_escaped(self, tmp_path: Path, capsys) -> None:
        """A run folder named with a terminal escape is printed escaped in the error line."""
        line = assert_one_line_error(*run_main(["report", str(tmp_path / "x\x1b]0;owned\x07y")], capsys))
        assert ("\x1b" in line, "\\x1b]0;owned\\x07y" in line) == (False, True)

    def test_stage_names_in_warnings_are_escaped(self, tmp_path: Path, capsys) -> None:
        """A warning quoting text from the trace reaches the terminal with its control characters escaped."""
        import warnings

        cli._one_line_warning(warnings.WarningMessage("bad stage 'a\x1b[2Jb'", UserWarning, "f", 1).message,
                              UserWarning, "f", 1)
        err = capsys.readouterr().err
        assert "pipeprobe: warning: bad stage 'a\\x1b[2Jb'\n" == err


class TestHelp:
    def test_version(self, capsys) -> None:
        """`pipeprobe --version` prints the version."""
        from pipeprobe import __version__

        with pytest.raises(SystemExit) as exc:
            cli.main(["--version"])
        assert (0, f"pipeprobe {__version__}\n") == (exc.value.code, capsys.readouterr().out)

    @pytest.mark.parametrize("name", sorted(cli.COMMANDS))
    def test_every_subcommand_has_a_description_and_an_example(self, name: str, capsys) -> None:
        """`pipeprobe NAME --help` shows what the command does and an example line starting 'pipeprobe NAME'."""
        with pytest.raises(SystemExit):
            cli.main([name, "--help"])
        out = capsys.readouterr().out
        assert (True, True) == (cli.COMMANDS[name].description.split()[0] in out,
                                f"example:\n  pipeprobe {name}" in out)
