"""One rule for numbers in every JSON pipeprobe writes.

A finite number is written as itself (numpy scalars as plain ``int`` or
``float``); NaN (not known) as ``null``; plus or minus infinity (no bound:
a stage made free that was the whole run) as the strings ``"inf"`` and
``"-inf"``, which ``float()`` reads back. Dict keys become strings, tuples
lists. The report, ``compare``, ``whatif`` and the ceilings all write
through :func:`json_ready` so the spelling cannot drift between them.
"""

from __future__ import annotations

import json
import math
import numbers
from typing import Any

__all__ = ["json_number", "json_ready", "dumps", "INF", "NEG_INF"]

#: How infinity is spelled in pipeprobe's JSON (``float("inf")`` reads it back).
INF = "inf"
NEG_INF = "-inf"


def json_number(x: Any) -> Any:
    """One number (or ``None``) as pipeprobe writes it in JSON.

    Examples
    --------
    >>> [json_number(v) for v in (2, 0.5, float("nan"), float("inf"), None, True)]
    [2, 0.5, None, 'inf', None, True]
    """
    if x is None or isinstance(x, bool):
        return x
    if isinstance(x, numbers.Integral):
        return int(x)
    f = float(x)
    if math.isnan(f):
        return None
    if math.isinf(f):
        return INF if f > 0 else NEG_INF
    return f


def json_ready(x: Any) -> Any:
    """``x`` with every number spelled by :func:`json_number`, ready for ``json.dumps(allow_nan=False)``.

    Examples
    --------
    >>> json_ready({"a": (1.5, float("inf")), 2: {"b": float("nan")}})
    {'a': [1.5, 'inf'], '2': {'b': None}}
    """
    if isinstance(x, dict):
        return {str(k): json_ready(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [json_ready(v) for v in x]
    if x is None or isinstance(x, (bool, numbers.Number)):
        if isinstance(x, numbers.Complex) and not isinstance(x, numbers.Real):
            return str(x)
        return json_number(x)
    return x


def dumps(x: Any) -> str:
    """``json.dumps`` of :func:`json_ready` ``(x)``; never writes NaN or Infinity tokens.

    Examples
    --------
    >>> dumps({"speedup": float("inf"), "share": float("nan")})
    '{"speedup": "inf", "share": null}'
    """
    return json.dumps(json_ready(x), allow_nan=False)
