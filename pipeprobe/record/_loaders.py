"""Zero-change recording of a torch ``DataLoader``: sample ids, item fetch and collate.

torch is never imported here: a loader is recognised by duck typing, and
the only torch call (``get_worker_info``, for iterable-style datasets) is
made inside a loader worker, where torch is already loaded.

For the duration of ``iter(loader)`` three of the loader's attributes are
swapped for thin wrappers, then put back; the loader's iterator (and, with
``num_workers > 0``, its worker processes) keep the wrappers:

* the index sampler becomes an :class:`_IndexTap`, which queues the sample
  ids of every index list it hands out. With ``in_order=True`` (torch's
  default) batches reach the consumer in sampler order, so the watch pops
  one entry per delivered batch and records it as membership rows;
* the dataset becomes a :class:`_TimedDataset` (map-style) or
  :class:`_TimedIterable` (iterable-style), which times every item fetch as
  the stage ``"fetch"``; decorated stages inside the dataset nest under it;
* the collate function becomes a :class:`_TimedCollate`, timed as the stage
  ``"collate"``. A collate span carries the first sample id of its batch,
  which links it to that batch.

Iterable-style datasets have no index. Their items get sample ids in the
order each worker yields them: item ``k`` of worker ``w`` (counting from 0
in every epoch) is sample ``k * num_workers + w`` (``num_workers`` counted
as 1 without workers). The consumer side predicts the same ids from torch's
round-robin hand-out of batches to workers, which holds while every worker
still has items; once a worker runs out before the others, the batches
that follow in that epoch are not linked to worker spans (their ids are
not recorded).
"""

from __future__ import annotations

import sys
import threading
import warnings
from collections import deque
from time import monotonic_ns, thread_time_ns
from typing import Any, Iterable, Iterator

from .. import tracefile as tf
from . import _recorder as _r
from ._window import tag_indices

FETCH_STAGE = "fetch"
COLLATE_STAGE = "collate"
_ERROR_BITS = tf.FLAG_ERROR << 24

#: First sample id fetched since the last collate, per thread (a worker
#: fetches the items of one batch and collates them in the same thread).
_FIRST = threading.local()


def _as_id(index: Any) -> int:
    if type(index) is int:
        return index
    try:  # numpy and torch integer scalars
        if hasattr(index, "__index__") and not isinstance(index, bool):
            return int(index.__index__())
    except Exception:  # noqa: BLE001 - a strange index only loses its id
        pass
    return -1


def _recording() -> bool:
    rec = _r.RECORDER
    return rec.spans_on or (not rec.checked_env and _r.attach_from_env())


def _start() -> tuple[int, int]:
    """Wall and thread-CPU clocks at a span's start, CPU read inside (as in ``record._CpuSpan``)."""
    t0 = monotonic_ns()
    return t0, (thread_time_ns() if _r.RECORDER.cpu_time else -1)


def _record(name: str, t0: int, c0: int, sample: int, failed: bool) -> None:
    """Append one finished span of our own stage ``name`` (never raises)."""
    cpu = thread_time_ns() - c0 if c0 >= 0 else -1
    t1 = monotonic_ns()
    rec = _r.RECORDER
    try:
        code = rec.stage_id(name) | (_ERROR_BITS if failed else 0)
        buf = rec.buffer()
        buf.extend((t0, t1, cpu, sample, buf.ctx, code))
        if len(buf) >= buf.limit:
            rec.spill(buf)
    except Exception as exc:  # noqa: BLE001 - never take training down
        rec.fail(exc)


class _Forwarding:
    """Looks and behaves like the wrapped object; only adds timing.

    Attribute reads and writes go to the wrapped object (so a
    ``worker_init_fn`` that configures ``get_worker_info().dataset`` still
    configures the user's dataset), ``isinstance`` sees the wrapped class,
    and pickling (spawned workers) rebuilds the wrapper around the wrapped
    object.
    """

    _pp_inner: Any

    def __init__(self, inner: Any) -> None:
        object.__setattr__(self, "_pp_inner", inner)

    def __getattr__(self, name: str) -> Any:
        if name == "_pp_inner":  # during unpickling, before __init__ ran
            raise AttributeError(name)
        return getattr(self._pp_inner, name)

    def __setattr__(self, name: str, value: Any) -> None:
        setattr(self._pp_inner, name, value)

    def __delattr__(self, name: str) -> None:
        delattr(self._pp_inner, name)

    @property  # type: ignore[misc]
    def __class__(self) -> type:  # noqa: D105 - isinstance() sees the user's class
        return type(self._pp_inner)

    def __reduce__(self) -> tuple[Any, ...]:
        return (type(self), (self._pp_inner,))

    def __repr__(self) -> str:
        return repr(self._pp_inner)


class _TimedDataset(_Forwarding):
    """A map-style dataset whose ``__getitem__`` is timed as ``"fetch"``."""

    def __len__(self) -> int:
        return len(self._pp_inner)

    def __getitem__(self, index: Any) -> Any:
        if not _recording():
            return self._pp_inner[index]
        sample = _as_id(index)
        if getattr(_FIRST, "id", -1) < 0:
            _FIRST.id = sample
        return _timed(FETCH_STAGE, self._pp_inner.__getitem__, index, sample, forget_first=True)


class _TimedBatchDataset(_TimedDataset):
    """A map-style dataset with a batched ``__getitems__``: one ``"fetch"`` span per batch."""

    def __getitems__(self, indices: Any) -> Any:
        if not _recording():
            return self._pp_inner.__getitems__(indices)
        try:
            sample = _as_id(indices[0]) if len(indices) else -1
        except Exception:  # noqa: BLE001
            sample = -1
        if getattr(_FIRST, "id", -1) < 0:
            _FIRST.id = sample
        return _timed(FETCH_STAGE, self._pp_inner.__getitems__, indices, sample)


def _timed(name: str, call: Any, arg: Any, sample: int, forget_first: bool = False) -> Any:
    """Run ``call(arg)`` as a span of stage ``name``; on failure optionally forget the batch's first id."""
    t0, c0 = _start()
    failed = True
    try:
        out = call(arg)
        failed = False
        return out
    finally:
        if failed and forget_first:
            _FIRST.id = -1
        _record(name, t0, c0, sample, failed)


def _worker_slot() -> tuple[int, int]:
    """``(worker_id, num_workers)`` inside a torch loader worker, ``(0, 1)`` elsewhere."""
    data = sys.modules.get("torch.utils.data")
    info = data.get_worker_info() if data is not None else None
    if info is None:
        return 0, 1
    return int(info.id), max(1, int(info.num_workers))


class _TimedIterable(_Forwarding):
    """An iterable-style dataset whose every ``next`` is timed as ``"fetch"``.

    Sample ids are assigned in order per worker: see the module docstring.
    """

    def __len__(self) -> int:
        return len(self._pp_inner)

    def __iter__(self) -> Iterator[Any]:
        it = iter(self._pp_inner)
        worker, workers = _worker_slot()
        k = 0
        while True:
            if not _recording():
                try:
                    item = next(it)
                except StopIteration:
                    return
                k += 1
                yield item
                continue
            sample = k * workers + worker
            t0, c0 = _start()
            try:
                item = next(it)
            except StopIteration:
                return
            except BaseException:
                _record(FETCH_STAGE, t0, c0, sample, True)
                raise
            _record(FETCH_STAGE, t0, c0, sample, False)
            if getattr(_FIRST, "id", -1) < 0:
                _FIRST.id = sample
            k += 1
            yield item


class _TimedCollate:
    """A collate function timed as ``"collate"``, tagged with its batch's first sample id."""

    def __init__(self, inner: Any) -> None:
        self.inner = inner

    def __call__(self, data: Any) -> Any:
        sample = getattr(_FIRST, "id", -1)
        _FIRST.id = -1
        if not _recording():
            return self.inner(data)
        return _timed(COLLATE_STAGE, self.inner, data, sample)

    def __getattr__(self, name: str) -> Any:
        if name == "inner":
            raise AttributeError(name)
        return getattr(self.inner, name)

    def __reduce__(self) -> tuple[Any, ...]:
        return (_TimedCollate, (self.inner,))


class _IndexTap:
    """Wraps a (batch) sampler and queues the sample ids of every index it yields."""

    def __init__(self, inner: Any) -> None:
        self.inner = inner
        self.queue: deque = deque()
        self.base = 0  # consumer batch id of this iteration's first batch (for the recording window)

    def __iter__(self) -> Iterator[Any]:
        queue = self.queue
        for j, index in enumerate(self.inner):
            ids = index if isinstance(index, (list, tuple)) else [index]
            queue.append([i for i in (_as_id(x) for x in ids if x is not None) if i >= 0])
            yield tag_indices(index, self.base + j)

    def __len__(self) -> int:
        return len(self.inner)

    def __getattr__(self, name: str) -> Any:
        if name == "inner":
            raise AttributeError(name)
        return getattr(self.inner, name)


class _IterableTap(_IndexTap):
    """For iterable-style datasets: queues the ids each batch's worker will give its items.

    torch hands batch ``j`` of an epoch to worker ``j % num_workers`` while
    every worker has items; that worker numbers its items as
    :class:`_TimedIterable` does.
    """

    def __init__(self, inner: Any, workers: int) -> None:
        super().__init__(inner)
        self.workers = max(1, workers)

    def __iter__(self) -> Iterator[Any]:
        queue = self.queue
        workers = self.workers
        counts = [0] * workers
        j = 0
        for index in self.inner:
            w = j % workers
            n = len(index) if isinstance(index, (list, tuple)) else 1
            k = counts[w]
            queue.append([(k + i) * workers + w for i in range(n)])
            counts[w] = k + n
            yield tag_indices(index, self.base + j)
            j += 1


def _is_torch_loader(loader: Any) -> bool:
    cls = type(loader)
    return any(c.__module__.startswith("torch.utils.data") for c in cls.__mro__) and hasattr(
        loader, "_index_sampler"
    )


def _is_iterable_style(loader: Any) -> bool:
    kind = getattr(loader, "_dataset_kind", None)
    return kind == 1 or (kind is None and not hasattr(loader.dataset, "__getitem__"))


def _is_datapipe(dataset: Any) -> bool:
    return any("datapipe" in c.__module__ for c in type(dataset).__mro__)


def _wrap_dataset(dataset: Any, iterable: bool) -> Any:
    if isinstance(dataset, _Forwarding) or _is_datapipe(dataset):
        return None
    getitem = getattr(type(dataset), "__getitem__", None)
    if getattr(getitem, "__pipeprobe_stage__", None) == FETCH_STAGE:
        return None  # the user already times it under our name
    if iterable:
        return _TimedIterable(dataset)
    if getattr(dataset, "__getitems__", None):
        return _TimedBatchDataset(dataset)
    return _TimedDataset(dataset)


def _wrap_collate(fn: Any) -> Any:
    if fn is None or isinstance(fn, _TimedCollate) or getattr(fn, "__pipeprobe_stage__", None):
        return None
    return _TimedCollate(fn)


def iter_with_indices(loader: Iterable[Any]) -> tuple[Iterator[Any], deque | None]:
    """Start iterating ``loader``; return the iterator and the queue of batch sample ids.

    For a torch ``DataLoader`` this also times the dataset's item fetch and
    the collate function (see the module docstring). The queue is ``None``
    when the loader is not a torch ``DataLoader`` or when its batch order
    cannot be matched to its sampler (``in_order=False``).
    """
    if not _is_torch_loader(loader):
        return iter(loader), None
    ordered = bool(getattr(loader, "in_order", True))
    if not ordered:
        warnings.warn(
            "pipeprobe: this DataLoader has in_order=False, so batches cannot be matched to "
            "sample ids; pass probe.watch(loader, samples=...) to link worker spans",
            RuntimeWarning,
            stacklevel=3,
        )
    iterable = _is_iterable_style(loader)
    existing = getattr(loader, "_iterator", None)
    if existing is not None and getattr(loader, "persistent_workers", False):
        # Persistent workers keep the dataset and collate function they were
        # started with; only the sampler tap is renewed.
        tap = existing._index_sampler
        if not isinstance(tap, _IndexTap):
            tap = _IterableTap(tap, loader.num_workers) if iterable else _IndexTap(tap)
            existing._index_sampler = tap
        tap.queue = deque()
        tap.base = _r.RECORDER.next_batch
        return iter(loader), (tap.queue if ordered else None)
    swaps: list[tuple[str, Any]] = []
    attr = "batch_sampler" if loader.batch_sampler is not None else "sampler"
    original = getattr(loader, attr)
    tap = _IterableTap(original, loader.num_workers) if iterable else _IndexTap(original)
    tap.base = _r.RECORDER.next_batch
    swaps.append((attr, original))
    object.__setattr__(loader, attr, tap)
    try:
        dataset = _wrap_dataset(loader.dataset, iterable)
        if dataset is not None:
            swaps.append(("dataset", loader.dataset))
            object.__setattr__(loader, "dataset", dataset)
        collate = _wrap_collate(getattr(loader, "collate_fn", None))
        if collate is not None:
            swaps.append(("collate_fn", loader.collate_fn))
            object.__setattr__(loader, "collate_fn", collate)
    except Exception as exc:  # noqa: BLE001 - timing is optional; the loader is not
        _r.RECORDER.fail(exc)
    try:
        it = iter(loader)
    finally:
        for name, value in reversed(swaps):
            object.__setattr__(loader, name, value)
    return it, (tap.queue if ordered else None)
