"""The progress line of a long analysis: silent when quick, one line per step on a pipe, rewritten on a terminal."""

from __future__ import annotations

import io
from pathlib import Path

import pytest

from pipeprobe import _progress
from pipeprobe._progress import ProgressLine, progress, step
from pipeprobe.cli import main


class _Clock:
    """A clock the test moves by hand."""

    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def _line(stream: io.StringIO) -> tuple[ProgressLine, _Clock]:
    clock = _Clock()
    return ProgressLine("report", stream, clock=clock, threaded=False), clock


class TestProgressLine:
    def test_quick_work_prints_nothing(self) -> None:
        """Work that ends before SHOW_AFTER_S leaves stderr exactly as it was."""
        out = io.StringIO()
        line, clock = _line(out)
        line.step("timeline")
        clock.now = _progress.SHOW_AFTER_S / 2
        line.draw()
        line.finish()
        assert "" == out.getvalue()

    def test_pipe_gets_one_line_per_step_and_the_total(self) -> None:
        """On a pipe each step past the threshold is one line (redraws add none), then the total time."""
        out = io.StringIO()
        line, clock = _line(out)
        line.step("reading span files")
        clock.now = 2.5
        line.draw()
        clock.now = 3.0
        line.draw()
        line.step("timeline")
        clock.now = 7.25
        line.draw()
        line.finish()
        expected = ["pipeprobe report: reading span files (2 s)", "pipeprobe report: timeline (7 s)",
                    "pipeprobe report: done in 7.2 s"]
        assert expected == out.getvalue().splitlines()

    def test_terminal_line_is_rewritten_in_place_and_wiped(self) -> None:
        """On a terminal the line is redrawn after a carriage return (common practice) and wiped at the end,
        so the report that follows starts on a clean line."""
        out = _Terminal()
        line, clock = _line(out)
        line.step("stage table")
        clock.now = 12.0
        line.draw()
        line.step("stalls")
        clock.now = 13.0
        line.draw()
        line.finish()
        first, second = "pipeprobe report: stage table (12 s)", "pipeprobe report: stalls (13 s)"
        wipe = "\r" + " " * len(second) + "\r"
        # the last draw is the one finish() makes: same text again, then the wipe
        expected = "\r" + first + "\r" + second.ljust(len(first)) + "\r" + second.ljust(len(second)) + wipe
        assert expected == out.getvalue()
        assert "\n" not in out.getvalue()


class TestProgressContext:
    def test_steps_reach_the_outermost_line_only(self, monkeypatch: pytest.MonkeyPatch) -> None:
        """A nested progress() (analyze inside the report command) adds no second line."""
        monkeypatch.setattr(_progress, "SHOW_AFTER_S", 0.0)
        out = io.StringIO()
        with progress("report", stream=out):
            with progress("analysis", stream=out):
                step("critical path")
        lines = out.getvalue().splitlines()
        assert "pipeprobe report: critical path (0 s)" in lines
        assert [] == [line for line in lines if not line.startswith("pipeprobe report: ")]

    def test_failed_work_claims_no_done(self, monkeypatch: pytest.MonkeyPatch) -> None:
        """Work that ends in an error leaves its step lines but no 'done' line (the error's line follows)."""
        monkeypatch.setattr(_progress, "SHOW_AFTER_S", 0.0)
        out = io.StringIO()
        with pytest.raises(OSError), progress("report", stream=out):
            step("writing the HTML page")
            raise OSError("read-only")
        lines = out.getvalue().splitlines()
        assert (True, []) == ("pipeprobe report: writing the HTML page (0 s)" in lines,
                              [line for line in lines if "done in" in line])

    @pytest.mark.parametrize("how", ["disabled", "environment"])
    def test_line_can_be_turned_off(self, how: str, monkeypatch: pytest.MonkeyPatch) -> None:
        """enabled=False and PIPEPROBE_PROGRESS=0 both keep stderr silent, however long the work."""
        monkeypatch.setattr(_progress, "SHOW_AFTER_S", 0.0)
        if how == "environment":
            monkeypatch.setenv("PIPEPROBE_PROGRESS", "0")
        out = io.StringIO()
        with progress("report", stream=out, enabled=how != "disabled"):
            step("timeline")
        assert "" == out.getvalue()


class TestReportCommand:
    def test_report_shows_progress_on_stderr_unless_quiet(self, simple_run_dir: Path,
                                                          monkeypatch: pytest.MonkeyPatch,
                                                          capsys: pytest.CaptureFixture[str]) -> None:
        """`pipeprobe report` names its steps on stderr when slow (threshold lowered here); --quiet keeps it off,
        and stdout (the JSON) is the same either way."""
        monkeypatch.setattr(_progress, "SHOW_AFTER_S", 0.0)
        assert 0 == main(["report", str(simple_run_dir), "--json"])
        loud = capsys.readouterr()
        assert 0 == main(["report", str(simple_run_dir), "--json", "--quiet"])
        quiet = capsys.readouterr()
        assert "pipeprobe report: done in" in loud.err.splitlines()[-1]
        assert "" == quiet.err
        assert loud.out == quiet.out
