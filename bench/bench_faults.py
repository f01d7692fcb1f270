"""Fault trials: rerun the random kills, signals, full disks and damaged traces; print the reliability table.

Each row: the fault or bad input, how many trials ran (fixed seeds), the
outcome, and the worst loss seen. Kills and signals hit child processes only.

    python bench/bench_faults.py [--kills N] [--signals N] [--fuzz N]

Loss for a kill is "kill time minus the finish time of the oldest span the
killed process had finished but the trace lacks" (the promise: at most one
flush interval, here 0.2 s, plus scheduling delay).
"""

from __future__ import annotations

import argparse
import json
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from _faultlab import (  # noqa: E402
    FAULT_CHILD,
    MISUSE_CHILD,
    SECOND_PROBE_CHILD,
    SIGNAL_CHILD,
    TIGHT_SIGNAL_CHILD,
    child_env,
    kill_trial,
    read_counter,
    read_progress,
    wait_for,
)

import pipeprobe  # noqa: E402
from pipeprobe.errors import PipeprobeError  # noqa: E402

FLUSH_S = 0.2


def kills(tmp: Path, target: str, n: int) -> tuple[str, int, str, str]:
    outs = [kill_trial(tmp, seed, target, flush_s=FLUSH_S) for seed in range(n)]
    loaded = sum(o.load_error == "" for o in outs)
    invented = sum(o.invented for o in outs)
    gaps = sum(not o.batches_ok for o in outs)
    worst = max(o.loss_s for o in outs)
    lost = max(o.done - o.kept for o in outs)
    outcome = f"trace loads {loaded}/{n}; {invented} spans invented; {gaps} batch gaps"
    return ("SIGKILL of the training process" if target == "main" else "SIGKILL of a loader worker", n, outcome,
            f"{worst:.3f} s ({lost} spans; flush every {FLUSH_S} s)")


def signals(tmp: Path, mode: str, signum: int, n: int) -> tuple[str, int, str, str]:
    lost_max, behaved = 0, 0
    for trial in range(n):
        run_dir, progress = tmp / f"sig-{mode}-{signum}-{trial}", tmp / f"sig-{mode}-{signum}-{trial}.txt"
        child = subprocess.Popen([sys.executable, "-c", SIGNAL_CHILD, str(run_dir), str(progress), mode],
                                 env=child_env(), stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
        wait_for(progress, lambda ls, t=trial: sum(k == "decode" for k, *_ in ls) >= 20 + 15 * t, 30)
        child.send_signal(signum)
        out, _ = child.communicate(timeout=30)
        if signum == signal.SIGINT:
            behaved += child.returncode == 0 and out.startswith("KeyboardInterrupt")
        else:
            behaved += child.returncode == (7 if mode == "user-exit" else -signal.SIGTERM)
        done = {i for k, _, i, _ in read_progress(progress) if k == "decode"}
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            run = pipeprobe.load(run_dir)
        kept = set(run.spans.loc[run.spans["stage"] == "decode", "sample_id"].astype(int))
        lost_max = max(lost_max, len(done - kept))
    name = {"user-exit": "SIGTERM, user handler exits at once", "default": "SIGTERM, default action"}[mode]
    if signum == signal.SIGINT:
        name, what = "SIGINT (Ctrl-C)", "KeyboardInterrupt raised in the loop"
    else:
        what = "user's handler ran" if mode == "user-exit" else "process ended by SIGTERM as before"
    return name, n, f"{what} {behaved}/{n}", f"{lost_max} spans"


def spill_signals(tmp: Path, mode: str, signum: int, n: int) -> tuple[str, int, str, str]:
    """Signals at random moments into a tight stage loop whose buffer of 16 spills every 16 spans."""
    rng = random.Random(11)
    lost_max, lossy, behaved = 0, 0, 0
    for trial in range(n):
        stem = f"spill-{mode}-{signum}-{trial}"
        run_dir, counter = tmp / stem, tmp / f"{stem}.count"
        child = subprocess.Popen([sys.executable, "-c", TIGHT_SIGNAL_CHILD, str(run_dir), str(counter), mode],
                                 env=child_env(), stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
        deadline = time.monotonic() + 30
        while read_counter(counter) < 1000 and time.monotonic() < deadline:
            time.sleep(0.01)
        time.sleep(rng.uniform(0.05, 0.3))
        child.send_signal(signum)
        out, _ = child.communicate(timeout=30)
        if signum == signal.SIGINT:
            behaved += child.returncode == 0 and out.startswith("KeyboardInterrupt")
        else:
            behaved += child.returncode == (7 if mode == "user-exit" else -signal.SIGTERM)
        done = set(range(read_counter(counter) + 1))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            run = pipeprobe.load(run_dir)
        kept = set(run.spans.loc[run.spans["stage"] == "decode", "sample_id"].astype(int))
        lost = len(done - kept)
        lost_max, lossy = max(lost_max, lost), lossy + (lost > 0)
    name = {"user-exit": "SIGTERM during buffer spills, user handler exits",
            "default": "SIGTERM during buffer spills, default action"}[mode]
    if signum == signal.SIGINT:
        name = "SIGINT during buffer spills"
    return (name + " (tight loop, buffer of 16)", n, f"trials losing spans: {lossy}/{n}; handled as without "
            f"pipeprobe {behaved}/{n}", f"{lost_max} spans")


def second_probe(tmp: Path, n: int) -> tuple[str, int, str, str]:
    """SIGKILL while a second probe of the same process records (the first closed cleanly)."""
    rng = random.Random(5)
    flush_s, worst_s, worst_n, intact = 0.1, 0.0, 0, 0
    for trial in range(n):
        run_a, run_b, progress = tmp / f"p2-{trial}-a", tmp / f"p2-{trial}-b", tmp / f"p2-{trial}.txt"
        child = subprocess.Popen([sys.executable, "-c", SECOND_PROBE_CHILD, str(run_a), str(run_b), str(progress),
                                  str(flush_s)], env=child_env(), stdout=subprocess.DEVNULL,
                                 stderr=subprocess.DEVNULL)
        wait_for(progress, lambda ls: any(k == "ready" for k, *_ in ls), 30)
        time.sleep(rng.uniform(0.8, 1.6))
        t_kill = time.monotonic_ns()
        child.kill()
        child.wait(timeout=30)
        done = {i: t for k, _, i, t in read_progress(progress) if k == "decode" and t <= t_kill}
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            kept = set(pipeprobe.load(run_b).spans["sample_id"].astype(int))
            intact += int((pipeprobe.load(run_a).spans["stage"] == "decode").sum()) == 10
        lost = [t for i, t in done.items() if i not in kept]
        worst_s = max(worst_s, (t_kill - min(lost)) / 1e9 if lost else 0.0)
        worst_n = max(worst_n, len(lost))
    return ("SIGKILL while a second probe records (one process, probes one after another)", n,
            f"first run whole {intact}/{n}; second run written every {flush_s} s",
            f"{worst_s:.3f} s of spans ({worst_n} spans)")


MISUSE_ROWS = {
    "large-ids": "ids beyond the record: sample 2**64 + k, a uint64 hash as decorated argument, batch 2**40, "
                 "watch(epoch=2**31)",
    "pool-two-probes": "a thread pool reused across two probes, 200 spans each",
    "chdir": "os.chdir() mid-run with a relative run folder",
    "samples-raises": "a samples= callable that raises on every third batch",
    "bad-names": "stage names with a lone surrogate (3 names)",
    "generator-async": "@stage on a generator, an async function, an async generator",
}


def misuse(tmp: Path, case: str) -> tuple[str, int, str, str]:
    """One misuse case run in a fresh process: what raised, what warned, what was kept."""
    res = subprocess.run([sys.executable, "-c", MISUSE_CHILD, str(tmp / f"misuse-{case}"), case],
                         env=child_env(), capture_output=True, text=True, timeout=120)
    if res.returncode != 0:
        return MISUSE_ROWS[case], 1, f"the job failed: {res.stderr.strip().splitlines()[-1]}", "the job"
    out = json.loads(res.stdout)
    raised = f"{len(out['errors'])} x {out['errors'][0]} at the call; " if out["errors"] else "nothing raised; "
    outcome = f"{raised}{len(out['warnings'])} warnings; {out['spans']}/{out['expected']} spans kept"
    return MISUSE_ROWS[case], 1, outcome, f"{out['expected'] - out['spans']} spans"


def own_failures(tmp: Path, fault: str, n: int) -> tuple[str, int, str, str]:
    one_warning = finished = 0
    for trial in range(n):
        res = subprocess.run([sys.executable, "-c", FAULT_CHILD, str(tmp / f"{fault}-{trial}"), fault, "20000"],
                             env=child_env(), capture_output=True, text=True, timeout=60)
        report = json.loads(res.stdout)
        finished += report["done"] == 20000 and res.returncode == 0
        one_warning += sum("pipeprobe stopped recording" in m for _, m in report["warnings"]) == 1
    name = {"fsize": "disk full (64 KiB file-size limit)", "removed": "run folder removed mid-run",
            "replaced": "run folder replaced by a file mid-run"}[fault]
    return name, n, f"one warning {one_warning}/{n}; training finished {finished}/{n}", "spans after the fault; training loses nothing"


def _classify(root: Path) -> str:
    try:
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            pipeprobe.load(root)
        return "warning" if any(issubclass(w.category, UserWarning) for w in seen) else "clean"
    except PipeprobeError as exc:
        return "error" if str(root) in str(exc) else "error-unnamed"
    except Exception:  # noqa: BLE001 - counted as a failure of the promise
        return "crash"


def fuzz(tmp: Path, base: Path, kind: str, n: int) -> tuple[str, int, str, str]:
    rng = random.Random(7)
    counts: dict[str, int] = {}
    files = sorted(p.name for p in base.iterdir())
    for trial in range(n):
        root = tmp / f"fuzz-{kind}-{trial}"
        shutil.copytree(base, root)
        path = root / rng.choice(files)
        raw = bytearray(path.read_bytes())
        if kind == "truncate":
            raw = raw[: rng.randrange(len(raw) + 1)]
        else:
            for _ in range(rng.randint(1, 8)):
                bit = rng.randrange(8 * len(raw))
                raw[bit // 8] ^= 1 << (bit % 8)
        path.write_bytes(bytes(raw))
        outcome = _classify(root)
        counts[outcome] = counts.get(outcome, 0) + 1
        shutil.rmtree(root)
    text = ", ".join(f"{k} {v}" for k, v in sorted(counts.items()))
    name = "a file cut at a random byte" if kind == "truncate" else "1-8 flipped bits in a file"
    return name, n, text, f"{counts.get('crash', 0) + counts.get('error-unnamed', 0)} unexplained failures"


def _base_run(tmp: Path) -> Path:
    code = r'''
import sys, time, pipeprobe
def gen():
    for b in range(6):
        ids = []
        for s in range(3):
            with pipeprobe.stage("decode", sample=3 * b + s):
                time.sleep(0.001)
            ids.append(3 * b + s)
        yield ids
with pipeprobe.Probe(sys.argv[1], report=False, sample_interval_s=0.01) as p:
    for batch in p.watch(gen(), samples=lambda ids: ids):
        with p.step():
            time.sleep(0.002)
'''
    subprocess.run([sys.executable, "-c", code, str(tmp / "base")], env=child_env(), check=True, timeout=60)
    return tmp / "base"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--kills", type=int, default=20, help="kill trials per target (20)")
    ap.add_argument("--signals", type=int, default=5, help="trials per signal case (5)")
    ap.add_argument("--spill-signals", type=int, default=12, help="trials per signal-during-spill case (12)")
    ap.add_argument("--failures", type=int, default=3, help="trials per own-failure case (3)")
    ap.add_argument("--fuzz", type=int, default=500, help="damaged runs per fuzz case (500)")
    args = ap.parse_args()
    t = time.perf_counter()
    rows = []
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        rows.append(kills(tmp, "main", args.kills))
        rows.append(kills(tmp, "worker", args.kills))
        rows.append(signals(tmp, "default", signal.SIGTERM, args.signals))
        rows.append(signals(tmp, "user-exit", signal.SIGTERM, args.signals))
        rows.append(signals(tmp, "default", signal.SIGINT, args.signals))
        rows.append(spill_signals(tmp, "default", signal.SIGTERM, args.spill_signals))
        rows.append(spill_signals(tmp, "user-exit", signal.SIGTERM, args.spill_signals))
        rows.append(spill_signals(tmp, "default", signal.SIGINT, args.spill_signals))
        rows.append(second_probe(tmp, args.signals))
        for case in MISUSE_ROWS:
            rows.append(misuse(tmp, case))
        for fault in ("fsize", "removed", "replaced"):
            rows.append(own_failures(tmp, fault, args.failures))
        base = _base_run(tmp)
        rows.append(fuzz(tmp, base, "truncate", args.fuzz))
        rows.append(fuzz(tmp, base, "flip", args.fuzz))
    head = ("fault or bad input", "trials", "outcome", "worst loss seen")
    widths = [max(len(str(r[i])) for r in rows + [head]) for i in range(4)]
    print(" | ".join(h.ljust(w) for h, w in zip(head, widths, strict=True)))
    print("-|-".join("-" * w for w in widths))
    for r in rows:
        print(" | ".join(str(c).ljust(w) for c, w in zip(r, widths, strict=True)))
    print(f"\n({time.perf_counter() - t:.0f} s)")


if __name__ == "__main__":
    main()
