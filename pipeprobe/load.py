"""Merging a run directory into pandas DataFrames on one time axis.

:func:`load` reads every process's span file, the membership rows that say
which samples formed each batch, and the resource samples, and returns a
:class:`Run`. Times are seconds from the run start (the earliest run-header
anchor). Spans recorded in worker processes carry a sample id but no batch
id; they are linked to the first delivery of a batch holding that sample
at or after the span ended (so a sample seen in several epochs links to the
right one).
"""

from __future__ import annotations

import hashlib
import os
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

import numpy as np
import pandas as pd

from . import tracefile as tf
from .errors import RunNotFoundError, TraceFormatError
from .record._clocksync import check_ranks, check_step_alignment, plan_alignment

__all__ = ["Run", "load", "SPAN_COLUMNS", "BATCH_COLUMNS"]

# Names pipeprobe writes: no leading zeros, so one rank or pid has one name.
_SPAN_FILE = re.compile(r"^spans-r(0|[1-9]\d{0,5})-p([1-9]\d{0,9})\.bin$")
_RUN_HEADER = re.compile(r"^run-r(0|[1-9]\d{0,5})\.json$")
_RES_FILE = re.compile(r"^res-r(0|[1-9]\d{0,5})\.bin$")
_PROC_HEADER = re.compile(r"^spans-r(0|[1-9]\d{0,5})-p([1-9]\d{0,9})\.json$")
_LOOKS_OURS = re.compile(r"^(spans|run|res)-r\d")
_NS_MAX = 2**62  # clock readings and anchors are int64 nanoseconds
_MAX_STAGES = 65536  # stage ids are uint16
_LEAD_S = 60.0  # spans may start this long before the run start (wall-anchor skew)
_LAG_S = 3600.0  # ... or end this long after the run's files were last written

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
        One row per process file: ``pid, ppid, rank, role, host, spans, file``.
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


def _problem(problems: list[str], message: str) -> None:
    problems.append(message)
    warnings.warn(message, stacklevel=3)


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _int_field(path: Path, h: dict[str, Any], key: str, lo: int, hi: int, required: bool = False) -> int | None:
    """Return header field ``key`` after checking it is a whole number in ``[lo, hi]``."""
    value = h.get(key)
    if value is None:
        if required:
            raise TraceFormatError(f"{path}: header field {key!r} is missing; the header is damaged, re-record the run")
        return None
    if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
        raise TraceFormatError(
            f"{path}: header field {key!r} is {_short(value)}, expected a whole number from {lo} to {hi}; "
            "the header is damaged, re-record the run"
        )
    return value


def _check_run_header(path: Path, h: dict[str, Any]) -> None:
    for key in ("anchor_mono_ns", "anchor_wall_ns"):
        _int_field(path, h, key, 0, _NS_MAX, required=True)
    _int_field(path, h, "end_mono_ns", 0, _NS_MAX)
    _int_field(path, h, "cores", 1, 1 << 20)
    _int_field(path, h, "batches", 0, 2**31 - 1)
    for key in ("sample_interval_s", "flush_interval_s"):
        value = h.get(key)
        if value is not None and (
            isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 <= value <= 86400
        ):
            raise TraceFormatError(
                f"{path}: header field {key!r} is {_short(value)}, expected seconds from 0 to 86400; "
                "the header is damaged, re-record the run"
            )


def _check_process_header(path: Path, h: dict[str, Any]) -> list[str]:
    """Check a process header; return its stage table."""
    for key in ("anchor_mono_ns", "anchor_wall_ns"):
        _int_field(path, h, key, 0, _NS_MAX)
    _int_field(path, h, "ppid", -1, 2**32)
    stages = h.get("stages", [])
    if not isinstance(stages, list) or len(stages) > _MAX_STAGES or not all(isinstance(s, str) for s in stages):
        raise TraceFormatError(
            f"{path}: header field 'stages' must be a list of at most {_MAX_STAGES} names, "
            f"got {_short(stages)}; the header is damaged"
        )
    return stages


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
    root = Path(run_dir)
    if root.exists() and not root.is_dir():
        raise RunNotFoundError(f"{str(root)!r} is a file, not a run directory; pass the folder given to Probe(out_dir)")
    if not root.is_dir():
        raise RunNotFoundError(f"run directory {str(root)!r} does not exist; pass the folder given to Probe(out_dir)")
    names = sorted(os.listdir(root))
    headers: dict[int, dict[str, Any]] = {}
    for name in names:
        m = _RUN_HEADER.match(name)
        if m:
            h = tf.read_json(root / name)
            _check_run_header(root / name, h)
            headers[int(m.group(1))] = h
    if not headers:
        raise RunNotFoundError(
            f"{str(root)!r} holds no pipeprobe run (no run-r<rank>.json); pass a folder written by pipeprobe.Probe"
        )
    problems: list[str] = []
    for name in names:
        if _LOOKS_OURS.match(name) and not name.endswith(".tmp") and not (
            _SPAN_FILE.match(name) or _RUN_HEADER.match(name) or _RES_FILE.match(name) or _PROC_HEADER.match(name)
        ):
            _problem(problems, f"{root / name}: not a file name pipeprobe writes; ignored it")
    for rank, h in sorted(headers.items()):
        if not h.get("closed"):
            _problem(
                problems,
                f"{root / f'run-r{rank}.json'}: the run did not close cleanly (killed or still running); "
                "up to one flush interval of spans may be missing",
            )
    # Several ranks: one job? all there? how do their clocks line up?
    for message in check_ranks(root, headers):
        _problem(problems, message)
    clock, offsets, notes = plan_alignment(root, headers)
    for message in notes:
        _problem(problems, message)
    first = headers[min(headers)]
    wanted = None if ranks is None else {int(r) for r in ranks}

    def to_axis(mono_ns: np.ndarray, h: dict[str, Any]) -> np.ndarray:
        if clock["method"] == "shared-monotonic":
            return mono_ns
        if clock["method"] == "measured-offsets":
            r = h.get("rank")
            return mono_ns - offsets.get(r if isinstance(r, int) else -1, 0)
        return mono_ns - int(h["anchor_mono_ns"]) + int(h["anchor_wall_ns"])

    starts = [int(to_axis(np.array([int(h["anchor_mono_ns"])]), h)[0]) for h in headers.values()]
    t0 = min(starts)
    # No record can end after its file was last written: bound the time axis
    # by the newest file time, so a flipped bit cannot make a 100-year span.
    newest_wall_ns = max(os.stat(root / n).st_mtime_ns for n in names if _LOOKS_OURS.match(n))
    lo_ns = -int(_LEAD_S * 1e9)
    hi_ns = max(newest_wall_ns - int(h["anchor_wall_ns"]) + s - t0 for h, s in zip(headers.values(), starts, strict=True))
    hi_ns += int(_LAG_S * 1e9)
    end = first.get("end_mono_ns")
    if end is not None and not lo_ns <= int(to_axis(np.array([end]), first)[0]) - t0 <= hi_ns:
        _problem(problems, f"{root / f'run-r{min(headers)}.json'}: its end time is outside the run; ignored it")
        first = {**first, "end_mono_ns": None}

    frames: list[pd.DataFrame] = []
    members: list[pd.DataFrame] = []
    procs: list[dict[str, Any]] = []
    seen_json = set()
    seen_bodies: dict[bytes, str] = {}
    mains: dict[int, list[str]] = {}
    for name in names:
        m = _SPAN_FILE.match(name)
        if not m:
            continue
        rank, pid = int(m.group(1)), int(m.group(2))
        bin_path = root / name
        json_path = bin_path.with_suffix(".json")
        seen_json.add(json_path.name)
        if wanted is not None and rank not in wanted:
            continue
        if rank not in headers:
            _problem(
                problems,
                f"{bin_path}: there is no run header run-r{rank}.json for its rank (a file of another run?); "
                "skipped this process",
            )
            continue
        if not json_path.exists():
            _problem(problems, f"{bin_path}: its process header {json_path.name} is missing; skipped this process")
            continue
        try:
            ph = tf.read_json(json_path)
            stages = _check_process_header(json_path, ph)
            if clock["method"] != "shared-monotonic":
                for key in ("anchor_mono_ns", "anchor_wall_ns"):
                    _int_field(json_path, ph, key, 0, _NS_MAX, required=True)
            recs = tf.read_records(bin_path, tf.CONTENT_SPANS)
        except (TraceFormatError, OSError) as exc:
            _problem(problems, f"{exc}; skipped this process")
            continue
        run_id = headers[rank].get("run_id")
        if ph.get("run_id") and run_id and ph.get("run_id") != run_id:
            _problem(
                problems,
                f"{json_path}: belongs to run {_short(ph.get('run_id'))}, but run-r{rank}.json to run "
                f"{_short(run_id)} (files of two runs mixed in one folder); skipped this process",
            )
            continue
        if len(recs):
            digest = hashlib.blake2b(recs.tobytes(), digest_size=16).digest()
            if digest in seen_bodies:
                _problem(problems, f"{bin_path}: same records as {seen_bodies[digest]} (a copied file); skipped it")
                continue
            seen_bodies[digest] = name
        bad = (recs["stage"] >= len(stages)) | (recs["kind"] > tf.KIND_MEMBER)
        if bad.any():
            _problem(problems, f"{bin_path}: {int(bad.sum())} records name unknown stages or kinds; dropped them")
            recs = recs[~bad]
        # Each process's own anchor pair maps its monotonic clock to the wall clock.
        start_ns = to_axis(recs["start_ns"], ph) - t0
        end_ns = to_axis(recs["end_ns"], ph) - t0
        outside = (start_ns < lo_ns) | (end_ns > hi_ns)
        if outside.any():
            _problem(
                problems,
                f"{bin_path}: {int(outside.sum())} records have times outside the run "
                "(before it started or after its files were last written); dropped them",
            )
            keep = ~outside
            recs, start_ns, end_ns = recs[keep], start_ns[keep], end_ns[keep]
        reversed_ = end_ns < start_ns
        if reversed_.any():
            _problem(problems, f"{bin_path}: {int(reversed_.sum())} spans end before they start; dropped them")
            keep = ~reversed_
            recs, start_ns, end_ns = recs[keep], start_ns[keep], end_ns[keep]
        is_member = recs["kind"] == tf.KIND_MEMBER
        if is_member.any():
            mr = recs[is_member]
            members.append(
                pd.DataFrame(
                    {
                        "rank": rank,
                        "batch_id": mr["batch_id"].astype(np.int64),
                        "sample_id": mr["sample_id"].astype(np.int64),
                        "ready_s": end_ns[is_member] / 1e9,
                        "epoch": mr["epoch"].astype(np.int64),
                    }
                )
            )
        sr = recs[~is_member]
        if len(set(stages)) != len(stages):
            _problem(problems, f"{json_path}: the stage table repeats a name; skipped this process")
            continue
        cat = pd.Categorical.from_codes(sr["stage"].astype(np.int64), categories=stages)
        cpu = sr["cpu_ns"].astype(np.float64)
        cpu[sr["cpu_ns"] < 0] = np.nan
        frames.append(
            pd.DataFrame(
                {
                    "stage": cat,
                    "start_s": start_ns[~is_member] / 1e9,
                    "end_s": end_ns[~is_member] / 1e9,
                    "sample_id": sr["sample_id"].astype(np.int64),
                    "batch_id": sr["batch_id"].astype(np.int64),
                    "epoch": sr["epoch"].astype(np.int64),
                    "pid": pid,
                    "tid": sr["tid"].astype(np.int64),
                    "rank": rank,
                    "cpu_s": cpu / 1e9,
                    "error": (sr["flags"] & tf.FLAG_ERROR).astype(bool),
                    "role": str(ph.get("role", "worker")),
                }
            )
        )
        if ph.get("role") == "main":
            mains.setdefault(rank, []).append(name)
        procs.append(
            {
                "pid": pid,
                "ppid": -1 if ph.get("ppid") is None else int(ph["ppid"]),
                "rank": rank,
                "role": str(ph.get("role", "worker")),
                "host": str(ph.get("host", "")),
                "spans": int((~is_member).sum()),
                "file": name,
            }
        )
    for rank, files in sorted(mains.items()):
        if len(files) > 1:
            _problem(problems, f"{root}: {', '.join(files)} all claim to be the main process of rank {rank}")
    for name in names:
        if _PROC_HEADER.match(name) and name not in seen_json:
            _problem(problems, f"{root / name}: span file {name[:-5]}.bin is missing; that process recorded nothing")

    spans = _empty_spans() if not frames else _concat_spans(frames)
    samples = (
        pd.concat(members, ignore_index=True)
        if members
        else pd.DataFrame({c: np.zeros(0, np.int64) for c in ("rank", "batch_id", "sample_id", "epoch")}).assign(
            ready_s=np.zeros(0)
        )
    )
    batches = _batches(spans, samples)
    for message in check_step_alignment(root, batches, clock):
        _problem(problems, message)
    spans = _link(spans, samples, batches)
    spans["dur_s"] = spans["end_s"] - spans["start_s"]
    spans = spans[list(SPAN_COLUMNS)].sort_values(["start_s", "end_s"], kind="stable").reset_index(drop=True)
    resources = _resources(root, names, headers, to_axis, t0, problems)
    if wanted is not None:
        resources = resources[resources["rank"].isin(wanted)].reset_index(drop=True)
    processes = pd.DataFrame(procs, columns=["pid", "ppid", "rank", "role", "host", "spans", "file"])
    return Run(
        run_dir=root,
        header=first,
        spans=spans,
        batches=batches,
        samples=samples[["rank", "batch_id", "sample_id", "ready_s"]],
        resources=resources,
        processes=processes,
        problems=problems,
        clock=clock,
        t0_ns=t0,
    )


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


def _resources(root: Path, names: list[str], headers: dict[int, dict[str, Any]], to_axis: Any, t0: int,
               problems: list[str]) -> pd.DataFrame:
    parts = []
    for name in names:
        m = _RES_FILE.match(name)
        if not m:
            continue
        try:
            recs = tf.read_records(root / name, tf.CONTENT_RESOURCES)
        except (TraceFormatError, OSError) as exc:
            _problem(problems, f"{exc}; resource samples of this rank skipped")
            continue
        h = headers.get(int(m.group(1)))
        if h is None:
            continue
        parts.append(
            pd.DataFrame(
                {
                    "t_s": (to_axis(recs["t_ns"], h) - t0) / 1e9,
                    "rank": int(m.group(1)),
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
    return pd.concat(parts, ignore_index=True)[cols].sort_values(["t_s", "pid", "core"]).reset_index(drop=True)
