"""The probe: a recording session's life cycle, the loader watch and the step timer.

Stage timers live in ``_spans.py``, the per-thread buffers in ``_buffers.py``, flushing in
``_recorder.py``; see ``tracefile.py`` for what lands on disk.
"""

from __future__ import annotations

import json
import os
import platform
import socket
import warnings
import weakref
from collections import deque
from dataclasses import replace
from pathlib import Path
from time import monotonic_ns, process_time_ns, thread_time_ns
from typing import Any, Callable, Iterable, Iterator, TypeVar

from .. import __version__, _live
from .. import tracefile as tf
from ..errors import ProbeStateError
from . import _clocksync, _closing, _signals, _window, _workerstart
from . import _recorder as _r
from ._recorder import RECORDER
from ._spans import _check_epoch, _check_id, _Noop, _Span, _StepSpan, stage
from ._threads import STEP_CPU_PROCESS, WAIT_CPU_OTHERS, read_thread_pools

__all__ = ["Probe"]

T = TypeVar("T")
_STEP_CODE = tf.KIND_STEP << 16
_ERROR_BITS = tf.FLAG_ERROR << 24
_NOOP_STEP = _Noop("step")  # shared: outside the window a step costs one flag read

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
        # The wait runs from the first clock read of an iteration to the last,
        # after the batch's bookkeeping, so the loop's own clock around next()
        # sees no more than the wait. The batch before last is let go inside the
        # wait too: the loop's `batch = next(it)` drops its reference to the last
        # batch, and freeing a batch a worker process sent (shared memory) took
        # 30-100 us on our 2-core machine, in the loop's next() but after the
        # wait ended. The loop holds that batch during next() anyway, so the
        # peak memory stays the same.
        rec = RECORDER
        wait_code = (tf.KIND_WAIT << 16) | ((epoch + 1) << 32)
        member_code = (tf.KIND_MEMBER << 16) | ((epoch + 1) << 32)
        # A caller that drives this generator with send(t) (pipeprobe run's loop
        # steps) hands in the instant its own next() began: the wait starts there.
        item = _kept = sent = None
        cpu = rec.cpu_time
        c0 = 0
        while True:
            t0 = monotonic_ns() if sent is None else sent
            _kept = None  # the batch before last: freed here, inside the wait
            on = rec.on
            if on:
                buf = rec.buffer()
                bid = rec.next_batch
                kept = _window.enter_batch(rec, bid)
                # The CPU the process's other threads use while the loop waits (a math-library pool that
                # keeps spinning after the step takes it from the workers; see _delivered), read only for a
                # wait the window keeps.
                c0 = process_time_ns() - thread_time_ns() if cpu and kept else 0
                prev_ctx = buf.ctx
                buf.ctx = bid
            try:
                item, _kept = next(it), item
            except StopIteration:
                if on:
                    buf.ctx = prev_ctx
                return
            except BaseException:
                if on and rec.on and kept:
                    rec.record(t0, monotonic_ns(), -1, -1, bid, wait_code | _ERROR_BITS)
                raise
            if on and rec.on:
                self._delivered(item, bid, t0, c0, wait_code, member_code, index_queue, kept)
            sent = yield item

    def _delivered(self, item: Any, bid: int, t0: int, c0: int, wait_code: int, member_code: int,
                   index_queue: deque | None, kept: bool) -> None:
        """Record batch ``bid`` just taken (when the window ``kept`` it): its sample ids at delivery, then its
        wait up to now, with the CPU time the process's other threads used since ``c0`` (their CPU clock
        then: process less this thread; the header's ``wait_cpu`` says waits hold it)."""
        rec = RECORDER
        t1 = monotonic_ns()
        rec.next_batch = bid + 1
        try:
            if index_queue is not None:
                ids = index_queue.popleft() if index_queue else None
            else:
                ids = self._sample_ids(item) if self._samples is not None and kept else None
            if ids and kept:
                for sid in ids:
                    rec.record(t1, t1, -1, sid, bid, member_code)
            if kept:
                others = max(0, process_time_ns() - thread_time_ns() - c0) if rec.cpu_time else -1
                rec.record(t0, monotonic_ns(), others, -1, bid, wait_code)
        except Exception as exc:  # noqa: BLE001 - never take training down
            rec.fail(exc)


def step_code() -> int:
    """The record code of a ``step`` span (kind and stage id) in this process."""
    return _STEP_CODE | RECORDER.stage_ids["step"]


def _checked_out_dir(out_dir: Any) -> Path:
    """``out_dir`` as an absolute path (an ``os.chdir()`` during the run must not move it)."""
    if not isinstance(out_dir, (str, os.PathLike)):
        raise ValueError(f"out_dir must be a path, got {type(out_dir).__name__}")
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise ValueError(f"out_dir {str(out)!r} is a file; give a folder for the run")
    return out.resolve()


def _make_run_folder(out: Path) -> None:
    """Create the run folder; a failure is left to :meth:`Probe._open_run`, which reports it as pipeprobe's own."""
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError:
        pass


def _check_intervals(sample_interval_s: Any, flush_interval_s: Any, buffer_spans: Any) -> None:
    if not (isinstance(sample_interval_s, (int, float)) and sample_interval_s >= 0):
        raise ValueError(f"sample_interval_s must be >= 0, got {sample_interval_s!r}")
    if not (isinstance(flush_interval_s, (int, float)) and flush_interval_s > 0):
        raise ValueError(f"flush_interval_s must be > 0, got {flush_interval_s!r}")
    if not (isinstance(buffer_spans, int) and buffer_spans >= 16):
        raise ValueError(f"buffer_spans must be an int >= 16, got {buffer_spans!r}")


#: Called with the run folder after a clean close of a probe made with
#: ``report=True``. The recording layer never imports the report: the
#: package facade installs the printer (see the design note in ``__init__``).
_CLOSE_REPORT: Callable[[Path], None] | None = None


def set_close_report(print_report: Callable[[Path], None] | None) -> None:
    """Install the end-of-run report a probe prints on close (``None``: no report)."""
    global _CLOSE_REPORT
    _CLOSE_REPORT = print_report


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
    live : bool or float, default False
        Print a status line on stderr every 5 s (or every ``live`` seconds)
        while recording; see :mod:`pipeprobe._live`.
    window : str, optional
        Record only some batches of a long job: ``"200:400"`` (batches 200
        to 399; ranges joined by commas) or ``"50/10m"`` (50 batches every
        10 minutes; ``s``, ``m``, ``h``). See :mod:`pipeprobe.record._window`.

    Raises
    ------
    ValueError
        A bad argument (``out_dir`` is a file, an interval not positive...).
    WindowSpecError
        ``window`` is written wrongly. Also a ``ValueError``.
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
        live: bool | float = False,
        window: str | None = None,
    ) -> None:
        out = _checked_out_dir(out_dir)
        parsed_window = None if window is None else _window.parse_window(window)
        _check_intervals(sample_interval_s, flush_interval_s, buffer_spans)
        live_s = _live.live_interval(live)
        rec = RECORDER
        if rec.on and rec.role == "main":
            raise ProbeStateError("a pipeprobe.Probe is already recording in this process; close it first")
        self.run_dir = out
        self.report = report
        self.closed = False
        run_id, run_id_source, clock_sync = self._join_ranks(sync_clocks)
        header_path = out / f"run-r{self.rank}.json"
        if header_path.exists():
            raise ValueError(f"{str(out)!r} already holds a recorded run (rank {self.rank}); give a new folder")
        self._sampler = None
        self._inline_loader: Callable[[], Any] | None = None  # a torch DataLoader watched with no workers
        self._env_before = {k: os.environ.get(k) for k in (_r.ENV_RUN_DIR, _r.ENV_OPTIONS)}
        rec.next_batch = 0
        rec.epoch = -1
        _make_run_folder(out)  # before start(): its flush thread may write before _open_run()
        rec.start(
            out,
            role="main",
            cpu_time=bool(cpu_time),
            flush_interval_s=float(flush_interval_s),
            buffer_spans=int(buffer_spans),
            rank=self.rank,
            world_size=self.world_size,
            run_id=run_id,
        )
        self._session = rec.session
        self._header = tf.RunHeader(
            run_id=run_id, run_id_source=run_id_source, clock_sync=clock_sync, host=socket.gethostname(),
            cores=os.cpu_count() or 1, anchor_wall_ns=rec.anchor_wall_ns, anchor_mono_ns=rec.anchor_mono_ns,
            pipeprobe_version=__version__, python_version=platform.python_version(), platform=platform.platform(),
            pid=os.getpid(), rank=self.rank, world_size=self.world_size, cpu_time=bool(cpu_time),
            sample_interval_s=float(sample_interval_s), flush_interval_s=float(flush_interval_s),
            extra={**_window.header_fields(parsed_window),
                   **({"step_cpu": STEP_CPU_PROCESS, "wait_cpu": WAIT_CPU_OTHERS} if cpu_time else {})},
        )
        rec.window, rec.spans_on = parsed_window, parsed_window is None  # a window opens at its first batch
        self._open_run(float(sample_interval_s))
        _signals._SIGNAL_CLOSERS.append(self._close_on_signal)
        self._live = None if live_s is None else _live.LiveLine(
            self.run_dir, self.rank, live_s, lambda: rec.next_batch).start()

    def _join_ranks(self, sync_clocks: bool) -> tuple[str, str, dict[str, Any] | None]:
        """Set this probe's rank and world size; return ``(run_id, run_id_source, clock_sync)``.

        With ``torch.distributed`` initialised, every rank takes part in the
        clock exchange here, before any check that one rank alone could fail.
        """
        self.rank, self.world_size = _r.detect_rank()
        run_id, run_id_source = _clocksync.local_run_id(self.world_size)
        clock_sync = None
        dist = _clocksync.distributed() if sync_clocks else None
        if dist is not None:  # before any check one rank alone could fail
            self.rank, self.world_size = int(dist.get_rank()), int(dist.get_world_size())
            agreed = _clocksync.measure(dist, _clocksync.local_run_id(1)[0])  # rank 0's, unique
            if agreed is not None:
                run_id, run_id_source, clock_sync = agreed["run_id"], "exchange", agreed["clock_sync"]
        return run_id, run_id_source, clock_sync

    def _open_run(self, sample_interval_s: float) -> None:
        """Create the folder, write the run header, tell workers where the run is, start the sampler.

        Any failure here is pipeprobe's own (an unwritable folder): one
        warning, and training goes on unrecorded.
        """
        rec = RECORDER
        options = {
            "cpu_time": rec.cpu_time,
            "flush_interval_s": rec.flush_interval_s,
            "buffer_spans": rec.buffer_spans,
            "rank": self.rank,
            "world_size": self.world_size,
            "run_id": rec.run_id,
        }
        try:
            self.run_dir.mkdir(parents=True, exist_ok=True)
            self._write_header()
            os.environ[_r.ENV_RUN_DIR] = str(self.run_dir)
            os.environ[_r.ENV_OPTIONS] = json.dumps(options)
            if sample_interval_s > 0:
                from ._sampler import ResourceSampler

                self._sampler = ResourceSampler(self.run_dir, self.rank, sample_interval_s)
                rec.extra_writers.append(self._sampler.write)
                self._sampler.start()
        except Exception as exc:  # noqa: BLE001 - an unwritable folder must not stop training
            rec.fail(exc)

    # -- recording API -------------------------------------------------------
    def stage(self, name: str, *, sample: int | None = None, batch: int | None = None) -> Any:
        """Time a stage; same as :func:`pipeprobe.stage`."""
        return stage(name, sample=sample, batch=batch)

    def step(self) -> Any:
        """Time the training step of the current batch: ``with probe.step(): ...``."""
        rec = RECORDER
        if not rec.spans_on:
            return _NOOP_STEP
        code = _STEP_CODE | rec.stage_ids["step"]  # step_code(), inlined: this runs once a batch in the loop
        return _StepSpan(code, -1, -1) if rec.cpu_time else _Span(code, -1, -1)

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
        if self._inline_loader is None and _workerstart.is_inline_torch_loader(loader):
            try:  # timed at close (record/_workerstart.py); a weak reference keeps no loader alive
                self._inline_loader = weakref.ref(loader)
            except TypeError:
                pass
        return _Watched(self, loader, samples, epoch)

    # -- life cycle ----------------------------------------------------------
    def _write_header(self) -> None:
        self._header = replace(self._header, stages=tuple(RECORDER.stage_names))
        tf.write_json_atomic(self.run_dir / f"run-r{self.rank}.json", self._header.to_json())

    def _close_on_signal(self) -> None:
        if not self.closed:
            self._header = replace(self._header, end_mono_ns=monotonic_ns(), ended_by="signal")
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
        if self._live is not None:
            self._live.stop()
        if self._sampler is not None:
            self._sampler.stop()
        if rec.session != self._session:
            # This probe failed and a newer one records now: its recorder,
            # signal hooks and environment are not this probe's to touch.
            _discard(_signals._SIGNAL_CLOSERS, self._close_on_signal)
            return
        ok = rec.on
        if ok:
            try:  # worker processes that outlive the probe flush now
                late = _closing.close_workers(self.run_dir.resolve(), self.rank)
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
        _signals.restore_signal_hooks()
        _discard(_signals._SIGNAL_CLOSERS, self._close_on_signal)
        for key, value in self._env_before.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value
        if not ok and not rec.failed:
            return
        self._header = replace(self._header, end_mono_ns=end, closed=True, batches=rec.next_batch,
                               extra={**self._header.extra, **_window.header_fields(rec.window, rec.next_batch),
                                      "threads": read_thread_pools(), **self._worker_start(ok)})
        rec.window = None
        try:
            self._write_header()
        except Exception as exc:  # noqa: BLE001
            if not rec.failed:
                rec.on = True
                rec.fail(exc)
            return
        if self.report and not rec.failed and _CLOSE_REPORT is not None:
            try:
                _CLOSE_REPORT(self.run_dir)
            except Exception as exc:  # noqa: BLE001 - the report must not break training
                warnings.warn(f"pipeprobe could not print its report: {exc}", RuntimeWarning, stacklevel=2)

    def _worker_start(self, ok: bool) -> dict[str, Any]:
        """The header's ``worker_start``: a watched torch DataLoader without workers, its worker starts timed."""
        loader = self._inline_loader() if self._inline_loader is not None else None
        self._inline_loader = None
        if loader is None or not ok or not RECORDER.next_batch:
            return {}
        timed = _workerstart.time_worker_starts(loader)
        return {"worker_start": timed} if timed else {}

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
