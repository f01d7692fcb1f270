"""Replay cases whose results were captured before the event engine was rewritten (issue 10).

``tests/data/replay_golden.json`` holds, per case, what the replay of commit
a776c4c (the closure-based loop) gave: wall and stall time, the per-batch
times, the workers and the critical path. ``tests/test_replay.py`` replays
the same cases with the current engine and expects the same numbers.

Run this file to print the current results as JSON (that is how the golden
file was written, from the old engine)::

    PYTHONPATH=. python tests/_replay_cases.py > tests/data/replay_golden.json
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path
from typing import Any, Callable

import numpy as np

DATA = Path(__file__).parent / "data"
RECORDED = DATA / "replay_runs"
GOLDEN = DATA / "replay_golden.json"
ARRAYS = ("request_s", "start_s", "end_s", "available_s", "wait_start_s", "ready_s", "done_s")


def _synthetic(seed: int, n: int, cpu: float, epochs: int, **config: Any) -> Any:
    from pipeprobe.whatif.plan import plan_from_durations

    rng = np.random.default_rng(seed)
    task = rng.exponential(0.02, n)
    step = rng.exponential(0.008, n)
    epoch = np.repeat(np.arange(epochs), -(-n // epochs))[:n]
    return plan_from_durations(task, step, task_cpu_s=cpu * task, step_cpu_s=cpu * step, epoch=epoch, **config)


def _staged(seed: int, n: int) -> Any:
    from pipeprobe.whatif.plan import plan_from_durations

    rng = np.random.default_rng(seed)
    stages = {"read": rng.exponential(0.002, n), "decode": rng.exponential(0.01, n), "augment": rng.uniform(0, 0.01, n)}
    total = sum(stages.values())
    return plan_from_durations(None, rng.exponential(0.006, n), stages=stages, task_cpu_s=0.7 * total,
                               step_cpu_s=np.zeros(n), workers=3, prefetch=4, cores=2, policy="round-robin",
                               epoch=np.repeat([0, 1], n // 2), epoch_barrier=True)


def _recorded(name: str) -> Any:
    import pipeprobe
    from pipeprobe.whatif.plan import build_plan

    return build_plan(pipeprobe.load(RECORDED / name))


#: name -> (plan maker, list of scenarios given to ``replay`` as keywords)
CASES: dict[str, tuple[Callable[[], Any], list[dict[str, Any]]]] = {
    "ff-contended": (
        lambda: _synthetic(1, 60, 0.8, 3, workers=3, prefetch=4, cores=2, policy="first-free"),
        [{}, {"cores": 1}, {"workers": 5, "prefetch": 8}, {"in_order": False}, {"policy": "round-robin"},
         {"workers": 0}, {"faster": {"task": 2.0}}, {"faster": {"step": math.inf}}, {"cores": math.inf},
         {"offload": {"task": 4.0}}],
    ),
    "rr-no-barrier": (
        lambda: _synthetic(2, 45, 0.0, 1, workers=2, prefetch=3, cores=4, policy="round-robin",
                           epoch_barrier=False),
        [{}, {"workers": 4}, {"prefetch": 1}, {"in_order": False}, {"policy": "first-free", "workers": 3}],
    ),
    "half-cpu": (
        lambda: _synthetic(3, 50, 0.5, 5, workers=4, prefetch=6, cores=1.5, policy="first-free"),
        [{}, {"cores": 3}, {"workers": 1, "prefetch": 1}, {"in_order": False, "workers": 6}],
    ),
    "staged": (
        lambda: _staged(4, 40),
        [{}, {"faster": {"decode": math.inf}}, {"faster": {"read": 0.5, "augment": 3.0}},
         {"offload": {"decode": 8.0}}, {"workers": 1}, {"policy": "first-free", "in_order": False}],
    ),
    "recorded-pool-ff": (
        lambda: _recorded("pool_ff"),
        [{}, {"workers": 4}, {"faster": {"decode": 2.0}}, {"cores": 1}, {"prefetch": 1}],
    ),
    "recorded-pool-rr": (
        lambda: _recorded("pool_rr"),
        [{}, {"workers": 1}, {"policy": "first-free"}, {"faster": {"read": math.inf}}, {"workers": 0}],
    ),
    "recorded-demo": (
        lambda: _recorded("demo"),
        [{}, {"workers": 4, "prefetch": 8}, {"faster": {"augment": 3.42}}, {"cores": math.inf},
         {"offload": {"decode": 4.0}}, {"in_order": False}],
    ),
}


def _plain(x: Any) -> Any:
    if isinstance(x, np.ndarray):
        return [_plain(v) for v in x.tolist()]
    if isinstance(x, dict):
        return {str(k): _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if isinstance(x, float) and not math.isfinite(x):
        return repr(x)  # "nan", "inf"
    return x


def replay_case(plan: Any, scenario: dict[str, Any]) -> dict[str, Any]:
    """The replay of one scenario as plain JSON values."""
    from pipeprobe.whatif.engine import replay

    r = replay(plan, **scenario)
    out = {"wall_s": r.wall_s, "stall_s": r.stall_s, "batch_id": r.batch_id, "worker": r.worker,
           "critical_path": dict(sorted(r.critical_path.items()))}
    out.update({k: getattr(r, k) for k in ARRAYS})
    return _plain(out)


def plan_summary(plan: Any) -> dict[str, Any]:
    """The numbers of a plan that the replay reads."""
    return _plain({
        "loader_names": list(plan.loader.names), "loader_io_s": plan.loader.io_s, "loader_cpu_s": plan.loader.cpu_s,
        "consumer_names": list(plan.consumer.names), "consumer_io_s": plan.consumer.io_s,
        "consumer_cpu_s": plan.consumer.cpu_s, "start_up_s": plan.start_up_s, "tail_s": plan.tail_s,
        "handoff_s": plan.handoff_s, "latency_s": plan.latency_s, "dispatch_s": plan.dispatch_s,
        "worker_gap_s": plan.worker_gap_s, "epoch_dispatch_s": plan.epoch_dispatch_s, "workers": plan.workers,
        "prefetch": plan.prefetch, "cores": plan.cores, "policy": plan.policy, "epoch_barrier": plan.epoch_barrier,
        "background_cores": plan.background_cores, "notes": list(plan.notes),
    })


def capture() -> dict[str, Any]:
    """Every case's plan summary and replays."""
    out: dict[str, Any] = {}
    for name, (make, scenarios) in CASES.items():
        plan = make()
        out[name] = {"plan": plan_summary(plan), "replays": [replay_case(plan, s) for s in scenarios]}
    return out


if __name__ == "__main__":
    json.dump(capture(), sys.stdout, indent=None)
