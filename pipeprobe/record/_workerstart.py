"""Timed starts of one loader worker, for a run that loaded in the training loop (runs at probe close).

A run recorded with ``num_workers=0`` shows nothing of what a loader
worker costs to start and stop, yet ``pipeprobe whatif --workers N``
needs it (:mod:`pipeprobe.whatif._lifecycle`). When the probe watched a
torch ``DataLoader`` with ``num_workers=0``, :func:`time_worker_starts`
runs at close, with recording already off: it makes a one-worker copy
of the loader (a map-style one hands out only its first batch) and, up to
:data:`STARTS` times, times ``iter()`` (making the worker process), the
first ``next()`` (the worker's start and its first batch) and stopping it
(the ``next()`` that ends the copy's epoch, as at an epoch's end). The run header keeps the medians as
``worker_start`` (docs/trace-format.md).

Bounds: it starts no new try after :data:`BUDGET_S` seconds, and a batch
that takes longer than :data:`BATCH_TIMEOUT_S` ends the timing (torch's
``timeout``). torch's random state is put back afterwards, so the job's
later random numbers do not change. Any failure becomes one warning and
no ``worker_start`` field; training is over by then and never sees it.

torch is not imported here: the loader is recognised by duck typing and
torch is taken from ``sys.modules`` (the loader's module loaded it).
"""

from __future__ import annotations

import copy
import statistics
import sys
import warnings
from time import perf_counter
from typing import Any

__all__ = ["is_inline_torch_loader", "time_worker_starts", "STARTS", "BUDGET_S", "BATCH_TIMEOUT_S"]

#: Worker starts timed (the median is kept: one slow start on a busy machine does not decide it).
STARTS = 3
#: No new start is tried after this many seconds (our choice: a small part of any real job's close).
BUDGET_S = 2.0
#: A first batch that takes longer ends the timing (torch's DataLoader ``timeout``, seconds).
BATCH_TIMEOUT_S = 10.0


def is_inline_torch_loader(loader: Any) -> bool:
    """``loader`` is a torch ``DataLoader`` that loads in the training loop (``num_workers == 0``).

    Examples
    --------
    >>> is_inline_torch_loader([[1, 2], [3, 4]])
    False
    """
    try:  # watch() calls this in the user's loop: a strange object only goes untimed
        is_torch = any(c.__module__.startswith("torch.utils.data") and c.__name__ == "DataLoader"
                       for c in type(loader).__mro__)
        return is_torch and getattr(loader, "num_workers", None) == 0
    except Exception:  # noqa: BLE001
        return False


def time_worker_starts(loader: Any) -> dict[str, Any] | None:
    """Time up to :data:`STARTS` starts of a one-worker copy of ``loader``; the header's ``worker_start``.

    Returns
    -------
    dict or None
        ``{"starts", "iter_s", "first_batch_s", "stop_s"}`` (medians over
        the starts timed), or None when no start could be timed (one
        ``RuntimeWarning`` says why).
    """
    torch = sys.modules.get("torch")
    state = torch.random.get_rng_state() if torch is not None else None
    try:
        times = _timed_starts(*_one_worker_copy(loader))
    except Exception as exc:  # noqa: BLE001 - the job is done; its run must still close
        warnings.warn(f"pipeprobe could not time a loader worker's start ({exc}); predictions that add workers "
                      "to this run will say the start-up cost is unknown", RuntimeWarning, stacklevel=3)
        return None
    finally:
        if state is not None:
            torch.random.set_rng_state(state)
    if not times:
        return None
    return {"starts": len(times), **{k: statistics.median(t[k] for t in times) for k in times[0]}}


def _one_worker_copy(loader: Any) -> tuple[Any, bool]:
    """A shallow copy of ``loader`` that loads with one worker process (same dataset, sampler and collate),
    and whether it hands out one batch only."""
    one = copy.copy(loader)
    object.__setattr__(one, "num_workers", 1)  # torch's DataLoader guards some attributes after init
    if getattr(one, "prefetch_factor", None) is None:
        object.__setattr__(one, "prefetch_factor", 2)  # torch's default with workers
    object.__setattr__(one, "persistent_workers", False)
    object.__setattr__(one, "timeout", BATCH_TIMEOUT_S)
    if hasattr(one, "_iterator"):
        object.__setattr__(one, "_iterator", None)
    return one, _one_batch(one)


def _one_batch(one: Any) -> bool:
    """A map-style loader's copy hands out only its first batch: the worker is idle when it is stopped.

    (So the stop is timed as at an epoch's end, where every batch was taken. An
    iterable-style dataset keeps its items: its worker may still be loading
    its second batch when it is stopped, and the stop includes that.)
    """
    if getattr(getattr(one, "_dataset_kind", None), "__int__", None) is None or int(one._dataset_kind) != 0:
        return False  # not a map-style dataset (torch's _DatasetKind.Map is 0)
    if getattr(one, "batch_sampler", None) is not None:
        object.__setattr__(one, "batch_sampler", [list(next(iter(one.batch_sampler)))])
        return True
    if getattr(one, "sampler", None) is not None:
        object.__setattr__(one, "sampler", [next(iter(one.sampler))])
        return True
    return False


def _timed_starts(one: Any, one_batch: bool) -> list[dict[str, float]]:
    """Step by step: ``iter()``, the first ``next()``, then stopping the worker; until STARTS or BUDGET_S."""
    out: list[dict[str, float]] = []
    begin = perf_counter()
    while len(out) < STARTS and perf_counter() - begin < BUDGET_S:
        t0 = perf_counter()
        it = iter(one)
        t1 = perf_counter()
        next(it)
        t2 = perf_counter()
        if one_batch:  # no second batch: this next() ends the epoch and stops the worker, as torch does
            next(it, None)
        shutdown = getattr(it, "_shutdown_workers", None)
        if shutdown is not None:
            shutdown()
        del it
        t3 = perf_counter()
        out.append({"iter_s": t1 - t0, "first_batch_s": t2 - t1, "stop_s": t3 - t2})
    return out
