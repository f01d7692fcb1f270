"""Reading a run a time range at a time, for the sliced analysis (:mod:`pipeprobe.sliced`).

:func:`scan_run` reads every span file once, in bounded pieces, and keeps
only what does not grow with the span count, plus the per-batch rows:
the run headers and time axis, an index of each file's pieces (the time
each piece covers), the waits and steps (one row per batch), the
membership rows (which sample went into which batch), each process's and
thread's first and last instant, and the resource samples.
:func:`read_range` then builds a :class:`~pipeprobe.load.Run` of the spans
that overlap a time range, with the same columns, order and batch links as
:func:`pipeprobe.load.load` gives those spans, reading only the pieces
whose time covers the range.

The records are checked as :func:`pipeprobe.load.load` checks them (an
unknown stage or kind, times outside the run, a span ending before it
starts: dropped with one problem per file), so both see the same spans.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import _runfolder as _rf
from . import tracefile as tf
from .load import Run, _batches, _link, _move_wait_cpu, _span_columns, _time_ordered_frame, worker_slots

__all__ = ["RunScan", "scan_run", "read_range", "count_records", "latest_first_delivery", "PIECE_RECORDS",
           "SEARCH_ROWS"]

#: Records per indexed piece of a span file (3 MiB): a range reads at most this much beyond what it needs.
PIECE_RECORDS = 1 << 16


@dataclass
class _File:
    """One usable span file: where it is, its header, and its pieces (first record, count, time covered)."""

    rank: int
    pid: int
    name: str
    header: tf.ProcessHeader
    path: Path
    first: np.ndarray
    count: np.ndarray
    lo_ns: np.ndarray
    hi_ns: np.ndarray
    spans: int = 0


@dataclass
class RunScan:
    """What :func:`scan_run` keeps of a run: sizes that grow with batches and samples, not with spans."""

    root: Path
    header: dict[str, Any]
    axis: _rf.TimeAxis
    files: list[_File]
    batches: pd.DataFrame
    samples: pd.DataFrame  # sorted by ready_s; pos: the row's place in the files' order; rank, batch_id 32-bit
    processes: pd.DataFrame
    threads: pd.DataFrame
    resources: pd.DataFrame
    problems: list[str] = field(default_factory=list)
    spans: int = 0
    last_end_s: float = 0.0

    batch_samples: float = 0.0  # the median of samples per batch (of the batches with membership rows)

    def run(self, spans: pd.DataFrame, samples: pd.DataFrame | None = None) -> Run:
        """A :class:`Run` with the whole run's tables and the given spans."""
        return Run(run_dir=self.root, header=self.header, spans=spans, batches=self.batches,
                   samples=self.samples if samples is None else samples, resources=self.resources,
                   processes=self.processes, problems=list(self.problems), clock=self.axis.clock,
                   t0_ns=self.axis.t0_ns)


def _checked(recs: np.ndarray, ph: tf.ProcessHeader, axis: _rf.TimeAxis) -> tuple[np.ndarray, ...]:
    """(keep, start_ns, end_ns, unknown, outside, reversed) of a piece: the checks of ``load``."""
    bad = (recs["stage"] >= len(ph.stages)) | (recs["kind"] > tf.KIND_MEMBER)
    start_ns = axis.to_axis(recs["start_ns"], ph) - axis.t0_ns
    end_ns = axis.to_axis(recs["end_ns"], ph) - axis.t0_ns
    out = ~bad & ((start_ns < axis.lo_ns) | (end_ns > axis.hi_ns))
    rev = ~bad & ~out & (end_ns < start_ns)
    return ~(bad | out | rev), start_ns, end_ns, bad, out, rev


@dataclass
class _Gather:
    """What the scan collects while it reads the files."""

    consumer: list[pd.DataFrame] = field(default_factory=list)
    members: list[dict[str, np.ndarray]] = field(default_factory=list)
    threads: list[pd.DataFrame] = field(default_factory=list)
    lives: list[dict[str, Any]] = field(default_factory=list)
    rows: list[dict[str, Any]] = field(default_factory=list)
    spans: int = 0
    last_end_ns: int | None = None


def scan_run(run_dir: str | Path) -> RunScan:
    """Read a run once, in bounded pieces, keeping the per-batch tables and an index of the span files.

    Parameters
    ----------
    run_dir : path-like

    Returns
    -------
    RunScan

    Raises
    ------
    RunNotFoundError, TraceFormatError
        As :func:`pipeprobe.load` raises them.
    """
    from .load import _check_folder

    problems = _rf.Problems()
    try:
        folder = _rf.list_folder(_check_folder(run_dir), problems)
        headers = _rf.read_run_headers(folder)
        _rf.check_names(folder, headers, problems)
        axis, first = _rf.align_clocks(folder, headers, problems)
        files, got = _scan_files(folder, headers, axis, problems)
        resources = _rf.read_resources(folder, headers, axis, None, problems)
    finally:
        problems.warn()
    return _assemble(folder.root, first, axis, files, got, resources, problems.messages)


def count_records(run_dir: str | Path) -> int:
    """Span records the run's span files hold, from their sizes (none read); 0 when there is no such folder."""
    root = Path(run_dir)
    if not root.is_dir():
        return 0
    return sum(max(0, p.stat().st_size - tf.PREAMBLE_BYTES) // tf.SPAN_RECORD.itemsize
               for p in root.iterdir() if _rf._SPAN_FILE.match(p.name) and p.is_file())


def _scan_files(folder: _rf.Folder, headers: dict[int, tf.RunHeader], axis: _rf.TimeAxis,
                problems: _rf.Problems) -> tuple[list[_File], _Gather]:
    files: list[_File] = []
    got = _Gather()
    seen: dict[bytes, str] = {}
    for name in folder.names:
        m = _rf._SPAN_FILE.match(name)
        if not m:
            continue
        rank, pid = int(m.group(1)), int(m.group(2))
        ph = _rf._process_header(folder, folder.root / name, rank, headers, axis, problems)
        if ph is None:
            continue
        try:
            f = _scan_file(folder.root / name, rank, pid, name, ph, axis, problems, got, seen)
        except (tf.TraceFormatError, OSError) as exc:
            problems.add(f"{exc}; skipped this process")
            continue
        if f is not None:
            files.append(f)
    return files, got


def _scan_file(path: Path, rank: int, pid: int, name: str, ph: tf.ProcessHeader, axis: _rf.TimeAxis,
               problems: _rf.Problems, got: _Gather, seen: dict[bytes, str]) -> _File | None:
    """Index one span file and take its waits, steps, membership rows and thread extents."""
    rf = tf.open_records(path, tf.CONTENT_SPANS)
    tf.warn_partial(rf, stacklevel=6)
    if rf.unwritten:
        problems.add(tf.unwritten_message(rf))
    digest = hashlib.blake2b(digest_size=16)
    index: list[tuple[int, int, int, int]] = []
    counts = np.zeros(3, np.int64)
    consumer, members, threads = [], [], []
    spans = 0
    lo_all, hi_all = None, None
    at = 0
    for first, last in rf.written:
        for a in range(first, last, PIECE_RECORDS):
            recs = _piece(path, a, min(last, a + PIECE_RECORDS) - a)
            digest.update(recs)
            keep, start_ns, end_ns, *bad = _checked(recs, ph, axis)
            counts += [int(x.sum()) for x in bad]
            member = keep & (recs["kind"] == tf.KIND_MEMBER)
            span = keep & ~member
            k = int(span.sum())
            if k:
                index.append((a, len(recs), int(start_ns[span].min()), int(end_ns[span].max())))
                lo_all = min(lo_all, index[-1][2]) if lo_all is not None else index[-1][2]
                hi_all = max(hi_all, index[-1][3]) if hi_all is not None else index[-1][3]
            spans += k
            r = recs[span]
            s0, s1 = start_ns[span], end_ns[span]
            cons = (r["stage"] <= 1)  # entries 0 and 1 of every stage table are wait and step
            consumer.append(pd.DataFrame({
                "stage": np.asarray(ph.stages, object)[r["stage"][cons]], "start_s": s0[cons] / 1e9,
                "end_s": s1[cons] / 1e9, "batch_id": r["batch_id"][cons].astype(np.int64),
                "epoch": r["epoch"][cons].astype(np.int64), "rank": rank,
                "error": (r["flags"][cons] & tf.FLAG_ERROR) != 0,
                "cpu_s": np.where(r["cpu_ns"][cons] < 0, np.nan, r["cpu_ns"][cons] / 1e9)}))
            if member.any():
                mr = recs[member]
                members.append({"rank": np.full(len(mr), rank, np.int32), "batch_id": mr["batch_id"].astype(np.int32),
                                "sample_id": mr["sample_id"].astype(np.int64), "ready_s": end_ns[member] / 1e9})
            if k:
                threads.append(_thread_piece(r, s0, s1, rank, pid, at))
            at += len(recs)
    _count_problems(path, counts, problems)
    d = digest.digest()
    if at:
        if d in seen:
            problems.add(f"{path}: same records as {seen[d]} (a copied file); skipped it")
            return None
        seen[d] = name
    got.members.extend(members)
    if len(set(ph.stages)) != len(ph.stages):
        problems.add(f"{path.with_suffix('.json')}: the stage table repeats a name; skipped this process")
        return None
    got.consumer.extend(consumer)
    got.threads.extend(threads)
    got.spans += spans
    if hi_all is not None:
        got.last_end_ns = hi_all if got.last_end_ns is None else max(got.last_end_ns, hi_all)
        got.lives.append({"rank": rank, "pid": pid, "role": ph.role, "start_s": lo_all / 1e9, "end_s": hi_all / 1e9})
    got.rows.append({"pid": pid, "ppid": -1 if ph.ppid is None else int(ph.ppid), "rank": rank, "role": ph.role,
                     "host": ph.host, "spans": spans, "file": name})
    idx = np.array(index, np.int64).reshape(-1, 4)
    return _File(rank, pid, name, ph, path, idx[:, 0], idx[:, 1], idx[:, 2], idx[:, 3], spans)


def _piece(path: Path, first: int, count: int) -> np.ndarray:
    """Records ``[first, first + count)`` of a span file (fewer if it shrank)."""
    rf = tf.RecordFile(path, tf.SPAN_RECORD, first + count, 0, ((first, first + count),))
    got = list(rf.chunks(max(1, count)))
    return got[0] if got else np.zeros(0, tf.SPAN_RECORD)


def _thread_piece(r: np.ndarray, s0: np.ndarray, s1: np.ndarray, rank: int, pid: int, at: int) -> pd.DataFrame:
    """Per thread of a piece: first and last instant, consumer or not, and its first user span (for order)."""
    user = r["stage"] > 1
    f = pd.DataFrame({"rank": rank, "pid": pid, "tid": r["tid"].astype(np.int64), "start_s": s0 / 1e9,
                      "end_s": s1 / 1e9, "consumer": ~user, "u_start": np.where(user, s0, np.iinfo(np.int64).max),
                      "u_end": s1, "pos": at + np.arange(len(r))})
    f = f.sort_values(["tid", "u_start", "u_end", "pos"], kind="stable")
    g = f.groupby("tid", sort=False)
    return pd.DataFrame({"rank": rank, "pid": pid, "first_s": g["start_s"].min(), "last_s": g["end_s"].max(),
                         "consumer": g["consumer"].any(), "u_start": g["u_start"].first(),
                         "u_end": g["u_end"].first(), "pos": g["pos"].first()}).reset_index()


def _count_problems(path: Path, counts: np.ndarray, problems: _rf.Problems) -> None:
    unknown, outside, reversed_ = (int(x) for x in counts)
    if unknown:
        problems.add(f"{path}: {unknown} records name unknown stages or kinds; dropped them")
    if outside:
        problems.add(f"{path}: {outside} records have times outside the run "
                     "(before it started or after its files were last written); dropped them")
    if reversed_:
        problems.add(f"{path}: {reversed_} spans end before they start; dropped them")


def _assemble(root: Path, first: dict[str, Any], axis: _rf.TimeAxis, files: list[_File], got: _Gather,
              resources: pd.DataFrame, problems: list[str]) -> RunScan:
    """The per-batch tables of the whole run, built as :func:`pipeprobe.load.load` builds them."""
    samples, counts = _membership(got.members)
    consumer = (pd.concat(got.consumer, ignore_index=True) if got.consumer else
                pd.DataFrame({"stage": [], "start_s": [], "end_s": [], "batch_id": [], "epoch": [], "rank": [],
                              "error": [], "cpu_s": []}))
    consumer["stage"] = consumer["stage"].astype("category")
    batches = _batches(consumer, samples.iloc[:0], counts)
    median = float(np.median(counts["samples"].to_numpy())) if len(counts) else 0.0
    processes = pd.DataFrame(got.rows, columns=["pid", "ppid", "rank", "role", "host", "spans", "file"])
    slots = worker_slots(pd.DataFrame(got.lives, columns=["rank", "pid", "role", "start_s", "end_s"]))
    processes["slot"] = [slots.get((int(r), int(p)), 0) for r, p in zip(processes["rank"], processes["pid"], strict=True)]
    threads = _thread_table(got.threads, files)
    return RunScan(root=root, header=first, axis=axis, files=files, batches=batches,
                   samples=samples, batch_samples=median, processes=processes,
                   threads=threads, resources=resources, problems=problems, spans=got.spans,
                   last_end_s=(got.last_end_ns / 1e9) if got.last_end_ns is not None else 0.0)


def _membership(members: list[dict[str, np.ndarray]]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The membership rows sorted by ``ready_s`` (stable), ``pos`` their place in the files' order, in narrow
    types (about 28 bytes a row; ``members`` is emptied as it is read); and their count per batch (``rank,
    batch_id, samples``, sorted, as ``groupby(["rank", "batch_id"]).size()`` gives it)."""
    dtypes = {"rank": np.int32, "batch_id": np.int32, "sample_id": np.int64, "ready_s": np.float64}
    cols = {c: np.concatenate([m.pop(c) for m in members]) if members else np.zeros(0, t) for c, t in dtypes.items()}
    members.clear()
    key, n = np.unique(cols["rank"].astype(np.int64) * (1 << 33) + cols["batch_id"] + (1 << 32), return_counts=True)
    counts = pd.DataFrame({"rank": key >> 33, "batch_id": (key & ((1 << 33) - 1)) - (1 << 32), "samples": n})
    del key, n
    order = np.argsort(cols["ready_s"], kind="stable")
    for c in dtypes:  # a column at a time: one copy more at most
        cols[c] = cols[c][order]
    cols["pos"] = order.astype(np.int32 if len(order) < (1 << 31) else np.int64)
    return pd.DataFrame(cols, copy=False), counts


def _thread_table(pieces: list[pd.DataFrame], files: list[_File]) -> pd.DataFrame:
    """One row per thread: ``rank, pid, tid, first_s, last_s, consumer, role`` and ``order``, the order in which
    its first stage span comes in the time-ordered spans (the thread order of :func:`pipeprobe.nesting.span_pieces`)."""
    cols = ["rank", "pid", "tid", "first_s", "last_s", "consumer", "u_start", "u_end", "pos"]
    t = pd.concat(pieces, ignore_index=True) if pieces else pd.DataFrame({c: [] for c in cols})
    file_no = {(f.rank, f.pid): i for i, f in enumerate(files)}
    t = t[[(int(r), int(p)) in file_no for r, p in zip(t["rank"], t["pid"], strict=True)]]
    t = t.assign(file=[file_no[(int(r), int(p))] for r, p in zip(t["rank"], t["pid"], strict=True)])
    t = t.sort_values(["rank", "pid", "tid", "u_start", "u_end", "file", "pos"], kind="stable")
    g = t.groupby(["rank", "pid", "tid"], sort=True)
    out = pd.DataFrame({"first_s": g["first_s"].min(), "last_s": g["last_s"].max(), "consumer": g["consumer"].any(),
                        "u_start": g["u_start"].first(), "u_end": g["u_end"].first(), "file": g["file"].first(),
                        "pos": g["pos"].first()}).reset_index()
    role = {(f.rank, f.pid): f.header.role for f in files}
    out["role"] = [role[(int(r), int(p))] for r, p in zip(out["rank"], out["pid"], strict=True)]
    order = np.lexsort((out["pos"], out["file"], out["u_end"], out["u_start"]))
    out["order"] = np.argsort(order)
    return out


def _joined(pieces: list[np.ndarray], dtype: Any) -> np.ndarray:
    return np.concatenate(pieces) if pieces else np.zeros(0, dtype)


def _file_range(f: _File, axis: _rf.TimeAxis, lo_ns: int, hi_ns: int,
                thread: tuple[int, int, int] | None = None) -> _rf.Records:
    """The checked span records of one file that overlap ``[lo_ns, hi_ns]``, read from the pieces that do."""
    pick = np.flatnonzero((f.lo_ns <= hi_ns) & (f.hi_ns >= lo_ns))
    recs, s0, s1 = [], [], []
    for i in pick:
        r = _piece(f.path, int(f.first[i]), int(f.count[i]))
        keep, start_ns, end_ns, *_ = _checked(r, f.header, axis)
        keep &= (r["kind"] != tf.KIND_MEMBER) & (end_ns >= lo_ns) & (start_ns <= hi_ns)
        if thread is not None:
            keep &= r["tid"] == thread[2]
        recs.append(r[keep])
        s0.append(start_ns[keep])
        s1.append(end_ns[keep])
    return _rf.Records(_joined(recs, tf.SPAN_RECORD), _joined(s0, np.int64), _joined(s1, np.int64), None)


def read_range(scan: RunScan, lo_s: float, hi_s: float, link_hi_s: float | None = None,
               thread: tuple[int, int, int] | None = None) -> Run:
    """The run's spans that overlap ``[lo_s, hi_s]``, as :func:`pipeprobe.load.load` gives them.

    Worker spans are linked to their batch through the membership rows that
    became ready in ``[lo_s, link_hi_s]`` (default ``hi_s``): a span whose
    batch was delivered later stays unlinked (batch -1). With ``thread``
    (rank, pid, tid), only that thread's spans.
    """
    lo_ns = -np.iinfo(np.int64).max if lo_s == -np.inf else int(np.floor(lo_s * 1e9)) - 1
    hi_ns = np.iinfo(np.int64).max if hi_s == np.inf else int(np.ceil(hi_s * 1e9)) + 1
    files = [f for f in scan.files if thread is None or (f.rank, f.pid) == thread[:2]]
    parts = [(f.rank, f.pid, f.header, _file_range(f, scan.axis, lo_ns, hi_ns, thread)) for f in files]
    cols = _span_columns(parts)
    _move_wait_cpu(cols)
    top = hi_s if link_hi_s is None else link_hi_s
    samples = _samples_between(scan.samples, lo_s, top)
    _link(cols, samples, scan.batches)
    return scan.run(_time_ordered_frame(cols), samples)


def _samples_between(sm: pd.DataFrame, lo_s: float, hi_s: float) -> pd.DataFrame:
    """The membership rows ready in ``[lo_s, hi_s]`` as :func:`pipeprobe.load.load` has them: in the files'
    order, with their row numbers there as index, 64-bit."""
    ready = sm["ready_s"].to_numpy(np.float64)
    a, b = np.searchsorted(ready, lo_s, side="left"), np.searchsorted(ready, hi_s, side="right")
    pos = sm["pos"].to_numpy()[a:b]
    order = np.argsort(pos, kind="stable")
    return pd.DataFrame({c: sm[c].to_numpy()[a:b][order].astype(np.float64 if c == "ready_s" else np.int64)
                         for c in ("rank", "batch_id", "sample_id", "ready_s")}, index=pos[order].astype(np.int64))


#: Membership rows searched at once for the first delivery of a span's sample (bounds that search's memory).
SEARCH_ROWS = 1 << 20


def latest_first_delivery(scan: RunScan, end_s: np.ndarray, rank: np.ndarray, sample_id: np.ndarray) -> float:
    """Per span (its end, rank and sample), the first membership row of its sample ready at or after it ended,
    as :func:`pipeprobe.load.load` links them: the latest of their ready times (-inf when none).

    The rows are searched :data:`SEARCH_ROWS` at a time from the earliest end on, each span until its row
    is found: the first match in a stretch of rows in delivery order is the first of all, as no earlier row
    was left out.
    """
    sm = scan.samples
    ready = sm["ready_s"].to_numpy(np.float64)
    left = pd.DataFrame({"end_s": end_s, "rank": rank.astype(np.int32),
                         "sample_id": sample_id.astype(np.int64)}).sort_values("end_s", kind="stable")
    latest, a = -np.inf, 0
    while len(left):
        a = max(a, int(np.searchsorted(ready, left["end_s"].iloc[0], side="left")))
        if a >= len(ready):
            break
        b = min(len(ready), a + SEARCH_ROWS)
        got = pd.merge_asof(left, sm.iloc[a:b], left_on="end_s", right_on="ready_s", by=["rank", "sample_id"],
                            direction="forward")["ready_s"].to_numpy(np.float64)
        found = ~np.isnan(got)
        if found.any():
            latest = max(latest, float(got[found].max()))
        left = left.iloc[np.flatnonzero(~found)]
        a = b
    return latest
