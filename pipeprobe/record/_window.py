"""Recording windows: which batches of a long job are recorded.

A window is written as text, parsed here and nowhere else
(:func:`parse_window`):

``A:B``
    batches ``A`` to ``B - 1`` (batch ids count from 0 in the order the
    training loop receives batches, as in a Python slice); ``A:`` runs to
    the end. Several ranges are joined by commas: ``0:50,2000:2100``.
``K/N<unit>``
    a duty cycle: ``K`` batches in every period of ``N`` seconds (``s``),
    minutes (``m``) or hours (``h``), e.g. ``100/10m``. Periods count from
    the start of recording; a group of ``K`` begins with the first batch of
    a period, at most one group per period (a group that outlasts its
    period lets the next begin at the batch after it).

The consumer decides per batch (:meth:`Window.admits`), in batch order;
a torch ``DataLoader``'s index tap asks the same question earlier, when
it hands the batch's indices to a worker, and gets the same answer (each
batch is decided once). The answer travels to worker processes with the
batch's index list (:func:`tag_indices`): a worker sets its own flag when
it starts on the batch. Outside the window a stage timer reads one flag
and returns a shared do-nothing object.
"""

from __future__ import annotations

import re
from bisect import bisect_right
from time import monotonic_ns
from typing import Any, Callable

from ..errors import WindowSpecError
from . import _recorder as _r

__all__ = ["Window", "parse_window", "enter_batch", "tag_indices", "header_fields"]

_RANGE = re.compile(r"^(\d+):(\d*)$")
_DUTY = re.compile(r"^(\d+)/(\d+(?:\.\d+)?)([smh])$")
_UNIT_S = {"s": 1.0, "m": 60.0, "h": 3600.0}
_HINT = "write A:B for batches A to B-1 (A: to the end; ranges joined by commas) or K/N[s|m|h] for K batches every N"


def _bad(spec: Any, why: str) -> WindowSpecError:
    return WindowSpecError(f"window {spec!r}: {why}; {_HINT}, e.g. 200:400 or 50/10m")


class Window:
    """Which batches are recorded: fixed ranges, or a duty cycle decided as batches come.

    Use :func:`parse_window` to make one.

    Attributes
    ----------
    spec : str
        The text it was parsed from.
    every_batches : int
        Batches per group of a duty cycle (0 for ranges).
    period_s : float
        Duty-cycle period in seconds (0 for ranges).
    """

    def __init__(self, spec: str, ranges: list[tuple[int, int | None]], every_batches: int = 0,
                 period_s: float = 0.0, clock: Callable[[], int] = monotonic_ns) -> None:
        self.spec = spec
        self.ranges = ranges
        self.every_batches = every_batches
        self.period_s = period_s
        self._clock = clock
        self._t0 = clock()
        self._next = 0  # first batch not decided yet (duty cycle)
        self._left = 0  # batches still to take in the open group
        self._group = -1  # period index of the last group opened
        self._taken: list[list[int]] = []  # admitted batches as [first, end) ranges

    def admits(self, batch_id: int) -> bool:
        """True when batch ``batch_id`` is recorded; a duty cycle decides each batch once, in order."""
        if not self.every_batches:
            return any(a <= batch_id and (b is None or batch_id < b) for a, b in self.ranges)
        while self._next <= batch_id:
            self._decide(self._next)
            self._next += 1
        taken = self._taken
        i = bisect_right(taken, [batch_id, float("inf")]) - 1
        return i >= 0 and taken[i][0] <= batch_id < taken[i][1]

    def _decide(self, batch_id: int) -> None:
        if self._left <= 0:
            group = int((self._clock() - self._t0) / 1e9 // self.period_s)
            if group <= self._group:
                return
            self._group, self._left = group, self.every_batches
        self._left -= 1
        if self._taken and self._taken[-1][1] == batch_id:
            self._taken[-1][1] = batch_id + 1
        else:
            self._taken.append([batch_id, batch_id + 1])

    def recorded(self, batches: int) -> list[list[int]]:
        """Ranges ``[first, end)`` of the batches recorded among the first ``batches`` delivered."""
        if self.every_batches:
            got = [[a, min(b, batches)] for a, b in self._taken]
        else:
            got = [[a, batches if b is None else min(b, batches)] for a, b in self.ranges]
        return [r for r in got if r[0] < r[1]]


def parse_window(spec: Any, *, clock: Callable[[], int] = monotonic_ns) -> Window:
    """Parse a window written as ``A:B[,C:D...]`` or ``K/N[s|m|h]``.

    Parameters
    ----------
    spec : str
        See the module docstring.
    clock : callable, optional
        Monotonic clock in ns for the duty cycle (tests pass a fake one).

    Returns
    -------
    Window

    Raises
    ------
    WindowSpecError
        ``spec`` is not one of the two forms, a range is empty or ranges
        overlap, a count or period is zero. Also a ``ValueError``.

    Examples
    --------
    >>> w = parse_window("2:4,6:")
    >>> [b for b in range(8) if w.admits(b)]
    [2, 3, 6, 7]
    >>> parse_window("100/10m").period_s
    600.0
    """
    if not isinstance(spec, str):
        raise _bad(spec, f"expected text, got {type(spec).__name__}")
    text = spec.strip().replace(" ", "")
    duty = _DUTY.match(text)
    if duty:
        k, n = int(duty.group(1)), float(duty.group(2)) * _UNIT_S[duty.group(3)]
        if k <= 0 or n <= 0:
            raise _bad(spec, "the batch count and the period must be above 0")
        return Window(text, [], every_batches=k, period_s=n, clock=clock)
    ranges: list[tuple[int, int | None]] = []
    for part in text.split(","):
        m = _RANGE.match(part)
        if not m:
            raise _bad(spec, f"cannot read {part!r}")
        a, b = int(m.group(1)), (int(m.group(2)) if m.group(2) else None)
        if b is not None and b <= a:
            raise _bad(spec, f"range {part!r} holds no batch (the end is not after the start)")
        ranges.append((a, b))
    ranges.sort(key=lambda r: r[0])
    for (_, b), (c, _) in zip(ranges, ranges[1:]):
        if b is None or c < b:
            raise _bad(spec, "ranges overlap")
    return Window(text, ranges, clock=clock)


def enter_batch(rec: Any, batch_id: int) -> bool:
    """The consumer starts on ``batch_id``: set this process's span flag; True when it is recorded."""
    window = rec.window
    if window is None:
        return True
    keep = window.admits(batch_id)
    rec.spans_on = keep and rec.on
    return keep


class _Tagged(list):
    """A batch's index list that sets the span flag of the process iterating it (a loader worker)."""

    __slots__ = ("keep",)

    def __iter__(self) -> Any:
        rec = _r.RECORDER
        if not rec.checked_env:  # a spawned worker joins the run first, or joining would turn its flag on
            _r.attach_from_env()
        rec.spans_on = self.keep and rec.on
        return list.__iter__(self)

    def __reduce__(self) -> tuple[Any, ...]:
        return (_tagged, (list.copy(self), self.keep))  # list(self) would call __iter__


def _tagged(items: list[Any], keep: bool) -> _Tagged:
    out = _Tagged(items)
    out.keep = keep
    return out


def tag_indices(index: Any, batch_id: int) -> Any:
    """``index`` (a batch's list of indices) tagged with whether ``batch_id`` is recorded.

    Only lists are tagged (a loader with ``batch_size=None`` hands out single
    indices, which stay as they are: its workers record all the time).
    """
    window = _r.RECORDER.window
    if window is None or type(index) is not list:
        return index
    return _tagged(index, window.admits(batch_id))


def header_fields(window: Window | None, batches: int | None = None) -> dict[str, Any]:
    """The run-header field ``window``: the spec, the duty cycle and (at close) the batches recorded."""
    if window is None:
        return {}
    out: dict[str, Any] = {"spec": window.spec, "every_batches": window.every_batches, "period_s": window.period_s}
    if batches is not None:
        out["batches"] = window.recorded(batches)
    return {"window": out}
