"""Lanes: the threads that recorded spans, and the one rule that names them.

A lane is a thread (rank, pid, tid). :func:`lane_name` makes every lane
name pipeprobe shows, and :func:`thread_lanes` gives each thread of a run
its name and display order; the dependency timeline, the critical-path and
stall tables, the timeline picture and the resource legend all use them,
so a thread has one name everywhere. Loader workers are named by their
slot (:func:`pipeprobe.load.worker_slots`), not their process.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .load import worker_slots

__all__ = ["lane_name", "thread_lanes"]


def lane_name(rank: int | None, process: int, thread: int = 1) -> str:
    """The name of a lane (a thread that recorded spans): the one rule timeline, plots and layout use.

    Parameters
    ----------
    rank : int or None
        The thread's rank, or None on a run of one rank 0 (no prefix).
    process : int
        0 for the training process, ``k`` for the loader worker in slot
        ``k`` of its rank (:func:`pipeprobe.load.worker_slots`).
    thread : int
        1 for the process's first thread (the consumer thread of the
        training process), ``t`` for its ``t``-th.

    Examples
    --------
    >>> lane_name(None, 0), lane_name(None, 0, 2), lane_name(None, 2), lane_name(1, 2, 3)
    ('main', 'main thread 2', 'worker 2', 'rank 1 worker 2 thread 3')
    """
    prefix = "" if rank is None else f"rank {rank} "
    base = "main" if process == 0 else f"worker {process}"
    return prefix + base + (f" thread {thread}" if thread > 1 else "")


def thread_lanes(spans: pd.DataFrame) -> tuple[pd.DataFrame, np.ndarray]:
    """Lanes in display order and each span's lane (a row position in the lanes table).

    Per rank: the consumer thread(s) (which waited for batches or ran
    steps) first, then other threads of the training process, then loader
    workers by their slot (:func:`pipeprobe.load.worker_slots`: the worker
    processes a loader starts anew each epoch take over the last epoch's
    slots, so they share its lane names), each named by :func:`lane_name`;
    lanes get a ``rank R`` prefix on runs of several ranks (or of one rank
    other than 0). Threads of successive processes in one slot share a
    name, so the timeline's ``lane`` column holds one lane per slot.

    Returns
    -------
    lanes : DataFrame
        ``rank, pid, tid, consumer, name, process, thread``, one row per lane.
    lane : ndarray of int
        Each span's row in ``lanes``.
    """
    cols = ["rank", "pid", "tid", "consumer", "name", "process", "thread"]
    if not len(spans):
        return pd.DataFrame({c: [] for c in cols}), np.zeros(0, np.int64)
    grouped = spans.groupby(["rank", "pid", "tid"], sort=True, observed=True)
    codes = grouped.ngroup().to_numpy(np.int64)
    keys = grouped.size().index
    n = len(keys)
    cons = np.bincount(codes[spans["stage"].isin(["wait", "step"]).to_numpy()], minlength=n) > 0
    is_worker = np.bincount(codes[(spans["role"] == "worker").to_numpy()], minlength=n) > 0
    th = pd.DataFrame({
        "code": np.arange(n), "rank": keys.get_level_values(0).to_numpy(np.int64),
        "pid": keys.get_level_values(1).to_numpy(np.int64), "tid": keys.get_level_values(2).to_numpy(np.int64),
        "consumer": cons, "first_s": grouped["start_s"].min().to_numpy(np.float64), "worker": is_worker & ~cons,
    })
    # each thread as one span from its first start to its last end: enough to find the worker slots
    lives = th.assign(start_s=th["first_s"], end_s=grouped["end_s"].max().to_numpy(np.float64),
                      role=np.where(is_worker, "worker", "main"))
    slots = worker_slots(lives)
    slot = np.array([slots.get((int(r), int(p)), 0) for r, p in zip(th["rank"], th["pid"], strict=True)], np.int64)
    # process number: 0 for the training process, the worker's slot for a loader worker
    th = th.assign(pid_first=th.groupby(["rank", "pid"])["first_s"].transform("min"),
                   group=np.where(th["consumer"], 0, np.where(th["worker"], 2, 1)),
                   process=np.where(th["worker"], slot, 0))
    th = th.sort_values(["rank", "group", "process", "pid_first", "pid", "first_s", "tid"],
                        kind="stable").reset_index(drop=True)
    th["thread"] = th.groupby(["rank", "process", th["pid"].where(th["worker"], -1)]).cumcount() + 1
    multi_rank = th["rank"].nunique() > 1
    th["name"] = [lane_name(r if multi_rank or r else None, p, t)
                  for r, p, t in zip(th["rank"], th["process"], th["thread"], strict=True)]
    lane_of_code = np.empty(n, np.int64)
    lane_of_code[th["code"].to_numpy()] = np.arange(n)
    return th[cols], lane_of_code[codes]
