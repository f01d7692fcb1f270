"""Timed starts of one loader worker, for a run that loaded in the training loop (runs at probe close).

A run recorded with ``num_workers=0`` shows nothing of what a loader
worker costs to start and stop, yet ``pipeprobe whatif --workers N``
needs it (:mod:`pipeprobe.whatif._lifecycle`). When the probe watched a
torch ``DataLoader`` with ``num_workers=0``, :func:`time_worker_starts`
runs at close, with recording already off: it makes a one-worker copy
of the loader (a map-style one hands out only its first batches) and, up to
:data:`STARTS` times, times ``iter()`` (making the worker process), the
first ``next()`` (the worker's start and its first batch) and stopping it
(the ``next()`` that ends the copy's epoch, as at an epoch's end). The
first start also takes :data:`BATCHES` batches with the copy's collate
function stamped (:class:`_Stamped`: when it began and ended in the
worker, on the machine's monotonic clock, which the loop reads too), so
that what a batch costs on its way from a worker to the loop is timed,
not guessed: ``collate_s`` (the collate in the worker, which puts the
batch in shared memory), ``latency_s`` (the collate's end to the loop
holding the batch, for batches the loop was already waiting for) and
``handoff_s`` (a ``next()`` for a batch that was already there, asked
after a pause). The run header keeps the medians as
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
import itertools
import statistics
import sys
import warnings
from time import monotonic_ns, perf_counter, sleep
from typing import Any

__all__ = ["is_inline_torch_loader", "time_worker_starts", "STARTS", "BATCHES", "BUDGET_S", "BATCH_TIMEOUT_S"]

#: Worker starts timed (the median is kept: one slow start on a busy machine does not decide it).
STARTS = 3
#: Batches the first start takes: the first (the worker's start), two the loop waits for (latency), one
#: already there after a pause (handoff).
BATCHES = 4
#: The pause before the last batch, in multiples of the slowest batch so far (the batch is surely there),
#: and at most this many seconds.
PAUSE_BATCHES, PAUSE_MAX_S = 1.5, 0.5
#: Longest wait for an iterable-style copy's worker to load the batches asked ahead, before its stop is timed.
IDLE_MAX_S = 1.0
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
        the starts timed) and, when the first start took its batches
        stamped, ``collate_s``, ``latency_s`` and ``handoff_s`` (seconds,
        medians over its batches); None when no start could be timed
        (one ``RuntimeWarning`` says why).
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
    out: dict[str, Any] = {"starts": len(times), **{k: statistics.median(t[k] for t in times)
                                                   for k in ("iter_s", "first_batch_s", "stop_s")}}
    out.update(times[0].get("way", {}))
    return out


def _one_worker_copy(loader: Any) -> tuple[Any, list | None]:
    """A shallow copy of ``loader`` that loads with one worker process (same dataset, sampler and collate),
    and, for a map-style loader, the first :data:`BATCHES` items of its sampler (None otherwise)."""
    one = copy.copy(loader)
    object.__setattr__(one, "num_workers", 1)  # torch's DataLoader guards some attributes after init
    if getattr(one, "prefetch_factor", None) is None:
        object.__setattr__(one, "prefetch_factor", 2)  # torch's default with workers
    object.__setattr__(one, "persistent_workers", False)
    object.__setattr__(one, "timeout", BATCH_TIMEOUT_S)
    if hasattr(one, "_iterator"):
        object.__setattr__(one, "_iterator", None)
    return one, _first_batches(one)


def _first_batches(one: Any) -> list | None:
    """A map-style loader's first :data:`BATCHES` sampler items: its copy hands out only those, so its
    worker is idle when it is stopped (None for another loader).

    (So the stop is timed as at an epoch's end, where every batch was taken. An
    iterable-style dataset keeps its items: its worker goes on loading the
    batches the loop asked ahead for, so the stop waits until it is idle first,
    :func:`_until_idle`.)
    """
    if getattr(getattr(one, "_dataset_kind", None), "__int__", None) is None or int(one._dataset_kind) != 0:
        return None  # not a map-style dataset (torch's _DatasetKind.Map is 0)
    for name in ("batch_sampler", "sampler"):
        source = getattr(one, name, None)
        if source is not None:
            items = list(itertools.islice(iter(source), BATCHES))
            if items:
                _hand_out(one, items, 1)
                return items
    return None


def _hand_out(one: Any, items: list, count: int) -> None:
    """The copy hands out the first ``count`` of ``items`` (batches, or samples without a batch sampler)."""
    name = "batch_sampler" if getattr(one, "batch_sampler", None) is not None else "sampler"
    object.__setattr__(one, name, [list(x) if name == "batch_sampler" else x for x in items[:count]])


class _Stamped:
    """A collate function that also returns when it began and ended (``time.monotonic_ns``, in the worker).

    Examples
    --------
    >>> batch, began, ended = _Stamped(list)((1, 2))
    >>> batch, 0 < began <= ended
    ([1, 2], True)
    """

    def __init__(self, collate: Any) -> None:
        self.collate = collate

    def __call__(self, items: Any) -> tuple[Any, int, int]:
        began = monotonic_ns()
        batch = self.collate(items)
        return batch, began, monotonic_ns()


def _timed_starts(one: Any, items: list | None) -> list[dict[str, Any]]:
    """Step by step: ``iter()``, the first ``next()`` (the first start: then its way to the loop,
    :func:`_way_to_the_loop`), then stopping the worker; until STARTS or BUDGET_S."""
    out: list[dict[str, Any]] = []
    begin = perf_counter()
    collate = getattr(one, "collate_fn", None)
    while len(out) < STARTS and perf_counter() - begin < BUDGET_S:
        stamped = not out and collate is not None
        if stamped:
            object.__setattr__(one, "collate_fn", _Stamped(collate))
        if items is not None:
            _hand_out(one, items, BATCHES if stamped else 1)
        t0 = perf_counter()
        it = iter(one)
        t1 = perf_counter()
        first = next(it)
        first_batch = perf_counter() - t1
        way, broke = {}, False
        try:
            way = _way_to_the_loop(it, first, first_batch) if stamped else {}
        except Exception:  # noqa: BLE001 - a later batch the job's dataset cannot load: the start is still timed
            broke = True
        if items is None:
            _until_idle(one, first_batch)
        t2 = perf_counter()
        if items is not None and not broke:  # no batch left: this next() ends the epoch and stops the worker
            next(it, None)
        shutdown = getattr(it, "_shutdown_workers", None)
        if shutdown is not None:
            shutdown()
        del it
        t3 = perf_counter()
        if stamped:
            object.__setattr__(one, "collate_fn", collate)
        out.append({"iter_s": t1 - t0, "first_batch_s": first_batch, "stop_s": t3 - t2, "way": way})
    return out


def _until_idle(one: Any, first_batch_s: float) -> None:
    """Wait until the worker of an iterable-style copy has loaded the batches the loop asked ahead for.

    torch asks a worker for ``prefetch_factor`` batches ahead; at an epoch's
    end its dataset has run out and it waits idle, so that is the stop the
    replay needs. Before this wait, a worker of a real job (8 tar shards,
    60 ms batches) was timed to stop in 96 ms, against 3.5 ms per worker at
    the same job's epoch ends with two workers. The first batch took the
    worker's start and one batch, so each batch ahead takes at most that
    long; the wait is at most :data:`IDLE_MAX_S`.
    """
    ahead = int(getattr(one, "prefetch_factor", None) or 2)
    sleep(min(IDLE_MAX_S, ahead * first_batch_s * PAUSE_BATCHES))


def _way_to_the_loop(it: Any, first: tuple, first_s: float) -> dict[str, float]:
    """Take the stamped start's batches after the first: the loop waits for the next ones (latency), then,
    after a pause, takes one that is already there (handoff). Medians; the collate's over all batches."""
    collates = [(first[2] - first[1]) / 1e9]
    latencies, slowest = [], first_s
    for _ in range(BATCHES - 2):
        asked = monotonic_ns()
        t = perf_counter()
        got = next(it, None)
        if got is None:
            break
        held = monotonic_ns()
        slowest = max(slowest, perf_counter() - t)
        collates.append((got[2] - got[1]) / 1e9)
        if got[2] > asked:  # the loop was waiting when the worker finished the batch
            latencies.append((held - got[2]) / 1e9)
    way = {"collate_s": statistics.median(collates)}
    if latencies:
        way["latency_s"] = statistics.median(latencies)
    sleep(min(PAUSE_MAX_S, PAUSE_BATCHES * slowest))
    t = perf_counter()
    got = next(it, None)
    if got is not None:
        way["handoff_s"] = perf_counter() - t
        collates.append((got[2] - got[1]) / 1e9)
        way["collate_s"] = statistics.median(collates)
    return way
