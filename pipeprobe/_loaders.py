"""Reading which sample ids form each batch from a torch ``DataLoader``.

torch is never imported here: a loader is recognised by duck typing. The
loader's index sampler is wrapped by :class:`_IndexTap` for the duration of
``iter(loader)``; the loader's iterator keeps the tap, and every index list
the sampler hands out is queued. With ``in_order=True`` (torch's default)
batches reach the consumer in sampler order, so the watch pops one entry
per delivered batch.
"""

from __future__ import annotations

import warnings
from collections import deque
from typing import Any, Iterable, Iterator


class _IndexTap:
    """Wraps a (batch) sampler and queues the sample ids of every index it yields."""

    def __init__(self, inner: Any) -> None:
        self.inner = inner
        self.queue: deque = deque()

    def __iter__(self) -> Iterator[Any]:
        queue = self.queue
        for index in self.inner:
            ids = index if isinstance(index, (list, tuple)) else [index]
            queue.append([int(i) for i in ids if i is not None])
            yield index

    def __len__(self) -> int:
        return len(self.inner)

    def __getattr__(self, name: str) -> Any:
        return getattr(self.inner, name)


def _is_torch_loader(loader: Any) -> bool:
    cls = type(loader)
    return any(c.__module__.startswith("torch.utils.data") for c in cls.__mro__) and hasattr(
        loader, "_index_sampler"
    )


def iter_with_indices(loader: Iterable[Any]) -> tuple[Iterator[Any], deque | None]:
    """Start iterating ``loader``; return the iterator and the queue of batch sample ids.

    The queue is ``None`` when the loader is not a torch ``DataLoader`` or
    when its batch order cannot be matched to its sampler (``in_order=False``).
    """
    if not _is_torch_loader(loader):
        return iter(loader), None
    if not getattr(loader, "in_order", True):
        warnings.warn(
            "pipeprobe: this DataLoader has in_order=False, so batches cannot be matched to "
            "sample ids; pass probe.watch(loader, samples=...) to link worker spans",
            RuntimeWarning,
            stacklevel=3,
        )
        return iter(loader), None
    existing = getattr(loader, "_iterator", None)
    if existing is not None and getattr(loader, "persistent_workers", False):
        tap = existing._index_sampler
        if not isinstance(tap, _IndexTap):
            tap = _IndexTap(tap)
            existing._index_sampler = tap
        tap.queue = deque()
        return iter(loader), tap.queue
    attr = "batch_sampler" if loader.batch_sampler is not None else "sampler"
    original = getattr(loader, attr)
    tap = _IndexTap(original)
    object.__setattr__(loader, attr, tap)
    try:
        it = iter(loader)
    finally:
        object.__setattr__(loader, attr, original)
    return it, tap.queue
