"""The report's estimate of what recording cost, held against a measured bare/recorded pair."""

from __future__ import annotations

import tempfile
import time

import pipeprobe
from pipeprobe.probecost import recording_cost

N_SPANS = 100_000


def _work(i: int) -> int:
    return i * i


def _bare_cpu_s() -> float:
    c0 = time.process_time()
    for i in range(N_SPANS):
        _work(i)
    return time.process_time() - c0


def _recorded_cpu_s() -> tuple[float, float]:
    """CPU seconds of the same loop with every item timed, and the report's estimate of what timing added."""
    run_dir = tempfile.mkdtemp()
    with pipeprobe.Probe(run_dir, report=False, sample_interval_s=0):
        c0 = time.process_time()
        for i in range(N_SPANS):
            with pipeprobe.stage("tiny", sample=i):
                _work(i)
        used = time.process_time() - c0
    a = pipeprobe.analyze(run_dir)
    cost = recording_cost(a.run, a.stages.table, a.wall_s)
    return used, float(cost.processes["added_s"].sum())


def _estimate_over_measured() -> float:
    bare_before = _bare_cpu_s()
    recorded, estimated = _recorded_cpu_s()
    bare_after = _bare_cpu_s()
    return estimated / (recorded - (bare_before + bare_after) / 2)


def test_estimate_matches_a_measured_bare_and_recorded_pair():
    """The cost a report states (spans x the per-span cost measured at probe start) is within 20 % (0.8x to 1.25x) of the
    CPU time recording added to a loop of 100,000 tiny timed items, measured bare and recorded side by side
    (process CPU time, so a busy machine stretches both alike; common practice for overhead checks). Records
    again at most twice when a shared machine disturbed the pair."""
    ratios = []
    for _ in range(3):
        ratios.append(_estimate_over_measured())
        if 0.8 <= ratios[-1] <= 1.25:
            break
    assert 0.8 <= ratios[-1] <= 1.25, ratios
