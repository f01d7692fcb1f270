"""Stage timers: the block form, the decorator and the checks on names and ids.

A span costs two clock reads (four with CPU time on) and one ``list.extend``
of six ints into the thread's buffer (``_buffers.py``); nothing else runs
on that path: no locks, no numpy, no dict building.
"""

from __future__ import annotations

import functools
import inspect
import statistics
from time import monotonic_ns, process_time_ns, thread_time_ns
from typing import Any, Callable, TypeVar

from .. import tracefile as tf
from ..errors import StageNameError, StageTargetError
from . import _recorder as _r
from ._buffers import _FIELDS, EPOCH_MAX, EPOCH_MIN, _Buffer, take_records
from ._recorder import RECORDER, TLS

__all__ = ["stage"]

T = TypeVar("T")
_STEP_CODE = tf.KIND_STEP << 16
_ERROR_BITS = tf.FLAG_ERROR << 24


def _check_stage_name(name: Any) -> str:
    if not isinstance(name, str):
        raise StageNameError(f"stage name must be a str, got {type(name).__name__} {name!r}")
    if not name or len(name) > 200:
        raise StageNameError(f"stage name must be 1 to 200 characters, got {name!r}")
    if name in _r.RESERVED_STAGES:
        raise StageNameError(
            f"stage name {name!r} is reserved: use probe.step() for the training step; "
            "the consumer's wait is recorded by probe.watch()"
        )
    try:
        name.encode("utf-8")
    except UnicodeEncodeError as exc:
        message = (
            f"stage name {name!r} cannot be written as UTF-8 (character {exc.object[exc.start]!r} "
            f"at position {exc.start}, a lone surrogate); give the name as plain text"
        )
        raise StageNameError(message) from None
    return name


def _check_epoch(epoch: int) -> int:
    """``epoch`` clipped to what a record holds (see ``_buffers.EPOCH_MAX``)."""
    return min(max(epoch, EPOCH_MIN), EPOCH_MAX)


def _check_timeable(fn: Any, name: str) -> None:
    """Refuse functions whose call only creates the work: generators and coroutines."""
    if inspect.isgeneratorfunction(fn) or inspect.iscoroutinefunction(fn) or inspect.isasyncgenfunction(fn):
        kind = "a generator function" if inspect.isgeneratorfunction(fn) else "an async function"
        message = (
            f"@pipeprobe.stage({name!r}) cannot time {getattr(fn, '__qualname__', fn)!r}: it is {kind}, "
            f"so a call only creates it; time the work inside it with `with pipeprobe.stage({name!r}): ...`"
        )
        raise StageTargetError(message)


def _check_id(value: Any, what: str) -> int:
    if value is None:
        return -1
    if isinstance(value, bool) or not isinstance(value, int):
        raise ValueError(f"{what} must be an int, got {type(value).__name__} {value!r}")
    return value


class _Span:
    """A timed block; also a decorator. Made by :func:`stage` and :meth:`Probe.step`."""

    __slots__ = ("_code", "_sample", "_batch", "_t0")

    def __init__(self, code: int, sample: int, batch: int) -> None:
        self._code = code
        self._sample = sample
        self._batch = batch

    def __enter__(self) -> _Span:
        self._t0 = monotonic_ns()
        return self

    def __exit__(self, et: Any, ev: Any, tb: Any) -> bool:
        t1 = monotonic_ns()
        try:
            buf = TLS.buf
        except AttributeError:
            buf = RECORDER.buffer()
        b = self._batch
        buf.extend(
            (self._t0, t1, -1, self._sample, b if b >= 0 else buf.ctx,
             self._code if et is None else self._code | _ERROR_BITS)
        )
        if len(buf) >= buf.limit:
            RECORDER.spill(buf)
        return False

    def __call__(self, fn: Callable[..., T]) -> Callable[..., T]:
        """Use as a decorator: time every call of ``fn`` under this stage name."""
        return _timed(fn, RECORDER.stage_names[self._code & 0xFFFF])


class _CpuSpan(_Span):
    """A :class:`_Span` that also takes the thread's CPU time."""

    __slots__ = ("_c0",)

    # The thread CPU clock is a system call, and the kernel may deschedule
    # the thread on its way back: reading it inside the wall-clock reads
    # puts that wait in the span (where cpu_s < dur_s shows it), not in a
    # gap between spans that nothing recorded.
    def __enter__(self) -> _CpuSpan:
        self._t0 = monotonic_ns()
        self._c0 = thread_time_ns()
        return self

    def __exit__(self, et: Any, ev: Any, tb: Any) -> bool:
        cpu = thread_time_ns() - self._c0
        t1 = monotonic_ns()
        try:
            buf = TLS.buf
        except AttributeError:
            buf = RECORDER.buffer()
        b = self._batch
        buf.extend(
            (self._t0, t1, cpu, self._sample, b if b >= 0 else buf.ctx,
             self._code if et is None else self._code | _ERROR_BITS)
        )
        if len(buf) >= buf.limit:
            RECORDER.spill(buf)
        return False


class _StepSpan(_Span):
    """The training step's timer: a :class:`_CpuSpan` whose CPU time is the whole process's (every thread).

    The step's math libraries run their own threads; their CPU time is
    what the thread check and the replay need. The process CPU clock sums
    the process's threads (one system call); it runs at step rate, not span
    rate. The run header's ``step_cpu`` says step records hold it.
    """

    __slots__ = ("_c0",)

    def __enter__(self) -> _StepSpan:
        self._t0 = monotonic_ns()
        self._c0 = process_time_ns()
        return self

    def __exit__(self, et: Any, ev: Any, tb: Any) -> bool:
        cpu = process_time_ns() - self._c0
        t1 = monotonic_ns()
        try:
            buf = TLS.buf
        except AttributeError:
            buf = RECORDER.buffer()
        b = self._batch
        buf.extend(
            (self._t0, t1, cpu, self._sample, b if b >= 0 else buf.ctx,
             self._code if et is None else self._code | _ERROR_BITS)
        )
        if len(buf) >= buf.limit:
            RECORDER.spill(buf)
        return False


def _timed(fn: Callable[..., T], name: str) -> Callable[..., T]:
    _check_timeable(fn, name)
    try:
        params = list(inspect.signature(fn).parameters)
    except (TypeError, ValueError):
        params = []
    pos = 1 if params and params[0] in ("self", "cls") else 0
    codes = RECORDER.user_codes

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> T:
        rec = RECORDER
        if not rec.spans_on:
            if rec.checked_env or not _r.attach_from_env():
                return fn(*args, **kwargs)
        code = codes.get(name)
        if code is None:
            code = codes[name] = rec.stage_id(name)
        sample = args[pos] if len(args) > pos and type(args[pos]) is int else -1
        t0 = monotonic_ns()
        c0 = thread_time_ns() if rec.cpu_time else -1  # inside the wall reads: see _CpuSpan
        try:
            return fn(*args, **kwargs)
        except BaseException:
            code |= _ERROR_BITS
            raise
        finally:
            cpu = thread_time_ns() - c0 if c0 >= 0 else -1
            t1 = monotonic_ns()
            try:
                buf = TLS.buf
            except AttributeError:
                buf = rec.buffer()
            buf.extend((t0, t1, cpu, sample, buf.ctx, code))
            if len(buf) >= buf.limit:
                rec.spill(buf)

    wrapper.__pipeprobe_stage__ = name  # type: ignore[attr-defined]
    return wrapper


class _Noop:
    """What :func:`stage` returns while nothing records: a free context manager."""

    __slots__ = ("_name",)

    def __init__(self, name: str = "") -> None:
        self._name = name

    def __enter__(self) -> _Noop:
        return self

    def __exit__(self, et: Any, ev: Any, tb: Any) -> bool:
        return False

    def __call__(self, fn: Callable[..., T]) -> Callable[..., T]:
        return _timed(fn, self._name)


_CODES = RECORDER.user_codes  # cleared in place when a probe starts
_NOOPS: dict[str, _Noop] = {}  # stateless, so one per stage name serves every call


def stage(name: str, *, sample: int | None = -1, batch: int | None = -1) -> Any:
    """Time a stage: ``with stage("decode", sample=i): ...`` or ``@stage("decode")``.

    Records into the probe active in this process. In loader worker
    processes (forked or spawned) it joins the parent's run by itself. While
    no probe is active it costs almost nothing and records nothing.

    Parameters
    ----------
    name : str
        Stage name, e.g. ``"decode"``. ``"step"`` and ``"wait"`` are reserved.
    sample : int, optional
        Sample id the work belongs to (-1 or None: unknown). The decorator
        form takes the first positional ``int`` argument (after ``self``)
        as the sample id.
    batch : int, optional
        Batch id, in the consumer's numbering (0, 1, ... in the order the
        training loop receives batches). By default, spans in the thread
        that iterates a watched loader belong to the batch being fetched or
        worked on; spans elsewhere are linked to batches through the sample
        ids the watch records.

    Returns
    -------
    context manager and decorator

    Raises
    ------
    StageNameError
        ``name`` is not a non-empty str, is reserved, or cannot be written
        as UTF-8 (a lone surrogate). Also a ``ValueError``.
    ValueError
        An id is not an int.
    StageTargetError
        The decorator form is put on a generator or async function, whose
        call only creates the work. Also a ``TypeError``.

    Notes
    -----
    Any int is accepted as an id. The trace stores a sample id as an int64
    and a batch id as an int32: a sample id beyond int64 (an unsigned 64-bit
    hash) is stored as its low 63 bits, a batch id beyond int32 as -1
    (unknown).

    Examples
    --------
    >>> import pipeprobe
    >>> with pipeprobe.stage("decode", sample=3):
    ...     pass
    """
    rec = RECORDER
    try:
        code = _CODES[name]
    except (KeyError, TypeError):
        return _stage_slow(name, sample, batch)
    if type(sample) is not int or type(batch) is not int:
        return _stage_slow(name, sample, batch)
    if rec.spans_on:
        return _CpuSpan(code, sample, batch) if rec.cpu_time else _Span(code, sample, batch)
    if rec.checked_env or not _r.attach_from_env():
        noop = _NOOPS.get(name)  # outside a recording window: one shared no-op per checked name
        if noop is None:
            noop = _NOOPS[name] = _Noop(name)
        return noop
    return _stage_slow(name, sample, batch)


def _stage_slow(name: Any, sample: Any, batch: Any) -> Any:
    _check_stage_name(name)
    sample_i = _check_id(sample, "sample")
    batch_i = _check_id(batch, "batch")
    rec = RECORDER
    if not rec.spans_on and (rec.checked_env or not _r.attach_from_env()):
        if rec.on and name not in _CODES:  # outside a recording window: the checked name takes the fast path next time
            _CODES[name] = rec.stage_id(name)
        return _Noop(name)
    code = _CODES.get(name)
    if code is None:
        code = _CODES[name] = rec.stage_id(name)
    return _CpuSpan(code, sample_i, batch_i) if rec.cpu_time else _Span(code, sample_i, batch_i)


def _calibration_stage(codes: dict[str, int], span_type: Any, name: str, sample: Any, batch: Any) -> Any:
    """The work of :func:`stage`'s fast path (a call, the name's code, the id checks) on a private name table.

    Calibration runs before the probe records, so it cannot call :func:`stage`
    itself (that would return a no-op, or put a stage name in the run).
    """
    code = codes[name]
    if type(sample) is not int or type(batch) is not int:
        raise TypeError("calibration ids are ints")
    return span_type(code, sample, batch)


#: Spans timed by :func:`calibrate_span_cost_ns`, in five blocks: a few ms.
CALIBRATION_SPANS = 2000


def calibrate_span_cost_ns(cpu_time: bool, spans: int = CALIBRATION_SPANS) -> float:
    """What one block-form span costs in this thread now, in ns, net of the loop around it.

    Times ``spans`` spans in five blocks, each against an empty loop of the
    same length, plus turning them into fixed-width records as a flush
    does, and returns the median difference per span. The spans go
    to a scratch buffer put in this thread's place for the measurement
    (large enough never to spill), so the run records nothing from it.
    Timed on this thread's CPU clock: on a loaded machine the thread waits
    for a core now and then, and wall time would count the wait as cost.
    A few milliseconds; the report uses it to estimate what recording cost.
    """
    span_type = _CpuSpan if cpu_time else _Span
    codes = {"calibration": 0}
    per_block = max(1, spans // 5)
    scratch = _Buffer(_FIELDS * (per_block + 1))
    saved = getattr(TLS, "buf", None)
    TLS.buf = scratch
    costs = []
    try:
        for _ in range(5):
            t0 = thread_time_ns()
            for i in range(per_block):
                with _calibration_stage(codes, span_type, "calibration", i, -1):
                    pass
            t1 = thread_time_ns()
            for _i in range(per_block):  # the same loop, empty
                pass
            t2 = thread_time_ns()
            take_records(scratch)  # what a flush does with these spans before writing them
            t3 = thread_time_ns()
            costs.append(((t1 - t0) - (t2 - t1) + (t3 - t2)) / per_block)
    finally:
        if saved is None:
            del TLS.buf
        else:
            TLS.buf = saved
    return max(0.0, statistics.median(costs))
