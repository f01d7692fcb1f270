"""The training loop the real bench jobs share: options, self-timing, optional recording, JSON out.

A job script builds its dataset and model from the parsed options and
calls :func:`train`. The loop times itself with ``time.perf_counter``:
``wall_s`` from the first ``iter(loader)`` to the end of the last step,
``next_s`` the total time spent inside ``next(loader)``. With ``--record
DIR`` it opens a ``pipeprobe.Probe`` right before the loop and closes it
right after (``probe.watch`` around the loader, ``probe.step`` around the
step); without it the job knows nothing of pipeprobe but its stage
decorators, so ``pipeprobe run`` can record it unchanged.

The last line on stdout is one JSON object: ``wall_s``, ``next_s``,
``batches``, ``epochs`` and the options.
"""

from __future__ import annotations

import argparse
import json
import time
from typing import Any, Callable


def job_options(description: str) -> argparse.ArgumentParser:
    """The options every job takes (a job adds its own)."""
    ap = argparse.ArgumentParser(description=description)
    ap.add_argument("--data", required=True, help="folder with the job's input files (written by the bench)")
    ap.add_argument("--workers", type=int, default=0, help="DataLoader num_workers")
    ap.add_argument("--prefetch", type=int, default=2, help="DataLoader prefetch_factor (per worker)")
    ap.add_argument("--persistent", action="store_true", help="DataLoader persistent_workers=True")
    ap.add_argument("--epochs", type=int, default=3)
    ap.add_argument("--threads", type=int, default=0, help="torch.set_num_threads (0: torch's default)")
    ap.add_argument("--cost", type=float, default=1.0, help="cost factor of the job's nested stage")
    ap.add_argument("--remove", default="", help="a nested stage to leave out")
    ap.add_argument("--record", default="", help="record the loop into this run folder with pipeprobe.Probe")
    return ap


def loader_options(args: argparse.Namespace) -> dict[str, Any]:
    """DataLoader keywords from the options (prefetch and persistence only with workers, as torch requires)."""
    if args.workers == 0:
        return {"num_workers": 0}
    return {"num_workers": args.workers, "prefetch_factor": args.prefetch, "persistent_workers": args.persistent}


def set_threads(args: argparse.Namespace) -> None:
    import torch

    if args.threads > 0:
        torch.set_num_threads(args.threads)


def sgd_step(net: Any) -> Callable[[Any], None]:
    """One training step of ``net`` on an ``(x, y)`` batch: cross-entropy, backward, plain SGD."""
    import torch

    opt = torch.optim.SGD(net.parameters(), lr=0.01)

    def step(batch: Any) -> None:
        x, y = batch
        loss = torch.nn.functional.cross_entropy(net(x), y)
        opt.zero_grad()
        loss.backward()
        opt.step()

    return step


def train(args: argparse.Namespace, loader: Any, step: Callable[[Any], None]) -> dict[str, Any]:
    """Run ``args.epochs`` epochs of ``step`` over ``loader``; print and return the job's own timings."""
    probe = None
    if args.record:
        import pipeprobe

        probe = pipeprobe.Probe(args.record, report=False)
    source = probe.watch(loader) if probe is not None else loader
    next_s, batches = 0.0, 0
    start = time.perf_counter()
    for _ in range(args.epochs):
        it = iter(source)
        while True:
            t0 = time.perf_counter()
            try:
                batch = next(it)
            except StopIteration:
                break
            next_s += time.perf_counter() - t0
            batches += 1
            if probe is not None:
                with probe.step():
                    step(batch)
            else:
                step(batch)
    wall_s = time.perf_counter() - start
    if probe is not None:
        probe.close()
    out = {"wall_s": wall_s, "next_s": next_s, "batches": batches, "epochs": args.epochs,
           "options": {k: v for k, v in vars(args).items() if k not in ("data", "record")}}
    print(json.dumps(out), flush=True)
    return out
