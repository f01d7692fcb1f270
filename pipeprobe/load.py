"""Merging a run directory into pandas DataFrames on one time axis.

:func:`load` reads every process's span file, the membership rows that say
which samples formed each batch, and the resource samples, and returns a
:class:`Run`. Times are seconds from the run start (the earliest run-header
anchor). Spans recorded in worker processes carry a sample id but no batch
id; they are linked to the first delivery of a batch holding that sample
at or after the span ended (so a sample seen in several epochs links to the
right one).

The steps of :func:`load`, each a function below returning a small frozen
record: list the folder without following links (``_list_folder``), read
and check the run headers (``_read_run_headers``, through
:class:`~pipeprobe.tracefile.RunHeader`), put every rank's clock on one axis
and bound the times a record may have (``_align_clocks``), read each
process's header and span records in bounded pieces (``_read_processes``,
``_read_process``, ``_read_span_records``), merge them (``_merge_spans``),
form the batches (``_batches``), link worker spans to them (``_link``), and
read the resource samples (``_resources``). What was missing or damaged is
collected on the way and issued as warnings when ``load`` returns.
"""

from __future__ import annotations

import hashlib
import heapq
import os
import re
import stat
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

import numpy as np
import pandas as pd

from . import tracefile as tf
from ._clocksync import check_ranks, check_step_alignment, plan_alignment
from .errors import RunNotFoundError, TraceFormatError

__all__ = ["Run", "load", "worker_slots", "SPAN_COLUMNS", "BATCH_COLUMNS"]

# Names pipeprobe writes: no leading zeros, so one rank or pid has one name.
_SPAN_FILE = re.compile(r"^spans-r(0|[1-9]\d{0,5})-p([1-9]\d{0,9})\.bin$")
_RUN_HEADER = re.compile(r"^run-r(0|[1-9]\d{0,5})\.json$")
_RES_FILE = re.compile(r"^res-r(0|[1-9]\d{0,5})\.bin$")
_PROC_HEADER = re.compile(r"^spans-r(0|[1-9]\d{0,5})-p([1-9]\d{0,9})\.json$")
_LOOKS_OURS = re.compile(r"^(spans|run|res)-r\d")
_LEAD_S = 60.0  # spans may start this long before the run start (wall-anchor skew)
_LAG_S = 3600.0  # ... or end this long after the run's end (or its files were last written)

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
}


@dataclass
class Run:
    """A loaded run: DataFrames on one time axis plus the headers.

    Attributes
    ----------
    run_dir : Path
    header : dict
        Run header of the lowest rank present.
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

    def whatif(self, **scenario: Any) -> Any:
        """Predict this run under a changed configuration: ``run.whatif(workers=4)``.

        A convenience for :func:`pipeprobe.whatif` (the what-if layer is
        imported only when called); it takes the same keyword arguments
        and returns its :class:`~pipeprobe.whatif.Prediction`.
        """
        from .whatif import whatif

        return whatif(self, **scenario)

    def __repr__(self) -> str:
        return (
            f"<pipeprobe.Run {str(self.run_dir)!r}: {len(self.spans)} spans, "
            f"{len(self.batches)} batches, {self.wall_s:.3f} s>"
        )


class _Problems:
    """What was missing or damaged: collected while loading, issued as warnings when :func:`load` returns."""

    def __init__(self) -> None:
        self.messages: list[str] = []

    def add(self, message: str) -> None:
        # a file name that is not UTF-8 comes from os.listdir with lone surrogates: escape them
        self.messages.append(tf.clean_text(message))

    def warn(self) -> None:
        for message in self.messages:
            warnings.warn(message, stacklevel=3)  # the caller of load()


@dataclass(frozen=True)
class _Folder:
    """The run folder's listing: file names to read, and names skipped because they are not regular files."""

    root: Path
    names: tuple[str, ...]
    not_files: frozenset[str]
    newest_wall_ns: int


@dataclass(frozen=True)
class _TimeAxis:
    """How every process's monotonic clock maps onto the run's axis, and the times a record may have on it."""

    clock: dict[str, Any]
    offsets: dict[int, int]
    t0_ns: int
    lo_ns: int
    hi_ns: int

    def to_axis(self, mono_ns: np.ndarray, h: tf.RunHeader | tf.ProcessHeader) -> np.ndarray:
        """Nanoseconds on the run's clock (not yet relative to ``t0_ns``)."""
        if self.clock["method"] == "shared-monotonic":
            return mono_ns
        if self.clock["method"] == "measured-offsets":
            return mono_ns - self.offsets.get(h.rank if h.rank is not None else -1, 0)
        # Each process's own anchor pair maps its monotonic clock to the wall clock.
        return mono_ns - int(h.anchor_mono_ns) + int(h.anchor_wall_ns)

    def at(self, mono_ns: int, h: tf.RunHeader | tf.ProcessHeader) -> int:
        """One instant, relative to the run start."""
        return int(self.to_axis(np.array([mono_ns], np.int64), h)[0]) - self.t0_ns


@dataclass(frozen=True)
class _Records:
    """One span file's records that passed the checks, with their times on the run's axis (ns from start)."""

    recs: np.ndarray
    start_ns: np.ndarray
    end_ns: np.ndarray
    digest: bytes | None


@dataclass(frozen=True)
class _Process:
    """What one process contributed: its spans (None when its stage table was unusable) and membership rows."""

    rank: int
    pid: int
    name: str
    header: tf.ProcessHeader
    spans: pd.DataFrame | None
    members: pd.DataFrame | None


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


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

    The steps: list the folder (:func:`_list_folder`), read and check the
    run headers (:func:`_read_run_headers`), put the ranks' clocks on one
    axis (:func:`_align_clocks`), read each process's spans
    (:func:`_read_process`), form the batches and link worker spans to them
    (:func:`_batches`, :func:`_link`), and read the resource samples
    (:func:`_resources`).

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
    problems = _Problems()
    try:
        folder = _list_folder(_check_folder(run_dir), problems)
        headers = _read_run_headers(folder)
        _check_names(folder, headers, problems)
        axis, first = _align_clocks(folder, headers, problems)
        wanted = None if ranks is None else {int(r) for r in ranks}
        procs = _read_processes(folder, headers, axis, wanted, problems)
        spans, samples = _merge_spans(procs)
        batches = _batches(spans, samples)
        for message in check_step_alignment(folder.root, batches, axis.clock):
            problems.add(message)
        spans = _link(spans, samples, batches)
        spans["dur_s"] = spans["end_s"] - spans["start_s"]
        spans = spans[list(SPAN_COLUMNS)].sort_values(["start_s", "end_s"], kind="stable").reset_index(drop=True)
        resources = _resources(folder, headers, axis, wanted, problems)
    finally:
        problems.warn()
    return Run(
        run_dir=folder.root,
        header=first,
        spans=spans,
        batches=batches,
        samples=samples[["rank", "batch_id", "sample_id", "ready_s"]],
        resources=resources,
        processes=_process_table(procs),
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


def _list_folder(root: Path, problems: _Problems) -> _Folder:
    """List the folder without following links: a link, pipe or device named like a trace file is skipped."""
    names: list[str] = []
    not_files: set[str] = set()
    newest = 0
    for name in sorted(os.listdir(root)):
        if not _LOOKS_OURS.match(name):
            names.append(name)
            continue
        try:
            st = os.lstat(root / name)
        except FileNotFoundError:  # removed while we looked
            continue
        if not stat.S_ISREG(st.st_mode) and not _RUN_HEADER.match(name):  # a bad run header is an error, later
            not_files.add(name)
            problems.add(
                f"{root / name}: not a regular file (a link, pipe or device); a run folder holds only files "
                "pipeprobe wrote, so remove it; skipped it"
            )
            continue
        names.append(name)
        newest = max(newest, st.st_mtime_ns)
    return _Folder(root, tuple(names), frozenset(not_files), newest)


def _read_run_headers(folder: _Folder) -> dict[int, tf.RunHeader]:
    headers: dict[int, tf.RunHeader] = {}
    for name in folder.names:
        m = _RUN_HEADER.match(name)
        if m:
            path = folder.root / name
            headers[int(m.group(1))] = tf.RunHeader.from_json(tf.read_json(path), path)
    if not headers:
        raise RunNotFoundError(
            f"{str(folder.root)!r} holds no pipeprobe run (no run-r<rank>.json); "
            "pass a folder written by pipeprobe.Probe"
        )
    return headers


def _check_names(folder: _Folder, headers: dict[int, tf.RunHeader], problems: _Problems) -> None:
    """Names that are not pipeprobe's, and ranks that did not close."""
    root = folder.root
    for name in folder.names:
        if _LOOKS_OURS.match(name) and not name.endswith(".tmp") and not (
            _SPAN_FILE.match(name) or _RUN_HEADER.match(name) or _RES_FILE.match(name) or _PROC_HEADER.match(name)
        ):
            problems.add(f"{root / name}: not a file name pipeprobe writes; ignored it")
    for rank, h in sorted(headers.items()):
        if not h.closed:
            problems.add(
                f"{root / f'run-r{rank}.json'}: the run did not close cleanly (killed or still running); "
                "up to one flush interval of spans may be missing"
            )


def _align_clocks(folder: _Folder, headers: dict[int, tf.RunHeader],
                  problems: _Problems) -> tuple[_TimeAxis, dict[str, Any]]:
    """The run's time axis, and the lowest rank's header (its end dropped when it lies outside the run).

    A record may start up to :data:`_LEAD_S` before the run start, and end
    up to :data:`_LAG_S` after the run's own end (its run headers' end
    anchors) or, for a run that did not record its end, after its files
    were last written (never later than now), so that neither a flipped
    bit nor a file time in the future can make a span of years.
    """
    root = folder.root
    as_json = {r: h.to_json() for r, h in headers.items()}
    for message in check_ranks(root, as_json):
        problems.add(message)
    clock, offsets, notes = plan_alignment(root, as_json)
    for message in notes:
        problems.add(message)
    axis = _TimeAxis(clock, offsets, 0, 0, 0)
    starts = {r: int(axis.to_axis(np.array([h.anchor_mono_ns], np.int64), h)[0]) for r, h in headers.items()}
    t0 = min(starts.values())
    newest_wall_ns = min(folder.newest_wall_ns, time.time_ns())
    lo_ns = -int(_LEAD_S * 1e9)
    hi_ns = max(newest_wall_ns - h.anchor_wall_ns + starts[r] - t0 for r, h in headers.items())
    hi_ns += int(_LAG_S * 1e9)
    axis = _TimeAxis(clock, offsets, t0, lo_ns, hi_ns)
    ends = {r: axis.at(h.end_mono_ns, h) for r, h in headers.items() if h.end_mono_ns is not None}
    ends = {r: e for r, e in ends.items() if lo_ns <= e <= hi_ns}
    low = min(headers)
    first = as_json[low]
    if headers[low].end_mono_ns is not None and low not in ends:
        problems.add(f"{root / f'run-r{low}.json'}: its end time is outside the run; ignored it")
        first = {**first, "end_mono_ns": None}
    if len(ends) == len(headers):
        axis = _TimeAxis(clock, offsets, t0, lo_ns, max(ends.values()) + int(_LAG_S * 1e9))
    return axis, first


def _read_processes(folder: _Folder, headers: dict[int, tf.RunHeader], axis: _TimeAxis,
                    wanted: set[int] | None, problems: _Problems) -> list[_Process]:
    """Every process's spans, skipping (with a problem each) files that cannot be trusted."""
    procs: list[_Process] = []
    seen_bodies: dict[bytes, str] = {}
    for name in folder.names:
        m = _SPAN_FILE.match(name)
        if not m or (wanted is not None and int(m.group(1)) not in wanted):
            continue
        proc = _read_process(folder, name, int(m.group(1)), int(m.group(2)), headers, axis, seen_bodies, problems)
        if proc is not None:
            procs.append(proc)
    mains: dict[int, list[str]] = {}
    for p in procs:
        if p.spans is not None and p.header.role == "main":
            mains.setdefault(p.rank, []).append(p.name)
    for rank, files in sorted(mains.items()):
        if len(files) > 1:
            problems.add(f"{folder.root}: {', '.join(files)} all claim to be the main process of rank {rank}")
    bins = set(folder.names) | folder.not_files
    for name in folder.names:
        if _PROC_HEADER.match(name) and name[:-5] + ".bin" not in bins:
            problems.add(f"{folder.root / name}: span file {name[:-5]}.bin is missing; that process recorded nothing")
    return procs


def _read_process(folder: _Folder, name: str, rank: int, pid: int, headers: dict[int, tf.RunHeader],
                  axis: _TimeAxis, seen_bodies: dict[bytes, str], problems: _Problems) -> _Process | None:
    """One process: its header, its records (checked), then its frames; None when skipped."""
    bin_path = folder.root / name
    ph = _process_header(folder, bin_path, rank, headers, axis, problems)
    if ph is None:
        return None
    try:
        got = _read_span_records(bin_path, ph, axis, problems)
    except (TraceFormatError, OSError) as exc:
        problems.add(f"{exc}; skipped this process")
        return None
    if got.digest is not None:
        if got.digest in seen_bodies:
            problems.add(f"{bin_path}: same records as {seen_bodies[got.digest]} (a copied file); skipped it")
            return None
        seen_bodies[got.digest] = name
    is_member = got.recs["kind"] == tf.KIND_MEMBER
    members = _member_frame(rank, got, is_member) if is_member.any() else None
    if len(set(ph.stages)) != len(ph.stages):
        problems.add(f"{bin_path.with_suffix('.json')}: the stage table repeats a name; skipped this process")
        return _Process(rank, pid, name, ph, None, members)
    return _Process(rank, pid, name, ph, _span_frame(rank, pid, ph, got, ~is_member), members)


def _process_header(folder: _Folder, bin_path: Path, rank: int, headers: dict[int, tf.RunHeader],
                    axis: _TimeAxis, problems: _Problems) -> tf.ProcessHeader | None:
    """The checked process header of a span file, or None (with a problem) when the process must be skipped."""
    json_path = bin_path.with_suffix(".json")
    if rank not in headers:
        problems.add(
            f"{bin_path}: there is no run header run-r{rank}.json for its rank (a file of another run?); "
            "skipped this process"
        )
        return None
    if json_path.name in folder.not_files:
        return None  # already named as not a regular file
    if json_path.name not in folder.names:
        problems.add(f"{bin_path}: its process header {json_path.name} is missing; skipped this process")
        return None
    try:
        shared = axis.clock["method"] == "shared-monotonic"
        ph = tf.ProcessHeader.from_json(tf.read_json(json_path), json_path, anchors_required=not shared)
    except (TraceFormatError, OSError) as exc:
        problems.add(f"{exc}; skipped this process")
        return None
    run_id = headers[rank].run_id
    if ph.run_id and run_id and ph.run_id != run_id:
        problems.add(
            f"{json_path}: belongs to run {_short(ph.run_id)}, but run-r{rank}.json to run "
            f"{_short(run_id)} (files of two runs mixed in one folder); skipped this process"
        )
        return None
    return ph


def _read_span_records(path: Path, ph: tf.ProcessHeader, axis: _TimeAxis, problems: _Problems) -> _Records:
    """Read a span file in bounded pieces, dropping (and counting) records that cannot be true."""
    rf = tf.open_records(path, tf.CONTENT_SPANS)
    tf.warn_partial(rf, stacklevel=5)
    if rf.unwritten:
        problems.add(tf.unwritten_message(rf))
    digest = hashlib.blake2b(digest_size=16)
    kept: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
    unknown = outside = reversed_ = 0
    for recs in rf.chunks():
        digest.update(recs.tobytes())
        bad = (recs["stage"] >= len(ph.stages)) | (recs["kind"] > tf.KIND_MEMBER)
        start_ns = axis.to_axis(recs["start_ns"], ph) - axis.t0_ns
        end_ns = axis.to_axis(recs["end_ns"], ph) - axis.t0_ns
        out = ~bad & ((start_ns < axis.lo_ns) | (end_ns > axis.hi_ns))
        rev = ~bad & ~out & (end_ns < start_ns)
        unknown, outside, reversed_ = unknown + int(bad.sum()), outside + int(out.sum()), reversed_ + int(rev.sum())
        keep = ~(bad | out | rev)
        kept.append((recs[keep], start_ns[keep], end_ns[keep]))
    if unknown:
        problems.add(f"{path}: {unknown} records name unknown stages or kinds; dropped them")
    if outside:
        problems.add(
            f"{path}: {outside} records have times outside the run "
            "(before it started or after its files were last written); dropped them"
        )
    if reversed_:
        problems.add(f"{path}: {reversed_} spans end before they start; dropped them")
    if not kept:
        empty = np.zeros(0, np.int64)
        return _Records(np.zeros(0, dtype=tf.SPAN_RECORD), empty, empty, None)
    recs, start_ns, end_ns = (np.concatenate(parts) for parts in zip(*kept, strict=True))
    return _Records(recs, start_ns, end_ns, digest.digest())


def _member_frame(rank: int, got: _Records, is_member: np.ndarray) -> pd.DataFrame:
    mr = got.recs[is_member]
    return pd.DataFrame(
        {
            "rank": rank,
            "batch_id": mr["batch_id"].astype(np.int64),
            "sample_id": mr["sample_id"].astype(np.int64),
            "ready_s": got.end_ns[is_member] / 1e9,
            "epoch": mr["epoch"].astype(np.int64),
        }
    )


def _span_frame(rank: int, pid: int, ph: tf.ProcessHeader, got: _Records, is_span: np.ndarray) -> pd.DataFrame:
    sr = got.recs[is_span]
    cpu = sr["cpu_ns"].astype(np.float64)
    cpu[sr["cpu_ns"] < 0] = np.nan
    return pd.DataFrame(
        {
            "stage": pd.Categorical.from_codes(sr["stage"].astype(np.int64), categories=list(ph.stages)),
            "start_s": got.start_ns[is_span] / 1e9,
            "end_s": got.end_ns[is_span] / 1e9,
            "sample_id": sr["sample_id"].astype(np.int64),
            "batch_id": sr["batch_id"].astype(np.int64),
            "epoch": sr["epoch"].astype(np.int64),
            "pid": pid,
            "tid": sr["tid"].astype(np.int64),
            "rank": rank,
            "cpu_s": cpu / 1e9,
            "error": (sr["flags"] & tf.FLAG_ERROR).astype(bool),
            "role": ph.role,
        }
    )


def _merge_spans(procs: list[_Process]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """All processes' spans in one frame, and all membership rows in another."""
    frames = [p.spans for p in procs if p.spans is not None]
    members = [p.members for p in procs if p.members is not None]
    spans = _empty_spans() if not frames else _concat_spans(frames)
    if members:
        samples = pd.concat(members, ignore_index=True)
    else:
        samples = pd.DataFrame({c: np.zeros(0, np.int64) for c in ("rank", "batch_id", "sample_id", "epoch")})
        samples = samples.assign(ready_s=np.zeros(0))
    return spans, samples


def _process_table(procs: list[_Process]) -> pd.DataFrame:
    rows = [
        {
            "pid": p.pid,
            "ppid": -1 if p.header.ppid is None else int(p.header.ppid),
            "rank": p.rank,
            "role": p.header.role,
            "host": p.header.host,
            "spans": len(p.spans),
            "file": p.name,
        }
        for p in procs
        if p.spans is not None
    ]
    table = pd.DataFrame(rows, columns=["pid", "ppid", "rank", "role", "host", "spans", "file"])
    # each process as one span from its first start to its last end: enough to find the worker slots
    lives = pd.DataFrame(
        [{"rank": p.rank, "pid": p.pid, "role": p.header.role, "start_s": p.spans["start_s"].min(),
          "end_s": p.spans["end_s"].max()} for p in procs if p.spans is not None and len(p.spans)],
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


def _concat_spans(frames: list[pd.DataFrame]) -> pd.DataFrame:
    stages = pd.Index(pd.unique(np.concatenate([f["stage"].cat.categories.to_numpy(object) for f in frames])))
    for f in frames:
        f["stage"] = f["stage"].cat.set_categories(stages)
        f["role"] = f["role"].astype(object)
    out = pd.concat(frames, ignore_index=True)
    out["role"] = out["role"].astype("category")
    return out


def _batches(spans: pd.DataFrame, samples: pd.DataFrame) -> pd.DataFrame:
    waits = spans[(spans["stage"] == "wait") & ~spans["error"]]  # a failed wait delivered nothing
    b = pd.DataFrame(
        {
            "rank": waits["rank"].to_numpy(np.int64),
            "batch_id": waits["batch_id"].to_numpy(np.int64),
            "epoch": waits["epoch"].to_numpy(np.int64),
            "wait_start_s": waits["start_s"].to_numpy(),
            "ready_s": waits["end_s"].to_numpy(),
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
    if len(samples):
        counts = samples.groupby(["rank", "batch_id"]).size().rename("samples").reset_index()
        b = b.merge(counts, on=["rank", "batch_id"], how="left")
        b["samples"] = b["samples"].fillna(0).astype(np.int64)
    else:
        b["samples"] = np.zeros(len(b), np.int64)
    b["wait_s"] = b["ready_s"] - b["wait_start_s"]
    b = b.sort_values(["rank", "batch_id"]).reset_index(drop=True)
    return b[list(BATCH_COLUMNS)]


def _link(spans: pd.DataFrame, samples: pd.DataFrame, batches: pd.DataFrame) -> pd.DataFrame:
    """Give worker spans their batch (via membership) and every span its epoch."""
    spans = spans.copy()
    need = (spans["batch_id"] < 0) & (spans["sample_id"] >= 0)
    if need.any() and len(samples):
        left = spans.loc[need, ["end_s", "sample_id", "rank"]].reset_index()
        left = left.sort_values("end_s", kind="stable")
        right = samples[["ready_s", "sample_id", "rank", "batch_id"]].sort_values("ready_s", kind="stable")
        joined = pd.merge_asof(
            left, right, left_on="end_s", right_on="ready_s", by=["rank", "sample_id"], direction="forward"
        )
        found = joined["batch_id"].notna().to_numpy()
        spans.loc[joined["index"].to_numpy()[found], "batch_id"] = joined["batch_id"].to_numpy()[found].astype(np.int64)
    if len(batches):
        key = batches.set_index(["rank", "batch_id"])["epoch"]
        has = spans["batch_id"] >= 0
        idx = pd.MultiIndex.from_arrays([spans.loc[has, "rank"], spans.loc[has, "batch_id"]])
        ep = key.reindex(idx).to_numpy()
        ok = ~pd.isna(ep)
        fill = spans.loc[has, "epoch"].to_numpy().copy()
        fill[ok] = ep[ok].astype(np.int64)
        spans.loc[has, "epoch"] = fill
    return spans


def _resources(folder: _Folder, headers: dict[int, tf.RunHeader], axis: _TimeAxis, wanted: set[int] | None,
               problems: _Problems) -> pd.DataFrame:
    """Resource samples of every rank (of the wanted ranks), on the run's axis; samples outside the run dropped."""
    parts = []
    for name in folder.names:
        m = _RES_FILE.match(name)
        if not m:
            continue
        rank, path = int(m.group(1)), folder.root / name
        try:
            rf = tf.open_records(path, tf.CONTENT_RESOURCES)
            tf.warn_partial(rf, stacklevel=3)
            if rf.unwritten:
                problems.add(tf.unwritten_message(rf))
            chunks = list(rf.chunks())
        except (TraceFormatError, OSError) as exc:
            problems.add(f"{exc}; resource samples of this rank skipped")
            continue
        if rank not in headers:
            continue
        recs = np.concatenate(chunks) if chunks else np.zeros(0, dtype=tf.RESOURCE_RECORD)
        t_ns = axis.to_axis(recs["t_ns"], headers[rank]) - axis.t0_ns
        out = (t_ns < axis.lo_ns) | (t_ns > axis.hi_ns)
        if out.any():
            problems.add(f"{path}: {int(out.sum())} resource samples have times outside the run; dropped them")
            recs, t_ns = recs[~out], t_ns[~out]
        parts.append(
            pd.DataFrame(
                {
                    "t_s": t_ns / 1e9,
                    "rank": rank,
                    "pid": recs["pid"].astype(np.int64),
                    "core": recs["core"].astype(np.int64),
                    "cpu_pct": recs["cpu_pct"],
                    "rss_bytes": recs["rss_bytes"],
                    "read_bytes": recs["read_bytes"],
                }
            )
        )
    cols = ["t_s", "rank", "pid", "core", "cpu_pct", "rss_bytes", "read_bytes"]
    if not parts:
        return pd.DataFrame({c: np.zeros(0, np.float64 if c in ("t_s", "cpu_pct") else np.int64) for c in cols})
    res = pd.concat(parts, ignore_index=True)[cols].sort_values(["t_s", "pid", "core"]).reset_index(drop=True)
    return res if wanted is None else res[res["rank"].isin(wanted)].reset_index(drop=True)
