"""Run the demo: train the parts classifier under a probe.

The demo plays a small quality-control line that sorts photos of machined
parts.  Its loader reads, decodes, resizes and augments the photos in worker
processes (see :mod:`pipeprobe.demo.pipeline`), and its training step is a
numpy perceptron (see :mod:`pipeprobe.demo.model`).  With the defaults, on
two cores, two workers cannot keep up with the training step, and the
report shows the loop waiting on input for about half of its wall time.
"""

from __future__ import annotations

import contextlib
import operator
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import pipeprobe
from pipeprobe.demo.images import PART_CLASSES, read_labels
from pipeprobe.demo.loader import PartsLoader
from pipeprobe.demo.model import MLP
from pipeprobe.demo.pipeline import AUGMENTS
from pipeprobe.demo.sample import demo_parts_dir

__all__ = ["DemoResult", "run_demo", "new_run_dir"]

RUNS_DIR = "pipeprobe-runs"
"""Folder, under the working directory, that holds the demo's runs by default."""

_batch_sample_ids = operator.attrgetter("sample_ids")


@dataclass
class DemoResult:
    """What a demo run leaves behind.

    Attributes
    ----------
    run_dir : pathlib.Path or None
        Folder the probe recorded into; ``None`` when recording was off.
    losses : list of float
        Training loss of each batch, in order.
    wall_s : float
        Seconds from the start of the first epoch to the end of the last
        step, the loader's shut-down included; opening and closing the
        probe (and its report) are not.
    """

    run_dir: Path | None
    losses: list[float]
    wall_s: float


def new_run_dir(parent: str | Path | None = None) -> Path:
    """Return a fresh, not yet existing, timestamped run folder path.

    Parameters
    ----------
    parent : str or pathlib.Path, optional
        Folder to put it in; ``./pipeprobe-runs`` by default.

    Returns
    -------
    pathlib.Path
        ``<parent>/demo-YYYYmmdd-HHMMSS``, with ``-2``, ``-3``... added if
        that name is taken.
    """
    root = Path(parent) if parent is not None else Path.cwd() / RUNS_DIR
    stem = f"demo-{datetime.now():%Y%m%d-%H%M%S}"
    candidate = root / stem
    suffix = 2
    while candidate.exists():
        candidate = root / f"{stem}-{suffix}"
        suffix += 1
    return candidate


def _train(
    loader: PartsLoader,
    model: MLP,
    batches: int,
    watch: Callable[[PartsLoader], Any],
    step: Callable[[], contextlib.AbstractContextManager],
) -> tuple[list[float], float]:
    """Consume ``batches`` batches, one epoch per pass; return losses and wall time."""
    losses: list[float] = []
    start_s = time.perf_counter()
    with loader:
        source = watch(loader)
        while len(losses) < batches:
            before = len(losses)
            for batch in source:
                with step():
                    loss = model.train_step(batch.images, batch.labels)
                losses.append(loss)
            if len(losses) == before:
                break  # the loader has nothing left to give
    return losses, time.perf_counter() - start_s


def _summary(losses: list[float], wall_s: float) -> str:
    """One line on how training went: mean loss of the first and last steps."""
    if not losses:
        return f"no training steps taken ({wall_s:.2f} s)"
    span = max(1, min(10, len(losses) // 2))
    first = sum(losses[:span]) / span
    last = sum(losses[-span:]) / span
    return (
        f"{len(losses)} steps in {wall_s:.2f} s; mean loss of the first {span} steps {first:.3f}, "
        f"of the last {span} steps {last:.3f}"
    )


def run_demo(
    out: str | Path | None = None,
    batches: int = 60,
    workers: int = 2,
    prefetch: int = 4,
    image_size: int = 96,
    augment: Sequence[str] = AUGMENTS,
    width: int = 256,
    input_pool: int = 2,
    batch_size: int = 16,
    seed: int = 0,
    start_method: str | None = None,
    quiet: bool = False,
    record: bool = True,
    data_dir: str | Path | None = None,
    step_threads: int = 1,
) -> DemoResult:
    """Train the demo classifier for ``batches`` steps, recording with a probe.

    The loop is the one a user writes::

        with pipeprobe.Probe(run_dir) as probe:
            for batch in probe.watch(loader, samples=lambda b: b.sample_ids):
                with probe.step():
                    loss = model.train_step(batch.images, batch.labels)

    repeated one epoch per pass over the photo set until ``batches`` batches
    have been used.

    Parameters
    ----------
    out : str or pathlib.Path, optional
        Run folder; a new one under ``./pipeprobe-runs`` by default (see
        :func:`new_run_dir`).  It must not hold a run already.
    batches : int, optional
        Training steps to take.
    workers : int, optional
        Loader worker processes; 0 loads in the training loop's thread.
    prefetch : int, optional
        Most batches asked of the workers and not yet used, in total.
    image_size : int, optional
        Side of the training images, in pixels.
    augment : sequence of str, optional
        Augmentations, a subset of ``("crop", "flip", "rotate", "jitter")``.
    width : int, optional
        Hidden units of the classifier; the step time grows with it.
    input_pool : int, optional
        The classifier averages ``input_pool`` x ``input_pool`` pixel blocks
        before its first layer; 1 feeds it every pixel (a slower step).
    batch_size : int, optional
        Photos per batch.
    seed : int, optional
        Seed of the shuffles, the augmentations and the initial weights.
    start_method : str, optional
        ``multiprocessing`` start method of the workers; "fork" on Linux by
        default.
    quiet : bool, optional
        Print nothing, the probe's report included.
    record : bool, optional
        If false, run the same loop with no probe at all, to measure what
        recording costs; ``run_dir`` of the result is then ``None``.
    data_dir : str or pathlib.Path, optional
        A folder of photos with a ``labels.csv`` (see
        :func:`~pipeprobe.demo.images.generate_images`); the bundled set by
        default.
    step_threads : int, optional
        Threads the step's math library (BLAS) may use; 0 keeps the
        library's default (one per core), which on a machine with few cores
        oversubscribes them beside the workers (the report's thread check
        shows it). Needs threadpoolctl; without it the default is kept.

    Returns
    -------
    DemoResult
        The run folder, the loss of each step and the wall time.

    Raises
    ------
    ValueError
        If an argument is out of range.
    """
    if batches < 0:
        message = f"batches must be at least 0, got {batches}"
        raise ValueError(message)
    if step_threads < 0:
        message = f"step_threads must be at least 0 (0: the library's default), got {step_threads}"
        raise ValueError(message)
    if width < 1:
        message = f"width must be at least 1, got {width}"
        raise ValueError(message)
    folder = Path(data_dir) if data_dir is not None else demo_parts_dir()
    files, labels = read_labels(folder)
    loader = PartsLoader(
        files,
        labels,
        batch_size=batch_size,
        workers=workers,
        prefetch=prefetch,
        image_size=image_size,
        augment=augment,
        seed=seed,
        batches=batches,
        start_method=start_method,
    )
    model = MLP(
        (3, image_size, image_size), width=width, classes=len(PART_CLASSES), input_pool=input_pool, seed=seed
    )
    say = (lambda text: None) if quiet else print
    say(
        f"pipeprobe demo: {batches} batches of {batch_size} part photos from {folder}, "
        f"{workers} worker(s), prefetch {prefetch}, {image_size} px, augment {'/'.join(augment) or 'none'}, "
        f"width {width}, input pool {input_pool}, step threads {step_threads or 'library default'}"
    )
    with _step_thread_limit(step_threads):
        return _run(loader, model, batches, record, out, quiet, say)


def _step_thread_limit(step_threads: int) -> contextlib.AbstractContextManager:
    """Limit the math library's threads to ``step_threads`` (0: leave them; so also without threadpoolctl)."""
    if step_threads == 0:
        return contextlib.nullcontext()
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return contextlib.nullcontext()
    return threadpool_limits(limits=step_threads)


def _run(loader: PartsLoader, model: MLP, batches: int, record: bool, out: str | Path | None, quiet: bool,
         say: Callable[[str], Any]) -> DemoResult:
    """Train, with or without a probe; print the summary."""
    if not record:
        losses, wall_s = _train(loader, model, batches, lambda source: source, contextlib.nullcontext)
        say(_summary(losses, wall_s))
        return DemoResult(run_dir=None, losses=losses, wall_s=wall_s)
    run_dir = Path(out) if out is not None else new_run_dir()
    say(f"recording into {run_dir}")
    with pipeprobe.Probe(run_dir, report=not quiet) as probe:
        watch = lambda source: probe.watch(source, samples=_batch_sample_ids)  # noqa: E731
        losses, wall_s = _train(loader, model, batches, watch, probe.step)
        say(_summary(losses, wall_s))
    return DemoResult(run_dir=run_dir, losses=losses, wall_s=wall_s)
