"""``pipeprobe report`` and ``pipeprobe compare`` on the command line: output and exit codes."""

from __future__ import annotations

import dataclasses
import json

import pytest
from _synth import simple_pipeline, write_run

from pipeprobe.cli import EXIT_BAD_INPUT, EXIT_GATE, EXIT_OK, main


@pytest.fixture
def slower_run_dir(tmp_path):
    """Like simple_run_dir with decode at 5 ms: stall 36/66 instead of 24/54."""
    return write_run(tmp_path / "slower", simple_pipeline(decode_ms=5.0))


class TestReport:
    def test_text(self, simple_run_dir, capsys):
        """`pipeprobe report RUN` prints the report and exits 0."""
        assert EXIT_OK == main(["report", str(simple_run_dir)])
        assert "  pace  input and step set the pace in turn" in capsys.readouterr().out.splitlines()

    def test_json(self, simple_run_dir, capsys):
        """`--json` prints one JSON object with the documented keys."""
        assert EXIT_OK == main(["report", str(simple_run_dir), "--json"])
        d = json.loads(capsys.readouterr().out)
        assert (3, "in turn") == (d["batches"], d["pace"]["outcome"])

    def test_missing_run_is_one_line_exit_2(self, tmp_path, capsys):
        """A missing folder: one line on stderr that says what to pass, exit 2."""
        assert EXIT_BAD_INPUT == main(["report", str(tmp_path / "nope")])
        err = capsys.readouterr().err
        assert 1 == len(err.strip().splitlines())
        assert "Probe(out_dir)" in err


class TestCompare:
    def test_regression_fails_the_gate(self, simple_run_dir, slower_run_dir, capsys):
        """Stall fraction up 10.1 points with a 5-point limit: REGRESSED, exit 1."""
        code = main(["compare", str(simple_run_dir), str(slower_run_dir), "--max-stall-increase", "0.05"])
        out = capsys.readouterr().out
        assert EXIT_GATE == code
        assert "REGRESSED" in out
        assert max(len(x) for x in out.splitlines()) <= 100

    def test_within_limits_passes(self, simple_run_dir, slower_run_dir):
        """The same change within a 20-point limit passes (exit 0); improvements never fail."""
        assert EXIT_OK == main(["compare", str(simple_run_dir), str(slower_run_dir), "--max-stall-increase", "0.2"])
        assert EXIT_OK == main(["compare", str(slower_run_dir), str(simple_run_dir), "--max-stall-increase", "0",
                                "--max-stage-increase", "0", "--max-wall-increase", "0"])

    def test_stage_and_wall_gates(self, simple_run_dir, slower_run_dir, capsys):
        """decode mean +66.7 % and wall per batch +22.2 % trip their gates."""
        assert EXIT_GATE == main(["compare", str(simple_run_dir), str(slower_run_dir), "--max-stage-increase", "0.5"])
        assert "stage decode mean_s" in capsys.readouterr().out
        assert EXIT_GATE == main(["compare", str(simple_run_dir), str(slower_run_dir), "--max-wall-increase", "0.2"])

    def test_json(self, simple_run_dir, slower_run_dir, capsys):
        """`compare --json` reports each metric and the failures."""
        main(["compare", str(simple_run_dir), str(slower_run_dir), "--max-stall-increase", "0.05", "--json"])
        d = json.loads(capsys.readouterr().out)
        row = {r["metric"]: r for r in d["rows"]}["stall_fraction"]
        assert pytest.approx(36 / 66 - 24 / 54) == row["change"]
        assert (True, 1) == (d["regressed"], len(d["failures"]))
        assert ("in turn", "in turn") == (d["pace_a"], d["pace_b"])

    def test_pace_and_stakes_side_by_side(self, simple_run_dir, slower_run_dir, capsys):
        """compare shows what paces each run and the replayed speed-up at stake: freeing the input of the
        serial loop gives 54/30 in A and 66/30 in B (analytic, Amdahl 1967: nothing overlaps)."""
        main(["compare", str(simple_run_dir), str(slower_run_dir)])
        out = capsys.readouterr().out
        row = next(line for line in out.splitlines() if "input free speedup" in line)
        assert ["1.80x", "2.20x"] == row.split()[3:5]
        assert "  pace  A: input and step set the pace in turn" in out.splitlines()

    @pytest.mark.parametrize("args", [["--max-stall-increase", "-1"], ["--max-stall-increase", "abc"], []])
    def test_bad_arguments_exit_2(self, simple_run_dir, args, capsys):
        """Bad thresholds or a missing run: exit 2 with a one-line error."""
        argv = ["compare", str(simple_run_dir)] + (args + [str(simple_run_dir)] if args else [])
        assert EXIT_BAD_INPUT == (_exit(argv))
        assert 1 == len(capsys.readouterr().err.strip().splitlines())


def _exit(argv):
    try:
        return main(argv)
    except SystemExit as exc:
        return exc.code


def test_compare_escapes_control_characters(tmp_path, capsys):
    """Stage names with a clear-screen sequence print as visible escapes in `compare` (common practice)."""
    rows = [dataclasses.replace(r, stage="dec\x1b[2Jode") if r.stage == "decode" else r for r in simple_pipeline()[100]]
    a = write_run(tmp_path / "a", {100: rows})
    b = write_run(tmp_path / "b", {100: rows})
    assert EXIT_OK == main(["compare", str(a), str(b)])
    out = capsys.readouterr().out
    assert (False, True) == ("\x1b" in out, "stage dec\\x1b[2Jode mean_s" in out)


_MALLINFO = """
import ctypes, sys
import numpy as np
from pipeprobe.cli import keep_freed_memory
class Info(ctypes.Structure):
    _fields_ = [(n, ctypes.c_size_t) for n in ("arena ordblks smblks hblks hblkhd usmblks fsmblks uordblks "
                                                 "fordblks keepcost").split()]
libc = ctypes.CDLL(None)
libc.mallinfo2.restype = Info
applied = keep_freed_memory() if sys.argv[1] == "keep" else False
a = np.ones(2**24)  # 128 MiB
print(int(applied), libc.mallinfo2().hblkhd >= a.nbytes)
"""


def _glibc_with_mallinfo2() -> bool:
    import ctypes
    import os
    import sys

    try:
        return sys.platform.startswith("linux") and os.confstr("CS_GNU_LIBC_VERSION").startswith("glibc") and hasattr(
            ctypes.CDLL(None), "mallinfo2")
    except (ValueError, OSError, AttributeError):
        return False


class TestKeepFreedMemory:
    @pytest.mark.skipif(not _glibc_with_mallinfo2(), reason="needs glibc 2.33 or later (mallinfo2)")
    @pytest.mark.parametrize(("mode", "expected"), [("keep", "1 False"), ("plain", "0 True")])
    def test_large_arrays_come_from_the_heap(self, mode, expected):
        """After it, a 128 MiB array is no mmap chunk (glibc manual, mallopt: M_MMAP_MAX 0 disables mmap)."""
        import os
        import subprocess
        import sys

        env = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_")}
        out = subprocess.run([sys.executable, "-c", _MALLINFO, mode], capture_output=True, text=True, env=env,
                             check=True, timeout=120)
        assert expected == out.stdout.strip()

    def test_only_the_commands_own_in_memory_report(self, simple_run_dir, monkeypatch, capsys):
        """main([...]) inside a program and the sliced report never retune the allocator; the CLI process does."""
        import pipeprobe.cli as cli

        calls = []
        monkeypatch.setattr(cli, "keep_freed_memory", lambda: calls.append(1))
        assert EXIT_OK == main(["report", str(simple_run_dir), "--json", "--slice-batches", "0"])
        monkeypatch.setattr(cli.sys, "argv", ["pipeprobe", "report", str(simple_run_dir), "--json",
                                              "--slice-batches", "1"])
        assert EXIT_OK == main()
        monkeypatch.setattr(cli.sys, "argv", ["pipeprobe", "report", str(simple_run_dir), "--json",
                                              "--slice-batches", "0"])
        assert EXIT_OK == main()
        capsys.readouterr()
        assert [1] == calls
