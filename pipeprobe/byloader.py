"""Runs recorded by ``pipeprobe run``: one view per DataLoader.

A script may iterate several loaders (training, validation). ``pipeprobe
run`` records them all in one trace, every ``iter(loader)`` as its own
epoch, and writes ``script.json`` next to the trace naming each loader and
its epochs. :func:`loader_table` sums each loader's batches, stall and loop
time; :func:`loader_run` cuts the run down to one loader's batches so the
usual analysis (:func:`pipeprobe.analyze`) reports on that loader alone.
"""

from __future__ import annotations

import dataclasses
import json
import os
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .errors import TraceFormatError
from .load import Run

__all__ = ["read_script_info", "loader_table", "loader_run", "training_loader", "LOADER_COLUMNS"]

SCRIPT_FILE = "script.json"

#: Columns of :func:`loader_table`, one row per loader, the training loader first.
LOADER_COLUMNS = {
    "loader": "name: dataset class and creation order (DigitSet-0), or the name given with --name",
    "batches": "batches the loop took from this loader",
    "epochs": "times the loop iterated it",
    "stall_s": "time the loop waited for its batches, seconds",
    "loop_s": "loop time between taking its batches and asking again (the untimed 'step'), seconds",
    "stall_share": "stall_s / (stall_s + loop_s)",
}


def read_script_info(run_dir: str | os.PathLike) -> dict[str, Any] | None:
    """The ``script.json`` of a run folder; ``None`` when the run was not recorded by ``pipeprobe run``.

    Raises
    ------
    TraceFormatError
        The file is there but is not a JSON object with a ``loaders`` list.
    """
    path = Path(run_dir) / SCRIPT_FILE
    if not path.is_file():
        return None
    try:
        info = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise TraceFormatError(f"{path}: not readable JSON ({exc}); record the script again") from None
    if not isinstance(info, dict) or not isinstance(info.get("loaders"), list):
        raise TraceFormatError(f"{path}: no 'loaders' list; record the script again")
    return info


def _epochs_of(loaders: list[dict[str, Any]]) -> dict[str, list[int]]:
    return {str(entry["name"]): [int(e) for e in entry.get("epochs", [])] for entry in loaders}


def loader_table(run: Run, loaders: list[dict[str, Any]], training: str | None = None) -> pd.DataFrame:
    """Batches, stall and loop time per loader (see :data:`LOADER_COLUMNS`); ``training`` first, then by batches.

    Parameters
    ----------
    run : Run
    loaders : list of dict
        ``script.json``'s ``loaders``: ``name`` and ``epochs`` of each.
    training : str, optional
        Name of the loader to put first.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for e, loader in enumerate([[[0], [1], [2]], [[3]]]):
    ...         for batch in probe.watch(loader, epoch=e):
    ...             pass
    >>> t = loader_table(pipeprobe.load(d), [{"name": "train", "epochs": [0]}, {"name": "val", "epochs": [1]}])
    >>> t[["loader", "batches", "epochs"]].values.tolist()
    [['train', 3, 1], ['val', 1, 1]]
    """
    b = run.batches
    rows = []
    for name, epochs in _epochs_of(loaders).items():
        mine = b[b["epoch"].isin(epochs)]
        stall, loop = float(mine["wait_s"].sum()), float(mine["step_s"].fillna(0.0).sum())
        rows.append({"loader": name, "batches": int(len(mine)), "epochs": len(epochs), "stall_s": stall,
                     "loop_s": loop, "stall_share": stall / (stall + loop) if stall + loop > 0 else 0.0})
    table = pd.DataFrame(rows, columns=list(LOADER_COLUMNS))
    first = (table["loader"] == training) if training is not None else pd.Series(False, index=table.index)
    table = table.assign(_first=~first).sort_values(["_first", "batches"], ascending=[True, False], kind="stable")
    return table.drop(columns="_first").reset_index(drop=True)


def training_loader(table: pd.DataFrame, wanted: str | None = None) -> str | None:
    """The loader the report covers first: ``wanted`` when it names one, else the one with most batches."""
    names = table["loader"].tolist()
    if wanted is not None and wanted in names:
        return wanted
    if table.empty or int(table["batches"].max()) == 0:
        return None
    return str(table.sort_values("batches", ascending=False, kind="stable")["loader"].iloc[0])


def loader_run(run: Run, epochs: list[int]) -> Run:
    """The run cut down to one loader: the batches of its epochs, their spans and samples, and its time window.

    Spans that belong to no batch of these epochs (another loader's, or
    never linked to a batch) are left out. The time axis starts when the
    first of these batches was asked for (or its first span started) and
    ends with the last of them, so the wall time, the stall share and the
    critical path are those of this loader's stretch of the run (another
    loader iterated inside that stretch counts as time nothing recorded ran).

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False, sample_interval_s=0) as probe:
    ...     for e, loader in enumerate([[[0], [1], [2]], [[3]]]):
    ...         for batch in probe.watch(loader, epoch=e):
    ...             pass
    >>> len(loader_run(pipeprobe.load(d), [1]).batches)
    1
    """
    keep = set(int(e) for e in epochs)
    batches = run.batches[run.batches["epoch"].isin(keep)].reset_index(drop=True)
    spans = run.spans[run.spans["epoch"].isin(keep)].reset_index(drop=True)
    ids = pd.MultiIndex.from_frame(batches[["rank", "batch_id"]])
    members = pd.MultiIndex.from_frame(run.samples[["rank", "batch_id"]])
    samples = run.samples[members.isin(ids)].reset_index(drop=True)
    cut = dataclasses.replace(run, spans=spans, batches=batches, samples=samples)
    return _window(cut) if len(batches) else cut


_TIME_COLUMNS = {
    "spans": ("start_s", "end_s"),
    "batches": ("wait_start_s", "ready_s", "step_start_s", "step_end_s"),
    "samples": ("ready_s",),
    "resources": ("t_s",),
}


def _window(run: Run) -> Run:
    """Move the time axis to the stretch its batches and spans cover; resources outside it are dropped."""
    b, sp = run.batches, run.spans
    lo = float(min(b["wait_start_s"].min(), sp["start_s"].min() if len(sp) else np.inf))
    hi = float(np.nanmax([b["ready_s"].max(), b["step_end_s"].max(), sp["end_s"].max() if len(sp) else -np.inf]))
    res = run.resources
    frames = {"spans": sp, "batches": b, "samples": run.samples,
              "resources": res[(res["t_s"] >= lo) & (res["t_s"] <= hi)]}
    moved = {}
    for name, frame in frames.items():
        frame = frame.reset_index(drop=True).copy()
        for col in _TIME_COLUMNS[name]:
            frame[col] = frame[col] - lo
        moved[name] = frame
    shift_ns = int(round(lo * 1e9))
    header = dict(run.header)
    header["end_mono_ns"] = run.t0_ns + shift_ns + int(round((hi - lo) * 1e9))
    return dataclasses.replace(run, header=header, t0_ns=run.t0_ns + shift_ns, **moved)
