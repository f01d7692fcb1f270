"""The ``pipeprobe whatif`` command: its options and what it prints (private).

``RUN_DIR`` may come before or after the options. ``--faster`` and
``--offload`` take several ``STAGE=K`` pairs, so argparse gives them the
folder too when it comes right after them (``pipeprobe whatif --faster
decode=2 RUN``); :func:`_split_run_dir` takes it back: the value that is
not a ``STAGE=K`` pair, or that names an existing folder.

``--prefetch`` counts batches in flight across all workers. torch's
``DataLoader(prefetch_factor=K)`` counts per worker: its loader keeps
``workers * K`` batches in flight. ``--prefetch-per-worker K`` (and
``--recorded-prefetch-per-worker K``) take the per-worker form.
"""

from __future__ import annotations

import os
from typing import Any

from .._text import printable
from ..errors import ScenarioError
from ._loader import POLICIES
from .scenario import Scenario, parse_factors

__all__ = ["add_arguments", "run_command"]

_DESCRIPTION = """\
Predict the wall time, stall share and critical path of a recorded run under a changed
configuration, by replaying the recorded pipeline (a discrete-event simulation).
RUN_DIR may come before or after the options.

--prefetch counts batches in flight across all workers. torch's DataLoader counts per worker
(prefetch_factor): a loader with 4 workers and prefetch_factor=2 keeps 8 batches in flight,
i.e. --prefetch 8, or --prefetch-per-worker 2."""


def add_arguments(parser: Any) -> None:
    """Add the ``pipeprobe whatif`` options to an argparse parser."""
    import argparse

    parser.description = _DESCRIPTION
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.add_argument("run_dir", metavar="RUN_DIR", nargs="?", help="recorded run folder (before or after the options)")
    parser.add_argument("--faster", nargs="+", default=[], metavar="STAGE=K",
                        help="stage made K times faster (inf = free), e.g. decode=2 augment=1.5")
    parser.add_argument("--offload", nargs="+", default=[], metavar="STAGE=K",
                        help="move a loader stage to the accelerator side of the step, K times faster there")
    parser.add_argument("--workers", metavar="N", help="loader workers (0 = load in the training loop)")
    parser.add_argument("--prefetch", metavar="N", help="batches in flight, all workers together")
    parser.add_argument("--prefetch-per-worker", metavar="K",
                        help="batches in flight per worker (torch's prefetch_factor): prefetch = workers x K")
    parser.add_argument("--cores", metavar="N", help="CPU cores the work shares (inf = no contention)")
    parser.add_argument("--policy", choices=POLICIES, help="how the loader hands batches to workers")
    parser.add_argument("--any-order", action="store_true", help="the loader delivers batches as they finish")
    parser.add_argument("--persistent-workers", action="store_true",
                        help="keep the loader workers across epochs (no wait for new ones at each epoch)")
    parser.add_argument("--recorded-workers", metavar="N", help="workers of the recorded run (default: counted)")
    parser.add_argument("--recorded-prefetch", metavar="N",
                        help="batches in flight in the recorded run (default: the smallest the trace allows)")
    parser.add_argument("--recorded-prefetch-per-worker", metavar="K",
                        help="the recorded loader's prefetch_factor: recorded prefetch = recorded workers x K")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def run_command(args: Any) -> int:
    """Run ``pipeprobe whatif`` with parsed arguments; return the exit code (errors raise ScenarioError)."""
    import json

    from ..load import load
    from .engine import replay
    from .plan import build_plan
    from .predict import format_prediction, predict

    run_dir, faster_pairs, offload_pairs = _split_run_dir(args.run_dir, args.faster, args.offload)
    faster = parse_factors(faster_pairs, "faster")
    offload = parse_factors(offload_pairs, "offload")
    run = load(run_dir)
    plan = build_plan(run, workers=args.recorded_workers, prefetch=args.recorded_prefetch,
                      keep_stages=[*faster, *offload])
    if args.recorded_prefetch_per_worker is not None:
        per_worker = _per_worker("--recorded-prefetch-per-worker", args.recorded_prefetch_per_worker,
                                 args.recorded_prefetch)
        plan = build_plan(run, workers=plan.workers, prefetch=max(1, plan.workers) * per_worker,
                          keep_stages=[*faster, *offload])
    prefetch = args.prefetch
    if args.prefetch_per_worker is not None:
        per_worker = _per_worker("--prefetch-per-worker", args.prefetch_per_worker, args.prefetch)
        workers = Scenario(workers=args.workers).workers
        prefetch = max(1, plan.workers if workers is None else workers) * per_worker
    scenario = Scenario(faster=faster, offload=offload, workers=args.workers, prefetch=prefetch, cores=args.cores,
                        policy=args.policy, in_order=not args.any_order)
    p = predict(plan, replay(plan), scenario, persistent_workers=args.persistent_workers)
    if args.json:
        print(json.dumps(p.to_dict(), allow_nan=False))
    else:
        # stage names come from the trace: escape control characters line by line
        print("\n".join(printable(line) for line in format_prediction(p).splitlines()))
    return 0


def _per_worker(option: str, value: str, total: Any) -> int:
    """The per-worker prefetch of ``option``; refused alongside the total form."""
    if total is not None:
        raise ScenarioError(f"{option} and the total prefetch were both given; give one of them")
    try:
        k = int(str(value).strip())
    except ValueError:
        k = 0
    if k < 1:
        raise ScenarioError(f"{option} {value!r}: give a whole number >= 1 (batches in flight per worker)")
    return k


def _split_run_dir(run_dir: str | None, faster: list[str], offload: list[str]) -> tuple[str, list[str], list[str]]:
    """Take the run folder back from the values of ``--faster``/``--offload`` when it was given after them."""
    lists = [list(faster), list(offload)]
    if run_dir is None:
        for values in lists:
            for i, value in enumerate(values):
                if "=" not in value or os.path.isdir(value):
                    run_dir = values.pop(i)
                    break
            if run_dir is not None:
                break
    if run_dir is None:
        raise ScenarioError("give the run folder: pipeprobe whatif RUN_DIR [options]")
    return run_dir, lists[0], lists[1]
