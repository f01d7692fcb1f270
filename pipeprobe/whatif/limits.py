"""Bounds on what a scenario may ask, and the checks that apply them.

Every count a user gives the replay (workers, prefetch, cores; the
recorded ones too) and every speed factor is checked here before anything
uses it, with a one-line :class:`~pipeprobe.errors.ScenarioError` that
names the limit. The limits are far beyond any real loader; they exist so
that a typo (``--workers 10000000``) or a factor of ``5e-324`` is refused
in a millisecond instead of taking gigabytes or producing a meaningless
speed-up.
"""

from __future__ import annotations

import math
import numbers
from typing import Any

from ..errors import ScenarioError

__all__ = [
    "MAX_WORKERS", "MAX_PREFETCH", "MIN_CORES", "MAX_CORES", "MIN_FACTOR", "MAX_FACTOR", "MAX_PLAN_STAGES",
    "OTHER_STAGES", "check_count", "check_factor", "check_cores",
]

#: Loader workers at most. The replay keeps state per worker; loaders run a few dozen processes per
#: training process, so a thousand leaves room for any real one and refuses a typo at once.
MAX_WORKERS = 1024
#: Batches in flight at most (prefetch). A loader holds each of them in memory; a hundred thousand
#: batches in flight is beyond any host's memory for real batches.
MAX_PREFETCH = 100_000
#: Cores at least (a CPU quota of a hundredth of a core) and at most (finite; ``inf``: no contention).
MIN_CORES = 0.01
MAX_CORES = 100_000.0
#: Speed factors: at most 1000 times slower; above a million times faster, write ``inf`` (free). Past
#: these a stage's replayed time loses all its digits to rounding, so the prediction means nothing.
MIN_FACTOR = 1e-3
MAX_FACTOR = 1e6
#: Stage names per side of a plan at most; past it the ones with the least time share one column
#: (the plan holds batches x stages numbers per side, and every replay scales them all).
MAX_PLAN_STAGES = 64
#: The column those stages share.
OTHER_STAGES = "(other stages)"

def check_count(name: str, value: Any, minimum: int, limit: int) -> int | None:
    """``value`` as a whole number from ``minimum`` to ``limit`` (``None`` stays ``None``).

    Raises
    ------
    ScenarioError
        Not a whole number, or out of range; the message names the range.

    Examples
    --------
    >>> check_count("workers", "4", 0, MAX_WORKERS)
    4
    >>> check_count("workers", 10**7, 0, MAX_WORKERS)
    Traceback (most recent call last):
    ...
    pipeprobe.errors.ScenarioError: workers=10000000: give a whole number from 0 to 1024 (the most the replay takes)
    """
    if value is None:
        return None
    text = f"{name}={value!r}: give a whole number from {minimum} to {limit}"
    if isinstance(value, str):
        try:
            value = int(value.strip())
        except ValueError:
            raise ScenarioError(text) from None
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or int(value) < minimum:
        raise ScenarioError(text)
    if int(value) > limit:
        raise ScenarioError(f"{text} (the most the replay takes)")
    return int(value)


def check_factor(stage: str, value: Any, what: str) -> float:
    """A speed factor from :data:`MIN_FACTOR` to :data:`MAX_FACTOR`, or ``inf`` (also ``"inf"``, ``"free"``).

    Raises
    ------
    ScenarioError
        Not a number, not > 0, or out of range; the message says what to give.

    Examples
    --------
    >>> check_factor("decode", "2", "faster"), check_factor("decode", "free", "faster")
    (2.0, inf)
    """
    hint = "2 = twice as fast, 0.5 = twice as slow, inf = free"
    if isinstance(value, str):
        text = value.strip().lower()
        try:
            value = math.inf if text in ("inf", "free") else float(text)
        except ValueError:
            raise ScenarioError(f"{what} {stage}={value!r}: the factor must be a number > 0 ({hint})") from None
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or math.isnan(float(value)):
        raise ScenarioError(f"{what} {stage}={value!r}: the factor must be a number > 0 ({hint})")
    value = float(value)
    if value <= 0:
        raise ScenarioError(f"{what} {stage}={value:g}: the factor must be > 0 ({hint})")
    if value < MIN_FACTOR:
        raise ScenarioError(f"{what} {stage}={value:g}: the factor must be at least {MIN_FACTOR:g} "
                            f"(1000 times slower); {hint}")
    if MAX_FACTOR < value < math.inf:
        raise ScenarioError(f"{what} {stage}={value:g}: the factor must be at most {MAX_FACTOR:g}; "
                            "write inf to make the stage free")
    return value


def check_cores(value: Any) -> float | None:
    """Cores the work shares: a number from :data:`MIN_CORES` to :data:`MAX_CORES`, or ``inf``.

    Examples
    --------
    >>> check_cores("1.5"), check_cores("inf")
    (1.5, inf)
    """
    if value is None:
        return None
    try:
        number = float(value) if isinstance(value, (str, numbers.Real)) and not isinstance(value, bool) else None
    except ValueError:
        number = None
    if number is None or math.isnan(number) or not (MIN_CORES <= number <= MAX_CORES or number == math.inf):
        raise ScenarioError(f"cores={value!r}: give a number of cores from {MIN_CORES:g} to {MAX_CORES:g} "
                            "(e.g. 4, or 1.5 for a CPU quota) or inf")
    return number
