"""The on-disk trace format: fixed-size binary records plus JSON headers.

A run directory holds, per rank ``R`` and process ``P``::

    run-rR.json          run header of rank R (written by its main process)
    spans-rR-pP.bin      span records of process P (fixed 48-byte records)
    spans-rR-pP.json     process header: pid, role, clock anchors, stage table
    res-rR.bin           resource samples of rank R (fixed 40-byte records)

Every ``.bin`` file starts with a 16-byte preamble::

    offset  size  field
    0       6     magic  b"PPRBIN"
    6       2     format version (little-endian uint16), currently 1
    8       2     record size in bytes (uint16)
    10      2     content: 1 = spans, 2 = resource samples (uint16)
    12      4     reserved, zero

followed by records with the layouts :data:`SPAN_RECORD` and
:data:`RESOURCE_RECORD` (little-endian, no padding). The record count is
never stored: it follows from the file size, so a file cut short by a
killed process loses only its last, partial record. Nothing on the load
path unpickles or evaluates anything; JSON headers are capped in size and
in content, and read into :class:`RunHeader` and :class:`ProcessHeader`,
whose ``from_json`` checks every number against what a run folder can
hold; span files are read in bounded pieces, skipping the holes of a
sparse file.
"""

from __future__ import annotations

import errno
import json
import os
import re
import stat
import struct
import warnings
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, ClassVar, Iterable, Iterator, Mapping

import numpy as np

from .errors import TraceFormatError

__all__ = [
    "usable_cores",
    "usable_core_ids",
    "FORMAT_VERSION",
    "SPAN_RECORD",
    "RESOURCE_RECORD",
    "KIND_STAGE",
    "KIND_WAIT",
    "KIND_STEP",
    "KIND_MEMBER",
    "FLAG_ERROR",
    "RunHeader",
    "ProcessHeader",
    "RecordFile",
    "open_records",
    "read_records",
    "read_json",
    "clean_text",
    "preamble",
]

FORMAT_VERSION = 1
MAGIC = b"PPRBIN"
PREAMBLE_BYTES = 16
CONTENT_SPANS = 1
CONTENT_RESOURCES = 2
#: A header larger than this is not a pipeprobe header (a stage table of
#: 65,536 names of 200 characters fits).
MAX_JSON_BYTES = 16 * 1024 * 1024
#: Objects and lists in one header: a pipeprobe header holds a handful.
MAX_JSON_CONTAINERS = 1024
#: Values in one header: a full stage table (65,536 names) and the clock
#: offsets of every rank of a large job, with room to spare.
MAX_JSON_VALUES = 1 << 18
#: Ranks a run folder can name: file names carry at most six rank digits.
MAX_RANKS = 1_000_000
#: Stage ids are uint16.
MAX_STAGES = 65536
#: Clock readings and anchors are int64 nanoseconds; this bound leaves headroom for offsets.
NS_MAX = 2**62
MAX_CORES = 1 << 20
#: Batch ids are int32.
MAX_BATCH_ID = 2**31 - 1
_JSON_STRING = re.compile(rb'"[^"\\]*(?:\\.[^"\\]*)*"')

#: Span record, 48 bytes. ``kind`` tells what the record is: a user stage,
#: the consumer waiting for a batch, a training step, or a membership row
#: saying that ``sample_id`` went into ``batch_id`` (start = end = delivery).
SPAN_RECORD = np.dtype(
    [
        ("start_ns", "<i8"),  # monotonic clock, ns
        ("end_ns", "<i8"),
        ("cpu_ns", "<i8"),  # thread CPU time inside the span, -1 if not taken
        ("sample_id", "<i8"),  # -1 unknown
        ("batch_id", "<i4"),  # -1 unknown
        ("epoch", "<i4"),  # -1 unknown
        ("tid", "<u4"),  # kernel thread id
        ("stage", "<u2"),  # index into the process header's stage table
        ("flags", "u1"),  # bit 0: the body raised
        ("kind", "u1"),  # KIND_* below
    ]
)
assert SPAN_RECORD.itemsize == 48

KIND_STAGE = 0
KIND_WAIT = 1
KIND_STEP = 2
KIND_MEMBER = 3
FLAG_ERROR = 1

#: Resource sample, 40 bytes. Process rows have ``core == -1``; per-core
#: system rows have ``pid == 0`` and ``core`` set, with rss/read set to -1.
RESOURCE_RECORD = np.dtype(
    [
        ("t_ns", "<i8"),  # monotonic clock, ns
        ("rss_bytes", "<i8"),
        ("read_bytes", "<i8"),  # cumulative bytes read by the process, -1 unknown
        ("cpu_pct", "<f8"),  # 100 = one full core
        ("pid", "<i4"),
        ("core", "<i4"),
    ]
)
assert RESOURCE_RECORD.itemsize == 40

_RECORDS = {CONTENT_SPANS: SPAN_RECORD, CONTENT_RESOURCES: RESOURCE_RECORD}

#: Records read at a time: a span file of any size is read in pieces of at
#: most this many records (48 MiB), never whole.
CHUNK_RECORDS = 1 << 20


def preamble(content: int) -> bytes:
    """Return the 16-byte preamble that starts a ``.bin`` file of ``content``."""
    size = _RECORDS[content].itemsize
    return MAGIC + struct.pack("<HHHI", FORMAT_VERSION, size, content, 0)


@dataclass(frozen=True)
class RecordFile:
    """A checked ``.bin`` file whose records can be read in bounded pieces.

    Attributes
    ----------
    path : Path
    dtype : numpy.dtype
        :data:`SPAN_RECORD` or :data:`RESOURCE_RECORD`.
    count : int
        Whole records the file's size holds.
    partial_bytes : int
        Bytes of a trailing partial record (a process killed mid-write).
    written : tuple of (int, int)
        Record ranges ``[first, last)`` that hold written data. pipeprobe
        only appends, so a hole in the file (a sparse file's unwritten
        region, which reads as zeros) holds no records.
    """

    path: Path
    dtype: np.dtype
    count: int
    partial_bytes: int
    written: tuple[tuple[int, int], ...]

    @property
    def unwritten(self) -> int:
        """Records that lie wholly in holes of a sparse file (never written, so never read)."""
        return self.count - sum(b - a for a, b in self.written)

    def chunks(self, max_records: int = CHUNK_RECORDS) -> Iterator[np.ndarray]:
        """Yield the written records, at most ``max_records`` at a time, in file order."""
        size = self.dtype.itemsize
        with open(self.path, "rb") as fh:
            for first, last in self.written:
                for a in range(first, last, max_records):
                    n = min(max_records, last - a)
                    fh.seek(PREAMBLE_BYTES + a * size)
                    got = np.fromfile(fh, dtype=self.dtype, count=n)
                    if len(got):
                        yield got
                    if len(got) < n:  # the file shrank while being read
                        return


def open_records(path: str | os.PathLike, content: int) -> RecordFile:
    """Check a ``.bin`` file's preamble and find its records, reading none of them.

    Raises
    ------
    TraceFormatError
        The preamble is missing, of another format, another version or
        another content; the message names the file.
    """
    path = Path(path)
    dtype = _RECORDS[content]
    _check_regular_file(path)
    with open(path, "rb") as fh:
        head = fh.read(PREAMBLE_BYTES)
        if len(head) == 0:
            # A process killed before its first flush leaves an empty file.
            return RecordFile(path, dtype, 0, 0, ())
        _check_preamble(path, head, content, dtype)
        body = os.fstat(fh.fileno()).st_size - PREAMBLE_BYTES
        count, partial = divmod(max(0, body), dtype.itemsize)
        written = _written_records(fh.fileno(), count, dtype.itemsize)
    return RecordFile(path, dtype, count, partial, written)


def _check_preamble(path: Path, head: bytes, content: int, dtype: np.dtype) -> None:
    if len(head) < PREAMBLE_BYTES or head[:6] != MAGIC:
        raise TraceFormatError(
            f"{path}: not a pipeprobe trace file (bad preamble); "
            "remove it from the run directory or re-record the run"
        )
    version, size, kind, _ = struct.unpack("<HHHI", head[6:])
    if version != FORMAT_VERSION:
        raise TraceFormatError(
            f"{path}: trace format version {version} is not supported by this "
            f"pipeprobe (reads version {FORMAT_VERSION}); upgrade pipeprobe or re-record"
        )
    if kind != content or size != dtype.itemsize:
        raise TraceFormatError(
            f"{path}: preamble says content {kind} with {size}-byte records, "
            f"expected content {content} with {dtype.itemsize}-byte records"
        )


def _written_records(fd: int, count: int, size: int) -> tuple[tuple[int, int], ...]:
    """Record ranges that overlap written data (``SEEK_DATA``/``SEEK_HOLE``; all of them where unsupported)."""
    if count == 0:
        return ()
    end = PREAMBLE_BYTES + count * size
    extents: list[tuple[int, int]] = []
    pos = PREAMBLE_BYTES
    try:
        while pos < end:
            start = os.lseek(fd, pos, os.SEEK_DATA)
            if start >= end:
                break
            pos = os.lseek(fd, start, os.SEEK_HOLE)
            extents.append((start, min(pos, end)))
    except OSError as exc:
        if exc.errno != errno.ENXIO:  # ENXIO: no data after pos; anything else: holes not supported here
            return ((0, count),)
    except AttributeError:  # no SEEK_DATA on this platform
        return ((0, count),)
    ranges: list[tuple[int, int]] = []
    for start, stop in extents:
        a = (start - PREAMBLE_BYTES) // size
        b = -(-(stop - PREAMBLE_BYTES) // size)
        if ranges and a <= ranges[-1][1]:
            ranges[-1] = (ranges[-1][0], max(ranges[-1][1], b))
        else:
            ranges.append((a, b))
    return tuple(ranges)


def read_records(path: str | os.PathLike, content: int) -> np.ndarray:
    """Read the records of one ``.bin`` file.

    Parameters
    ----------
    path : path-like
        The file.
    content : int
        ``CONTENT_SPANS`` or ``CONTENT_RESOURCES``; the preamble must agree.

    Returns
    -------
    numpy.ndarray
        Structured array of :data:`SPAN_RECORD` or :data:`RESOURCE_RECORD`.
        A trailing partial record (a process killed mid-write) is dropped
        with a warning, and so are records in holes of a sparse file.

    Raises
    ------
    TraceFormatError
        The preamble is missing, of another format, another version or
        another content; the message names the file.
    """
    rf = open_records(path, content)
    warn_partial(rf, stacklevel=3)
    if rf.unwritten:
        warnings.warn(unwritten_message(rf), stacklevel=2)
    parts = list(rf.chunks())
    return np.concatenate(parts) if parts else np.zeros(0, dtype=rf.dtype)


def warn_partial(rf: RecordFile, stacklevel: int = 2) -> None:
    """Warn that a truncated final record was dropped, when there is one."""
    if rf.partial_bytes:
        warnings.warn(
            f"{rf.path}: dropped a truncated final record ({rf.partial_bytes} of {rf.dtype.itemsize} bytes)",
            stacklevel=stacklevel + 1,
        )


def unwritten_message(rf: RecordFile) -> str:
    """What to say about records in holes of a sparse file."""
    return (f"{rf.path}: {rf.unwritten} records lie in holes of a sparse file (never written, so not "
            "pipeprobe's); dropped them")


def _check_regular_file(path: Path) -> int:
    """Return the size of ``path``; refuse links, pipes and devices (a read could hang or never end)."""
    st = os.lstat(path)
    if not stat.S_ISREG(st.st_mode):
        raise TraceFormatError(
            f"{path}: not a regular file (a link, pipe or device); "
            "a run folder holds only files pipeprobe wrote, so remove it"
        )
    return st.st_size


def read_json(path: str | os.PathLike) -> dict[str, Any]:
    """Read a JSON header safely: size-capped, content-capped, must be an object.

    Before parsing, the text is checked to hold at most
    :data:`MAX_JSON_CONTAINERS` objects and lists and about
    :data:`MAX_JSON_VALUES` values (counted outside strings), so a header of
    millions of ``{}`` costs no memory; text that cannot be written as
    UTF-8 (a lone surrogate from a ``\\ud800`` escape) is escaped.

    Raises
    ------
    TraceFormatError
        The file is too large or too full, not valid JSON, not an object,
        or of an unknown format version.
    """
    path = Path(path)
    size = _check_regular_file(path)
    if size > MAX_JSON_BYTES:
        raise TraceFormatError(
            f"{path}: header is {size} bytes, more than the {MAX_JSON_BYTES} allowed; "
            "it is not a pipeprobe header"
        )
    with open(path, "rb") as fh:
        raw = fh.read(size + 1)  # the size lstat gave (a file grown since is cut there, then fails to parse)
    _check_json_content(path, raw)
    try:
        data = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:
        # ValueError covers JSONDecodeError and over-long integer literals;
        # RecursionError a deeply nested document.
        reason = str(exc).splitlines()[0][:200] if str(exc) else type(exc).__name__
        raise TraceFormatError(f"{path}: header is not valid JSON ({reason}); re-record the run") from None
    if not isinstance(data, dict):
        raise TraceFormatError(f"{path}: header must be a JSON object")
    version = data.get("format_version")
    if version != FORMAT_VERSION:
        raise TraceFormatError(
            f"{path}: header format version {_short(version)} is not supported "
            f"(this pipeprobe reads version {FORMAT_VERSION})"
        )
    return _clean(data)


def _check_json_content(path: Path, raw: bytes) -> None:
    """Refuse a header with more objects, lists or values than a pipeprobe header can hold."""
    bare = _JSON_STRING.sub(b'""', raw)
    containers = bare.count(b"{") + bare.count(b"[")
    values = containers + bare.count(b",") + bare.count(b":")
    if containers > MAX_JSON_CONTAINERS or values > MAX_JSON_VALUES:
        raise TraceFormatError(
            f"{path}: header holds {containers} objects and lists and about {values} values, more than a "
            f"pipeprobe header has ({MAX_JSON_CONTAINERS} and {MAX_JSON_VALUES}); it is not a pipeprobe header"
        )


def clean_text(text: str) -> str:
    """Return ``text`` with what UTF-8 cannot encode (lone surrogates) written as ``\\udXXX`` escapes.

    Examples
    --------
    >>> clean_text("dec\\ud800ode")
    'dec\\\\ud800ode'
    >>> clean_text("décode")
    'décode'
    """
    try:
        text.encode("utf-8")
        return text
    except UnicodeEncodeError:
        return text.encode("utf-8", "backslashreplace").decode("utf-8")


def _clean(value: Any) -> Any:
    """``value`` with every string in it passed through :func:`clean_text` (its size is bounded already)."""
    if isinstance(value, str):
        return clean_text(value)
    if isinstance(value, list):
        return [_clean(v) for v in value]
    if isinstance(value, dict):
        return {clean_text(k): _clean(v) for k, v in value.items()}
    return value


def write_json_atomic(path: str | os.PathLike, data: dict[str, Any]) -> None:
    """Write ``data`` as JSON to ``path`` through a temporary file and a rename."""
    path = Path(path)
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(json.dumps(data, indent=1, sort_keys=True), encoding="utf-8")
    os.replace(tmp, path)


# -- header fields: each checked against what a run folder can hold ---------------------------


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _damaged(path: Path, key: str, value: Any, expected: str) -> TraceFormatError:
    return TraceFormatError(
        f"{path}: header field {key!r} is {_short(value)}, expected {expected}; the header is damaged, re-record the run"
    )


def _whole(path: Path, data: Mapping[str, Any], key: str, lo: int, hi: int, required: bool = False) -> int | None:
    """Header field ``key`` after checking it is a whole number in ``[lo, hi]`` (None when absent)."""
    value = data.get(key)
    if value is None:
        if required:
            raise TraceFormatError(f"{path}: header field {key!r} is missing; the header is damaged, re-record the run")
        return None
    if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
        raise _damaged(path, key, value, f"a whole number from {lo} to {hi}")
    return value


def _seconds(path: Path, data: Mapping[str, Any], key: str) -> float | None:
    value = data.get(key)
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 <= value <= 86400:
        raise _damaged(path, key, value, "seconds from 0 to 86400")
    return float(value)


def _lenient_int(data: Mapping[str, Any], key: str, lo: int, hi: int) -> int | None:
    """A field only used as a label or a key: a whole number in ``[lo, hi]``, else None."""
    value = data.get(key)
    ok = isinstance(value, int) and not isinstance(value, bool) and lo <= value <= hi
    return value if ok else None


def _label(data: Mapping[str, Any], key: str, default: str | None = None) -> str | None:
    """A text field; other JSON values are kept as their text (strings are cleaned on read)."""
    value = data.get(key)
    if value is None:
        return default
    return value if isinstance(value, str) else clean_text(str(value))


def _stage_table(path: Path, data: Mapping[str, Any]) -> tuple[str, ...]:
    stages = data.get("stages", [])
    if not isinstance(stages, list) or len(stages) > MAX_STAGES or not all(isinstance(s, str) for s in stages):
        raise TraceFormatError(
            f"{path}: header field 'stages' must be a list of at most {MAX_STAGES} names, "
            f"got {_short(stages)}; the header is damaged"
        )
    return tuple(stages)


def _extra(data: Mapping[str, Any], known: Iterable[str]) -> dict[str, Any]:
    """Fields this pipeprobe does not know (a newer writer's), kept as read."""
    skip = set(known) | {"format", "format_version"}
    return {k: v for k, v in data.items() if k not in skip}


def _header_json(header: Any) -> dict[str, Any]:
    """A header dataclass as its JSON object: format, version, fields kept from the file, then its fields."""
    out = {"format": header.FORMAT, "format_version": FORMAT_VERSION, **header.extra}
    out.update({f.name: getattr(header, f.name) for f in fields(header) if f.name != "extra"})
    out["stages"] = list(header.stages)
    return out


@dataclass(frozen=True)
class RunHeader:
    """The run header ``run-rR.json``: one per rank, written by its main process at start and close.

    Every field is documented in docs/trace-format.md. :meth:`from_json`
    checks each number against what a run folder can hold before anything
    uses it; fields this pipeprobe does not know are kept in ``extra`` and
    written back by :meth:`to_json`.

    Examples
    --------
    >>> h = RunHeader(run_id="r1", host="box", anchor_wall_ns=5, anchor_mono_ns=7, world_size=2)
    >>> RunHeader.from_json(h.to_json(), Path("run-r0.json")) == h
    True
    >>> try:
    ...     RunHeader.from_json({**h.to_json(), "world_size": 10**12}, Path("run-r0.json"))
    ... except TraceFormatError as exc:
    ...     print(str(exc).split(";")[0])
    run-r0.json: header field 'world_size' is 1000000000000, expected a whole number from 1 to 1000000
    """

    anchor_wall_ns: int
    anchor_mono_ns: int
    run_id: str | None = None
    run_id_source: str | None = None
    clock_sync: dict[str, Any] | None = None
    host: str | None = None
    cores: int | None = None
    end_mono_ns: int | None = None
    closed: bool = False
    ended_by: str | None = None
    batches: int | None = None
    pipeprobe_version: str | None = None
    python_version: str | None = None
    platform: str | None = None
    pid: int | None = None
    rank: int | None = None
    world_size: int | None = None
    cpu_time: bool = False
    sample_interval_s: float | None = None
    flush_interval_s: float | None = None
    stages: tuple[str, ...] = ()
    extra: dict[str, Any] = field(default_factory=dict, compare=False)

    FORMAT: ClassVar[str] = "pipeprobe-run"

    def to_json(self) -> dict[str, Any]:
        """The header as the JSON object written to disk."""
        return _header_json(self)

    @classmethod
    def from_json(cls, data: Mapping[str, Any], path: Path) -> RunHeader:
        """Check a run header read by :func:`read_json` (``path`` names it in errors).

        Raises
        ------
        TraceFormatError
            A number is missing where required, or outside what a run
            folder can hold (e.g. a world size beyond :data:`MAX_RANKS`).
        """
        stages = data.get("stages")
        clock_sync = data.get("clock_sync")
        return cls(
            anchor_wall_ns=_whole(path, data, "anchor_wall_ns", 0, NS_MAX, required=True),
            anchor_mono_ns=_whole(path, data, "anchor_mono_ns", 0, NS_MAX, required=True),
            end_mono_ns=_whole(path, data, "end_mono_ns", 0, NS_MAX),
            cores=_whole(path, data, "cores", 1, MAX_CORES),
            batches=_whole(path, data, "batches", 0, MAX_BATCH_ID),
            world_size=_whole(path, data, "world_size", 1, MAX_RANKS),
            sample_interval_s=_seconds(path, data, "sample_interval_s"),
            flush_interval_s=_seconds(path, data, "flush_interval_s"),
            rank=_lenient_int(data, "rank", 0, MAX_RANKS - 1),
            pid=_lenient_int(data, "pid", 0, 2**32),
            run_id=_label(data, "run_id"),
            run_id_source=_label(data, "run_id_source"),
            host=_label(data, "host"),
            ended_by=_label(data, "ended_by"),
            pipeprobe_version=_label(data, "pipeprobe_version"),
            python_version=_label(data, "python_version"),
            platform=_label(data, "platform"),
            clock_sync=clock_sync if isinstance(clock_sync, dict) else None,
            closed=bool(data.get("closed")),
            cpu_time=bool(data.get("cpu_time")),
            stages=tuple(stages) if isinstance(stages, list) and all(isinstance(s, str) for s in stages) else (),
            extra=_extra(data, (f.name for f in fields(cls))),
        )


@dataclass(frozen=True)
class ProcessHeader:
    """The process header ``spans-rR-pP.json``: who wrote a span file, its clock anchors and its stage table.

    A record's ``stage`` field indexes ``stages``; entries 0 and 1 are
    always ``wait`` and ``step``. The anchors may be absent in old files
    of one host (None), where every process shares the monotonic clock.

    Examples
    --------
    >>> h = ProcessHeader(pid=11, role="worker", stages=("wait", "step", "decode"))
    >>> ProcessHeader.from_json(h.to_json(), Path("spans-r0-p11.json")).stages
    ('wait', 'step', 'decode')
    """

    pid: int | None = None
    ppid: int | None = None
    rank: int | None = None
    world_size: int | None = None
    role: str = "worker"
    host: str = ""
    anchor_mono_ns: int | None = None
    anchor_wall_ns: int | None = None
    cpu_time: bool = False
    stages: tuple[str, ...] = ()
    run_id: str | None = None
    extra: dict[str, Any] = field(default_factory=dict, compare=False)

    FORMAT: ClassVar[str] = "pipeprobe-process"

    def to_json(self) -> dict[str, Any]:
        """The header as the JSON object written to disk."""
        return _header_json(self)

    @classmethod
    def from_json(cls, data: Mapping[str, Any], path: Path, anchors_required: bool = False) -> ProcessHeader:
        """Check a process header read by :func:`read_json` (``path`` names it in errors).

        ``anchors_required``: the anchors must be there (processes on
        several hosts are put on one axis by them).

        Raises
        ------
        TraceFormatError
            An anchor or ``ppid`` is not a whole number in range, or the
            stage table is not a list of at most :data:`MAX_STAGES` names.
        """
        return cls(
            anchor_mono_ns=_whole(path, data, "anchor_mono_ns", 0, NS_MAX, required=anchors_required),
            anchor_wall_ns=_whole(path, data, "anchor_wall_ns", 0, NS_MAX, required=anchors_required),
            ppid=_whole(path, data, "ppid", -1, 2**32),
            stages=_stage_table(path, data),
            pid=_lenient_int(data, "pid", 0, 2**32),
            rank=_lenient_int(data, "rank", 0, MAX_RANKS - 1),
            world_size=_lenient_int(data, "world_size", 1, MAX_RANKS),
            role=_label(data, "role", "worker"),
            host=_label(data, "host", ""),
            run_id=_label(data, "run_id"),
            cpu_time=bool(data.get("cpu_time")),
            extra=_extra(data, (f.name for f in fields(cls))),
        )


def usable_cores(header: Mapping[str, Any]) -> int:
    """Cores the run's training process could use: its CPU affinity's count from the header's ``threads``
    facts, else the machine's ``cores`` (folders recorded before 0.2.0; a process pinned to some cores, as
    batch schedulers do, could use only those).

    Examples
    --------
    >>> usable_cores({"cores": 16, "threads": {"usable_cores": 4}}), usable_cores({"cores": 16})
    (4, 16)
    """
    threads = header.get("threads")
    n = threads.get("usable_cores") if isinstance(threads, dict) else None
    if isinstance(n, int) and not isinstance(n, bool) and 1 <= n <= 1 << 20:
        return n
    cores = header.get("cores")
    return int(cores) if isinstance(cores, int) and not isinstance(cores, bool) and cores >= 1 else 1


def usable_core_ids(header: Mapping[str, Any]) -> frozenset[int] | None:
    """The ids of the cores the training process could use (the header's ``threads.affinity``; None:
    not recorded, then every core counts).

    Examples
    --------
    >>> sorted(usable_core_ids({"threads": {"affinity": [2, 3]}})), usable_core_ids({})
    ([2, 3], None)
    """
    threads = header.get("threads")
    ids = threads.get("affinity") if isinstance(threads, dict) else None
    if not isinstance(ids, list) or not ids:
        return None
    if not all(isinstance(i, int) and not isinstance(i, bool) and 0 <= i < 1 << 20 for i in ids):
        return None
    return frozenset(ids)
