"""Text columns kept as small integer codes into a list of names, turned into strings only at the end.

The analysis of a long run handles millions of labels (stage names, lanes,
kinds) that take a handful of values. Working on codes and building the
text column once, in C, keeps it fast and small: on pandas with
Arrow-backed strings a column is taken from the names by pyarrow instead
of being built from Python string objects (about ten times faster).
"""

from __future__ import annotations

from typing import Any, Iterable

import numpy as np
import pandas as pd

__all__ = ["Names", "codes_of", "text_column"]


class Names:
    """A growing list of distinct names, each with a code (its position).

    Examples
    --------
    >>> n = Names(["read", "decode"])
    >>> n.code("step"), n.code("read"), n.names
    (2, 0, ['read', 'decode', 'step'])
    """

    def __init__(self, names: Iterable[str] = ()) -> None:
        self.names: list[str] = []
        self._index: dict[str, int] = {}
        for name in names:
            self.code(name)

    def code(self, name: str) -> int:
        """The code of ``name``, adding it when new."""
        got = self._index.get(name)
        if got is None:
            got = self._index[name] = len(self.names)
            self.names.append(name)
        return got

    def recode(self, codes: np.ndarray, names: list[str]) -> np.ndarray:
        """Codes into ``names`` (``-1`` for a missing value, read as ``'nan'``) as codes into this list."""
        table = np.array([self.code(n) for n in names] + [self.code("nan")], np.int64)
        return table[np.where(codes < 0, len(names), codes)]


def codes_of(column: pd.Series) -> tuple[np.ndarray, list[str]]:
    """A column as (codes, names), the names as ``str(value)`` (categorical columns without a copy of the text)."""
    cat = column if isinstance(column.dtype, pd.CategoricalDtype) else column.astype("category")
    return cat.cat.codes.to_numpy(np.int64), [str(c) for c in cat.cat.categories]


def _string_dtype() -> Any:
    """The dtype pandas gives a column of Python strings (object on pandas 2, Arrow-backed str on pandas 3)."""
    return pd.Series(np.array(["x"], object)).dtype


def text_column(codes: np.ndarray, names: list[str]) -> Any:
    """The strings ``names[codes]`` as a column of the dtype pandas gives text (equal to building it from str).

    Examples
    --------
    >>> list(pd.Series(text_column(np.array([1, 0, 1]), ["gap", "step"])))
    ['step', 'gap', 'step']
    """
    dtype = _string_dtype()
    if isinstance(dtype, pd.StringDtype) and dtype.storage == "pyarrow" and len(names):
        import pyarrow as pa  # present wherever pandas stores text in Arrow

        taken = pa.array(names, pa.large_string()).take(pa.array(np.asarray(codes, np.int64)))
        return pd.array(taken, dtype=dtype)
    return np.asarray(names + [""], object)[codes] if len(names) else np.full(len(codes), "", object)
