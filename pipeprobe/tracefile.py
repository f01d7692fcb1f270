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
path unpickles or evaluates anything; JSON headers are size-capped.
"""

from __future__ import annotations

import json
import os
import stat
import struct
import warnings
from pathlib import Path
from typing import Any

import numpy as np

from .errors import TraceFormatError

__all__ = [
    "FORMAT_VERSION",
    "SPAN_RECORD",
    "RESOURCE_RECORD",
    "KIND_STAGE",
    "KIND_WAIT",
    "KIND_STEP",
    "KIND_MEMBER",
    "FLAG_ERROR",
    "read_records",
    "read_json",
    "preamble",
]

FORMAT_VERSION = 1
MAGIC = b"PPRBIN"
PREAMBLE_BYTES = 16
CONTENT_SPANS = 1
CONTENT_RESOURCES = 2
MAX_JSON_BYTES = 16 * 1024 * 1024

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


def preamble(content: int) -> bytes:
    """Return the 16-byte preamble that starts a ``.bin`` file of ``content``."""
    size = _RECORDS[content].itemsize
    return MAGIC + struct.pack("<HHHI", FORMAT_VERSION, size, content, 0)


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
        with a warning.

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
            return np.zeros(0, dtype=dtype)
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
        body = fh.read()
    whole, rest = divmod(len(body), dtype.itemsize)
    if rest:
        warnings.warn(
            f"{path}: dropped a truncated final record ({rest} of {dtype.itemsize} bytes)",
            stacklevel=2,
        )
    return np.frombuffer(body, dtype=dtype, count=whole).copy()


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
    """Read a JSON header safely (size-capped, must be an object).

    Raises
    ------
    TraceFormatError
        The file is too large, not valid JSON, not an object, or of an
        unknown format version.
    """
    path = Path(path)
    size = _check_regular_file(path)
    if size > MAX_JSON_BYTES:
        raise TraceFormatError(
            f"{path}: header is {size} bytes, more than the {MAX_JSON_BYTES} allowed; "
            "it is not a pipeprobe header"
        )
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
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
            f"{path}: header format version {version!r} is not supported "
            f"(this pipeprobe reads version {FORMAT_VERSION})"
        )
    return data


def write_json_atomic(path: str | os.PathLike, data: dict[str, Any]) -> None:
    """Write ``data`` as JSON to ``path`` through a temporary file and a rename."""
    path = Path(path)
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(json.dumps(data, indent=1, sort_keys=True), encoding="utf-8")
    os.replace(tmp, path)
