"""Writing a run as plain tables that other tools read (parquet or csv).

:func:`export_tables` loads a run with :func:`pipeprobe.load`, finds its
critical path as :func:`pipeprobe.analyze` does, and writes seven tables
into a folder, one file each, plus ``manifest.json`` describing them. A
run recorded with a window (``Probe(window=...)``) is written with its
unrecorded gaps cut out, its stretches end to end
(:func:`pipeprobe.stretches.condense`), as the analysis sees it; the
manifest's ``times`` says so:

``run``
    One row about the run (id, host, start time, wall time, counts).
``spans``, ``batches``, ``samples``, ``resources``
    The frames of :class:`pipeprobe.Run`, column for column.
``critical_segments``
    The pieces of the critical path that tile the run's wall time
    (:attr:`pipeprobe.CriticalPath.segments`).
``loader_epochs``
    Which DataLoader each epoch iterated (runs recorded by ``pipeprobe
    run``; no rows otherwise).

Every table starts with a ``run_id`` column, so the files of many runs can
be read as one table (e.g. by DuckDB with a glob) and grouped by run. The
steps are :func:`_collect_tables`, :func:`_prepare_folder`,
:func:`_write_table` per table, and :func:`_write_manifest` last (its
presence says the export finished).
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .byloader import read_script_info
from .critical import SEGMENT_COLUMNS
from .errors import PipeprobeError
from .load import BATCH_COLUMNS, SPAN_COLUMNS, Run, load
from .stretches import condense, is_windowed, timeline_and_path

__all__ = ["export_tables", "Export", "TABLES", "FORMATS", "MANIFEST", "ExportFolderError", "MissingExtraError"]

#: File name of the manifest written last into the export folder.
MANIFEST = "manifest.json"
#: Table file formats: csv always works, parquet needs pyarrow (``pip install 'pipeprobe[parquet]'``).
FORMATS = ("csv", "parquet")
_MANIFEST_FORMAT = "pipeprobe-tables"
_MANIFEST_VERSION = 1

_RUN_ID = {"run_id": "the run's id from its run header (one value per exported run)"}

#: Tables written, with the meaning of each column (``run_id`` first in every table).
TABLES: dict[str, dict[str, str]] = {
    "run": {
        **_RUN_ID,
        "host": "host name of the lowest rank",
        "started_ns": "wall-clock time of the run start, ns since the Unix epoch (UTC)",
        "wall_s": "wall time of the run, seconds",
        "batches": "batches delivered to the training loop (all ranks)",
        "spans": "spans recorded (all processes)",
        "world_size": "ranks of the job",
        "pipeprobe_version": "version that recorded the run",
    },
    "spans": {**_RUN_ID, **SPAN_COLUMNS},
    "batches": {**_RUN_ID, **BATCH_COLUMNS},
    "samples": {
        **_RUN_ID,
        "rank": "rank",
        "batch_id": "batch that held the sample",
        "sample_id": "sample id",
        "ready_s": "the batch reached the consumer, seconds from run start",
    },
    "resources": {
        **_RUN_ID,
        "t_s": "sample time, seconds from run start",
        "rank": "rank",
        "pid": "process id; 0 for per-core system rows",
        "core": "CPU core for system rows; -1 for process rows",
        "cpu_pct": "CPU %",
        "rss_bytes": "resident memory of the process (-1 for core rows)",
        "read_bytes": "bytes the process read so far (-1 for core rows or unknown)",
    },
    "critical_segments": {**_RUN_ID, **SEGMENT_COLUMNS},
    "loader_epochs": {
        **_RUN_ID,
        "loader": "DataLoader name (runs recorded by pipeprobe run; no rows otherwise)",
        "epoch": "an epoch of the trace that iterated this loader (join to batches.epoch)",
    },
}


class ExportFolderError(PipeprobeError, FileExistsError):
    """The export folder already holds files (pass ``force=True`` to write into it)."""


class MissingExtraError(PipeprobeError, ImportError):
    """An optional dependency the chosen output needs is not installed."""


@dataclass(frozen=True)
class Export:
    """What :func:`export_tables` wrote.

    Attributes
    ----------
    out_dir : Path
        The export folder.
    manifest : Path
        ``out_dir / 'manifest.json'``.
    files : dict of str to Path
        Table name to file.
    rows : dict of str to int
        Table name to row count.
    """

    out_dir: Path
    manifest: Path
    files: dict[str, Path]
    rows: dict[str, int]


def export_tables(run: Run | str | os.PathLike, out_dir: str | os.PathLike, *, format: str = "csv",
                  force: bool = False) -> Export:
    """Write a run's spans, batches, samples, resources and critical path as tables.

    Parameters
    ----------
    run : Run or path-like
        A loaded run, or a run folder to :func:`pipeprobe.load`.
    out_dir : path-like
        Folder to write into; created if missing. An existing folder must be
        empty unless ``force`` is true.
    format : {'csv', 'parquet'}
        File format of the tables. Parquet needs pyarrow.
    force : bool
        Write into a non-empty folder: replaces the tables and manifest of
        an earlier export there (either format) and leaves other files alone.

    Returns
    -------
    Export

    Raises
    ------
    ExportFolderError
        ``out_dir`` is a non-empty folder and ``force`` is false, or a file.
    MissingExtraError
        ``format='parquet'`` without pyarrow installed.
    ValueError
        An unknown ``format``.
    RunNotFoundError, TraceFormatError
        When given a path that :func:`pipeprobe.load` cannot read.

    Examples
    --------
    >>> import tempfile, pandas as pd
    >>> from pipeprobe.export import export_tables
    >>> from pipeprobe._example_runs import write_example_run
    >>> d = write_example_run(tempfile.mkdtemp(), batches=3, decode_ms=2, step_ms=1)
    >>> out = export_tables(d, tempfile.mkdtemp() + "/tables")
    >>> sorted(out.files)
    ['batches', 'critical_segments', 'loader_epochs', 'resources', 'run', 'samples', 'spans']
    >>> pd.read_csv(out.files["batches"])["batch_id"].tolist()
    [0, 1, 2]
    """
    if format not in FORMATS:
        raise ValueError(f"unknown table format {format!r}; choose one of {', '.join(FORMATS)}")
    if format == "parquet":
        _require_pyarrow()
    out = Path(out_dir)
    _check_folder(out, force)
    if not isinstance(run, Run):
        run = load(run)
    run = condense(run)  # a windowed run: the analysis' axis, so the critical path never crosses a gap
    tables = _collect_tables(run)
    _prepare_folder(out)
    files = {name: _write_table(frame, out / f"{name}.{format}", format) for name, frame in tables.items()}
    rows = {name: int(len(frame)) for name, frame in tables.items()}
    manifest = _write_manifest(out, run, format, files, rows)
    return Export(out_dir=out, manifest=manifest, files=files, rows=rows)


def _require_pyarrow() -> None:
    try:
        import pyarrow  # noqa: F401
    except ImportError:
        message = ("parquet tables need pyarrow: pip install 'pipeprobe[parquet]' "
                   "(or write csv with format='csv')")
        raise MissingExtraError(message) from None


def _check_folder(out: Path, force: bool) -> None:
    """Refuse a file, or a non-empty folder without ``force``, before anything is read or written."""
    if out.exists() and not out.is_dir():
        raise ExportFolderError(f"{out} is a file, not a folder; pass a folder to export into")
    if out.is_dir() and not force and any(out.iterdir()):
        raise ExportFolderError(f"{out} is not empty; pick a new folder, or pass --force to write into it")


def _prepare_folder(out: Path) -> None:
    """Create the folder; remove an earlier export's tables and manifest (both formats)."""
    out.mkdir(parents=True, exist_ok=True)
    ours = [MANIFEST] + [f"{name}.{fmt}" for name in TABLES for fmt in FORMATS]
    for name in ours:
        path = out / name
        if path.is_file() and not path.is_symlink():
            path.unlink()


def _collect_tables(run: Run) -> dict[str, pd.DataFrame]:
    """The tables, each with the documented columns in order and ``run_id`` first."""
    run_id = str(run.header.get("run_id", run.run_dir.name))
    segments = timeline_and_path(run)[1].segments  # the analysis' own path: one stretch at a time
    frames = {
        "run": pd.DataFrame([_run_row(run)]),
        "spans": run.spans,
        "batches": run.batches,
        "samples": run.samples,
        "resources": run.resources,
        "critical_segments": segments,
        "loader_epochs": _loader_epochs(run),
    }
    return {name: _with_columns(frames[name], TABLES[name], run_id) for name in TABLES}


def _loader_epochs(run: Run) -> pd.DataFrame:
    """Which loader each epoch iterated, from ``script.json`` (``pipeprobe run``); empty otherwise."""
    info = read_script_info(run.run_dir)
    rows = [(str(e["name"]), int(epoch)) for e in (info or {}).get("loaders", []) for epoch in e.get("epochs", [])]
    return pd.DataFrame({"loader": pd.Series([r[0] for r in rows], dtype=object),
                         "epoch": pd.Series([r[1] for r in rows], dtype=np.int64)})


def _run_row(run: Run) -> dict[str, Any]:
    h = run.header
    anchor_wall, anchor_mono = h.get("anchor_wall_ns"), h.get("anchor_mono_ns")
    started = int(anchor_wall) - (int(anchor_mono) - run.t0_ns) if anchor_wall is not None and anchor_mono is not None else -1
    return {
        "host": str(h.get("host", "")),
        "started_ns": started,
        "wall_s": float(run.wall_s),
        "batches": int(len(run.batches)),
        "spans": int(len(run.spans)),
        "world_size": int(h.get("world_size", 1) or 1),
        "pipeprobe_version": str(h.get("pipeprobe_version", "")),
    }


def _with_columns(frame: pd.DataFrame, columns: dict[str, str], run_id: str) -> pd.DataFrame:
    """The documented columns in order, ``run_id`` filled in; categories become plain strings."""
    out = pd.DataFrame(index=range(len(frame)))
    for name in columns:
        if name == "run_id":
            out[name] = pd.Series([run_id] * len(frame), dtype=object)
            continue
        col = frame[name].reset_index(drop=True)
        out[name] = col.astype(object) if isinstance(col.dtype, pd.CategoricalDtype) else col
    for name in out:
        if out[name].dtype == object:
            out[name] = out[name].astype(str)
    return out


def _times_meaning(run: Run) -> str:
    """What the time columns count from: the run start, or the condensed axis of a windowed run."""
    if not is_windowed(run):
        return "seconds from the run start (see the run table's started_ns)"
    return ("seconds on the condensed axis: the run was recorded in stretches (Probe(window=...)) and the "
            "unrecorded time between them is cut out, the stretches laid end to end from 0 as the analysis "
            "sees them; wall_s is their summed wall time")


def _step_meaning(run: Run) -> str:
    info = read_script_info(run.run_dir)
    if info is not None and info.get("step"):
        return str(info["step"])
    return "the training step as timed by probe.step()"


def _write_table(frame: pd.DataFrame, path: Path, format: str) -> Path:
    """Write one table through a temporary name, so a half-written file never has the final name."""
    tmp = path.with_name(f".{path.name}.part")
    if format == "parquet":
        frame.to_parquet(tmp, engine="pyarrow", index=False)
    else:
        frame.to_csv(tmp, index=False)
    os.replace(tmp, path)
    return path


def _write_manifest(out: Path, run: Run, format: str, files: dict[str, Path], rows: dict[str, int]) -> Path:
    tables = {
        name: {"file": files[name].name, "rows": rows[name], "columns": TABLES[name]}
        for name in TABLES
    }
    manifest = {
        "format": _MANIFEST_FORMAT,
        "format_version": _MANIFEST_VERSION,
        "run_id": str(run.header.get("run_id", run.run_dir.name)),
        "run_dir": str(Path(run.run_dir).resolve()),
        "table_format": format,
        "times": _times_meaning(run),
        "step": _step_meaning(run),
        "missing": "-1 for unknown ids and counts, empty (NaN) for unknown numbers",
        "problems": list(run.problems),
        "tables": tables,
    }
    path = out / MANIFEST
    tmp = path.with_name(f".{MANIFEST}.part")
    tmp.write_text(json.dumps(manifest, indent=1, allow_nan=False) + "\n", encoding="utf-8")
    os.replace(tmp, path)
    return path


def add_arguments(parser: Any) -> None:
    """The ``pipeprobe export`` arguments."""
    parser.add_argument("run_dir", metavar="RUN", help="run folder")
    parser.add_argument("out_dir", metavar="OUT_DIR", help="folder for the tables (new or empty)")
    parser.add_argument("--format", choices=FORMATS, default="csv",
                        help="table file format (csv); parquet needs pyarrow: pip install 'pipeprobe[parquet]'")
    parser.add_argument("--force", action="store_true",
                        help="write into a non-empty OUT_DIR, replacing an earlier export's tables")


def run_command(args: Any) -> int:
    """Run ``pipeprobe export``; print one line per table and the manifest path last."""
    done = export_tables(args.run_dir, args.out_dir, format=args.format, force=args.force)
    for name, path in done.files.items():
        print(f"{name:<18} {done.rows[name]:>10} rows  {path}")
    print(f"manifest: {done.manifest}")
    return 0
