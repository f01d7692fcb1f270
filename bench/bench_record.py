"""Recorder cost: per-span cost of the timers, and bytes per span on disk.

Prints medians of repeated measurements, measured side by side in one run:
a bare loop, a bare Python context manager, two monotonic clock reads, and
pipeprobe's block and decorator forms with CPU time off and on; then the
same forms and ``probe.step()`` outside a recording window (a probe made
with ``window=`` before its first batch), against the bare context
manager and the plain call.

    python bench/bench_record.py [--spans N] [--repeats R]
"""

from __future__ import annotations

import argparse
import os
import statistics
import tempfile
from time import monotonic_ns, perf_counter_ns

import pipeprobe
from pipeprobe import tracefile as tf


class _Bare:
    __slots__ = ("name",)

    def __init__(self, name: str) -> None:
        self.name = name

    def __enter__(self) -> "_Bare":
        return self

    def __exit__(self, *exc: object) -> bool:
        return False


def _per_span_ns(fn, n: int) -> float:
    t = perf_counter_ns()
    fn(n)
    return (perf_counter_ns() - t) / n


def loop_empty(n: int) -> None:
    for _ in range(n):
        pass


def loop_clock(n: int) -> None:
    for _ in range(n):
        monotonic_ns()
        monotonic_ns()


def loop_bare_cm(n: int) -> None:
    for _ in range(n):
        with _Bare("decode"):
            pass


def loop_block(n: int) -> None:
    stage = pipeprobe.stage
    for i in range(n):
        with stage("decode", sample=i):
            pass


def _work(i: int) -> int:
    return i


def loop_decorated(n: int) -> None:
    f = pipeprobe.stage("decode")(_work)
    for i in range(n):
        f(i)


def loop_plain_call(n: int) -> None:
    for i in range(n):
        _work(i)


def loop_step_of(probe: pipeprobe.Probe):
    """The training step's timer: its CPU time is the process's (every thread), not the thread's."""

    def loop_step(n: int) -> None:
        step = probe.step
        for _ in range(n):
            with step():
                pass

    return loop_step


def loop_watch_of(probe: pipeprobe.Probe):
    """The loader watch, per batch: its wait (with CPU time on, the CPU the process's other threads used)."""

    def loop_watch(n: int) -> None:
        for _ in probe.watch(range(n)):
            pass

    return loop_watch


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--spans", type=int, default=200_000)
    ap.add_argument("--repeats", type=int, default=7)
    args = ap.parse_args()
    n = args.spans
    rows: dict[str, list[float]] = {}

    def measure(label: str, fn) -> None:
        rows.setdefault(label, []).append(_per_span_ns(fn, n))

    with tempfile.TemporaryDirectory() as d:
        for rep in range(args.repeats):
            for cpu in (False, True):
                run = os.path.join(d, f"r{rep}-{cpu}")
                with pipeprobe.Probe(run, cpu_time=cpu, report=False, sample_interval_s=0) as probe:
                    suffix = "cpu on" if cpu else "cpu off"
                    measure(f"block form ({suffix})", loop_block)
                    measure(f"decorator form ({suffix})", loop_decorated)
                    measure(f"probe.step() ({suffix})", loop_step_of(probe))
                    measure(f"probe.watch per batch ({suffix})", loop_watch_of(probe))
            with pipeprobe.Probe(os.path.join(d, f"w{rep}"), report=False, sample_interval_s=0,
                                 window="1000000:") as probe:  # no batch taken: outside the window throughout
                measure("block form (outside window)", loop_block)
                measure("decorator form (outside window)", loop_decorated)
                measure("probe.step() (outside window)", loop_step_of(probe))
            measure("empty loop", loop_empty)
            measure("two monotonic clock reads", loop_clock)
            measure("bare Python context manager", loop_bare_cm)
            measure("plain function call", loop_plain_call)
        last = os.path.join(d, f"r{args.repeats - 1}-True")
        spans = sum(
            len(tf.read_records(os.path.join(last, f), tf.CONTENT_SPANS))
            for f in os.listdir(last) if f.endswith(".bin") and f.startswith("spans")
        )
        size = sum(os.path.getsize(os.path.join(last, f)) for f in os.listdir(last) if f.startswith("spans"))
    med = {k: statistics.median(v) for k, v in rows.items()}
    print(f"per-span cost, median of {args.repeats} x {n} spans (ns per iteration, loop included)")
    for k, v in med.items():
        print(f"  {k:<32} {v:8.1f}")
    for form, base in (("block form", "bare Python context manager"), ("decorator form", "plain function call")):
        off, on = med[f"{form} (cpu off)"], med[f"{form} (cpu on)"]
        print(f"  {form}: {off - med['empty loop']:.0f} ns net of the loop; "
              f"{off - med[base]:.0f} ns over {base}; CPU time adds {on - off:.0f} ns")
    for form, base in (("block form", "bare Python context manager"), ("decorator form", "plain function call"),
                       ("probe.step()", "bare Python context manager")):
        out = med[f"{form} (outside window)"]
        print(f"  {form} outside the window: {out - med['empty loop']:.0f} ns net of the loop, "
              f"{out / med[base]:.2f}x {base} (same loop)")
    bare = med["bare Python context manager"]
    print(f"  probe.step(): {med['probe.step() (cpu off)'] / bare:.2f}x the bare context manager with CPU time off, "
          f"{med['probe.step() (cpu on)'] / bare:.2f}x with it on (process CPU clock); the block form with thread "
          f"CPU time: {med['block form (cpu on)'] / bare:.2f}x")
    w_off, w_on = med["probe.watch per batch (cpu off)"], med["probe.watch per batch (cpu on)"]
    print(f"  probe.watch: {w_off - med['empty loop']:.0f} ns a batch net of the loop; CPU time adds "
          f"{w_on - w_off:.0f} ns (the wait reads the process and thread CPU clocks at both ends)")
    print(f"bytes per span on disk: {size / spans:.1f} ({spans} spans, {size} bytes incl. headers)")


if __name__ == "__main__":
    main()
