"""Recording: the :class:`Probe`, stage timers, the loader watch and the step timer.

A span costs two clock reads (four with CPU time on) and six integer
stores into a preallocated per-thread buffer; see ``_recorder.py`` for the
buffering and ``tracefile.py`` for what lands on disk.
"""

from __future__ import annotations

import functools
import inspect
import json
import os
import platform
import socket
import warnings
from collections import deque
from pathlib import Path
from time import monotonic_ns, thread_time_ns
from typing import Any, Callable, Iterable, Iterator, TypeVar

from . import __version__, _clocksync
from . import _recorder as _r
from . import tracefile as tf
from ._recorder import RECORDER, TLS
from .errors import ProbeStateError, StageNameError, StageTargetError

__all__ = ["Probe", "stage"]

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
    """``epoch`` clipped to what a record holds (see ``_recorder.EPOCH_MAX``)."""
    return min(max(epoch, _r.EPOCH_MIN), _r.EPOCH_MAX)


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
        if not rec.on:
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
    if rec.on:
        return _CpuSpan(code, sample, batch) if rec.cpu_time else _Span(code, sample, batch)
    if rec.checked_env or not _r.attach_from_env():
        return _Noop(name)
    return _stage_slow(name, sample, batch)


def _stage_slow(name: Any, sample: Any, batch: Any) -> Any:
    _check_stage_name(name)
    sample_i = _check_id(sample, "sample")
    batch_i = _check_id(batch, "batch")
    rec = RECORDER
    if not rec.on and (rec.checked_env or not _r.attach_from_env()):
        return _Noop(name)
    code = _CODES.get(name)
    if code is None:
        code = _CODES[name] = rec.stage_id(name)
    return _CpuSpan(code, sample_i, batch_i) if rec.cpu_time else _Span(code, sample_i, batch_i)


class _Watched:
    """An iterable of batches whose every iteration is recorded as an epoch."""

    def __init__(self, probe: Probe, iterable: Iterable[T], samples: Any, epoch: int | None) -> None:
        self._probe = probe
        self._iterable = iterable
        self._samples = samples
        self._epoch = epoch
        self._samples_warned = False

    def _sample_ids(self, item: Any) -> list[int] | None:
        """The user's ``samples=`` callable on a delivered batch; its failure is its own.

        The callable is user code: when it raises (or returns something
        that is not ints), that batch is recorded without sample ids, one
        warning names the callable, and recording goes on.
        """
        try:
            return [int(i) for i in self._samples(item)]
        except Exception as exc:  # noqa: BLE001 - the user's callable, not pipeprobe, failed
            if not self._samples_warned:
                self._samples_warned = True
                warnings.warn(
                    f"pipeprobe: the samples= callable given to watch() raised {type(exc).__name__}: {exc}. "
                    "Batches it fails on are recorded without their sample ids; recording goes on.",
                    RuntimeWarning,
                    stacklevel=3,
                )
            return None

    def __len__(self) -> int:
        return len(self._iterable)  # type: ignore[arg-type]

    def __iter__(self) -> Iterator[Any]:
        rec = RECORDER
        if self._epoch is not None:
            rec.epoch = _check_epoch(self._epoch)
        else:
            rec.epoch += 1
        epoch = rec.epoch
        index_queue = None
        if self._samples is None and RECORDER.on:
            from ._loaders import iter_with_indices

            it, index_queue = iter_with_indices(self._iterable)
        else:
            it = iter(self._iterable)
        return self._run(it, epoch, index_queue)

    def _run(self, it: Iterator[Any], epoch: int, index_queue: deque | None) -> Iterator[Any]:
        rec = RECORDER
        wait_code = (tf.KIND_WAIT << 16) | ((epoch + 1) << 32)
        member_code = (tf.KIND_MEMBER << 16) | ((epoch + 1) << 32)
        while True:
            on = rec.on
            if on:
                buf = rec.buffer()
                bid = rec.next_batch
                prev_ctx = buf.ctx
                buf.ctx = bid
            t0 = monotonic_ns()
            try:
                item = next(it)
            except StopIteration:
                if on:
                    buf.ctx = prev_ctx
                return
            except BaseException:
                if on and rec.on:
                    rec.record(t0, monotonic_ns(), -1, -1, bid, wait_code | _ERROR_BITS)
                raise
            t1 = monotonic_ns()
            if on and rec.on:
                rec.next_batch = bid + 1
                try:
                    rec.record(t0, t1, -1, -1, bid, wait_code)
                    if index_queue is not None:
                        ids = index_queue.popleft() if index_queue else None
                    else:
                        ids = self._sample_ids(item) if self._samples is not None else None
                    if ids:
                        for sid in ids:
                            rec.record(t1, t1, -1, sid, bid, member_code)
                except Exception as exc:  # noqa: BLE001 - never take training down
                    rec.fail(exc)
            yield item


class Probe:
    """One recording session of a training run, written to ``out_dir``.

    Parameters
    ----------
    out_dir : str or path-like
        The run directory. Created if missing; it must not be a file and
        must not already hold a run of the same rank.
    cpu_time : bool, default True
        Also record the thread CPU time spent inside each span.
    sample_interval_s : float, default 0.2
        Period of the resource sampler (CPU %, RSS, bytes read, per-core
        CPU); ``0`` turns it off.
    flush_interval_s : float, default 1.0
        How often buffered spans are written. A killed process loses at
        most this much recording.
    report : bool, default True
        Print the end-of-run stall report on :meth:`close`.
    buffer_spans : int, default 8192
        Spans each thread buffers between flushes (48 bytes each).
    sync_clocks : bool, default True
        When ``torch.distributed`` is initialised, measure the clock offsets
        between ranks at start (a few collective rounds; every rank must
        create its probe at the same point) and agree on one run id.

    Raises
    ------
    ValueError
        A bad argument (``out_dir`` is a file, an interval not positive...).
    ProbeStateError
        Another probe is already recording in this process.

    Examples
    --------
    >>> import pipeprobe, tempfile
    >>> with pipeprobe.Probe(tempfile.mkdtemp(), report=False) as probe:
    ...     for batch in probe.watch([[1, 2], [3, 4]]):
    ...         with probe.step():
    ...             total = sum(batch)
    """

    def __init__(
        self,
        out_dir: str | os.PathLike,
        *,
        cpu_time: bool = True,
        sample_interval_s: float = 0.2,
        flush_interval_s: float = 1.0,
        report: bool = True,
        buffer_spans: int = 8192,
        sync_clocks: bool = True,
    ) -> None:
        if not isinstance(out_dir, (str, os.PathLike)):
            raise ValueError(f"out_dir must be a path, got {type(out_dir).__name__}")
        out = Path(out_dir)
        if out.exists() and not out.is_dir():
            raise ValueError(f"out_dir {str(out)!r} is a file; give a folder for the run")
        out = out.resolve()  # an os.chdir() during the run must not move it
        if not (isinstance(sample_interval_s, (int, float)) and sample_interval_s >= 0):
            raise ValueError(f"sample_interval_s must be >= 0, got {sample_interval_s!r}")
        if not (isinstance(flush_interval_s, (int, float)) and flush_interval_s > 0):
            raise ValueError(f"flush_interval_s must be > 0, got {flush_interval_s!r}")
        if not (isinstance(buffer_spans, int) and buffer_spans >= 16):
            raise ValueError(f"buffer_spans must be an int >= 16, got {buffer_spans!r}")
        rec = RECORDER
        if rec.on and rec.role == "main":
            raise ProbeStateError("a pipeprobe.Probe is already recording in this process; close it first")
        self.run_dir = out
        self.report = report
        self.closed = False
        self.rank, self.world_size = _r.detect_rank()
        run_id, run_id_source = _clocksync.local_run_id(self.world_size)
        clock_sync = None
        dist = _clocksync.distributed() if sync_clocks else None
        if dist is not None:  # before any check one rank alone could fail
            self.rank, self.world_size = int(dist.get_rank()), int(dist.get_world_size())
            agreed = _clocksync.measure(dist, _clocksync.local_run_id(1)[0])  # rank 0's, unique
            if agreed is not None:
                run_id, run_id_source, clock_sync = agreed["run_id"], "exchange", agreed["clock_sync"]
        header_path = out / f"run-r{self.rank}.json"
        if header_path.exists():
            raise ValueError(f"{str(out)!r} already holds a recorded run (rank {self.rank}); give a new folder")
        self._sampler = None
        self._env_before = {k: os.environ.get(k) for k in (_r.ENV_RUN_DIR, _r.ENV_OPTIONS)}
        options = {
            "cpu_time": bool(cpu_time),
            "flush_interval_s": float(flush_interval_s),
            "buffer_spans": int(buffer_spans),
            "rank": self.rank,
            "world_size": self.world_size,
            "run_id": run_id,
        }
        rec.next_batch = 0
        rec.epoch = -1
        rec.start(
            out.resolve(),
            role="main",
            cpu_time=bool(cpu_time),
            flush_interval_s=float(flush_interval_s),
            buffer_spans=int(buffer_spans),
            rank=self.rank,
            world_size=self.world_size,
            run_id=run_id,
        )
        self._session = rec.session
        self._header = {
            "format": "pipeprobe-run",
            "format_version": tf.FORMAT_VERSION,
            "run_id": run_id,
            "run_id_source": run_id_source,
            "clock_sync": clock_sync,
            "host": socket.gethostname(),
            "cores": os.cpu_count() or 1,
            "anchor_wall_ns": rec.anchor_wall_ns,
            "anchor_mono_ns": rec.anchor_mono_ns,
            "end_mono_ns": None,
            "pipeprobe_version": __version__,
            "python_version": platform.python_version(),
            "platform": platform.platform(),
            "pid": os.getpid(),
            "rank": self.rank,
            "world_size": self.world_size,
            "cpu_time": bool(cpu_time),
            "sample_interval_s": float(sample_interval_s),
            "flush_interval_s": float(flush_interval_s),
            "stages": [],
            "closed": False,
        }
        try:
            out.mkdir(parents=True, exist_ok=True)
            self._write_header()
            os.environ[_r.ENV_RUN_DIR] = str(out.resolve())
            os.environ[_r.ENV_OPTIONS] = json.dumps(options)
            if sample_interval_s > 0:
                from ._sampler import ResourceSampler

                self._sampler = ResourceSampler(out, self.rank, float(sample_interval_s))
                rec.extra_writers.append(self._sampler.write)
                self._sampler.start()
        except Exception as exc:  # noqa: BLE001 - an unwritable folder must not stop training
            rec.fail(exc)
        _r._SIGNAL_CLOSERS.append(self._close_on_signal)

    # -- recording API -------------------------------------------------------
    def stage(self, name: str, *, sample: int | None = None, batch: int | None = None) -> Any:
        """Time a stage; same as :func:`pipeprobe.stage`."""
        return stage(name, sample=sample, batch=batch)

    def step(self) -> Any:
        """Time the training step of the current batch: ``with probe.step(): ...``."""
        rec = RECORDER
        if not rec.on:
            return _Noop("step")
        code = _STEP_CODE | rec.stage_ids["step"]
        return _CpuSpan(code, -1, -1) if rec.cpu_time else _Span(code, -1, -1)

    def watch(
        self,
        loader: Iterable[T],
        *,
        samples: Callable[[T], Iterable[int]] | None = None,
        epoch: int | None = None,
    ) -> Iterable[T]:
        """Wrap an iterable of batches to record how long the consumer waits for each.

        Every ``iter()`` of the returned object is one epoch. Batch ids count
        from 0 across the whole run, in the order batches reach the consumer.

        Parameters
        ----------
        loader : iterable
            Any iterable of batches: a generator, a pool's ``imap``, a torch
            ``DataLoader`` (whose sample ids are read from its sampler).
        samples : callable, optional
            Maps a delivered batch to the sample ids it holds; this is how
            spans recorded in worker processes are linked to batches when
            the loader is not a torch ``DataLoader``.
        epoch : int, optional
            Epoch number to record instead of counting iterations. The trace
            holds epochs from -2**31 to 2**31 - 2; one beyond is clipped.
        """
        if samples is not None and not callable(samples):
            raise ValueError("samples must be a callable that returns the sample ids of a batch")
        if epoch is not None:
            _check_id(epoch, "epoch")
        return _Watched(self, loader, samples, epoch)

    # -- life cycle ----------------------------------------------------------
    def _write_header(self) -> None:
        self._header["stages"] = list(RECORDER.stage_names)
        tf.write_json_atomic(self.run_dir / f"run-r{self.rank}.json", self._header)

    def _close_on_signal(self) -> None:
        if not self.closed:
            self._header["end_mono_ns"] = monotonic_ns()
            self._header["ended_by"] = "signal"
            try:
                self._write_header()
            except Exception:  # noqa: BLE001
                pass

    def close(self) -> None:
        """Flush everything, finish the run header and print the stall report."""
        if self.closed:
            return
        self.closed = True
        rec = RECORDER
        end = monotonic_ns()
        if self._sampler is not None:
            self._sampler.stop()
        if rec.session != self._session:
            # This probe failed and a newer one records now: its recorder,
            # signal hooks and environment are not this probe's to touch.
            _discard(_r._SIGNAL_CLOSERS, self._close_on_signal)
            return
        ok = rec.on
        if ok:
            try:  # worker processes that outlive the probe flush now
                late = _r.close_workers(self.run_dir.resolve(), self.rank)
                if late:
                    warnings.warn(
                        f"pipeprobe: worker processes {late} did not flush within 3 s of close; "
                        "their last spans may be missing from the run",
                        RuntimeWarning,
                        stacklevel=2,
                    )
            except Exception as exc:  # noqa: BLE001 - never take training down
                warnings.warn(f"pipeprobe could not flush worker processes: {exc}", RuntimeWarning, stacklevel=2)
        rec.stop()
        _r.restore_signal_hooks()
        _discard(_r._SIGNAL_CLOSERS, self._close_on_signal)
        for key, value in self._env_before.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value
        if not ok and not rec.failed:
            return
        self._header["end_mono_ns"] = end
        self._header["closed"] = True
        self._header["batches"] = rec.next_batch
        try:
            self._write_header()
        except Exception as exc:  # noqa: BLE001
            if not rec.failed:
                rec.on = True
                rec.fail(exc)
            return
        if self.report and not rec.failed:
            try:
                from .report import print_close_report

                print_close_report(self.run_dir)
            except Exception as exc:  # noqa: BLE001 - the report must not break training
                warnings.warn(f"pipeprobe could not print its report: {exc}", RuntimeWarning, stacklevel=2)

    def __enter__(self) -> Probe:
        return self

    def __exit__(self, et: Any, ev: Any, tb: Any) -> None:
        self.close()

    def __reduce__(self) -> tuple[Any, ...]:
        # A probe passed to a spawned worker becomes that worker's recorder.
        return (_worker_probe, (str(self.run_dir),))

    def __repr__(self) -> str:
        state = "closed" if self.closed else ("recording" if RECORDER.on else "off")
        return f"<pipeprobe.Probe {str(self.run_dir)!r} {state}>"


def _discard(items: list[Any], item: Any) -> None:
    try:
        items.remove(item)
    except ValueError:
        pass


class _WorkerProbe:
    """The probe seen in a worker process: stages and steps record, no life cycle."""

    def __init__(self, run_dir: str) -> None:
        self.run_dir = Path(run_dir)
        if not RECORDER.on:
            if os.environ.get(_r.ENV_RUN_DIR) != str(self.run_dir.resolve()):
                os.environ[_r.ENV_RUN_DIR] = str(self.run_dir.resolve())
            _r.attach_from_env()

    stage = staticmethod(stage)

    def step(self) -> Any:
        return Probe.step(self)  # type: ignore[arg-type]

    def close(self) -> None:
        RECORDER.flush()

    def __reduce__(self) -> tuple[Any, ...]:
        return (_worker_probe, (str(self.run_dir),))


def _worker_probe(run_dir: str) -> _WorkerProbe:
    return _WorkerProbe(run_dir)
