"""The report of a run analysed in slices: Amdahl's law's ceilings from the joined critical path."""

from __future__ import annotations

import json

import pytest

from pipeprobe._example_runs import write_example_run
from pipeprobe.cli import main


def test_sliced_report_gives_amdahls_ceilings(tmp_path, capsys):
    """A run whose decode takes 6 of every 8 ms on the critical path (share 0.75, the example run's
    arithmetic): the sliced JSON report gives decode's speed-up 2x as 1 / (0.25 + 0.75 / 2) = 1.6 and free
    as 1 / 0.25 = 4 (Amdahl, AFIPS 1967), and the step's as 1 / (0.75 + 0.125) and 1 / 0.75."""
    run = write_example_run(tmp_path / "run", batches=6, decode_ms=6, step_ms=2)
    assert 0 == main(["report", str(run), "--slice-batches", "2", "--json"])
    rows = {r["label"]: r for r in json.loads(capsys.readouterr().out)["amdahl"]}
    assert [1.6, 4.0, 1 / 0.875, 4 / 3] == pytest.approx([rows["decode"]["speedup_2x"], rows["decode"]["ceiling"],
                                                          rows["step"]["speedup_2x"], rows["step"]["ceiling"]])


def test_sliced_text_report_names_the_ceilings(tmp_path, capsys):
    """The text report has one Amdahl line per stage on the path, and still says what it leaves out."""
    run = write_example_run(tmp_path / "run", batches=6, decode_ms=6, step_ms=2)
    assert 0 == main(["report", str(run), "--slice-batches", "2"])
    out = capsys.readouterr().out
    assert "decode: 75.0 % of the path, 2x: 1.60x, free: 4.00x" in out and "replayed ceilings" in out
