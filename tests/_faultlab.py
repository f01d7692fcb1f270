"""Fault trials shared by ``tests/test_faults.py`` and ``bench/bench_faults.py``.

A trial runs a small recorded training job in a child process (never in the
test process), injects a fault, then compares what the child says it had
finished against what the trace holds. Every finished span is announced on a
progress file: one ``kind pid id t_ns`` line, written with a single
``os.write`` on an ``O_APPEND`` descriptor right after the span closed, so the
lines of several processes never interleave and the time is on the same
monotonic clock as the spans.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent

#: How long a child may take to reach a point, or to end, before a trial calls it hung.
#: Generous: a loaded 2-core CI machine stretched a healthy child past 30 s; a real hang
#: never gets there, so it still fails (with a TimeoutError naming the point).
HANG_GUARD_S = 120.0

#: A data-parallel-free training job: a fork pool of 2 loader workers decodes
#: samples (4 ms each), the main process waits for batches of 4 and steps.
PIPELINE_CHILD = r'''
import os, sys, time, multiprocessing as mp
import pipeprobe
from pipeprobe import stage

run_dir, progress, n_batches, flush_s = sys.argv[1], sys.argv[2], int(sys.argv[3]), float(sys.argv[4])
BATCH = 4
PROG = os.open(progress, os.O_WRONLY | os.O_CREAT | os.O_APPEND)

def note(kind, ident):
    os.write(PROG, f"{kind} {os.getpid()} {ident} {time.monotonic_ns()}\n".encode())

def load_sample(sid):
    with stage("decode", sample=sid):
        time.sleep(0.004)
    note("decode", sid)
    return sid

if __name__ == "__main__":
    with pipeprobe.Probe(run_dir, report=False, flush_interval_s=flush_s, sample_interval_s=0.1) as probe:
        with mp.get_context("fork").Pool(2) as pool:
            it = pool.imap(load_sample, range(n_batches * BATCH), chunksize=1)
            def batches():
                for _ in range(n_batches):
                    yield [next(it) for _ in range(BATCH)]
            note("ready", -1)
            for b, ids in enumerate(probe.watch(batches(), samples=lambda ids: ids)):
                with probe.step():
                    time.sleep(0.01)
                note("step", b)
    note("closed", -1)
'''


# A training loop announcing each finished span; argv: run_dir progress mode.
SIGNAL_CHILD = r'''
import os, signal, sys, time
import pipeprobe
run_dir, progress, mode = sys.argv[1], sys.argv[2], sys.argv[3]
PROG = os.open(progress, os.O_WRONLY | os.O_CREAT | os.O_APPEND)
def note(kind, i):
    os.write(PROG, f"{kind} {os.getpid()} {i} {time.monotonic_ns()}\n".encode())
if mode == "user-exit":
    signal.signal(signal.SIGTERM, lambda s, f: os._exit(7))
# flush_interval_s is far longer than the run: only the signal path can save the spans.
probe = pipeprobe.Probe(run_dir, report=False, flush_interval_s=60, sample_interval_s=0)
note("ready", -1)
def work(i):
    with pipeprobe.stage("decode", sample=i):
        time.sleep(0.002)
    note("decode", i)
try:
    for i in range(100000):
        work(i)
except KeyboardInterrupt as exc:
    frames = [f.name for f in __import__("traceback").extract_tb(exc.__traceback__)]
    probe.close()
    print("KeyboardInterrupt", " ".join(frames), flush=True)
    sys.exit(0)
'''


# Records spans in a loop after breaking the run folder; prints the warnings seen.
# argv: run_dir fault spans
FAULT_CHILD = r'''
import json, os, resource, shutil, signal, sys, time, warnings
from pathlib import Path
import pipeprobe
run_dir, fault, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
if fault == "fsize":
    # A small file-size limit stands in for a full disk; with SIGXFSZ ignored
    # the write fails with EFBIG instead of killing the process.
    signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    resource.setrlimit(resource.RLIMIT_FSIZE, (64 * 1024, resource.RLIM_INFINITY))
done = 0
with warnings.catch_warnings(record=True) as seen:
    warnings.simplefilter("always")
    sample_s = 0.02 if fault == "fsize" else 0
    with pipeprobe.Probe(run_dir, report=False, flush_interval_s=0.02, buffer_spans=256,
                         sample_interval_s=sample_s) as probe:
        for i in range(n):
            with pipeprobe.stage("decode", sample=i):
                pass
            done += 1
            if i == n // 4:
                if fault in ("removed", "replaced"):
                    shutil.rmtree(run_dir)
                if fault == "replaced":
                    Path(run_dir).write_text("not a folder")
            if i % 500 == 0:
                time.sleep(0.03)  # let the flusher run
print(json.dumps({"done": done, "warnings": [[w.category.__name__, str(w.message)] for w in seen]}))
'''


def child_env() -> dict[str, str]:
    """Environment for child processes: import pipeprobe from this checkout."""
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    env.pop("PIPEPROBE_RUN_DIR", None)
    env.pop("PIPEPROBE_OPTIONS", None)
    return env


def read_progress(path: Path) -> list[tuple[str, int, int, int]]:
    """Parse complete progress lines: ``(kind, pid, id, t_ns)``."""
    out = []
    if not path.exists():
        return out
    for line in path.read_text().splitlines():
        parts = line.split()
        if len(parts) == 4:
            out.append((parts[0], int(parts[1]), int(parts[2]), int(parts[3])))
    return out


def wait_for(path: Path, pred, timeout_s: float) -> list[tuple[str, int, int, int]]:
    """Poll the progress file until ``pred(lines)`` holds; return the lines."""
    deadline = time.monotonic() + timeout_s
    while True:
        lines = read_progress(path)
        if pred(lines):
            return lines
        if time.monotonic() > deadline:
            raise TimeoutError(f"child did not reach the expected point in {timeout_s} s: {lines[-3:]}")
        time.sleep(0.01)


@dataclass
class KillOutcome:
    """What one kill trial found."""

    target: str  # "main" or "worker"
    done: int  # spans the killed process announced as finished
    kept: int  # of those, spans found in the trace
    invented: int  # spans in the trace that were never started (must be 0)
    loss_s: float  # kill time minus the finish time of the oldest lost span (0 if none lost)
    batches_ok: bool  # batch ids in the trace are 0..n-1 with no gap, each with its wait
    load_error: str  # "" when the trace loaded


def kill_trial(tmp: Path, seed: int, target: str, flush_s: float = 0.2) -> KillOutcome:
    """SIGKILL the main process or one loader worker at a random point of a real run.

    The delay before the kill is drawn from ``random.Random(seed)``. After a
    main-process kill its orphaned workers are killed too; after a worker
    kill the job (now waiting forever on the lost task, as it would without
    pipeprobe) is killed as a whole. Only the killed process is scored.
    """
    import numpy as np

    import pipeprobe

    rng = random.Random(seed)
    run_dir, progress = tmp / f"run-{target}-{seed}", tmp / f"progress-{target}-{seed}.txt"
    child = subprocess.Popen(
        [sys.executable, "-c", PIPELINE_CHILD, str(run_dir), str(progress), "400", str(flush_s)],
        env=child_env(), start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    try:
        wait_for(progress, lambda ls: any(k == "ready" for k, *_ in ls), HANG_GUARD_S)
        time.sleep(rng.uniform(0.8, 2.0))
        lines = read_progress(progress)
        if target == "main":
            victim = child.pid
        else:
            workers = sorted({pid for k, pid, _, _ in lines if k == "decode"})
            victim = workers[rng.randrange(len(workers))]
        t_kill = time.monotonic_ns()
        os.kill(victim, signal.SIGKILL)
        time.sleep(0.3)
    finally:
        try:
            os.killpg(child.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        child.wait(timeout=HANG_GUARD_S)
    kind = "step" if target == "main" else "decode"
    done = {ident: t for k, pid, ident, t in read_progress(progress) if k == kind and pid == victim and t <= t_kill}
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            run = pipeprobe.load(run_dir)
    except Exception as exc:  # noqa: BLE001 - reported as the outcome
        return KillOutcome(target, len(done), 0, 0, float("inf"), False, f"{type(exc).__name__}: {exc}")
    sp = run.spans[(run.spans["pid"] == victim) & (run.spans["stage"] == kind)]
    ids = set((sp["batch_id"] if target == "main" else sp["sample_id"]).astype(int))
    kept = {i for i in done if i in ids}
    # A span may close just before the kill and its progress line never be
    # written: allow that one; anything beyond it was invented.
    invented = len(ids - set(done)) - (1 if ids - set(done) else 0)
    lost = [t for i, t in done.items() if i not in ids]
    loss_s = (t_kill - min(lost)) / 1e9 if lost else 0.0
    b = run.batches
    batches_ok = bool(np.array_equal(b["batch_id"].to_numpy(), np.arange(len(b))) and b["ready_s"].notna().all())
    return KillOutcome(target, len(done), len(kept), invented, loss_s, batches_ok, "")


# Raises a signal at itself from inside the third buffer spill, after the
# spill took 16 spans out of the buffer and before it wrote them: the moment
# a signal used to lose them. argv: run_dir mode signal_name
SPILL_SIGNAL_CHILD = r'''
import os, signal, sys
import pipeprobe
from pipeprobe.record import _recorder
run_dir, mode, signum = sys.argv[1], sys.argv[2], getattr(signal, sys.argv[3])
if mode == "user-exit":
    signal.signal(signal.SIGTERM, lambda s, f: os._exit(7))
if mode == "user-raise":
    signal.signal(signal.SIGTERM, lambda s, f: sys.exit(7))
probe = pipeprobe.Probe(run_dir, report=False, flush_interval_s=60, sample_interval_s=0, buffer_spans=16)
rec = _recorder.RECORDER
write, spills = rec._write, []
def signalled_write(chunks):
    spills.append(len(chunks[0]))
    if len(spills) == 3:
        os.kill(os.getpid(), signum)  # Python runs the handler right here, mid-spill
    write(chunks)
rec._write = signalled_write
for i in range(1000):
    with pipeprobe.stage("decode", sample=i):
        pass
print("the signal did not end the loop", flush=True)
'''


# Records spans in a tight loop (a buffer of 16 spills every 16 spans) and
# after each span stores its id in a memory-mapped counter (no system call,
# so most of the loop's time is spans and spills); argv: run_dir counter mode.
# Used with signals sent at random moments: many land inside a spill.
TIGHT_SIGNAL_CHILD = r'''
import mmap, os, signal, struct, sys
import pipeprobe
run_dir, counter, mode = sys.argv[1], sys.argv[2], sys.argv[3]
fd = os.open(counter, os.O_RDWR | os.O_CREAT)
os.ftruncate(fd, 8)
done = mmap.mmap(fd, 8)
struct.pack_into("<q", done, 0, -1)
if mode == "user-exit":
    signal.signal(signal.SIGTERM, lambda s, f: os._exit(7))
probe = pipeprobe.Probe(run_dir, report=False, flush_interval_s=60, sample_interval_s=0, buffer_spans=16)
pack = struct.pack_into
try:
    for i in range(10**8):
        with pipeprobe.stage("decode", sample=i):
            pass
        pack("<q", done, 0, i)
except KeyboardInterrupt:
    print("KeyboardInterrupt", flush=True)
    os._exit(0)
'''


def read_counter(path: Path) -> int:
    """The last id a :data:`TIGHT_SIGNAL_CHILD` stored (-1 before its first span, or no file yet)."""
    import struct

    try:
        raw = path.read_bytes()
    except OSError:
        return -1
    return struct.unpack("<q", raw[:8])[0] if len(raw) >= 8 else -1


# Two probes one after the other in one process; the second records in the
# main thread (whose buffer the first probe made) until it is killed.
# argv: run_dir_a run_dir_b progress flush_s
SECOND_PROBE_CHILD = r'''
import os, sys, time
import pipeprobe
run_a, run_b, progress, flush_s = sys.argv[1], sys.argv[2], sys.argv[3], float(sys.argv[4])
PROG = os.open(progress, os.O_WRONLY | os.O_CREAT | os.O_APPEND)
with pipeprobe.Probe(run_a, report=False, sample_interval_s=0, flush_interval_s=flush_s):
    for i in range(10):
        with pipeprobe.stage("decode", sample=i):
            pass
pipeprobe.Probe(run_b, report=False, sample_interval_s=0, flush_interval_s=flush_s)
os.write(PROG, f"ready {os.getpid()} -1 {time.monotonic_ns()}\n".encode())
for i in range(10**6):
    with pipeprobe.stage("decode", sample=i):
        time.sleep(0.002)
    os.write(PROG, f"decode {os.getpid()} {i} {time.monotonic_ns()}\n".encode())
'''


# One misuse case per run, in a fresh process; prints a JSON outcome:
# {"spans": kept, "expected": announced, "errors": [...], "warnings": [...]}.
# argv: run_dir case
MISUSE_CHILD = r'''
import asyncio, json, os, sys, time, warnings
from concurrent.futures import ThreadPoolExecutor
import pipeprobe
from pipeprobe.errors import PipeprobeError
run_dir, case = sys.argv[1], sys.argv[2]
errors, expected, dirs = [], 0, [run_dir]

def count(folder, stage):
    spans = pipeprobe.load(folder).spans
    return int((spans["stage"] == stage).sum())

@pipeprobe.stage("decode")
def decode(sample_hash):
    return sample_hash

with warnings.catch_warnings(record=True) as seen:
    warnings.simplefilter("always")
    if case == "large-ids":
        with pipeprobe.Probe(run_dir, report=False, sample_interval_s=0, buffer_spans=16,
                             flush_interval_s=0.01) as probe:
            batches = [[2**64 - 1 - 2 * b, 2**64 - 2 - 2 * b] for b in range(20)]
            for batch in probe.watch(batches, samples=lambda b: b, epoch=2**31):
                for sid in batch:
                    decode(sid)
                    with pipeprobe.stage("augment", sample=sid + 2**70, batch=2**40):
                        pass
                    expected += 2
    elif case == "pool-two-probes":
        def work(i):
            with pipeprobe.stage("decode", sample=i):
                pass
        dirs = [run_dir + "-a", run_dir + "-b"]
        with ThreadPoolExecutor(4) as pool:
            for d in dirs:
                with pipeprobe.Probe(d, report=False, sample_interval_s=0):
                    list(pool.map(work, range(200)))
                expected += 200
    elif case == "chdir":
        os.makedirs(run_dir + "-elsewhere")
        os.chdir(os.path.dirname(run_dir))
        with pipeprobe.Probe(os.path.basename(run_dir), report=False, sample_interval_s=0.01,
                             flush_interval_s=0.01):
            for i in range(200):
                if i == 100:
                    os.chdir(run_dir + "-elsewhere")
                    time.sleep(0.05)
                decode(i)
                expected += 1
    elif case == "samples-raises":
        def ids_of(batch):
            if batch[0] % 3 == 0:
                raise KeyError(batch[0])
            return batch
        with pipeprobe.Probe(run_dir, report=False, sample_interval_s=0) as probe:
            for batch in probe.watch([[b, b + 100] for b in range(30)], samples=ids_of):
                decode(batch[0])
                expected += 1
    elif case == "bad-names":
        for name in ("dec\ud800ode", "\udfff", "x\udcff"):
            try:
                pipeprobe.stage(name)
            except PipeprobeError as exc:
                errors.append(type(exc).__name__)
        with pipeprobe.Probe(run_dir, report=False, sample_interval_s=0):
            decode(1)
            expected += 1
    elif case == "generator-async":
        def gen():
            yield 1
        async def coro():
            return 1
        async def agen():
            yield 1
        for fn in (gen, coro, agen):
            try:
                pipeprobe.stage("decode")(fn)
            except PipeprobeError as exc:
                errors.append(type(exc).__name__)
        with pipeprobe.Probe(run_dir, report=False, sample_interval_s=0):
            decode(1)
            expected += 1
spans = sum(count(d, "decode") + (count(d, "augment") if case == "large-ids" else 0) for d in dirs)
print(json.dumps({"spans": spans, "expected": expected, "errors": errors,
                  "warnings": [str(w.message) for w in seen if "pipeprobe" in str(w.message)]}))
'''
