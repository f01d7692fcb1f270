"""Merging a run directory into pandas DataFrames on one time axis.

:func:`load` reads every process's span file, the membership rows that say
which samples formed each batch, and the resource samples, and returns a
:class:`Run`. Times are seconds from the run start (the earliest run-header
anchor). Spans recorded in worker processes carry a sample id but no batch
id; they are linked to the first delivery of a batch holding that sample
at or after the span ended (so a sample seen in several epochs links to the
right one).

The steps of :func:`load`, each a function returning a small frozen record.
Those that read files live in :mod:`pipeprobe._runfolder`: list the folder
without following links (``list_folder``), read and check the run headers
(``read_run_headers``, through :class:`~pipeprobe.tracefile.RunHeader`), put
every rank's clock on one axis and bound the times a record may have
(``align_clocks``), read each process's header and span records in bounded
pieces (``read_processes``), and read the resource samples
(``read_resources``). The rest are below: copy every process's span
records once into compact merged columns (``_span_columns``: numpy arrays,
stage and role as codes, no per-process frames), form the batches from the
waits and steps (``_batches``), link worker spans to them in place
(``_link``), build :attr:`Run.spans` in time order, one column at a time
(``_time_ordered_frame``), and give each worker process its loader slot
(:func:`worker_slots`). What was missing or damaged is collected on the way
and issued as warnings when ``load`` returns.
"""

from __future__ import annotations

import dataclasses
import heapq
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

import numpy as np
import pandas as pd

from . import _runfolder as _rf
from . import tracefile as tf
from ._progress import step
from ._runfolder import _RUN_HEADER  # noqa: F401 (ranks.py finds run headers by this pattern)
from .errors import RunNotFoundError
from .record._clocksync import check_step_alignment

__all__ = ["Run", "load", "worker_slots", "SPAN_COLUMNS", "BATCH_COLUMNS"]

#: Columns of :attr:`Run.spans`, one row per timed span.
SPAN_COLUMNS = {
    "stage": "stage name; 'step' for training steps, 'wait' for the consumer waiting for a batch",
    "start_s": "start, seconds from run start",
    "end_s": "end, seconds from run start",
    "dur_s": "end_s - start_s",
    "sample_id": "sample id, -1 unknown",
    "batch_id": "batch id in consumer order, -1 unknown",
    "epoch": "epoch of the batch, -1 unknown",
    "pid": "process id",
    "tid": "kernel thread id",
    "rank": "rank of the data-parallel job (0 for single-process jobs)",
    "cpu_s": "thread CPU seconds inside the span (NaN when CPU time was off)",
    "error": "True when the span's body raised",
    "role": "'main' (the training process) or 'worker' (a loader worker)",
}

#: Columns of :attr:`Run.batches`, one row per batch delivered to the consumer.
BATCH_COLUMNS = {
    "rank": "rank",
    "batch_id": "batch id (0, 1, ... in delivery order)",
    "epoch": "epoch",
    "wait_start_s": "the consumer asked for the batch",
    "ready_s": "the batch reached the consumer",
    "wait_s": "stall: how long the consumer waited",
    "step_start_s": "the training step on this batch started (NaN if none was timed)",
    "step_end_s": "the training step ended",
    "step_s": "step duration",
    "samples": "number of samples known to be in the batch",
    "others_cpu_s": "CPU seconds the training process's other threads used during the wait (NaN unknown): "
                    "a math-library pool still spinning after the step shows here",
}


@dataclass
class Run:
    """A loaded run: DataFrames on one time axis plus the headers.

    Attributes
    ----------
    run_dir : Path
    header : dict
        Run header of the lowest rank present, as checked by
        :class:`~pipeprobe.tracefile.RunHeader` (its ``to_json()``: every
        documented field, names that UTF-8 cannot encode escaped).
    spans : DataFrame
        See :data:`SPAN_COLUMNS`.
    batches : DataFrame
        See :data:`BATCH_COLUMNS`.
    samples : DataFrame
        Which sample went into which batch: ``rank, batch_id, sample_id, ready_s``.
    resources : DataFrame
        ``t_s, pid, core, cpu_pct, rss_bytes, read_bytes``; per-core system
        rows have ``pid == 0``, process rows have ``core == -1``.
    processes : DataFrame
        One row per process file: ``pid, ppid, rank, role, host, spans, file,
        slot``; ``slot`` is 0 for the training process and ``k >= 1`` for the
        loader worker slot the process filled (:func:`worker_slots`), so the
        new worker processes a loader starts each epoch fill the same slots.
    problems : list of str
        What was missing or damaged (also issued as warnings).
    clock : dict
        How processes were put on one axis: ``method`` and ``uncertainty_s``.
    """

    run_dir: Path
    header: dict[str, Any]
    spans: pd.DataFrame
    batches: pd.DataFrame
    samples: pd.DataFrame
    resources: pd.DataFrame
    processes: pd.DataFrame
    problems: list[str] = field(default_factory=list)
    clock: dict[str, Any] = field(default_factory=dict)
    t0_ns: int = 0

    @property
    def wall_s(self) -> float:
        """Wall time of the run: from the first to the last recorded instant."""
        end = self.header.get("end_mono_ns")
        if end is not None and self.clock.get("method") == "shared-monotonic":
            return max(0.0, (int(end) - self.t0_ns) / 1e9)
        if len(self.spans):
            return float(max(0.0, self.spans["end_s"].max()))
        return 0.0

    @property
    def stages(self) -> list[str]:
        """Stage names in the order they first started (``wait`` and ``step`` excluded)."""
        user = self.spans[~self.spans["stage"].isin(["wait", "step"])]
        if user.empty:
            return []
        first = user.groupby("stage", observed=True)["start_s"].min().sort_values()
        return [str(s) for s in first.index]

    def __repr__(self) -> str:
        return (
            f"<pipeprobe.Run {str(self.run_dir)!r}: {len(self.spans)} spans, "
            f"{len(self.batches)} batches, {self.wall_s:.3f} s>"
        )


def _empty_spans() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "stage": pd.Categorical([]),
            "start_s": np.zeros(0),
            "end_s": np.zeros(0),
            "dur_s": np.zeros(0),
            "sample_id": np.zeros(0, np.int64),
            "batch_id": np.zeros(0, np.int64),
            "epoch": np.zeros(0, np.int64),
            "pid": np.zeros(0, np.int64),
            "tid": np.zeros(0, np.int64),
            "rank": np.zeros(0, np.int64),
            "cpu_s": np.zeros(0),
            "error": np.zeros(0, bool),
            "role": pd.Categorical([]),
        }
    )


def load(run_dir: str | os.PathLike, *, ranks: Iterable[int] | None = None) -> Run:
    """Load a run directory written by :class:`pipeprobe.Probe`.

    The steps: list the folder (:func:`~pipeprobe._runfolder.list_folder`), read and check the
    run headers (:func:`~pipeprobe._runfolder.read_run_headers`), put the ranks' clocks on one
    axis (:func:`~pipeprobe._runfolder.align_clocks`), read each process's spans
    (:func:`~pipeprobe._runfolder.read_process`), form the batches and link worker spans to them
    (:func:`_batches`, :func:`_link`), and read the resource samples
    (:func:`~pipeprobe._runfolder.read_resources`).

    Parameters
    ----------
    run_dir : path-like
        The folder given to ``Probe(out_dir)``.
    ranks : iterable of int, optional
        Read the span files of these ranks only (all by default). The time
        axis is still that of the whole run.

    Returns
    -------
    Run

    Raises
    ------
    RunNotFoundError
        The folder does not exist or holds no run header.
    TraceFormatError
        A run header is unreadable. Damaged span files are skipped with a
        warning instead, and named in :attr:`Run.problems`.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> d = tempfile.mkdtemp()
    >>> with pipeprobe.Probe(d, report=False) as probe:
    ...     for batch in probe.watch([[0, 1], [2, 3]]):
    ...         with probe.step():
    ...             pass
    >>> run = pipeprobe.load(d)
    >>> len(run.batches)
    2
    """
    problems = _rf.Problems()
    step("reading span files")
    try:
        folder = _rf.list_folder(_check_folder(run_dir), problems)
        headers = _rf.read_run_headers(folder)
        _rf.check_names(folder, headers, problems)
        axis, first = _rf.align_clocks(folder, headers, problems)
        wanted = None if ranks is None else {int(r) for r in ranks}
        procs = _rf.read_processes(folder, headers, axis, wanted, problems)
        processes = _process_table(procs)
        samples = _members(procs)
        step("merging spans")
        cols = _span_columns(_take_records(procs))
        batches = _batches(_consumer_frame(cols), samples)
        _move_wait_cpu(cols)
        for message in check_step_alignment(folder.root, batches, axis.clock):
            problems.add(message)
        step("linking worker spans")
        _link(cols, samples, batches)
        spans = _time_ordered_frame(cols)
        resources = _rf.read_resources(folder, headers, axis, wanted, problems)
    finally:
        problems.warn()
    return Run(
        run_dir=folder.root,
        header=first,
        spans=spans,
        batches=batches,
        samples=samples[["rank", "batch_id", "sample_id", "ready_s"]],
        resources=resources,
        processes=processes,
        problems=problems.messages,
        clock=axis.clock,
        t0_ns=axis.t0_ns,
    )


def _check_folder(run_dir: str | os.PathLike) -> Path:
    root = Path(run_dir)
    if root.exists() and not root.is_dir():
        raise RunNotFoundError(f"{str(root)!r} is a file, not a run directory; pass the folder given to Probe(out_dir)")
    if not root.is_dir():
        raise RunNotFoundError(f"run directory {str(root)!r} does not exist; pass the folder given to Probe(out_dir)")
    return root


def _members(procs: list[_rf.Process]) -> pd.DataFrame:
    """All membership rows (which sample went into which batch), in file order."""
    members = [p.members for p in procs if p.members is not None]
    if members:
        return pd.concat(members, ignore_index=True)
    samples = pd.DataFrame({c: np.zeros(0, np.int64) for c in ("rank", "batch_id", "sample_id", "epoch")})
    return samples.assign(ready_s=np.zeros(0))


def _process_table(procs: list[_rf.Process]) -> pd.DataFrame:
    rows = [
        {
            "pid": p.pid,
            "ppid": -1 if p.header.ppid is None else int(p.header.ppid),
            "rank": p.rank,
            "role": p.header.role,
            "host": p.header.host,
            "spans": p.span_count,
            "file": p.name,
        }
        for p in procs
        if p.spans is not None
    ]
    table = pd.DataFrame(rows, columns=["pid", "ppid", "rank", "role", "host", "spans", "file"])
    # each process as one span from its first start to its last end: enough to find the worker slots
    lives = pd.DataFrame(
        [{"rank": p.rank, "pid": p.pid, "role": p.header.role, "start_s": p.spans.start_ns.min() / 1e9,
          "end_s": p.spans.end_ns.max() / 1e9} for p in procs if p.spans is not None and p.span_count],
        columns=["rank", "pid", "role", "start_s", "end_s"])
    slots = worker_slots(lives)
    table["slot"] = [slots.get((int(r), int(p)), 0) for r, p in zip(table["rank"], table["pid"], strict=True)]
    return table


def worker_slots(spans: pd.DataFrame) -> dict[tuple[int, int], int]:
    """The loader worker slot (1, 2, ...) of each worker process, per rank: ``{(rank, pid): slot}``.

    A worker is a slot of the loader, not a process: with torch's default
    ``persistent_workers=False`` every epoch starts new worker processes,
    which take over the slots of the last epoch's. A worker process is
    alive from its first span's start to its last span's end; taken in
    order of their start, each takes the lowest slot that no living worker
    holds (greedy interval colouring, which uses as few slots as there are
    workers alive at once). Persistent workers thus keep one slot each, and
    the two workers of each of three epochs fill slots 1 and 2.

    Parameters
    ----------
    spans : DataFrame
        :attr:`Run.spans` (``rank, pid, role, start_s, end_s``).

    Returns
    -------
    dict
        ``(rank, pid) -> slot`` for every process with ``role == "worker"``.

    References
    ----------
    Interval graph colouring by start time: Hashimoto, A. and Stevens, J.
    (1971), "Wire routing by optimizing channel assignment within large
    apertures" (the left-edge algorithm).

    Examples
    --------
    >>> import pandas as pd
    >>> spans = pd.DataFrame({"rank": 0, "pid": [11, 12, 13, 14], "role": "worker",
    ...                       "start_s": [0.0, 0.1, 2.0, 2.1], "end_s": [1.0, 1.1, 3.0, 3.1]})
    >>> worker_slots(spans)
    {(0, 11): 1, (0, 12): 2, (0, 13): 1, (0, 14): 2}
    """
    workers = spans[spans["role"] == "worker"] if len(spans) else spans
    if not len(workers):
        return {}
    life = workers.groupby(["rank", "pid"], observed=True).agg(start=("start_s", "min"), end=("end_s", "max"))
    # by start; at one instant, a worker that also ended there first (it frees its slot at once), then by pid
    life = life.reset_index().assign(lasts=lambda f: f["end"] > f["start"])
    life = life.sort_values(["rank", "start", "lasts", "pid"], kind="stable")
    out: dict[tuple[int, int], int] = {}
    for _, part in life.groupby("rank", sort=True):
        busy: list[tuple[float, int]] = []  # (end, slot) of living workers
        free: list[int] = []
        for rank, pid, start, end in zip(part["rank"], part["pid"], part["start"], part["end"], strict=True):
            while busy and busy[0][0] <= start:
                heapq.heappush(free, heapq.heappop(busy)[1])
            slot = heapq.heappop(free) if free else len(busy) + 1
            heapq.heappush(busy, (float(end), slot))
            out[(int(rank), int(pid))] = slot
    return out


def _batches(spans: pd.DataFrame, samples: pd.DataFrame, counts: pd.DataFrame | None = None) -> pd.DataFrame:
    """The per-batch table; ``counts`` (``rank, batch_id, samples``, sorted), when given, stands for the
    membership rows' count per batch."""
    waits = spans[(spans["stage"] == "wait") & ~spans["error"]]  # a failed wait delivered nothing
    b = pd.DataFrame(
        {
            "rank": waits["rank"].to_numpy(np.int64),
            "batch_id": waits["batch_id"].to_numpy(np.int64),
            "epoch": waits["epoch"].to_numpy(np.int64),
            "wait_start_s": waits["start_s"].to_numpy(),
            "ready_s": waits["end_s"].to_numpy(),
            "others_cpu_s": waits["cpu_s"].to_numpy(np.float64) if "cpu_s" in waits else np.nan,
        }
    )
    b = b[b["batch_id"] >= 0].drop_duplicates(["rank", "batch_id"], keep="last")
    steps = spans[(spans["stage"] == "step") & (spans["batch_id"] >= 0)]
    if len(steps):
        agg = steps.groupby(["rank", "batch_id"]).agg(step_start_s=("start_s", "min"), step_end_s=("end_s", "max"))
        agg["step_s"] = steps.assign(d=steps["end_s"] - steps["start_s"]).groupby(["rank", "batch_id"])["d"].sum()
        b = b.merge(agg.reset_index(), on=["rank", "batch_id"], how="left")
    else:
        b = b.assign(step_start_s=np.nan, step_end_s=np.nan, step_s=np.nan)
    if counts is None and len(samples):
        counts = samples.groupby(["rank", "batch_id"]).size().rename("samples").reset_index()
    if counts is not None and len(counts):
        b = b.merge(counts, on=["rank", "batch_id"], how="left")
        b["samples"] = b["samples"].fillna(0).astype(np.int64)
    else:
        b["samples"] = np.zeros(len(b), np.int64)
    b["wait_s"] = b["ready_s"] - b["wait_start_s"]
    b = b.sort_values(["rank", "batch_id"]).reset_index(drop=True)
    return b[list(BATCH_COLUMNS)]


# -- the merged spans as compact columns ----------------------------------------------------------


@dataclass
class _Columns:
    """Every process's spans as one set of numpy columns, in file order (the columns of :data:`SPAN_COLUMNS`
    but ``stage`` and ``role`` as codes into ``stages`` and ``roles``, and no ``dur_s`` yet)."""

    arrays: dict[str, np.ndarray]
    stages: pd.Index
    roles: list[str]
    any_process: bool

    def __len__(self) -> int:
        return len(self.arrays["start_s"])


_Part = tuple[int, int, Any, "_rf.Records"]  # rank, pid, process header, span records


def _take_records(procs: list[_rf.Process]) -> list[_Part]:
    """The span records of each process with usable spans, leaving ``procs`` without them (to free them early)."""
    parts = [(p.rank, p.pid, p.header, p.spans) for p in procs if p.spans is not None]
    procs[:] = [dataclasses.replace(p, spans=None) for p in procs]
    return parts


#: Dtypes of the merged columns (those of :data:`SPAN_COLUMNS`, stage and role as codes).
_COLUMN_DTYPES = {"stage": np.int32, "start_s": np.float64, "end_s": np.float64, "sample_id": np.int64,
                  "batch_id": np.int64, "epoch": np.int64, "pid": np.int64, "tid": np.int64, "rank": np.int64,
                  "cpu_s": np.float64, "error": bool, "role": np.int8}


def _span_columns(parts: list[_Part]) -> _Columns:
    """Copy each process's records into the merged columns, dropping each process's records once copied.

    Peak memory is the records of all processes (64 bytes a span) plus the columns (77 bytes a span), with
    no frame of Python objects and no second copy of the merged spans.
    """
    stages = pd.Index(pd.unique(np.concatenate([np.asarray(list(h.stages), object) for _, _, h, _ in parts])
                                if parts else np.zeros(0, object)))
    roles = sorted({h.role for _, _, h, got in parts if len(got.recs)})
    n = sum(len(got.recs) for _, _, _, got in parts)
    out = {c: np.empty(n, dt) for c, dt in _COLUMN_DTYPES.items()}
    any_process = bool(parts)
    at = 0
    while parts:
        rank, pid, h, got = parts.pop(0)
        r, k = got.recs, len(got.recs)
        piece = slice(at, at + k)
        out["stage"][piece] = stages.get_indexer(list(h.stages)).astype(np.int32)[r["stage"]] if k else 0
        np.divide(got.start_ns, 1e9, out=out["start_s"][piece])
        np.divide(got.end_ns, 1e9, out=out["end_s"][piece])
        for c in ("sample_id", "batch_id", "epoch", "tid"):
            out[c][piece] = r[c]
        out["pid"][piece], out["rank"][piece] = pid, rank
        cpu = out["cpu_s"][piece]
        np.divide(r["cpu_ns"], 1e9, out=cpu)
        cpu[r["cpu_ns"] < 0] = np.nan
        out["error"][piece] = (r["flags"] & tf.FLAG_ERROR) != 0
        out["role"][piece] = roles.index(h.role) if k else 0
        at += k
        del r, got
    return _Columns(out, stages, roles, any_process)


def _stage_column(cols: _Columns, codes: np.ndarray) -> pd.Categorical:
    return pd.Categorical.from_codes(codes.astype(np.int64), categories=cols.stages)


def _consumer_frame(cols: _Columns) -> pd.DataFrame:
    """The waits and steps (file order) as a small frame with the columns :func:`_batches` reads."""
    a = cols.arrays
    codes = [cols.stages.get_loc(name) for name in ("wait", "step") if name in cols.stages]
    rows = np.flatnonzero(np.isin(a["stage"], codes)) if codes else np.zeros(0, np.int64)
    frame = {c: a[c][rows] for c in ("start_s", "end_s", "batch_id", "epoch", "rank", "error", "cpu_s")}
    return pd.DataFrame({"stage": _stage_column(cols, a["stage"][rows]), **frame})


def _move_wait_cpu(cols: _Columns) -> None:
    """Leave the waits without CPU time in the spans, in place: theirs is the process's other threads'
    (``Run.batches.others_cpu_s``), not the waiting thread's, which the span columns document."""
    if "wait" in cols.stages:
        a = cols.arrays
        a["cpu_s"][a["stage"] == cols.stages.get_loc("wait")] = np.nan


def _link(cols: _Columns, samples: pd.DataFrame, batches: pd.DataFrame) -> None:
    """Give worker spans their batch (via membership) and every span its epoch, in place."""
    a = cols.arrays
    need = np.flatnonzero((a["batch_id"] < 0) & (a["sample_id"] >= 0))
    if len(need) and len(samples):
        left = pd.DataFrame({"index": need, "end_s": a["end_s"][need], "sample_id": a["sample_id"][need],
                             "rank": a["rank"][need]})
        left = left.sort_values("end_s", kind="stable")
        right = samples[["ready_s", "sample_id", "rank", "batch_id"]].sort_values("ready_s", kind="stable")
        joined = pd.merge_asof(
            left, right, left_on="end_s", right_on="ready_s", by=["rank", "sample_id"], direction="forward"
        )
        found = joined["batch_id"].notna().to_numpy()
        a["batch_id"][joined["index"].to_numpy()[found]] = joined["batch_id"].to_numpy()[found].astype(np.int64)
    if len(batches):
        has = np.flatnonzero(a["batch_id"] >= 0)
        key = _batch_key(batches["rank"].to_numpy(np.int64), batches["batch_id"].to_numpy(np.int64))
        want = _batch_key(a["rank"][has], a["batch_id"][has])
        at = np.minimum(np.searchsorted(key, want), len(key) - 1)  # batches are sorted by (rank, batch_id)
        ok = key[at] == want
        a["epoch"][has[ok]] = batches["epoch"].to_numpy(np.int64)[at[ok]]


def _batch_key(rank: np.ndarray, batch_id: np.ndarray) -> np.ndarray:
    """One sortable int per (rank, batch id): batch ids are 32-bit in the trace format."""
    return rank * (1 << 33) + batch_id + 1


def _time_ordered_frame(cols: _Columns) -> pd.DataFrame:
    """:attr:`Run.spans`: the columns in time order (start, then end; stable), each taken once."""
    if not cols.any_process:
        return _empty_spans()
    a = cols.arrays
    order = np.lexsort((a["end_s"], a["start_s"]))
    out: dict[str, Any] = {}
    for c in SPAN_COLUMNS:
        if c == "dur_s":
            out[c] = out["end_s"] - out["start_s"]
        elif c == "stage":
            out[c] = _stage_column(cols, a.pop(c)[order])
        elif c == "role":
            out[c] = pd.Categorical.from_codes(a.pop(c)[order].astype(np.int64), categories=cols.roles)
        else:
            out[c] = a.pop(c)[order]
    return pd.DataFrame(out)  # one block per dtype, as pandas keeps a frame it built itself
