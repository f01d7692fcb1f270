"""The event loop of the what-if replay and the critical path of its result (private).

:func:`simulate` runs a :class:`~pipeprobe.replay.ReplayPlan`'s per-batch
work through loader workers, a bounded prefetch, the consumer and shared
cores; :func:`critical_path` walks the replayed run back from its end. See
:mod:`pipeprobe.replay` for the model.

References
----------
.. [1] G. S. Fishman, *Discrete-Event Simulation*, Springer, 2001.
.. [2] L. Kleinrock, *Queueing Systems, Volume 2*, Wiley, 1976, ch. 4 (processor sharing).
.. [3] J. E. Kelley and M. R. Walker, "Critical-path planning and scheduling", 1959.
"""

from __future__ import annotations

import heapq
import math
from collections import deque
from typing import Any

import numpy as np

#: Names of the parts of a replayed run that are no user stage.
START_UP = "(start-up)"
CONSUMER_OVERHEAD = "(consumer overhead)"
WORKER_OVERHEAD = "(worker overhead)"
DISPATCH = "(loader dispatch)"
HANDOFF = "(loader handoff)"
UNSTAGED = "(unstaged loading)"
PSEUDO_STAGES = (START_UP, CONSUMER_OVERHEAD, WORKER_OVERHEAD, DISPATCH, HANDOFF, UNSTAGED)

_DISPATCHABLE, _WORKER_READY, _AVAILABLE, _RESUME, _HANDOFF = range(5)


def simulate(
    plan: Any, loader: Any, consumer: Any, W: int, P: int, ncores: float, policy: str, in_order: bool
) -> dict[str, Any]:
    nb = plan.batches
    l_io = loader.io_s.sum(1)
    l_cpu = loader.cpu_s.sum(1)
    c_io = consumer.io_s.sum(1)
    c_cpu = consumer.cpu_s.sum(1)
    l_nom = (l_io + l_cpu).tolist()
    c_nom = (c_io + c_cpu).tolist()
    with np.errstate(invalid="ignore", divide="ignore"):
        l_u = np.where(l_io + l_cpu > 0, l_cpu / (l_io + l_cpu), 0.0).tolist()
        c_u = np.where(c_io + c_cpu > 0, c_cpu / (c_io + c_cpu), 0.0).tolist()
    epoch = plan.epoch
    ep_first = np.r_[True, epoch[1:] != epoch[:-1]]
    ep_idx = (np.cumsum(ep_first) - 1).tolist()
    ep_first_l = ep_first.tolist()
    ep_list = epoch.tolist()
    barrier = plan.epoch_barrier
    ep_disp = plan.epoch_dispatch_s.tolist()
    idx_in_epoch = (np.arange(nb) - np.maximum.accumulate(np.where(ep_first, np.arange(nb), 0))).tolist()
    h, lat, disp, gap = plan.handoff_s, plan.latency_s, plan.dispatch_s, plan.worker_gap_s
    if W == 0:
        h, lat = 0.0, 0.0

    nan = math.nan
    req = [nan] * nb
    start = [nan] * nb
    end = [nan] * nb
    avail = [nan] * nb
    wstart = [nan] * nb  # wait start of the consumer for this batch
    ready = [nan] * nb
    done = [nan] * nb
    worker = [-1] * nb
    start_by_worker = [False] * nb  # task start was set by its worker freeing up (else by the request)
    prev_on_worker = [-1] * nb
    req_after = [-1] * nb  # request made when the consumer took this batch (-1: at an epoch start)
    req_epoch_k = [-1] * nb  # ...or at the consumer wait of this consumed position
    ready_by_batch = [False] * nb
    taken_order: list[int] = []

    heap: list[tuple[float, int, int, int]] = []
    seq = 0
    push = heapq.heappush
    pop = heapq.heappop

    # running CPU tasks: entity -> [fin_time, rem_nominal, u, batch]; entity W is the consumer
    run_fin: dict[int, float] = {}
    run_rem: dict[int, float] = {}
    run_u: dict[int, float] = {}
    run_b: dict[int, int] = {}
    last_t = 0.0
    rate_r = 1.0
    contended = ncores < W + 1

    def rho(u: float, r: float) -> float:
        # nominal progress when the CPU parts run at speed r and the off-CPU parts at full speed
        return 1.0 / (1.0 - u + u / r) if r < 1.0 else 1.0

    def cpu_speed(us: list[float]) -> float:
        # the speed r at which the CPU use of all tasks (u r / ((1 - u) r + u) each) fills the
        # cores exactly; 1 when they fit
        tot = sum(us)
        if tot <= ncores:
            return 1.0
        r = ncores / tot  # exact when every task is all CPU; else an upper bound
        if all(u == 1.0 or u == 0.0 for u in us):
            return r
        for _ in range(30):  # Newton on a concave increasing function, from above: monotone
            use = grad = 0.0
            for u in us:
                den = (1.0 - u) * r + u
                use += u * r / den
                grad += u * u / (den * den)
            step = (use - ncores) / grad if grad > 0 else 0.0
            r -= step
            if step <= 1e-12 * r:
                break
        return max(r, 1e-9)

    run_rho: dict[int, float] = {}

    def advance(now: float) -> None:
        # progress every running task to ``now`` at the current rates
        nonlocal last_t
        dt = now - last_t
        if dt > 0:
            for e in run_rem:
                run_rem[e] -= run_rho[e] * dt
        last_t = now

    def rerate(now: float) -> None:
        # new CPU speed for the running set; new finish times
        nonlocal rate_r
        rate_r = cpu_speed(list(run_u.values()))
        for e in run_rem:
            rr = rho(run_u[e], rate_r)
            run_rho[e] = rr
            rem = run_rem[e]
            run_fin[e] = now + (rem / rr if rem > 0 else 0.0)

    def run_task(e: int, b: int, nom: float, u: float, now: float) -> None:
        run_u[e] = u
        run_b[e] = b
        if contended:
            advance(now)
            run_rem[e] = nom
            rerate(now)
        else:
            run_fin[e] = now + nom

    def stop_task(e: int, now: float) -> None:
        del run_fin[e], run_u[e], run_b[e]
        if contended:
            advance(now)
            del run_rem[e], run_rho[e]
            rerate(now)

    # loader state
    idle: deque[int] = deque(range(W))
    idle_set = set(range(W))
    queue: deque[int] = deque()  # first-free: dispatchable tasks
    wq: list[deque[int]] = [deque() for _ in range(W)]  # round-robin: per-worker dispatchable tasks
    assigned = [-1] * nb
    last_task_of = [-1] * max(W, 1)
    next_req = 0
    in_flight = 0
    # consumer state
    cons_k = 0  # position in consumption order
    cons_waiting = -2  # -2 not waiting; -1 waiting for any; b waiting for batch b
    avail_pool: list[tuple[float, int]] = []  # out-of-order: available, not taken
    taken = [False] * nb
    CONS = W

    def start_on(w: int, b: int, now: float, by_worker: bool) -> None:
        idle_set.discard(w)
        start[b] = now
        worker[b] = w
        start_by_worker[b] = by_worker
        prev_on_worker[b] = last_task_of[w]
        last_task_of[w] = b
        run_task(w, b, l_nom[b], l_u[b], now)

    def request(b: int, now: float, after: int, at_k: int) -> None:
        nonlocal seq, in_flight
        req[b] = now
        req_after[b] = after
        req_epoch_k[b] = at_k
        in_flight += 1
        delay = ep_disp[ep_idx[b]] if after < 0 else disp
        if policy == "round-robin":
            assigned[b] = (idx_in_epoch[b] if barrier else b) % W
        seq += 1
        push(heap, (now + delay, seq, _DISPATCHABLE, b))

    def consumer_take(b: int, now: float) -> None:
        # consumer has batch b at ``now``; request the next one; run its consumer work
        nonlocal next_req, in_flight
        ready[b] = now
        taken[b] = True
        taken_order.append(b)
        if W > 0:
            in_flight -= 1
            if next_req < nb and (not barrier or ep_list[next_req] == ep_list[b]):
                nr = next_req
                next_req += 1
                request(nr, now, b, -1)
        run_task(CONS, b, c_nom[b], c_u[b], now)

    def consumer_wait(now: float) -> None:
        nonlocal cons_waiting, next_req, seq
        k = cons_k
        b = k  # in-order: the k-th batch
        if W == 0:
            wstart[b] = now
            start[b] = now
            req[b] = now
            run_task(CONS, b, l_nom[b], l_u[b], now)
            cons_waiting = -3  # loading inline
            return
        if (k == 0 or (barrier and ep_first_l[k])) and next_req == k:
            stop = nb
            if barrier:
                e = ep_list[k]
                stop = k
                while stop < nb and ep_list[stop] == e:
                    stop += 1
            while next_req < stop and next_req < k + P:
                nr = next_req
                next_req += 1
                request(nr, now, -1, k)
        if in_order:
            wstart[b] = now
            if avail[b] == avail[b] and avail[b] <= now:  # not NaN and already there
                seq += 1
                push(heap, (now + h, seq, _HANDOFF, b))
                cons_waiting = -2
            else:
                cons_waiting = b
        else:
            if avail_pool:
                _, bb = heapq.heappop(avail_pool)
                wstart[bb] = now
                seq += 1
                push(heap, (now + h, seq, _HANDOFF, bb))
                cons_waiting = -2
            else:
                cons_waiting = -1
                pending_wait[0] = now

    pending_wait = [0.0]
    now = plan.start_up_s
    seq += 1
    push(heap, (now, seq, _RESUME, 0))
    finished_at = now
    inf = math.inf
    while True:
        t_fixed = heap[0][0] if heap else inf
        if run_fin:
            e_min = min(run_fin, key=run_fin.__getitem__)
            t_cpu = run_fin[e_min]
        else:
            t_cpu = inf
        if t_cpu == inf and t_fixed == inf:
            break
        if t_cpu <= t_fixed:
            now = t_cpu
            b = run_b[e_min]
            stop_task(e_min, now)
            if e_min == CONS:
                if cons_waiting == -3:  # inline load finished: take it, then its consumer work
                    end[b] = now
                    avail[b] = now
                    ready_by_batch[b] = True
                    cons_waiting = -2
                    consumer_take(b, now)
                else:
                    done[b] = now
                    cons_k += 1
                    if cons_k < nb:
                        seq += 1
                        push(heap, (now, seq, _RESUME, cons_k))
                    else:
                        finished_at = now
            else:
                w = e_min
                end[b] = now
                seq += 1
                push(heap, (now + lat, seq, _AVAILABLE, b))
                seq += 1
                push(heap, (now + gap, seq, _WORKER_READY, w))
            continue
        now, _, kind, arg = pop(heap)
        if kind == _DISPATCHABLE:
            b = arg
            if policy == "round-robin":
                w = assigned[b]
                if w in idle_set and not wq[w]:
                    start_on(w, b, now, False)
                else:
                    wq[w].append(b)
            else:
                if idle:
                    w = idle.popleft()
                    start_on(w, b, now, False)
                else:
                    queue.append(b)
        elif kind == _WORKER_READY:
            w = arg
            if policy == "round-robin":
                if wq[w]:
                    start_on(w, wq[w].popleft(), now, True)
                else:
                    idle_set.add(w)
            else:
                if queue:
                    start_on(w, queue.popleft(), now, True)
                else:
                    idle.append(w)
                    idle_set.add(w)
        elif kind == _AVAILABLE:
            b = arg
            avail[b] = now
            if in_order:
                if cons_waiting == b:
                    t = max(now, wstart[b] + h)
                    ready_by_batch[b] = t == now
                    cons_waiting = -2
                    seq += 1
                    push(heap, (t, seq, _HANDOFF, b))
            else:
                if cons_waiting == -1:
                    wstart[b] = pending_wait[0]
                    t = max(now, wstart[b] + h)
                    ready_by_batch[b] = t == now
                    cons_waiting = -2
                    seq += 1
                    push(heap, (t, seq, _HANDOFF, b))
                else:
                    heapq.heappush(avail_pool, (now, b))
        elif kind == _HANDOFF:
            consumer_take(arg, now)
        elif kind == _RESUME:
            consumer_wait(now)
    wall = finished_at + plan.tail_s
    a = {k: np.array(v, float) for k, v in
         dict(request_s=req, start_s=start, end_s=end, available_s=avail, wait_start_s=wstart,
              ready_s=ready, done_s=done).items()}
    stall = float(np.nansum(a["ready_s"] - a["wait_start_s"]))
    cp = critical_path(plan, loader, consumer, a, taken_order, worker, start_by_worker, prev_on_worker, req_after,
                        req_epoch_k, ready_by_batch, W, wall, h)
    return dict(wall_s=wall, stall_s=stall, batch_id=plan.batch_id[np.array(taken_order, np.int64)],
                worker=np.array(worker, np.int64), critical_path=cp, **a)


def critical_path(
    plan: Any, loader: Any, consumer: Any, a: dict[str, np.ndarray], taken_order: list[int],
    worker: list[int], start_by_worker: list[bool], prev_on_worker: list[int], req_after: list[int],
    req_epoch_k: list[int], ready_by_batch: list[bool], W: int, wall: float, h: float,
) -> dict[str, float]:
    """Walk the replayed run back from its end along the events that set each time."""
    acc: dict[str, float] = {}

    def add(name: str, s: float) -> None:
        if s > 0:
            acc[name] = acc.get(name, 0.0) + s

    req, start, end = a["request_s"], a["start_s"], a["end_s"]
    ready, wstart, done = a["ready_s"], a["wait_start_s"], a["done_s"]
    pos_of = {b: k for k, b in enumerate(taken_order)}
    loader_path: list[tuple[int, float]] = []
    cons_path: list[tuple[int, float]] = []
    if not taken_order:
        add(START_UP, wall)
        return acc
    add(CONSUMER_OVERHEAD, plan.tail_s)
    state, x = "consumer", len(taken_order) - 1
    for _ in range(8 * len(taken_order) + 8):
        if state == "consumer":  # consumer work on the x-th taken batch
            b = taken_order[x]
            cons_path.append((b, done[b] - ready[b]))
            state, x = "take", b
        elif state == "take":  # the consumer took batch x: set by the batch or by the consumer
            b = x
            if W == 0 or ready_by_batch[b]:
                if W > 0:
                    add(HANDOFF, ready[b] - end[b])
                state = "task"
            else:
                add(CONSUMER_OVERHEAD, ready[b] - wstart[b])
                state, x = "wait", pos_of[b]
        elif state == "wait":  # the consumer began waiting for its x-th batch
            if x == 0:
                add(START_UP, wstart[taken_order[0]])
                break
            state, x = "consumer", x - 1
        else:  # loader task of batch x
            b = x
            loader_path.append((b, end[b] - start[b]))
            if W == 0:
                state, x = "wait", pos_of[b]
            elif start_by_worker[b] and prev_on_worker[b] >= 0:
                add(WORKER_OVERHEAD, start[b] - end[prev_on_worker[b]])
                x = prev_on_worker[b]
            else:
                add(DISPATCH, start[b] - req[b])
                if req_after[b] >= 0:
                    state, x = "take", req_after[b]
                else:
                    state, x = "wait", req_epoch_k[b]
    _spread(acc, loader, loader_path)
    _spread(acc, consumer, cons_path)
    return acc


def _spread(acc: dict[str, float], work: Any, path: list[tuple[int, float]]) -> None:
    """Split the replayed durations of tasks on the path over their stages (CPU parts slowed)."""
    if not path:
        return
    idx = np.array([p[0] for p in path], np.int64)
    elapsed = np.array([p[1] for p in path], float)
    io = work.io_s[idx]
    cpu = work.cpu_s[idx]
    io_t = io.sum(1)
    cpu_t = cpu.sum(1)
    with np.errstate(invalid="ignore", divide="ignore"):
        dil = np.where(cpu_t > 0, np.maximum(0.0, elapsed - io_t) / cpu_t, 0.0)
    part = io + cpu * dil[:, None]
    tot = part.sum(1)
    with np.errstate(invalid="ignore", divide="ignore"):
        part = np.where(tot[:, None] > 0, part * (elapsed / tot)[:, None], 0.0)
    sums = part.sum(0)
    for name, s in zip(work.names, sums, strict=True):
        if s > 0:
            acc[name] = acc.get(name, 0.0) + float(s)
