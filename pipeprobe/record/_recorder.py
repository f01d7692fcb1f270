"""The per-process recorder: hot-path span buffers, flushing and process hooks.

One :class:`_Recorder` exists per process (``RECORDER``). It owns one
preallocated buffer per thread; a span writes six integers into its
thread's buffer and bumps a counter, with no lock. A background thread
copies finished records to disk every ``flush_interval_s``; a buffer that
fills up before then is written by its own thread. The per-buffer lock is
only taken by those two copies, never per span.

This module never imports the analysis side.
"""

from __future__ import annotations

import atexit
import errno
import json
import os
import socket
import sys
import threading
import warnings
from pathlib import Path
from time import monotonic_ns, sleep, time_ns
from typing import Any

import numpy as np

from .. import tracefile as tf
from . import _signals
from ._buffers import _FIELDS, TLS, _Buffer, take_records
from ._closing import CLOSE_POLL_S, close_ack_name, close_request_name, touch

ENV_RUN_DIR = "PIPEPROBE_RUN_DIR"
ENV_OPTIONS = "PIPEPROBE_OPTIONS"
RESERVED_STAGES = ("wait", "step")
_MAX_STAGES = 65535


def detect_rank() -> tuple[int, int]:
    """Return ``(rank, world_size)`` from the usual launcher environment variables."""
    env = os.environ
    rank = world = None
    for key in ("RANK", "PMI_RANK", "OMPI_COMM_WORLD_RANK", "SLURM_PROCID"):
        if env.get(key, "").strip().isdigit():
            rank = int(env[key])
            break
    for key in ("WORLD_SIZE", "PMI_SIZE", "OMPI_COMM_WORLD_SIZE", "SLURM_NTASKS"):
        if env.get(key, "").strip().isdigit():
            world = int(env[key])
            break
    return (rank or 0), (world or 1)




class _Recorder:
    """State of recording in this process. See the module docstring."""

    def __init__(self) -> None:
        self.on = False
        self.spans_on = False  # spans are taken now: on, and inside the recording window (_window.py)
        self.window = None  # the main process's recording window (_window.Window), None: every batch
        self.checked_env = False
        self.cpu_time = True
        self.run_dir: Path | None = None
        self.rank = 0
        self.world_size = 1
        self.role = "main"
        self.pid = os.getpid()
        self.flush_interval_s = 1.0
        self.buffer_spans = 8192
        self.stage_names: list[str] = []
        self.stage_ids: dict[str, int] = {}
        self.user_codes: dict[str, int] = {}  # validated user stage names -> code
        self.epoch = -1
        self.next_batch = 0
        self.failed = False
        self.run_id = ""
        self.session = 0  # counts starts: a probe acts on the recorder only while it is the latest
        self.span_cost_ns: float | None = None  # measured at start (see _spans.calibrate_span_cost_ns)
        self._reset_process_state()

    # -- set-up ---------------------------------------------------------
    def _reset_process_state(self) -> None:
        """State of a new process (or a forked child): fresh locks, no threads but this one."""
        self.in_flush = threading.local()  # .on: this thread is inside flush()
        self.meta_lock = threading.Lock()
        self.io_lock = threading.Lock()
        self._reset_run_state()

    def _reset_run_state(self) -> None:
        """State of a new run in this process; the locks stay (other threads may hold them)."""
        self.pending_signal: tuple[int, Any] | None = None
        self.buffers: list[_Buffer] = []
        self.flusher: threading.Thread | None = None
        self.stop_event = threading.Event()
        self.span_file = None
        self.header_stages_written = -1
        self.extra_writers: list[Any] = []  # callables flushed with the spans

    def _retire(self) -> None:
        """Stop what an earlier run left behind: a flusher (a failed run keeps it), an open span file."""
        flusher, self.flusher = self.flusher, None
        if flusher is not None:
            self.stop_event.set()
            if flusher is not threading.current_thread():
                flusher.join(timeout=1)
        if self.span_file is not None and self.io_lock.acquire(timeout=1):
            try:
                self.span_file.close()
            except OSError:
                pass
            finally:
                self.span_file = None
                self.io_lock.release()

    def start(
        self,
        run_dir: Path,
        *,
        role: str,
        cpu_time: bool,
        flush_interval_s: float,
        buffer_spans: int,
        rank: int,
        world_size: int,
        stages: list[str] | None = None,
        run_id: str = "",
    ) -> None:
        self._retire()
        with self.meta_lock:
            kept = self._live_buffers()
            self._reset_run_state()
            for buf in kept:  # threads that recorded under an earlier probe keep their buffers
                buf.clear()
                buf.limit = _FIELDS * buffer_spans
                buf.ctx = -1
                self.buffers.append(buf)
        self.run_dir = run_dir
        self.role = role
        self.cpu_time = cpu_time
        self.flush_interval_s = flush_interval_s
        self.buffer_spans = buffer_spans
        self.rank = rank
        self.world_size = world_size
        self.run_id = run_id
        self.pid = os.getpid()
        self.failed = False
        # This process is set up now: after a failure, a stage() call must not
        # join the run again from the environment (a second warning, a
        # main process recording as a worker).
        self.checked_env = True
        self.stage_names.clear()
        self.stage_ids.clear()
        self.user_codes.clear()
        for name in RESERVED_STAGES + tuple(stages or ()):
            self.stage_id(name)
        self.span_cost_ns = _measure_span_cost(cpu_time)
        self.anchor_mono_ns = monotonic_ns()
        self.anchor_wall_ns = time_ns()
        self.on = True
        self.spans_on = True
        self.session += 1
        with self.meta_lock:
            if self.flusher is None:  # a new thread's buffer() may have started it already
                self._start_flusher()
        _signals.install_signal_hooks()

    def _live_buffers(self) -> list[_Buffer]:
        """The buffers of this process's live threads, this thread's included.

        A thread keeps its buffer (a thread-local) for its whole life, across
        probes: a new probe must adopt it, or a pool thread that recorded
        under an earlier probe would record into a buffer nobody flushes.
        """
        bufs = [b for b in self.buffers if b.owner.is_alive()]
        mine = getattr(TLS, "buf", None)
        if mine is not None and all(b is not mine for b in bufs):
            bufs.append(mine)
        return bufs

    def stage_id(self, name: str) -> int:
        sid = self.stage_ids.get(name)
        if sid is not None:
            return sid
        with self.meta_lock:
            sid = self.stage_ids.get(name)
            if sid is None:
                if len(self.stage_names) >= _MAX_STAGES:
                    raise ValueError(f"more than {_MAX_STAGES} distinct stage names in one process")
                sid = len(self.stage_names)
                self.stage_names.append(name)
                self.stage_ids[name] = sid
        return sid

    def buffer(self) -> _Buffer:
        """This thread's buffer, made on first use."""
        try:
            return TLS.buf
        except AttributeError:
            buf = _Buffer(_FIELDS * self.buffer_spans)
            TLS.buf = buf
            with self.meta_lock:
                self.buffers.append(buf)
                if self.flusher is None and self.on:
                    self._start_flusher()
            return buf

    def _start_flusher(self) -> None:
        # The thread gets its own stop event: a later run replaces self.stop_event.
        stop = self.stop_event = threading.Event()
        t = threading.Thread(target=self._flush_loop, args=(stop,), name="pipeprobe-flush", daemon=True)
        self.flusher = t
        t.start()

    def _flush_loop(self, stop: threading.Event) -> None:
        _signals.block_signals_in_this_thread()
        if self.role != "worker" or self.run_dir is None:
            while not stop.wait(self.flush_interval_s):
                self.flush()
            return
        # A worker can outlive the probe (persistent loader workers, an open
        # pool): between flushes, look for the parent's close request (one
        # stat per tick); answer it by flushing, acknowledging and stopping.
        request = self.run_dir / close_request_name(self.rank)
        tick_ns = int(min(CLOSE_POLL_S, self.flush_interval_s) * 1e9)
        period_ns = int(self.flush_interval_s * 1e9)
        due = monotonic_ns() + period_ns
        while not stop.wait(tick_ns / 1e9):
            _signals.LOST_SIGNALS.check()
            if os.path.exists(request):
                self.stop()
                touch(self.run_dir / close_ack_name(self.rank, self.pid))
                self._watch_after_close(tick_ns / 1e9)
                return
            now = monotonic_ns()
            # Flush early once to write the process header: that registers
            # this worker with the parent's close.
            if now >= due or (self.header_stages_written < 0 and any(len(b) for b in list(self.buffers))):
                self.flush()
                due = now + period_ns

    def _watch_after_close(self, tick_s: float) -> None:
        """After the close answer, keep watching for a lost SIGTERM until a later run takes over.

        The worker lives on (a pool still open, persistent loader workers)
        and must still end when its pool terminates it: a SIGTERM that lands
        just as its main thread blocks on the pool's lock is seen only here
        (see ``_signals``). A later run in this process starts its own flush
        thread, which watches from then on: this one then ends.
        """
        with self.meta_lock:
            if self.flusher is not threading.current_thread():
                return
            self.flusher = None  # only a watch now: stop() at the worker's exit must not wait for it
        while self.flusher is None and _signals.LOST_SIGNALS.read_fd >= 0:
            _signals.LOST_SIGNALS.check()
            sleep(tick_s)

    # -- writing -----------------------------------------------------------
    def record(self, start: int, end: int, cpu: int, sample: int, batch: int, code: int) -> None:
        """Append one record to this thread's buffer (used off the hot path)."""
        buf = self.buffer()
        buf.extend((start, end, cpu, sample, batch, code))
        if len(buf) >= buf.limit:
            self.spill(buf)

    def spill(self, buf: _Buffer) -> None:
        """Write a full buffer from its own thread.

        A spill is a write in progress like a flush: a signal arriving
        meanwhile waits for it (see :meth:`flush`), and a failure here,
        even in turning the records into fixed-width ones, is pipeprobe's
        own: one warning, recording stops, the user's loop goes on.
        """
        mine = self.in_flush
        outer = not getattr(mine, "on", False)
        mine.on = True
        try:
            with buf.lock:
                chunk = self._take(buf)
            self._write([chunk])
        except Exception as exc:  # noqa: BLE001 - never take training down
            self.fail(exc)
        finally:
            if outer:
                self._end_write(mine)

    _take = staticmethod(take_records)

    def flush(self, lock_timeout_s: float = -1) -> None:
        """Write every thread's finished records and the extra writers' data.

        ``lock_timeout_s >= 0`` is for signal handlers: the thread a signal
        interrupted may hold a lock, so give up instead of waiting forever.
        """
        if not self.on:
            return
        mine = self.in_flush
        outer = not getattr(mine, "on", False)
        mine.on = True  # a signal arriving in this thread now waits for this flush (see _on_signal)
        try:
            self._flush(lock_timeout_s)
        finally:
            if outer:
                self._end_write(mine)

    def _end_write(self, mine: threading.local) -> None:
        """Leave the outermost write of this thread; deliver a signal it held back."""
        mine.on = False
        # Signals run in the main thread, and only it may deliver one it held back:
        # through the whole signal path, so other threads' buffers are written too.
        if threading.current_thread() is threading.main_thread():
            pending, self.pending_signal = self.pending_signal, None
            if pending is not None:
                _signals._on_signal(*pending)

    def _flush(self, lock_timeout_s: float) -> None:
        # Take the file lock before any records, so records are never taken
        # out of a buffer and then dropped because the file is busy.
        io_lock = self.io_lock
        if not io_lock.acquire(timeout=lock_timeout_s):
            return
        try:
            chunks = []
            try:
                for buf in list(self.buffers):
                    if not buf.lock.acquire(timeout=lock_timeout_s):
                        continue
                    try:
                        if len(buf):
                            chunks.append(self._take(buf))
                    finally:
                        buf.lock.release()
            except Exception as exc:  # noqa: BLE001 - never take training down (nor the flush thread)
                self.fail(exc)
            self._write_locked(chunks)
        finally:
            io_lock.release()
        for writer in list(self.extra_writers):
            try:
                writer(lock_timeout_s)
            except Exception as exc:  # noqa: BLE001 - never take training down
                self.fail(exc)

    def _write(self, chunks: list[np.ndarray]) -> None:
        with self.io_lock:
            self._write_locked(chunks)

    def _write_locked(self, chunks: list[np.ndarray]) -> None:
        if not self.on:
            return
        try:
            if self.span_file is None:
                if not chunks and self.header_stages_written >= 0:
                    return
                self._open_files()
            if len(self.stage_names) != self.header_stages_written:
                self._write_process_header()
            for chunk in chunks:
                if len(chunk):
                    data = chunk.tobytes()
                    written = self.span_file.write(data)
                    if written != len(data):  # a full disk or file-size limit writes part
                        raise OSError(errno.ENOSPC, f"short write, {written} of {len(data)} bytes (disk full?)")
            if os.fstat(self.span_file.fileno()).st_nlink == 0:
                raise FileNotFoundError(errno.ENOENT, f"{self.run_dir} was removed while recording")
        except Exception as exc:  # noqa: BLE001 - never take training down
            self.fail(exc)

    def file_stem(self) -> str:
        return f"spans-r{self.rank}-p{self.pid}"

    def _open_files(self) -> None:
        path = self.run_dir / (self.file_stem() + ".bin")
        fh = open(path, "ab", buffering=0)
        if fh.tell() == 0:
            fh.write(tf.preamble(tf.CONTENT_SPANS))
        self.span_file = fh

    def _write_process_header(self) -> None:
        names = list(self.stage_names)
        header = tf.ProcessHeader(
            pid=self.pid, ppid=os.getppid(), rank=self.rank, world_size=self.world_size, role=self.role,
            host=socket.gethostname(), anchor_mono_ns=self.anchor_mono_ns, anchor_wall_ns=self.anchor_wall_ns,
            cpu_time=self.cpu_time, stages=tuple(names), run_id=self.run_id,
            extra={"span_cost_ns": self.span_cost_ns},
        ).to_json()
        tf.write_json_atomic(self.run_dir / (self.file_stem() + ".json"), header)
        self.header_stages_written = len(names)

    def fail(self, exc: BaseException) -> None:
        """Switch recording off after pipeprobe's own failure, warning once."""
        was_on = self.on
        self.on = self.spans_on = False
        if was_on and not self.failed:
            self.failed = True
            warnings.warn(
                f"pipeprobe stopped recording after an internal failure: {type(exc).__name__}: {exc}. "
                "Training continues; what was written so far stays readable.",
                RuntimeWarning,
                stacklevel=2,
            )

    def stop(self, lock_timeout_s: float = -1) -> None:
        """Flush everything and stop the flusher; recording is off afterwards."""
        if self.flusher is not None:
            self.stop_event.set()
            if self.flusher is not threading.current_thread():
                self.flusher.join(timeout=5 if lock_timeout_s < 0 else lock_timeout_s)
        self.flush(lock_timeout_s)
        self.on = self.spans_on = False
        if not self.io_lock.acquire(timeout=lock_timeout_s):
            return
        try:
            if self.span_file is not None:
                try:
                    self.span_file.close()
                except OSError:
                    pass
                self.span_file = None
        finally:
            self.io_lock.release()

    # -- process hooks -----------------------------------------------------
    def after_fork_in_child(self) -> None:
        """A forked child gets its own files and drops the parent's unflushed records."""
        was_on = self.on
        self._reset_process_state()
        mine = getattr(TLS, "buf", None)
        if mine is not None:  # the parent flushes these records, not us
            mine.clear()
            mine.owner = threading.current_thread()
            mine.tid = threading.get_native_id()
            mine.ctx = -1
            mine.lock = threading.Lock()
            self.buffers.append(mine)
        self.pid = os.getpid()
        self.checked_env = True
        self.next_batch = 0
        _signals._SIGNAL_CLOSERS.clear()  # the parent's probe is not ours to close
        self.window = None  # the parent decides; a worker learns from each batch's indices
        if was_on:
            self.role = "worker"
            self.on = self.spans_on = True
            _register_worker_exit()
            _signals.LOST_SIGNALS.arm()
            # The forking thread's buffer came along, so buffer() would never
            # start a flusher here: start it now.
            self._start_flusher()


def _measure_span_cost(cpu_time: bool) -> float | None:
    """This process's per-span cost, for the process header; ``None`` if it cannot be measured."""
    from ._spans import calibrate_span_cost_ns  # _spans builds on this module

    try:
        return round(calibrate_span_cost_ns(cpu_time), 1)
    except Exception:  # noqa: BLE001 - a figure for the report, never a reason to stop recording
        return None


RECORDER = _Recorder()


def attach_from_env() -> bool:
    """In a worker process, join the run named by the environment, if any."""
    rec = RECORDER
    rec.checked_env = True
    run_dir = os.environ.get(ENV_RUN_DIR)
    if not run_dir or rec.on:
        return rec.on
    try:
        options = json.loads(os.environ.get(ENV_OPTIONS, "{}"))
        rec.start(
            Path(run_dir),
            role="worker",
            cpu_time=bool(options.get("cpu_time", True)),
            flush_interval_s=float(options.get("flush_interval_s", 1.0)),
            buffer_spans=int(options.get("buffer_spans", 8192)),
            rank=int(options.get("rank", 0)),
            world_size=int(options.get("world_size", 1)),
            run_id=str(options.get("run_id", "")),
            stages=[str(s) for s in options.get("stages", [])],
        )
        _register_worker_exit()
        _signals.LOST_SIGNALS.arm()  # a spawned worker can block on a pool's lock as a forked one can
    except Exception as exc:  # noqa: BLE001 - never take training down
        rec.fail(exc)
    return rec.on


def _register_worker_exit() -> None:
    # multiprocessing children leave through os._exit, which skips atexit;
    # its own finalizers still run on a normal exit.
    try:
        import multiprocessing.util as mpu

        mpu.Finalize(None, RECORDER.stop, exitpriority=100)
    except Exception:  # noqa: BLE001
        pass
    atexit.register(RECORDER.stop)


os.register_at_fork(after_in_child=RECORDER.after_fork_in_child)


def _after_mp_bootstrap(rec: _Recorder) -> None:
    # multiprocessing clears its finalizers in a new child after our fork hook
    # ran; register the exit flush again once it has.
    if rec.on:
        _register_worker_exit()


try:
    import multiprocessing.util as _mpu

    _mpu.register_after_fork(RECORDER, _after_mp_bootstrap)
except Exception:  # noqa: BLE001
    pass



def python_version() -> str:
    return sys.version.split()[0]
