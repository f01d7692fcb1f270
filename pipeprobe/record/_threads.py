"""The thread pools of the training process, for the run header (private; read once, when the probe closes).

The training step's math libraries run their own pools of threads (BLAS,
OpenMP, torch's intra-op threads). On a machine with few cores those
threads and the loader workers compete for the same cores; the thread
check (:mod:`pipeprobe.threads`) and the replay need to know how many
threads the step could use. :func:`read_thread_pools` reads them:
``threadpoolctl`` (when it can be imported) lists the BLAS and OpenMP
pools of the libraries loaded in the process, and torch's intra-op count
is read only when ``torch`` is already imported (pipeprobe never imports
it).
"""

from __future__ import annotations

import os
import sys
from typing import Any

__all__ = ["read_thread_pools", "STEP_CPU_PROCESS", "WAIT_CPU_OTHERS"]

#: Value of the run header's ``step_cpu`` field: step records hold the CPU time of every thread of the process.
STEP_CPU_PROCESS = "process"
#: Value of the run header's ``wait_cpu`` field: wait records hold the CPU time the process's other threads
#: used during the wait (a math-library pool that keeps spinning after a step shows there).
WAIT_CPU_OTHERS = "other-threads"
#: Pools kept in the header at most (a process loads a handful).
MAX_POOLS = 16
#: Core ids listed in the header at most (beyond, only their count).
MAX_AFFINITY = 4096


def _usable_cores() -> int:
    """Cores this process may run on (its affinity mask), else the machine's count."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def _affinity() -> list[int] | None:
    """The ids of the cores this process may run on, when the system says (None: unknown or too many to list)."""
    try:
        ids = sorted(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return None
    return ids if len(ids) <= MAX_AFFINITY else None


def _pools() -> list[dict[str, Any]] | None:
    """The BLAS and OpenMP pools threadpoolctl sees (None: threadpoolctl is not installed)."""
    try:
        import threadpoolctl
    except ImportError:
        return None
    pools = []
    for info in threadpoolctl.threadpool_info()[:MAX_POOLS]:
        pools.append({"api": str(info.get("user_api", "")), "library": str(info.get("internal_api", "")),
                      "threads": int(info.get("num_threads") or 1)})
    return pools


def _torch_intra_op() -> int | None:
    """torch's intra-op thread count when torch is already imported (None otherwise)."""
    torch = sys.modules.get("torch")
    get = getattr(torch, "get_num_threads", None)
    return int(get()) if callable(get) else None


def read_thread_pools() -> dict[str, Any]:
    """The run header's ``threads`` object: usable cores, the math libraries' pools, torch's intra-op threads.

    ``pools`` is None when threadpoolctl is not installed; a failure to
    read them is recorded as ``error`` (the thread check is then skipped),
    never raised.

    Examples
    --------
    >>> sorted(read_thread_pools())
    ['affinity', 'error', 'pools', 'torch_intra_op', 'usable_cores']
    """
    out: dict[str, Any] = {"usable_cores": _usable_cores(), "affinity": _affinity(), "pools": None,
                           "torch_intra_op": None, "error": None}
    try:
        out["pools"] = _pools()
        out["torch_intra_op"] = _torch_intra_op()
    except Exception as exc:  # noqa: BLE001 - a library we only read must not stop the probe's close
        out["error"] = f"{type(exc).__name__}: {exc}"[:200]
    return out
