"""``pipeprobe export``: a run as parquet or csv tables other tools read, with a JSON manifest."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pandas as pd
import pytest

import pipeprobe
from pipeprobe import cli
from pipeprobe.export import TABLES, ExportFolderError, MissingExtraError, export_tables

sys.path.insert(0, str(Path(__file__).parent))
from _synth import simple_pipeline, step, wait, write_run  # noqa: E402
from test_stretches import _two_stretches  # noqa: E402

FRAMES = ("spans", "batches", "samples", "resources")


def _plain(frame: pd.DataFrame) -> pd.DataFrame:
    """A loaded frame with categories as plain strings (how the tables store them)."""
    out = frame.reset_index(drop=True).copy()
    for name in out:
        if isinstance(out[name].dtype, pd.CategoricalDtype) or out[name].dtype == object:
            out[name] = out[name].astype(str)
    return out


def _read(path: Path) -> pd.DataFrame:
    frame = pd.read_parquet(path) if path.suffix == ".parquet" else pd.read_csv(path)
    return _plain(frame)


def _cli(argv: list[str], capsys: pytest.CaptureFixture) -> tuple[int, str, str]:
    try:
        code = cli.main(argv)
    except SystemExit as exc:
        code = exc.code
    got = capsys.readouterr()
    return code, got.out, got.err


class TestRoundTrip:
    @pytest.mark.parametrize("fmt", ["csv", "parquet"])
    def test_tables_read_back_equal_load(self, analysis_pool_run: Path, tmp_path: Path, fmt: str) -> None:
        """Spans, batches, samples and resources read back with pandas equal pipeprobe.load's frames (pandas)."""
        if fmt == "parquet":
            pytest.importorskip("pyarrow", reason="parquet tables need pyarrow (the 'parquet' extra)")
        run = pipeprobe.load(analysis_pool_run)
        done = export_tables(analysis_pool_run, tmp_path / "t", format=fmt)
        for name in FRAMES:
            back = _read(done.files[name])
            assert [run.header["run_id"]] * len(back) == back.pop("run_id").tolist()
            pd.testing.assert_frame_equal(_plain(getattr(run, name)), back, check_exact=True)

    def test_round_trip_has_rows(self, analysis_pool_run: Path, tmp_path: Path) -> None:
        """The recorded run exports every kind of row (so the round trip compares something)."""
        done = export_tables(analysis_pool_run, tmp_path / "t")
        assert 10 == done.rows["batches"]
        assert 40 == done.rows["samples"]
        assert all(done.rows[name] > 0 for name in ("spans", "resources", "critical_segments"))

    def test_critical_segments_by_hand(self, simple_run_dir: Path, tmp_path: Path) -> None:
        """One producer, nothing overlapping: the path is every decode, augment and step (by hand)."""
        done = export_tables(simple_run_dir, tmp_path / "t")
        seg = pd.read_csv(done.files["critical_segments"])
        per_label = seg.groupby("label")["seconds"].sum().round(9).to_dict()
        # 3 batches x 2 samples x 3 ms decode, x 1 ms augment; 3 x 10 ms step
        assert {"decode": 0.018, "augment": 0.006, "step": 0.030} == per_label

    def test_run_table(self, simple_run_dir: Path, tmp_path: Path) -> None:
        """The one-row run table gives the id, wall time and counts (by hand from the synthetic run)."""
        done = export_tables(simple_run_dir, tmp_path / "t")
        row = pd.read_csv(done.files["run"]).iloc[0]
        assert ("synth", 3, 18, 0.054) == (row["run_id"], row["batches"], row["spans"], round(row["wall_s"], 9))

    def test_empty_run(self, tmp_path: Path) -> None:
        """A run with no spans exports header-only tables with every documented column."""
        d = write_run(tmp_path / "empty", {100: []})
        done = export_tables(d, tmp_path / "t")
        for name, columns in TABLES.items():
            frame = pd.read_csv(done.files[name])
            assert list(columns) == list(frame.columns)
        assert 0 == done.rows["spans"]


class TestLoaders:
    def test_loader_epochs_of_a_script_run(self, tmp_path: Path) -> None:
        """A run recorded by pipeprobe run exports which loader each epoch iterated, and the step's meaning."""
        rows = [wait(0, 2, 0), step(2, 3, 0), wait(3, 4, 1, epoch=1)]
        d = write_run(tmp_path / "r", {100: rows})
        script = {"loaders": [{"name": "train", "epochs": [0]}, {"name": "val", "epochs": [1]}],
                  "step": "loop time between batches (not timed)"}
        (d / "script.json").write_text(json.dumps(script))
        done = export_tables(d, tmp_path / "t")
        loaders = pd.read_csv(done.files["loader_epochs"])
        batches = pd.read_csv(done.files["batches"]).merge(loaders, on=["run_id", "epoch"])
        assert [("train", 0), ("val", 1)] == list(zip(batches["loader"], batches["batch_id"], strict=True))
        assert script["step"] == json.loads(done.manifest.read_text())["step"]

    def test_no_loader_rows_otherwise(self, simple_run_dir: Path, tmp_path: Path) -> None:
        """A run recorded with a Probe has no loader rows; its step is the timed one."""
        done = export_tables(simple_run_dir, tmp_path / "t")
        assert (0, "the training step as timed by probe.step()") == (
            done.rows["loader_epochs"], json.loads(done.manifest.read_text())["step"])


class TestManifest:
    def test_manifest_describes_files(self, simple_run_dir: Path, tmp_path: Path) -> None:
        """The manifest names each table's file, row count and columns, matching the files."""
        done = export_tables(simple_run_dir, tmp_path / "t")
        manifest = json.loads(done.manifest.read_text())
        assert ("pipeprobe-tables", 1, "csv") == (manifest["format"], manifest["format_version"],
                                                  manifest["table_format"])
        for entry in manifest["tables"].values():
            frame = pd.read_csv(tmp_path / "t" / entry["file"])
            assert (list(entry["columns"]), entry["rows"]) == (list(frame.columns), len(frame))


class TestWindowedRun:
    """A run recorded in stretches (Probe(window=...)): tables on the analysis' condensed axis (issue #13)."""

    def test_critical_segments_are_the_analysis_own(self, tmp_path: Path) -> None:
        """The exported critical-path segments equal pipeprobe.analyze(run).critical.segments, gap never crossed."""
        d = _two_stretches(tmp_path / "run")
        done = export_tables(d, tmp_path / "t")
        want = _plain(pipeprobe.analyze(d).critical.segments)
        back = _read(done.files["critical_segments"]).drop(columns="run_id")
        pd.testing.assert_frame_equal(want[list(back.columns)], back, check_exact=False, rtol=0, atol=1e-9)

    def test_hand_worked_path_and_wall(self, tmp_path: Path) -> None:
        """By hand (tests/test_stretches.py): decode 22 ms and step 28 ms of the path, 50 ms wall, no gap."""
        done = export_tables(_two_stretches(tmp_path / "run"), tmp_path / "t")
        seg = pd.read_csv(done.files["critical_segments"])
        got = seg.groupby("label")["seconds"].sum().mul(1e3).round(6).to_dict()
        wall = float(pd.read_csv(done.files["run"])["wall_s"].iloc[0])
        assert ({"decode": 22.0, "step": 28.0}, 50.0) == (got, round(wall * 1e3, 6))

    def test_frames_are_the_condensed_runs(self, tmp_path: Path) -> None:
        """Spans, batches and samples read back equal the condensed run's, column for column (pandas)."""
        from pipeprobe.stretches import condense

        d = _two_stretches(tmp_path / "run")
        run = condense(pipeprobe.load(d))
        done = export_tables(d, tmp_path / "t")
        for name in ("spans", "batches", "samples"):  # the synthetic run has no resource samples
            back = _read(done.files[name]).drop(columns="run_id")
            pd.testing.assert_frame_equal(_plain(getattr(run, name)[list(back.columns)]), back, check_exact=True)

    def test_manifest_names_the_condensed_axis(self, simple_run_dir: Path, tmp_path: Path) -> None:
        """The manifest's 'times' says a windowed run's times are on the condensed axis; a plain run's are not."""
        windowed = export_tables(_two_stretches(tmp_path / "run"), tmp_path / "w")
        plain = export_tables(simple_run_dir, tmp_path / "p")
        times = [json.loads(x.manifest.read_text())["times"] for x in (windowed, plain)]
        assert (True, False) == ("condensed axis" in times[0], "condensed axis" in times[1])


class TestManyRuns:
    def test_duckdb_query_over_two_runs(self, tmp_path: Path) -> None:
        """The README's DuckDB query over two exported runs gives each run's stall share (DuckDB; by hand)."""
        duckdb = pytest.importorskip("duckdb", reason="the many-runs query needs duckdb (the 'test' extra)")
        pytest.importorskip("pyarrow", reason="parquet tables need pyarrow (the 'parquet' extra)")
        slow = write_run(tmp_path / "slow", simple_pipeline(decode_ms=6.0), run_id="slow")
        fast = write_run(tmp_path / "fast", simple_pipeline(decode_ms=1.0), run_id="fast")
        for d in (slow, fast):
            export_tables(d, tmp_path / "tables" / d.name, format="parquet")
        t = tmp_path / "tables"
        rows = duckdb.sql(f"""
            SELECT r.run_id, r.batches, round(100 * sum(b.wait_s) / any_value(r.wall_s), 1) AS stall_pct
            FROM '{t}/*/run.parquet' AS r JOIN '{t}/*/batches.parquet' AS b USING (run_id)
            GROUP BY ALL ORDER BY stall_pct DESC""").fetchall()
        # per batch the wait is 2 x (decode + 1 ms augment) and the step 10 ms:
        # slow 42 ms of 72 ms = 58.3 %, fast 12 ms of 42 ms = 28.6 %
        assert [("slow", 3, 58.3), ("fast", 3, 28.6)] == rows


class TestBadInput:
    def test_refuses_non_empty_folder(self, simple_run_dir: Path, tmp_path: Path,
                                      capsys: pytest.CaptureFixture) -> None:
        """A non-empty OUT_DIR: one line, exit 2 (common practice), and its files stay as they were."""
        out = tmp_path / "t"
        out.mkdir()
        (out / "notes.txt").write_text("mine")
        code, stdout, err = _cli(["export", str(simple_run_dir), str(out)], capsys)
        assert (2, 1, "") == (code, len(err.strip().splitlines()), stdout)
        assert "--force" in err
        assert (["notes.txt"], "mine") == (sorted(p.name for p in out.iterdir()), (out / "notes.txt").read_text())

    def test_force_replaces_an_earlier_export(self, simple_run_dir: Path, tmp_path: Path,
                                              capsys: pytest.CaptureFixture) -> None:
        """--force swaps an earlier export's tables (any format) and keeps unrelated files."""
        pytest.importorskip("pyarrow", reason="parquet tables need pyarrow (the 'parquet' extra)")
        out = tmp_path / "t"
        export_tables(simple_run_dir, out, format="parquet")
        (out / "notes.txt").write_text("mine")
        code, _, _ = _cli(["export", str(simple_run_dir), str(out), "--force"], capsys)
        expected = sorted([f"{name}.csv" for name in TABLES] + ["manifest.json", "notes.txt"])
        assert (0, expected) == (code, sorted(p.name for p in out.iterdir()))

    def test_parquet_without_pyarrow(self, simple_run_dir: Path, tmp_path: Path,
                                     monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture) -> None:
        """Parquet without pyarrow: one line naming the extra to install, exit 2, nothing written."""
        monkeypatch.setitem(sys.modules, "pyarrow", None)  # import pyarrow now raises ImportError
        with pytest.raises(MissingExtraError):
            export_tables(simple_run_dir, tmp_path / "a", format="parquet")
        code, _, err = _cli(["export", str(simple_run_dir), str(tmp_path / "b"), "--format", "parquet"], capsys)
        assert (2, False, False) == (code, (tmp_path / "a").exists(), (tmp_path / "b").exists())
        assert "pip install 'pipeprobe[parquet]'" in err

    def test_out_dir_is_a_file(self, simple_run_dir: Path, tmp_path: Path) -> None:
        """OUT_DIR naming a file is refused, even with force, and the file is kept."""
        f = tmp_path / "f"
        f.write_text("x")
        with pytest.raises(ExportFolderError):
            export_tables(simple_run_dir, f, force=True)
        assert "x" == f.read_text()

    def test_unknown_format(self, simple_run_dir: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
        """An unknown format: ValueError in Python, one line and exit 2 on the command line."""
        with pytest.raises(ValueError):
            export_tables(simple_run_dir, tmp_path / "t", format="xlsx")
        code, _, err = _cli(["export", str(simple_run_dir), str(tmp_path / "t"), "--format", "xlsx"], capsys)
        assert (2, 1) == (code, len(err.strip().splitlines()))

    def test_missing_run(self, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
        """A missing run folder: one line, exit 2, no export folder made."""
        code, _, err = _cli(["export", str(tmp_path / "nope"), str(tmp_path / "t")], capsys)
        assert (2, 1, False) == (code, len(err.strip().splitlines()), (tmp_path / "t").exists())
