"""Closed-form laws behind the what-if answers: Amdahl's law, the bottleneck law, Little's law.

These are the classical formulas the replay (:mod:`pipeprobe.whatif.engine`) is
compared with. They take plain numbers, not runs.

References
----------
.. [1] G. M. Amdahl, "Validity of the single processor approach to achieving
   large scale computing capabilities", AFIPS Spring Joint Computer
   Conference, 1967.
.. [2] P. J. Denning and J. P. Buzen, "The operational analysis of queueing
   network models", ACM Computing Surveys 10(3), 1978.
.. [3] E. D. Lazowska, J. Zahorjan, G. S. Graham and K. C. Sevcik,
   *Quantitative System Performance*, Prentice-Hall, 1984, ch. 5.
.. [4] J. D. C. Little, "A proof for the queuing formula L = lambda W",
   Operations Research 9(3), 1961.
"""

from __future__ import annotations

import math
from typing import Iterable, Sequence

import numpy as np

__all__ = [
    "amdahl_speedup",
    "amdahl_ceiling",
    "bottleneck_throughput",
    "bottleneck_wall_s",
    "little_queue_length",
    "little_time_in_queue_s",
    "queue_statistics",
]


def _share(p: float) -> float:
    p = float(p)
    if not 0.0 <= p <= 1.0:
        raise ValueError(f"the share p must be between 0 and 1, got {p}")
    return p


def amdahl_speedup(p: float, factor: float) -> float:
    """Overall speed-up when a part taking share ``p`` of the time gets ``factor`` times faster.

    ``1 / ((1 - p) + p / factor)``; ``factor = inf`` gives the ceiling.

    Parameters
    ----------
    p : float
        Share of the time the improved part takes, 0..1.
    factor : float
        How many times faster that part gets (> 0; ``math.inf``: free).

    Returns
    -------
    float

    Raises
    ------
    ValueError
        ``p`` outside 0..1 or ``factor`` not > 0.

    Examples
    --------
    >>> round(amdahl_speedup(0.4, 10), 2)
    1.56

    References
    ----------
    .. [1] G. M. Amdahl, AFIPS 1967.
    """
    p = _share(p)
    factor = float(factor)
    if not factor > 0:
        raise ValueError(f"factor must be > 0, got {factor}")
    rest = (1.0 - p) + (0.0 if math.isinf(factor) else p / factor)
    return math.inf if rest == 0 else 1.0 / rest


def amdahl_ceiling(p: float) -> float:
    """The most any speed-up of a part with share ``p`` can give: ``1 / (1 - p)``.

    Examples
    --------
    >>> round(amdahl_ceiling(0.5), 2)
    2.0

    References
    ----------
    .. [1] G. M. Amdahl, AFIPS 1967.
    """
    return amdahl_speedup(p, math.inf)


def bottleneck_throughput(demands_s: Iterable[float], servers: Sequence[float] | None = None) -> float:
    """Upper bound on throughput (batches/s): ``min_i servers_i / D_i`` over the resources.

    ``D_i`` is the demand of one batch on resource ``i`` (seconds of
    service it needs there), ``servers_i`` how many identical servers that
    resource has (1 by default; a pool of 4 workers is one resource with
    4 servers). The bottleneck law: ``X <= 1 / D_max`` for single servers.

    Examples
    --------
    >>> bottleneck_throughput([0.02, 0.05])
    20.0
    >>> bottleneck_throughput([0.02, 0.05], servers=[1, 4])
    50.0

    References
    ----------
    .. [1] P. J. Denning and J. P. Buzen, ACM Computing Surveys, 1978.
    .. [2] E. D. Lazowska et al., *Quantitative System Performance*, 1984, ch. 5.
    """
    d = np.asarray(list(demands_s), float)
    m = np.ones_like(d) if servers is None else np.asarray(list(servers), float)
    if d.shape != m.shape or (d < 0).any() or (m <= 0).any():
        raise ValueError("give one demand >= 0 and one server count > 0 per resource")
    with np.errstate(divide="ignore"):
        rates = np.where(d > 0, m / np.where(d > 0, d, 1.0), np.inf)
    return float(rates.min()) if len(rates) else math.inf


def bottleneck_wall_s(batches: int, demands_s: Iterable[float], servers: Sequence[float] | None = None) -> float:
    """Lower bound on the wall time of ``batches`` batches: ``batches / bottleneck_throughput``.

    Examples
    --------
    >>> bottleneck_wall_s(100, [0.02, 0.05])
    5.0
    """
    x = bottleneck_throughput(demands_s, servers)
    return 0.0 if math.isinf(x) else batches / x


def little_queue_length(throughput: float, time_in_queue_s: float) -> float:
    """Little's law: mean number in the queue ``L = lambda * W``.

    Examples
    --------
    >>> little_queue_length(10.0, 0.3)
    3.0

    References
    ----------
    .. [1] J. D. C. Little, Operations Research, 1961.
    """
    return float(throughput) * float(time_in_queue_s)


def little_time_in_queue_s(queue_length: float, throughput: float) -> float:
    """Little's law solved for the mean time in the queue: ``W = L / lambda``.

    Examples
    --------
    >>> little_time_in_queue_s(3.0, 10.0)
    0.3
    """
    return float(queue_length) / float(throughput) if throughput > 0 else math.inf


def queue_statistics(enter_s: np.ndarray, leave_s: np.ndarray) -> tuple[float, float, float]:
    """Measure a queue from its entries and exits: ``(L, lambda, W)``.

    ``L`` is the time average of the number of items inside, integrated
    over the observation window ``[min(enter), max(leave)]``; ``lambda``
    the items per second over that window; ``W`` the mean time an item
    spent inside. Little's law says ``L == lambda * W``; this function
    measures the three independently so the law can be checked.

    Examples
    --------
    >>> L, lam, W = queue_statistics(np.array([0.0, 1.0]), np.array([2.0, 2.0]))
    >>> (round(L, 3), round(lam, 3), round(W, 3))
    (1.5, 1.0, 1.5)

    References
    ----------
    .. [1] J. D. C. Little, Operations Research, 1961.
    """
    enter = np.asarray(enter_s, float)
    leave = np.asarray(leave_s, float)
    if enter.shape != leave.shape or (leave < enter).any():
        raise ValueError("enter_s and leave_s must have one entry each per item, leave >= enter")
    if len(enter) == 0:
        return 0.0, 0.0, 0.0
    t0, t1 = float(enter.min()), float(leave.max())
    horizon = t1 - t0
    t = np.concatenate([enter, leave])
    d = np.concatenate([np.ones(len(enter)), -np.ones(len(leave))])
    order = np.lexsort((d, t))
    t, n = t[order], np.cumsum(d[order])
    area = float(np.sum(n[:-1] * np.diff(t)))
    if horizon <= 0:
        return 0.0, math.inf, 0.0
    return area / horizon, len(enter) / horizon, float(np.mean(leave - enter))
