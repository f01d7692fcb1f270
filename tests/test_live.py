"""The live status line: figures read from what the recording wrote, one line per interval."""

from __future__ import annotations

import io
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import pytest

import pipeprobe
from pipeprobe._live import LiveLine, _SpanTail, format_status, live_interval

sys.path.insert(0, str(Path(__file__).parent))
from _faultlab import child_env  # noqa: E402
from _synth import simple_pipeline, write_run  # noqa: E402


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


class TestFigures:
    def test_status_by_hand(self) -> None:
        """Rate, interval and whole-run stall, busiest stage share: worked out by hand."""
        line = format_status(300, 5.0, 50, 1.0, 30.0, 60.0, Counter({"decode": 6e8, "augment": 2e8}))
        # 50 batches / 5 s; 1 s of 5 s waiting; 30 s of 60 s; decode 0.6 of 0.8 s of input time
        assert ("pipeprobe  300 batches  10.0 batches/s  stall 20 % last 5 s, 50 % whole run  "
                "busiest input stage: decode (75 %)") == line

    def test_fetch_gives_way_to_the_stages_inside_it(self) -> None:
        """The loader's fetch holds the dataset's own stages: those are named, not fetch."""
        stages = Counter({"fetch": 9e8, "decode": 5e8, "resize": 3e8, "collate": 1e8})
        assert format_status(1, 1.0, 1, 0.0, 0.0, 1.0, stages).endswith("busiest input stage: decode (56 %)")

    def test_loader_stages_alone(self) -> None:
        """With only the loader's own stages, fetch is the busiest."""
        assert format_status(1, 1.0, 1, 0.0, 0.0, 1.0, Counter({"fetch": 9e8, "collate": 1e8})).endswith(
            "busiest input stage: fetch (90 %)")

    def test_tail_reads_each_record_once(self, tmp_path: Path) -> None:
        """The tail sums the written waits and stages once, however often it reads (synthetic run, by hand)."""
        d = write_run(tmp_path / "r", simple_pipeline())
        tail = _SpanTail(d, 0)
        first, again = tail.read_new(), tail.read_new()
        # 3 batches: waits of 2 x (3 + 1) ms; decode 6 x 3 ms, augment 6 x 1 ms
        assert (24_000_000, {"decode": 18_000_000, "augment": 6_000_000}) == (first.wait_ns, dict(first.stage_ns))
        assert (0, {}) == (again.wait_ns, dict(again.stage_ns))

    @pytest.mark.parametrize("live,expected", [(True, 5.0), (False, None), (0.25, 0.25)])
    def test_live_interval(self, live: object, expected: float | None) -> None:
        """live=True means every 5 s; a number is its own interval; False is off."""
        assert expected == live_interval(live)

    @pytest.mark.parametrize("live", [0, -1, "5", float("inf")])
    def test_bad_live(self, tmp_path: Path, live: object) -> None:
        """A bad live value is refused before recording starts."""
        with pytest.raises(ValueError):
            pipeprobe.Probe(tmp_path / "r", live=live)
        assert not (tmp_path / "r").exists()


class TestWhereItGoes:
    def test_terminal_rewrites_one_line(self, tmp_path: Path) -> None:
        """On a terminal each line overwrites the last (carriage return, padded); stop ends it (common practice)."""
        out = _Terminal()
        live = LiveLine(tmp_path, 0, 5.0, lambda: 0, stream=out)
        live.show("pipeprobe  a longer first line")
        live.show("pipeprobe  short")
        live.stop()
        assert "\rpipeprobe  a longer first line\rpipeprobe  short" + " " * 14 + "\n" == out.getvalue()

    def test_pipe_gets_one_line_per_interval(self, tmp_path: Path) -> None:
        """To a file or pipe each status is its own line, and stop adds nothing."""
        out = io.StringIO()
        live = LiveLine(tmp_path, 0, 5.0, lambda: 0, stream=out)
        live.show("one")
        live.show("two")
        live.stop()
        assert "one\ntwo\n" == out.getvalue()


class TestWhileRecording:
    def test_probe_live(self, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
        """Probe(live=...) prints status lines while recording: batches so far and the busiest stage, also
        for a probe that is not the first in its process (a notebook)."""
        with pipeprobe.Probe(tmp_path / "earlier", report=False, sample_interval_s=0) as probe:
            for _ in probe.watch([[0]]):
                pass

        def batches():
            for b in range(60):
                with pipeprobe.stage("decode", sample=b):
                    time.sleep(0.01)
                yield [b]

        for attempt in range(3):  # a loaded machine may starve the status thread; record again before judging
            with pipeprobe.Probe(tmp_path / f"r{attempt}", report=False, sample_interval_s=0, flush_interval_s=0.05,
                                 live=0.15) as probe:
                for _ in probe.watch(batches()):
                    with probe.step():
                        time.sleep(0.001)
            lines = [x for x in capsys.readouterr().err.splitlines() if x.startswith("pipeprobe  ")]
            if len(lines) >= 2 and any("busiest input stage: decode (100 %)" in x for x in lines):
                break
        counts = [int(x.split()[1]) for x in lines]
        assert (True, True) == (counts == sorted(counts), counts[-1] <= 60), lines
        assert any("busiest input stage: decode (100 %)" in x for x in lines), lines

    def test_run_quiet_and_not(self, tmp_path: Path) -> None:
        """pipeprobe run prints status lines to a pipe every --status-every seconds; --quiet prints none."""
        script = tmp_path / "s.py"
        script.write_text("import time\ntime.sleep(1.0)\n")
        err = {}
        for flag in ("--quiet", "--status-every=0.2"):
            for attempt in range(3):  # a loaded machine may starve the status thread; record again before judging
                done = subprocess.run([sys.executable, "-m", "pipeprobe", "run", "--out",
                                       str(tmp_path / f"{flag}-{attempt}"), flag, str(script)],
                                      capture_output=True, text=True, env=child_env(), timeout=120)
                err[flag] = [x for x in done.stderr.splitlines() if x.startswith("pipeprobe  0 batches")]
                if flag == "--quiet" or len(err[flag]) >= 2:
                    break
        assert (0, True) == (len(err["--quiet"]), len(err["--status-every=0.2"]) >= 2)
