"""Clock offsets between the ranks of a torch.distributed job, measured at probe start.

Ranks on different hosts read different monotonic clocks. When
``torch.distributed`` is initialised, every rank's probe runs a few
exchange rounds at start. A round is an ``all_gather`` to line the ranks
up (the barrier), then a timed ``all_gather``: each rank reads its clock
just before (``a``) and just after (``b``) the timed one. No rank can
finish that gather before every rank has entered it, so for rank ``r``
against the reference rank 0 (offset ``theta = clock_r - clock_0``)::

    a_r - b_0  <  theta  <  b_r - a_0

Every round gives such an interval; the true offset lies in all of them,
so their intersection is kept and its midpoint is the offset, its half
width the uncertainty. This is the round-trip bound of the network time
protocol (Mills, RFC 5905, on-wire protocol), with a collective in place
of a request and reply. Clock drift over the few milliseconds of the
exchange is neglected; if the intervals do not intersect (a clock was
stepped), the narrowest round alone is used.

torch is never imported here unless the caller's process already imported
``torch.distributed`` and initialised it.
"""

from __future__ import annotations

import os
import socket
import sys
import warnings
from time import monotonic_ns, time_ns
from typing import Any, Callable

import numpy as np

ROUNDS = 8
_ID_BYTES = 96


def distributed() -> Any | None:
    """Return ``torch.distributed`` when it is imported and initialised, else ``None``."""
    dist = sys.modules.get("torch.distributed")
    if dist is None:
        return None
    try:
        if dist.is_available() and dist.is_initialized():
            return dist
    except Exception:  # noqa: BLE001 - a broken install just means no exchange
        return None
    return None


def local_run_id(world_size: int) -> tuple[str, str]:
    """Return ``(run_id, source)`` without talking to other ranks.

    A single-process run gets a unique id of its own (``source="local"``).
    The ranks of a multi-rank job share the launcher's job id when one is
    in the environment (``source="launcher"``): ``TORCHELASTIC_RUN_ID``,
    then SLURM's job and step ids, then ``MASTER_ADDR:MASTER_PORT``.
    """
    env = os.environ
    if world_size > 1:
        elastic = env.get("TORCHELASTIC_RUN_ID", "")
        if elastic and elastic != "none":
            return f"torchelastic-{elastic}", "launcher"
        if env.get("SLURM_JOB_ID"):
            return f"slurm-{env['SLURM_JOB_ID']}-{env.get('SLURM_STEP_ID', '')}", "launcher"
        if env.get("MASTER_ADDR") and env.get("MASTER_PORT"):
            return f"master-{env['MASTER_ADDR']}:{env['MASTER_PORT']}", "launcher"
    return f"{socket.gethostname()}-{os.getpid()}-{time_ns()}", "local"


def offsets_from_stamps(stamps: np.ndarray, reference: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Clock offsets and their uncertainties from exchange timestamps.

    Parameters
    ----------
    stamps : ndarray, shape (ranks, rounds, 2)
        ``stamps[r, k] = (a, b)``: rank ``r``'s clock just before and just
        after the timed collective of round ``k``, in ns.
    reference : int
        The rank whose clock the offsets are relative to.

    Returns
    -------
    offset_ns, uncertainty_ns : ndarray of int64, shape (ranks,)
        ``clock_r - clock_reference`` and the half width of the interval
        that holds it (the reference rank has 0 and 0).

    References
    ----------
    D. Mills et al., "Network Time Protocol Version 4", RFC 5905 (2010),
    the on-wire offset and delay calculation.

    Examples
    --------
    >>> import numpy as np
    >>> s = np.array([[[0, 10]], [[1002, 1008]]])  # rank 1 reads 1000 ns ahead
    >>> off, unc = offsets_from_stamps(s)
    >>> int(off[1]), int(unc[1])
    (1000, 8)
    """
    s = np.asarray(stamps, dtype=np.int64)
    a, b = s[..., 0], s[..., 1]
    lower = a - b[reference]  # (ranks, rounds)
    upper = b - a[reference]
    lo, hi = lower.max(axis=1), upper.min(axis=1)
    offset = (lo + hi) // 2
    unc = (hi - lo + 1) // 2
    empty = hi < lo
    if empty.any():
        width = upper - lower
        k = width.argmin(axis=1)
        idx = np.arange(len(s))
        offset[empty] = ((lower[idx, k] + upper[idx, k]) // 2)[empty]
        unc[empty] = ((width[idx, k] + 1) // 2)[empty]
    offset[reference] = 0
    unc[reference] = 0
    return offset, unc


def exchange(dist: Any, run_id: str, *, rounds: int = ROUNDS,
             clock: Callable[[], int] = monotonic_ns) -> dict[str, Any]:
    """Agree on a run id and measure this rank's clock offset against rank 0.

    Every rank of the job must call this at the same point (it runs
    collectives). Returns ``{"run_id": ..., "clock_sync": {...}}`` with
    rank 0's run id and this rank's ``offset_ns`` and ``uncertainty_ns``.
    """
    import torch

    rank, world = dist.get_rank(), dist.get_world_size()
    backend = str(dist.get_backend()).lower()
    device = torch.device("cuda", torch.cuda.current_device()) if "nccl" in backend else torch.device("cpu")
    done = torch.cuda.synchronize if device.type == "cuda" else (lambda: None)

    raw = run_id.encode("utf-8")[:_ID_BYTES].ljust(_ID_BYTES, b"\0")
    ids = torch.tensor(list(raw), dtype=torch.uint8, device=device)
    dist.broadcast(ids, src=0)
    agreed = bytes(ids.cpu().tolist()).rstrip(b"\0").decode("utf-8", errors="replace")

    one = torch.zeros(1, dtype=torch.int64, device=device)
    out = [torch.zeros(1, dtype=torch.int64, device=device) for _ in range(world)]
    mine = np.zeros((rounds, 2), dtype=np.int64)
    for k in range(rounds):
        dist.all_gather(out, one)  # line the ranks up
        done()
        a = clock()
        dist.all_gather(out, one)
        done()
        b = clock()
        mine[k] = (a, b)
    table = [torch.zeros((rounds, 2), dtype=torch.int64, device=device) for _ in range(world)]
    dist.all_gather(table, torch.from_numpy(mine).to(device))
    stamps = np.stack([t.cpu().numpy() for t in table])
    offset, unc = offsets_from_stamps(stamps, reference=0)
    return {
        "run_id": agreed,
        "clock_sync": {
            "method": "all-gather rounds",
            "clock": "monotonic",
            "reference_rank": 0,
            "rounds": int(rounds),
            "offset_ns": int(offset[rank]),
            "uncertainty_ns": int(unc[rank]),
            "offsets_ns": [int(x) for x in offset],
            "uncertainties_ns": [int(x) for x in unc],
        },
    }


def measure(dist: Any, run_id: str) -> dict[str, Any] | None:
    """:func:`exchange`, turning a failure into one warning and ``None``."""
    try:
        return exchange(dist, run_id)
    except Exception as exc:  # noqa: BLE001 - never take training down
        warnings.warn(
            f"pipeprobe could not measure clock offsets between ranks ({type(exc).__name__}: {exc}); "
            "the ranks' timelines are aligned by their wall clocks instead",
            RuntimeWarning,
            stacklevel=3,
        )
        return None


# -- the merge side: putting the ranks of a run on one time axis ---------------
#: Wall clocks or step ends that disagree by more than this are reported.
DISAGREE_S = 1.0


def _run_file(rank: int) -> str:
    return f"run-r{rank}.json"


def check_ranks(root: Any, headers: dict[int, dict[str, Any]]) -> list[str]:
    """Check that the run headers in one folder belong to one job.

    Returns the warnings to report (a rank missing, disagreeing world
    sizes, run ids that cannot be compared).

    Raises
    ------
    TraceFormatError
        Run headers from different runs (their run ids differ) are mixed
        in the folder; the message names the files of each run.
    """
    from ..errors import TraceFormatError

    warn: list[str] = []
    comparable: dict[str, list[int]] = {}
    local = []
    for rank, h in sorted(headers.items()):
        if h.get("run_id_source") == "local" and len(headers) > 1:
            local.append(rank)
        else:
            comparable.setdefault(str(h.get("run_id")), []).append(rank)
    if len(comparable) > 1:
        groups = "; ".join(
            f"run {rid!r}: {', '.join(_run_file(r) for r in ranks)}" for rid, ranks in comparable.items()
        )
        raise TraceFormatError(
            f"{root}: holds files of {len(comparable)} different runs ({groups}); "
            "move each run's files into a folder of its own and load them one at a time"
        )
    if local:
        warn.append(
            f"{root}: {', '.join(_run_file(r) for r in local)} carry run ids made by each process alone "
            "(no torch.distributed and no launcher job id), so pipeprobe cannot check that these ranks "
            "belong to one run"
        )
    sizes = {r: h.get("world_size") for r, h in headers.items()}
    valid = {r: s for r, s in sizes.items() if isinstance(s, int) and not isinstance(s, bool) and s >= 1}
    if len(set(valid.values())) > 1:
        said = ", ".join(f"{_run_file(r)} says {s}" for r, s in sorted(valid.items()))
        warn.append(f"{root}: the ranks disagree on the world size ({said})")
    world = max(valid.values(), default=1)
    missing = [r for r in range(world) if r not in headers]
    if missing:
        shown = ", ".join(_run_file(r) for r in missing[:8]) + (" ..." if len(missing) > 8 else "")
        warn.append(
            f"{root}: world size is {world} but {len(missing)} rank(s) left no run header ({shown}; "
            f"present: ranks {', '.join(str(r) for r in sorted(headers))}); cross-rank results cover "
            "only the ranks present"
        )
    extra = [r for r in headers if r >= world]
    if extra and valid:
        warn.append(
            f"{root}: {', '.join(_run_file(r) for r in sorted(extra))} name ranks beyond the world size {world}"
        )
    return warn


def _measured(h: dict[str, Any]) -> tuple[int, int] | None:
    cs = h.get("clock_sync")
    if not isinstance(cs, dict) or cs.get("reference_rank") != 0:
        return None
    off, unc = cs.get("offset_ns"), cs.get("uncertainty_ns")
    ok = all(isinstance(v, int) and not isinstance(v, bool) and abs(v) < 2**62 for v in (off, unc))
    return (off, unc) if ok and unc >= 0 else None


def plan_alignment(root: Any, headers: dict[int, dict[str, Any]]) -> tuple[dict[str, Any], dict[int, int], list[str]]:
    """Decide how each rank's monotonic clock maps onto the run's time axis.

    Returns ``(clock, offsets_ns, warnings)``. ``clock["method"]`` is

    * ``"shared-monotonic"``: every rank ran on one host, whose monotonic
      clock all processes share (exact);
    * ``"measured-offsets"``: the offsets measured at start
      (:func:`exchange`); rank ``r``'s time ``t`` maps to ``t -
      offsets_ns[r]`` on rank 0's clock, within ``clock["uncertainty_s"]``;
    * ``"wall-anchor"``: several hosts and no measured offsets; each
      process's own (monotonic, wall) anchor pair maps it to the wall clock,
      whose agreement between hosts is unknown.
    """
    warn: list[str] = []
    hosts = {str(h.get("host")) for h in headers.values()}
    measured = {r: _measured(h) for r, h in headers.items()}
    have = {r: m for r, m in measured.items() if m is not None}
    offsets = {r: 0 for r in headers}
    if len(have) == len(headers) and len(headers) > 1:
        unc = max(u for _, u in have.values())
        same_host_zero = len(hosts) == 1 and all(abs(o) <= u + 1_000_000 for o, u in have.values())
        if same_host_zero:
            return {"method": "shared-monotonic", "uncertainty_s": 0.0, "measured_uncertainty_s": unc / 1e9}, offsets, warn
        offsets = {r: o for r, (o, _) in have.items()}
        clock = {"method": "measured-offsets", "uncertainty_s": unc / 1e9}
        # Wall clocks: how far each host's wall clock is from rank 0's at one instant.
        ref = min(headers)
        base = offsets[ref] + int(headers[ref]["anchor_wall_ns"]) - int(headers[ref]["anchor_mono_ns"])
        for r, h in sorted(headers.items()):
            skew_s = (int(h["anchor_wall_ns"]) - int(h["anchor_mono_ns"]) + offsets[r] - base) / 1e9
            if r != ref and abs(skew_s) > DISAGREE_S:
                warn.append(
                    f"{root}: the wall clock behind {_run_file(r)} ({h.get('host')}) is {abs(skew_s):.2f} s "
                    f"{'ahead of' if skew_s > 0 else 'behind'} that of {_run_file(ref)} ({headers[ref].get('host')}); "
                    f"the timeline uses the clock offsets measured at start instead (within {unc / 1e6:.3f} ms)"
                )
        return clock, offsets, warn
    if len(hosts) <= 1:
        return {"method": "shared-monotonic", "uncertainty_s": 0.0}, offsets, warn
    if have:
        warn.append(
            f"{root}: only {', '.join(_run_file(r) for r in sorted(have))} carry measured clock offsets; "
            "the ranks were aligned by wall-clock anchors instead"
        )
    warn.append(
        f"{root}: ranks ran on {len(hosts)} hosts; their clocks were aligned by wall-clock anchors, "
        "whose agreement is unknown (NTP-level, typically milliseconds); initialise torch.distributed "
        "before creating the Probe to have the offsets measured"
    )
    return {"method": "wall-anchor", "uncertainty_s": float("nan")}, offsets, warn


def check_step_alignment(root: Any, batches: Any, clock: dict[str, Any]) -> list[str]:
    """Warn when wall-anchored ranks' step ends disagree by seconds.

    A gradient synchronisation keeps the step ends of data-parallel ranks
    within milliseconds of each other, so a median gap of seconds between
    two ranks' ends of the same batch means their hosts' wall clocks
    disagree (common practice: clocks kept by NTP agree to milliseconds).
    """
    if clock.get("method") != "wall-anchor" or batches is None or not len(batches):
        return []
    ends = batches.pivot_table(index="batch_id", columns="rank", values="step_end_s", aggfunc="first")
    if ends.shape[1] < 2:
        return []
    ref = int(ends.columns.min())
    warn = []
    for r in ends.columns:
        if int(r) == ref:
            continue
        gap = (ends[r] - ends[ref]).dropna()
        if len(gap) and abs(float(gap.median())) > DISAGREE_S:
            g = float(gap.median())
            warn.append(
                f"{root}: steps in {_run_file(int(r))} end a median {abs(g):.2f} s "
                f"{'after' if g > 0 else 'before'} the same steps in {_run_file(ref)}, though a gradient "
                "synchronisation keeps them within milliseconds: the hosts' wall clocks disagree and "
                "cross-rank timings are off by about that much; record with torch.distributed initialised "
                "so that the probe measures the offsets"
            )
    return warn
