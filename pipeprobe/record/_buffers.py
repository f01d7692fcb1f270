"""Per-thread span buffers, and their conversion to fixed-width records.

A thread records into its own :class:`_Buffer` (a thread-local, kept for
the thread's whole life, across probes) with one ``list.extend`` of six
ints per span. :func:`take_records` moves a buffer's ints into the
structured records of ``tracefile.SPAN_RECORD``; it runs off the hot path,
in a spill or a flush, and it is where ids that do not fit the record's
fields are fitted by the documented rule (docs/trace-format.md).
"""

from __future__ import annotations

import threading

import numpy as np

from .. import tracefile as tf

_FIELDS = 6  # start, end, cpu, sample, batch, code
_INT64_MIN, _INT64_MAX = -(2**63), 2**63 - 1
#: A sample id beyond int64 (an unsigned 64-bit hash, say) keeps its low 63 bits.
SAMPLE_ID_MASK = 2**63 - 1
#: The record's batch id is an int32; a batch id beyond it is stored as -1 (unknown).
BATCH_ID_MAX = 2**31 - 1
#: The record's epoch is an int32, and the hot path carries ``epoch + 1`` in
#: the top half of an int64 code: epochs are clipped into this range.
EPOCH_MIN, EPOCH_MAX = -(2**31), 2**31 - 2
_BATCH_FIELD = 4  # position of the batch id among a record's fields


def _as_int64(values: list[int]) -> np.ndarray:
    """The buffer's ints as int64; ids out of that range follow the documented rule.

    The fast path is one conversion; only a buffer holding an int beyond
    int64 takes the slow one: such a sample id keeps its low 63 bits
    (:data:`SAMPLE_ID_MASK`: the same id always maps to the same stored id,
    so spans still link to batches), such a batch id becomes -1 (unknown).
    Times and codes never leave int64.
    """
    try:
        return np.fromiter(values, dtype=np.int64, count=len(values))
    except OverflowError:
        pass
    fitted = []
    for i, v in enumerate(values):
        if not _INT64_MIN <= v <= _INT64_MAX:
            v = -1 if i % _FIELDS == _BATCH_FIELD else v & SAMPLE_ID_MASK
        fitted.append(v)
    return np.array(fitted, dtype=np.int64)


class _Buffer(list):
    """Records of one thread, six ints each, appended by one ``extend``.

    The owning thread only ever appends; a flush copies and deletes a prefix
    under ``lock``. Under the GIL each ``extend``, copy and delete is atomic,
    so the hot path needs no lock.
    """

    __slots__ = ("ctx", "tid", "limit", "lock", "owner")

    def __init__(self, limit: int) -> None:
        super().__init__()
        self.owner = threading.current_thread()
        self.tid = threading.get_native_id()
        self.ctx = -1  # batch the consumer thread is fetching or working on
        self.limit = limit
        self.lock = threading.Lock()


#: One thread-local for the life of the process; a forked child keeps the
#: forking thread's entry and empties it.
TLS = threading.local()


def take_records(buf: _Buffer) -> np.ndarray:
    """Move the finished records out of ``buf`` into a structured array (lock held).

    A record is six little-endian 8-byte words (``tracefile.SPAN_RECORD``):
    start, end, cpu and sample id as they are, then the batch id and the
    epoch as two int32 in one word, then the thread id (uint32), the stage
    (uint16), the flags and the kind (uint8 each) in the last. Built as
    whole words, it costs a few column operations per flush.
    """
    k = len(buf)
    raw = _as_int64(buf[:k]).reshape(-1, _FIELDS)
    del buf[:k]
    out = np.empty(raw.shape, dtype="<i8")  # little-endian like the record, whatever the machine
    out[:, :4] = raw[:, :4]
    batch = raw[:, 4]
    batch = np.where((batch < -1) | (batch > BATCH_ID_MAX), -1, batch)
    code = raw[:, 5]  # stage | kind << 16 | flags << 24 | (epoch + 1) << 32
    out[:, 4] = (batch & 0xFFFFFFFF) | (((code >> 32) - 1) << 32)
    out[:, 5] = buf.tid | ((code & 0xFFFF) << 32) | (((code >> 24) & 0xFF) << 48) | (((code >> 16) & 0xFF) << 56)
    return out.view(tf.SPAN_RECORD).reshape(len(raw))
