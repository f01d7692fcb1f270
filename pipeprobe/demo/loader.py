"""A multi-process loader that hands the demo's batches out in order.

Vocabulary used here:

sample id
    ``epoch * len(files) + i`` for the photo ``files[i]`` in epoch
    ``epoch``: each load of a photo in a run has its own id, and the id alone
    gives back the file (``sample_id % len(files)``) and the epoch
    (``sample_id // len(files)``).
batch id
    ``epoch * batches_per_epoch + k`` for the ``k``-th batch of an epoch:
    batches are counted across the whole run.
prefetch
    the most batches that have been asked of the workers but not yet handed
    to the consumer.  The batch the consumer is working on does not count;
    the batches in a worker's hands and those done but waiting their turn
    do.  The loader does not look past the end of an epoch.
"""

from __future__ import annotations

import multiprocessing
import multiprocessing.pool
import sys
from collections import deque
from collections.abc import Iterator, Sequence
from pathlib import Path
from types import TracebackType

import numpy as np

from pipeprobe.demo.pipeline import AUGMENTS, Batch, BatchTask, load_batch

__all__ = ["PartsLoader", "default_start_method"]


def default_start_method() -> str | None:
    """Return ``"fork"`` on Linux, else ``None`` (the platform's default).

    Returns
    -------
    str or None
        A name for :func:`multiprocessing.get_context`.
    """
    return "fork" if sys.platform.startswith("linux") else None


class PartsLoader:
    """Load batches of photos in worker processes, one epoch per ``iter()``.

    Each call of ``iter()`` starts the next epoch (0, 1, 2, ...), shuffled
    with a permutation seeded by ``(seed, epoch)``.  An epoch holds
    ``len(files) // batch_size`` full batches; the last partial batch is
    dropped.  Batches come out in batch-id order whatever order the workers
    finish them in.

    With ``workers=0`` the batches are loaded in the calling thread, when
    they are asked for, and ``prefetch`` is unused.  Otherwise a process pool
    is started on the first ``iter()`` (so workers started inside an open
    probe record into it) and kept until :meth:`close`; use the loader as a
    context manager so the pool is shut down.

    Parameters
    ----------
    files : sequence of str or pathlib.Path
        Photo files.
    labels : sequence of int
        Class index of each file.
    batch_size : int
        Samples per batch.
    workers : int, optional
        Worker processes; 0 loads in the calling thread.
    prefetch : int, optional
        Most batches asked of the workers and not yet handed out (see the
        module notes).  Fewer than ``workers`` leaves workers idle.
    image_size : int, optional
        Side of the square output images, in pixels.
    augment : sequence of str, optional
        Augmentations, a subset of :data:`~pipeprobe.demo.pipeline.AUGMENTS`.
    seed : int, optional
        Seed of the shuffles and the augmentations.
    shuffle : bool, optional
        Shuffle each epoch; if false, every epoch is in file order.
    batches : int or None, optional
        Stop after handing out this many batches in all, even mid-epoch;
        ``None`` for no limit.
    start_method : str or None, optional
        ``multiprocessing`` start method of the pool ("fork", "spawn",
        "forkserver"); ``None`` means :func:`default_start_method`.

    Raises
    ------
    ValueError
        If an argument is out of range or an augmentation is unknown.

    Examples
    --------
    >>> from pipeprobe.demo.images import generate_images, read_labels
    >>> import tempfile
    >>> folder = tempfile.mkdtemp()
    >>> _ = generate_images(folder, 8)
    >>> files, labels = read_labels(folder)
    >>> with PartsLoader(files, labels, batch_size=4, workers=0, image_size=32) as loader:
    ...     [batch.batch_id for batch in loader]
    [0, 1]
    """

    def __init__(
        self,
        files: Sequence[str | Path],
        labels: Sequence[int],
        batch_size: int,
        workers: int = 2,
        prefetch: int = 4,
        image_size: int = 96,
        augment: Sequence[str] = AUGMENTS,
        seed: int = 0,
        shuffle: bool = True,
        batches: int | None = None,
        start_method: str | None = None,
    ) -> None:
        problems = []
        if len(files) != len(labels):
            problems.append(f"{len(files)} files but {len(labels)} labels")
        if batch_size < 1 or batch_size > len(files):
            problems.append(f"batch_size must be 1..{len(files)} (the number of files), got {batch_size}")
        if workers < 0:
            problems.append(f"workers must be at least 0, got {workers}")
        if workers > 0 and prefetch < 1:
            problems.append(f"prefetch must be at least 1 with workers, got {prefetch}")
        if image_size < 8:
            problems.append(f"image_size must be at least 8 px, got {image_size}")
        if batches is not None and batches < 0:
            problems.append(f"batches must be at least 0, got {batches}")
        unknown = sorted(set(augment) - set(AUGMENTS))
        if unknown:
            problems.append(f"unknown augmentation(s) {', '.join(unknown)}; known: {', '.join(AUGMENTS)}")
        if problems:
            message = "; ".join(problems)
            raise ValueError(message)
        self.files = [str(path) for path in files]
        self.labels = [int(label) for label in labels]
        self.batch_size = batch_size
        self.workers = workers
        self.prefetch = prefetch
        self.image_size = image_size
        self.augment = tuple(augment)
        self.seed = seed
        self.shuffle = shuffle
        self.batches = batches
        self.start_method = start_method if start_method is not None else default_start_method()
        self.batches_per_epoch = len(self.files) // batch_size
        self._next_epoch = 0
        self._handed_out = 0
        self._pool: multiprocessing.pool.Pool | None = None

    def plan_epoch(self, epoch: int) -> list[BatchTask]:
        """List the batches of an epoch, without loading anything.

        Parameters
        ----------
        epoch : int
            Epoch number.

        Returns
        -------
        list of BatchTask
            All ``batches_per_epoch`` batches, in batch-id order (the
            ``batches`` limit is not applied).
        """
        count = len(self.files)
        if self.shuffle:
            order = np.random.default_rng((self.seed, epoch)).permutation(count)
        else:
            order = np.arange(count)
        tasks = []
        for k in range(self.batches_per_epoch):
            indices = [int(i) for i in order[k * self.batch_size:(k + 1) * self.batch_size]]
            tasks.append(
                BatchTask(
                    batch_id=epoch * self.batches_per_epoch + k,
                    epoch=epoch,
                    sample_ids=tuple(epoch * count + i for i in indices),
                    paths=tuple(self.files[i] for i in indices),
                    labels=tuple(self.labels[i] for i in indices),
                    image_size=self.image_size,
                    augment=self.augment,
                    seed=self.seed,
                )
            )
        return tasks

    def __iter__(self) -> Iterator[Batch]:
        """Start the next epoch and return an iterator over its batches."""
        epoch = self._next_epoch
        self._next_epoch += 1
        tasks = self.plan_epoch(epoch)
        if self.batches is not None:
            tasks = tasks[:max(0, self.batches - self._handed_out)]
        if self.workers == 0:
            return self._load_here(tasks)
        return self._load_in_pool(tasks)

    def _load_here(self, tasks: list[BatchTask]) -> Iterator[Batch]:
        """Load each batch in the calling thread when it is asked for."""
        for task in tasks:
            batch = load_batch(task)
            self._handed_out += 1
            yield batch

    def _load_in_pool(self, tasks: list[BatchTask]) -> Iterator[Batch]:
        """Keep up to ``prefetch`` batches asked of the pool; hand them out in order."""
        pool = self._ensure_pool()
        waiting = iter(tasks)
        in_flight: deque[multiprocessing.pool.AsyncResult] = deque()
        for task in waiting:
            in_flight.append(pool.apply_async(load_batch, (task,)))
            if len(in_flight) == self.prefetch:
                break
        while in_flight:
            try:
                batch = in_flight.popleft().get()
            except BaseException:
                self.terminate()
                raise
            task = next(waiting, None)
            if task is not None:
                in_flight.append(pool.apply_async(load_batch, (task,)))
            self._handed_out += 1
            yield batch

    def _ensure_pool(self) -> multiprocessing.pool.Pool:
        """Start the worker pool if it is not running."""
        if self._pool is None:
            context = multiprocessing.get_context(self.start_method)
            self._pool = context.Pool(processes=self.workers)
        return self._pool

    def close(self) -> None:
        """Let the workers finish what they were asked and exit, then wait for them.

        Workers exit normally, so their exit handlers run.  Safe to call twice.
        """
        pool, self._pool = self._pool, None
        if pool is not None:
            pool.close()
            pool.join()

    def terminate(self) -> None:
        """Stop the workers at once, dropping unfinished batches.  Safe to call twice."""
        pool, self._pool = self._pool, None
        if pool is not None:
            pool.terminate()
            pool.join()

    def __enter__(self) -> PartsLoader:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        if exc_type is None:
            self.close()
        else:
            self.terminate()
