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
import signal
import socket
import sys
import threading
import warnings
from pathlib import Path
from time import monotonic_ns, sleep, time_ns
from typing import Any

import numpy as np

from .. import tracefile as tf

ENV_RUN_DIR = "PIPEPROBE_RUN_DIR"
ENV_OPTIONS = "PIPEPROBE_OPTIONS"
RESERVED_STAGES = ("wait", "step")
_FIELDS = 6  # start, end, cpu, sample, batch, code
_MAX_STAGES = 65535
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
        return np.array(values, dtype=np.int64)
    except OverflowError:
        pass
    fitted = []
    for i, v in enumerate(values):
        if not _INT64_MIN <= v <= _INT64_MAX:
            v = -1 if i % _FIELDS == _BATCH_FIELD else v & SAMPLE_ID_MASK
        fitted.append(v)
    return np.array(fitted, dtype=np.int64)


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


class _Recorder:
    """State of recording in this process. See the module docstring."""

    def __init__(self) -> None:
        self.on = False
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
        self._reset_process_state()

    # -- set-up ---------------------------------------------------------
    def _reset_process_state(self) -> None:
        self.in_flush = threading.local()  # .on: this thread is inside flush()
        self.pending_signal: tuple[int, Any] | None = None
        self.buffers: list[_Buffer] = []
        self.meta_lock = threading.Lock()
        self.io_lock = threading.Lock()
        self.flusher: threading.Thread | None = None
        self.stop_event = threading.Event()
        self.span_file = None
        self.header_stages_written = -1
        self.extra_writers: list[Any] = []  # callables flushed with the spans

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
        kept = self._live_buffers()
        self._reset_process_state()
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
        for buf in kept:  # threads that recorded under an earlier probe keep their buffers
            buf.clear()
            buf.limit = _FIELDS * buffer_spans
            buf.ctx = -1
            self.buffers.append(buf)
        for name in RESERVED_STAGES + tuple(stages or ()):
            self.stage_id(name)
        self.anchor_mono_ns = monotonic_ns()
        self.anchor_wall_ns = time_ns()
        self.on = True
        self.session += 1
        with self.meta_lock:
            self._start_flusher()
        install_signal_hooks()

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
        self.stop_event = threading.Event()
        t = threading.Thread(target=self._flush_loop, name="pipeprobe-flush", daemon=True)
        self.flusher = t
        t.start()

    def _flush_loop(self) -> None:
        block_signals_in_this_thread()
        stop = self.stop_event
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
            if os.path.exists(request):
                self.stop()
                _touch(self.run_dir / close_ack_name(self.rank, self.pid))
                return
            now = monotonic_ns()
            # Flush early once to write the process header: that registers
            # this worker with the parent's close.
            if now >= due or (self.header_stages_written < 0 and any(len(b) for b in list(self.buffers))):
                self.flush()
                due = now + period_ns

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

    @staticmethod
    def _take(buf: _Buffer) -> np.ndarray:
        """Move the finished records out of ``buf`` into a structured array (lock held)."""
        k = len(buf)
        raw = _as_int64(buf[:k]).reshape(-1, _FIELDS)
        del buf[:k]
        out = np.empty(len(raw), dtype=tf.SPAN_RECORD)
        out["start_ns"] = raw[:, 0]
        out["end_ns"] = raw[:, 1]
        out["cpu_ns"] = raw[:, 2]
        out["sample_id"] = raw[:, 3]
        batch = raw[:, 4]
        out["batch_id"] = np.where((batch < -1) | (batch > BATCH_ID_MAX), -1, batch)
        code = raw[:, 5]
        out["stage"] = code & 0xFFFF
        out["kind"] = (code >> 16) & 0xFF
        out["flags"] = (code >> 24) & 0xFF
        out["epoch"] = (code >> 32) - 1
        out["tid"] = buf.tid
        return out

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
                _on_signal(*pending)

    def _flush(self, lock_timeout_s: float) -> None:
        # Take the file lock before any records, so records are never taken
        # out of a buffer and then dropped because the file is busy.
        if not self.io_lock.acquire(timeout=lock_timeout_s):
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
            self.io_lock.release()
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
        header = {
            "format": "pipeprobe-process",
            "format_version": tf.FORMAT_VERSION,
            "pid": self.pid,
            "ppid": os.getppid(),
            "rank": self.rank,
            "world_size": self.world_size,
            "role": self.role,
            "host": socket.gethostname(),
            "anchor_mono_ns": self.anchor_mono_ns,
            "anchor_wall_ns": self.anchor_wall_ns,
            "cpu_time": self.cpu_time,
            "stages": names,
            "run_id": self.run_id,
        }
        tf.write_json_atomic(self.run_dir / (self.file_stem() + ".json"), header)
        self.header_stages_written = len(names)

    def fail(self, exc: BaseException) -> None:
        """Switch recording off after pipeprobe's own failure, warning once."""
        was_on = self.on
        self.on = False
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
        self.on = False
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
        _SIGNAL_CLOSERS.clear()  # the parent's probe is not ours to close
        if was_on:
            self.role = "worker"
            self.on = True
            _register_worker_exit()
            # The forking thread's buffer came along, so buffer() would never
            # start a flusher here: start it now.
            self._start_flusher()


RECORDER = _Recorder()


# -- closing worker processes that outlive the probe ---------------------------
CLOSE_POLL_S = 0.2  # worker wake-ups per second stay few: each needs the GIL


def close_request_name(rank: int) -> str:
    return f"close-r{rank}.request"


def close_ack_name(rank: int, pid: int) -> str:
    return f"close-r{rank}-p{pid}.done"


def _touch(path: Path) -> None:
    try:
        with open(path, "ab"):
            pass
    except OSError:
        pass


def _live_worker_pids(run_dir: Path, rank: int, me: int) -> tuple[set[int], set[int]]:
    """``(registered, unregistered)`` live child processes that may hold records of this rank."""
    import multiprocessing

    import psutil

    prefix = f"spans-r{rank}-p"
    registered = set()
    for name in os.listdir(run_dir):
        if name.startswith(prefix) and name.endswith(".json") and name[len(prefix):-5].isdigit():
            pid = int(name[len(prefix):-5])
            if pid != me:
                registered.add(pid)
    children = {p.pid for p in multiprocessing.active_children() if p.pid is not None}

    def alive(pid: int) -> bool:
        try:
            proc = psutil.Process(pid)
            return proc.status() != psutil.STATUS_ZOMBIE and (pid in children or proc.ppid() == me)
        except (psutil.Error, OSError):
            return False

    live = {pid for pid in registered | children if alive(pid)}
    return live & registered, live - registered


def close_workers(run_dir: Path, rank: int, timeout_s: float = 3.0) -> list[int]:
    """Ask this rank's live worker processes to flush and stop; wait for their answers.

    Worker processes that outlive the probe (persistent loader workers, a
    pool still open) otherwise write their last records only at their next
    flush or on exit. Returns the pids that did not answer within
    ``timeout_s``.
    """
    me = os.getpid()
    registered, unregistered = _live_worker_pids(run_dir, rank, me)
    if not registered and not unregistered:
        return []
    _touch(run_dir / close_request_name(rank))

    def answered(pid: int) -> bool:
        return (run_dir / close_ack_name(rank, pid)).exists()

    start = monotonic_ns()
    deadline = start + int(timeout_s * 1e9)
    # A child that recorded its first spans in the last tick registers itself
    # (writes its process header) within one more tick.
    settle = start + int(3 * CLOSE_POLL_S * 1e9)
    while True:
        pending = {p for p in registered if not answered(p)}
        now = monotonic_ns()
        if (not pending and (not unregistered or now >= settle)) or now >= deadline:
            break
        sleep(0.01)
        # Re-scan: children that registered meanwhile join, dead ones (they
        # flushed on exit, or were killed) leave.
        live, unregistered = _live_worker_pids(run_dir, rank, me)
        registered = {p for p in registered | live if p in live or answered(p)}
    for pid in registered:
        try:
            os.unlink(run_dir / close_ack_name(rank, pid))
        except OSError:
            pass
    return sorted(pending)


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


# -- signals ------------------------------------------------------------------
_PREVIOUS_HANDLERS: dict[int, Any] = {}


def _on_signal(signum: int, frame: Any) -> None:
    rec = RECORDER
    if getattr(rec.in_flush, "on", False):
        # The interrupted code is writing records: dying or raising now would
        # lose them. The flush delivers the signal as soon as it is done.
        rec.pending_signal = (signum, frame)
        return
    try:
        rec.flush(lock_timeout_s=0.2)
        for hook in list(_SIGNAL_CLOSERS):
            hook()
    except Exception:  # noqa: BLE001 - the signal must still be delivered
        pass
    _deliver(signum, frame)


def _deliver(signum: int, frame: Any) -> None:
    """Hand a signal to the handler that was there before pipeprobe's."""
    rec = RECORDER
    previous = _PREVIOUS_HANDLERS.get(signum, signal.SIG_DFL)
    if callable(previous):
        previous(signum, frame)
    elif previous == signal.SIG_IGN:
        return
    else:
        # Not rec.stop(): the interrupted code may hold a lock that stop()
        # takes without a timeout (e.g. inside Event.set() of an exit flush),
        # and the process is about to end anyway. The span file is
        # unbuffered, so what flush() wrote is on disk.
        rec.on = False
        signal.signal(signum, signal.SIG_DFL)
        os.kill(os.getpid(), signum)


_SIGNAL_CLOSERS: list[Any] = []


def block_signals_in_this_thread() -> None:
    """Keep SIGTERM and SIGINT away from a pipeprobe thread.

    The kernel may hand a process signal to any thread that does not block
    it. If it lands on one of our background threads while the main thread
    waits in a call that only a signal would interrupt (a lock, a pipe),
    Python's handler, which runs in the main thread, waits with it: a pool
    worker told to terminate would never do so.
    """
    try:
        signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGTERM, signal.SIGINT})
    except (AttributeError, OSError, ValueError):
        pass


def install_signal_hooks() -> None:
    """Flush on SIGTERM and SIGINT, then hand the signal to what was there before."""
    if threading.current_thread() is not threading.main_thread():
        return
    for signum in (signal.SIGTERM, signal.SIGINT):
        try:
            current = signal.getsignal(signum)
            if current is _on_signal:
                continue
            if current is None:  # installed from C; leave it alone
                continue
            _PREVIOUS_HANDLERS[signum] = current
            signal.signal(signum, _on_signal)
        except (ValueError, OSError):
            pass


def restore_signal_hooks() -> None:
    """Put back the handlers that were there before :func:`install_signal_hooks`."""
    if threading.current_thread() is not threading.main_thread():
        return
    for signum, previous in list(_PREVIOUS_HANDLERS.items()):
        try:
            if signal.getsignal(signum) is _on_signal:
                signal.signal(signum, previous)
        except (ValueError, OSError):
            pass
    _PREVIOUS_HANDLERS.clear()


def python_version() -> str:
    return sys.version.split()[0]
