"""Reading a run folder, one file at a time: the steps of :func:`pipeprobe.load.load` that touch files.

List the folder without following links (:func:`list_folder`), read and
check the run headers (:func:`read_run_headers`), put every rank's clock
on one axis and bound the times a record may have (:func:`align_clocks`),
read each process's header and span records in bounded pieces
(:func:`read_processes`), and read the resource samples
(:func:`read_resources`). What was missing or damaged is collected in a
:class:`Problems` and issued as warnings when ``load`` returns.
"""

from __future__ import annotations

import hashlib
import os
import re
import stat
import time
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import tracefile as tf
from .errors import RunNotFoundError, TraceFormatError
from .record._clocksync import check_ranks, plan_alignment

# Names pipeprobe writes: no leading zeros, so one rank or pid has one name.
_SPAN_FILE = re.compile(r"^spans-r(0|[1-9]\d{0,5})-p([1-9]\d{0,9})\.bin$")
_RUN_HEADER = re.compile(r"^run-r(0|[1-9]\d{0,5})\.json$")
_RES_FILE = re.compile(r"^res-r(0|[1-9]\d{0,5})\.bin$")
_PROC_HEADER = re.compile(r"^spans-r(0|[1-9]\d{0,5})-p([1-9]\d{0,9})\.json$")
_LOOKS_OURS = re.compile(r"^(spans|run|res)-r\d")
_LEAD_S = 60.0  # spans may start this long before the run start (wall-anchor skew)
_LAG_S = 3600.0  # ... or end this long after the run's end (or its files were last written)



class Problems:
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
class Folder:
    """The run folder's listing: file names to read, and names skipped because they are not regular files."""

    root: Path
    names: tuple[str, ...]
    not_files: frozenset[str]
    newest_wall_ns: int


@dataclass(frozen=True)
class TimeAxis:
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
class Records:
    """One span file's records that passed the checks, with their times on the run's axis (ns from start)."""

    recs: np.ndarray
    start_ns: np.ndarray
    end_ns: np.ndarray
    digest: bytes | None


@dataclass(frozen=True)
class Process:
    """What one process contributed: its span records (None when its stage table was unusable) and membership rows.

    ``spans`` holds the raw records of its spans (no membership rows) and their times: about 64 bytes a
    span, less than the merged frame, so that :func:`pipeprobe.load.load` can build each column of
    :attr:`~pipeprobe.load.Run.spans` once, straight from the records.
    """

    rank: int
    pid: int
    name: str
    header: tf.ProcessHeader
    spans: Records | None
    members: pd.DataFrame | None

    @property
    def span_count(self) -> int:
        return 0 if self.spans is None else len(self.spans.recs)


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def list_folder(root: Path, problems: Problems) -> Folder:
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
    return Folder(root, tuple(names), frozenset(not_files), newest)


def read_run_headers(folder: Folder) -> dict[int, tf.RunHeader]:
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


def check_names(folder: Folder, headers: dict[int, tf.RunHeader], problems: Problems) -> None:
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


def align_clocks(folder: Folder, headers: dict[int, tf.RunHeader],
                  problems: Problems) -> tuple[TimeAxis, dict[str, Any]]:
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
    axis = TimeAxis(clock, offsets, 0, 0, 0)
    starts = {r: int(axis.to_axis(np.array([h.anchor_mono_ns], np.int64), h)[0]) for r, h in headers.items()}
    t0 = min(starts.values())
    newest_wall_ns = min(folder.newest_wall_ns, time.time_ns())
    lo_ns = -int(_LEAD_S * 1e9)
    hi_ns = max(newest_wall_ns - h.anchor_wall_ns + starts[r] - t0 for r, h in headers.items())
    hi_ns += int(_LAG_S * 1e9)
    axis = TimeAxis(clock, offsets, t0, lo_ns, hi_ns)
    ends = {r: axis.at(h.end_mono_ns, h) for r, h in headers.items() if h.end_mono_ns is not None}
    ends = {r: e for r, e in ends.items() if lo_ns <= e <= hi_ns}
    low = min(headers)
    first = as_json[low]
    if headers[low].end_mono_ns is not None and low not in ends:
        problems.add(f"{root / f'run-r{low}.json'}: its end time is outside the run; ignored it")
        first = {**first, "end_mono_ns": None}
    if len(ends) == len(headers):
        axis = TimeAxis(clock, offsets, t0, lo_ns, max(ends.values()) + int(_LAG_S * 1e9))
    return axis, first


def read_processes(folder: Folder, headers: dict[int, tf.RunHeader], axis: TimeAxis,
                    wanted: set[int] | None, problems: Problems) -> list[Process]:
    """Every process's spans, skipping (with a problem each) files that cannot be trusted."""
    procs: list[Process] = []
    seen_bodies: dict[bytes, str] = {}
    for name in folder.names:
        m = _SPAN_FILE.match(name)
        if not m or (wanted is not None and int(m.group(1)) not in wanted):
            continue
        proc = read_process(folder, name, int(m.group(1)), int(m.group(2)), headers, axis, seen_bodies, problems)
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


def read_process(folder: Folder, name: str, rank: int, pid: int, headers: dict[int, tf.RunHeader],
                  axis: TimeAxis, seen_bodies: dict[bytes, str], problems: Problems) -> Process | None:
    """One process: its header, its records (checked), then its frames; None when skipped."""
    bin_path = folder.root / name
    ph = _process_header(folder, bin_path, rank, headers, axis, problems)
    if ph is None:
        return None
    try:
        got = read_span_records(bin_path, ph, axis, problems)
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
        return Process(rank, pid, name, ph, None, members)
    return Process(rank, pid, name, ph, _only_spans(got, is_member), members)


def _process_header(folder: Folder, bin_path: Path, rank: int, headers: dict[int, tf.RunHeader],
                    axis: TimeAxis, problems: Problems) -> tf.ProcessHeader | None:
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


#: A span record as one opaque item of its size (a fast copy of selected records).
_RAW_SPAN = np.dtype((np.void, tf.SPAN_RECORD.itemsize))


def read_span_records(path: Path, ph: tf.ProcessHeader, axis: TimeAxis, problems: Problems) -> Records:
    """Read a span file in bounded pieces, dropping (and counting) records that cannot be true."""
    rf = tf.open_records(path, tf.CONTENT_SPANS)
    tf.warn_partial(rf, stacklevel=5)
    if rf.unwritten:
        problems.add(tf.unwritten_message(rf))
    digest = hashlib.blake2b(digest_size=16)
    # the kept records go straight into arrays sized for the whole file (no list of pieces to join)
    size = rf.count - rf.unwritten  # records in holes of a sparse file are never read
    recs_out = np.empty(size, dtype=tf.SPAN_RECORD)
    start_out, end_out = np.empty(size, np.int64), np.empty(size, np.int64)
    n = unknown = outside = reversed_ = 0
    seen = False
    for recs in rf.chunks():
        digest.update(recs)  # the buffer itself: no copy
        bad = (recs["stage"] >= len(ph.stages)) | (recs["kind"] > tf.KIND_MEMBER)
        start_ns = axis.to_axis(recs["start_ns"], ph) - axis.t0_ns
        end_ns = axis.to_axis(recs["end_ns"], ph) - axis.t0_ns
        out = ~bad & ((start_ns < axis.lo_ns) | (end_ns > axis.hi_ns))
        rev = ~bad & ~out & (end_ns < start_ns)
        unknown, outside, reversed_ = unknown + int(bad.sum()), outside + int(out.sum()), reversed_ + int(rev.sum())
        keep = ~(bad | out | rev)
        k = int(keep.sum())
        if k == len(recs):  # the usual chunk: every record kept, copied as it is
            recs_out[n:n + k], start_out[n:n + k], end_out[n:n + k] = recs, start_ns, end_ns
        else:  # records as opaque bytes: numpy picks those of a structured type field by field, far slower
            recs_out[n:n + k] = recs.view(_RAW_SPAN)[keep].view(tf.SPAN_RECORD)
            start_out[n:n + k], end_out[n:n + k] = start_ns[keep], end_ns[keep]
        n += k
        seen = True
    if unknown:
        problems.add(f"{path}: {unknown} records name unknown stages or kinds; dropped them")
    if outside:
        problems.add(
            f"{path}: {outside} records have times outside the run "
            "(before it started or after its files were last written); dropped them"
        )
    if reversed_:
        problems.add(f"{path}: {reversed_} spans end before they start; dropped them")
    if not seen:
        empty = np.zeros(0, np.int64)
        return Records(np.zeros(0, dtype=tf.SPAN_RECORD), empty, empty, None)
    return Records(_fit(recs_out, n), _fit(start_out, n), _fit(end_out, n), digest.digest())


def _fit(a: np.ndarray, n: int) -> np.ndarray:
    """The first ``n`` entries; a copy when many were dropped, so the unused rest is freed."""
    return a[:n] if n >= 0.9 * len(a) else a[:n].copy()


def _member_frame(rank: int, got: Records, is_member: np.ndarray) -> pd.DataFrame:
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


def _only_spans(got: Records, is_member: np.ndarray) -> Records:
    """The records without the membership rows (no copy when there are none)."""
    if not is_member.any():
        return got
    keep = ~is_member
    return Records(got.recs[keep], got.start_ns[keep], got.end_ns[keep], got.digest)


def read_resources(folder: Folder, headers: dict[int, tf.RunHeader], axis: TimeAxis, wanted: set[int] | None,
               problems: Problems) -> pd.DataFrame:
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
