"""Numbers kept on disk between the slices of the sliced analysis (:mod:`pipeprobe.sliced`), read back by key.

A :class:`Spill` is a set of columns (one raw file each, in a temporary
folder) that the analysis appends to once per slice, and reads back one
group of keys (stage codes) at a time: a key's rows come back in the order
they were appended, slice by slice from the last appended (the analysis
reads the slices from the last to the first, so that is the run's order).
Memory holds the index of what each slice wrote (keys, first rows, counts),
not the rows.

:func:`key_groups` packs keys into groups of about ``budget`` rows, keeping
keys that must be read together (a stage and the labels of its time) in
one group.
"""

from __future__ import annotations

from pathlib import Path
from typing import Iterator

import numpy as np

__all__ = ["Spill", "key_groups", "GROUP_ROWS"]

#: Rows read back at once, at most, unless one key (a stage) alone has more.
GROUP_ROWS = 4_000_000


class Spill:
    """Columns appended part by part to raw files in ``folder``, read back by key.

    Parameters
    ----------
    folder : Path
        An existing folder the caller deletes (the files are named ``{name}.{column}``).
    name : str
    dtypes : dict of str to dtype
        The columns and their types.

    Examples
    --------
    >>> import tempfile
    >>> s = Spill(Path(tempfile.mkdtemp()), "x", {"v": np.float64})
    >>> s.append(np.array([2, 1, 2]), {"v": np.array([0.5, 1.5, 2.5])})
    >>> s.append(np.array([1, 2]), {"v": np.array([3.5, 4.5])})
    >>> got = s.read([1, 2])
    >>> got["v"].tolist(), got["key"].tolist(), s.counts()
    ([3.5, 4.5, 1.5, 0.5, 2.5], [1, 2, 1, 2, 2], {1: 2, 2: 3})
    """

    def __init__(self, folder: Path, name: str, dtypes: dict[str, np.dtype]) -> None:
        self.folder = folder
        self._dtypes = {c: np.dtype(t) for c, t in dtypes.items()}
        self._paths = {c: folder / f"{name}.{c}" for c in dtypes}
        self._parts: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []  # per part: keys, first rows, counts
        self._rows = 0
        self._counts: dict[int, int] = {}
        for p in self._paths.values():
            p.touch()

    def append(self, key: np.ndarray, columns: dict[str, np.ndarray]) -> None:
        """Append rows: their keys and one array per column, all of one length (kept in order within a key)."""
        if not len(key):
            return
        order = np.argsort(key, kind="stable")
        keys, first, counts = np.unique(key[order], return_index=True, return_counts=True)
        for c, path in self._paths.items():
            try:
                with open(path, "ab") as f:
                    np.ascontiguousarray(columns[c][order], dtype=self._dtypes[c]).tofile(f)
            except OSError as exc:
                reason = (f"{exc.strerror or exc}: the analysis in slices keeps about 50 bytes a span on disk "
                          "while it runs; set TMPDIR to a folder with room")
                raise OSError(exc.errno, reason, str(path)) from exc
        self._parts.append((keys.astype(np.int64), first.astype(np.int64) + self._rows, counts.astype(np.int64)))
        self._rows += len(key)
        for k, n in zip(keys.tolist(), counts.tolist(), strict=True):
            self._counts[k] = self._counts.get(k, 0) + n

    def counts(self) -> dict[int, int]:
        """Rows per key, over all parts."""
        return dict(sorted(self._counts.items()))

    def read(self, keys: list[int] | np.ndarray, *, oldest_first: bool = False) -> dict[str, np.ndarray]:
        """The rows of ``keys``, and their key as column ``key``: per part from the last appended to the first
        (``oldest_first``: from the first), within a part by key, each key's rows in the order appended."""
        want = np.asarray(keys, np.int64)
        runs = [r for part in (self._parts if oldest_first else reversed(self._parts)) for r in _runs(part, want)]
        ranges = [(a, n) for a, n, _ in runs]
        out = {"key": np.concatenate([k for _, _, k in runs]) if runs else np.zeros(0, np.int64)}
        for c, path in self._paths.items():
            dt = self._dtypes[c]
            with open(path, "rb") as f:
                chunks = []
                for a, n in ranges:
                    f.seek(a * dt.itemsize)
                    chunks.append(np.fromfile(f, dtype=dt, count=n))
            out[c] = np.concatenate(chunks) if chunks else np.zeros(0, dt)
        return out


    def key_parts(self, key: int, columns: tuple[str, ...]) -> Iterator[dict[str, np.ndarray]]:
        """The rows of one key, part by part from the last appended to the first (only ``columns``; parts
        without the key skipped): one part's rows in memory at a time."""
        want = np.array([key], np.int64)
        for part in reversed(self._parts):
            for first, count, _ in _runs(part, want):
                yield {c: self._range(c, first, count) for c in columns}

    def parts(self) -> Iterator[dict[str, np.ndarray]]:
        """Each part's rows (by key within it, as appended), from the last part appended to the first."""
        for keys, first, counts in reversed(self._parts):
            a, n = int(first[0]), int(counts.sum())
            yield {"key": np.repeat(keys, counts), **{c: self._range(c, a, n) for c in self._paths}}

    def column(self, name: str) -> np.ndarray:
        """One column of every row, the parts from the last appended to the first."""
        got = [self._range(name, int(first[0]), int(counts.sum())) for _, first, counts in reversed(self._parts)]
        return np.concatenate(got) if got else np.zeros(0, self._dtypes[name])

    def remove(self) -> None:
        """Delete the files (the spill is empty and unusable afterwards)."""
        for path in self._paths.values():
            path.unlink(missing_ok=True)
        self._parts.clear()
        self._counts.clear()
        self._rows = 0

    @property
    def rows(self) -> int:
        """Rows appended, over all parts."""
        return self._rows

    def _range(self, name: str, first: int, count: int) -> np.ndarray:
        dt = self._dtypes[name]
        with open(self._paths[name], "rb") as f:
            f.seek(first * dt.itemsize)
            return np.fromfile(f, dtype=dt, count=count)


def _runs(part: tuple[np.ndarray, np.ndarray, np.ndarray], want: np.ndarray) -> list[tuple[int, int, np.ndarray]]:
    """(first row, count, key per row) of the stretches of one part that hold the wanted keys, neighbours merged."""
    keys, first, counts = part
    hit = np.flatnonzero(np.isin(keys, want))
    if not len(hit):
        return []
    breaks = np.flatnonzero(np.diff(hit) > 1) + 1
    starts, ends = hit[np.r_[0, breaks]], hit[np.r_[breaks - 1, len(hit) - 1]]
    return [(int(first[s]), int(first[e] + counts[e] - first[s]), np.repeat(keys[s:e + 1], counts[s:e + 1]))
            for s, e in zip(starts, ends, strict=True)]


def key_groups(rows: dict[int, int], together: list[tuple[int, int]], budget: int | None = None) -> list[list[int]]:
    """Keys of ``rows`` packed into groups of at most ``budget`` rows (default :data:`GROUP_ROWS`; a key with
    more alone), in key order;
    keys joined through the pairs of ``together`` (directly or through keys not in ``rows``) in one group.

    Examples
    --------
    Stages 0 and 2 share label 7, so they come back together:

    >>> key_groups({0: 3, 1: 3, 2: 3, 5: 1}, [(0, 7), (2, 7)], budget=6)
    [[0, 2], [1, 5]]
    """
    budget = GROUP_ROWS if budget is None else budget
    root = {k: k for pair in together for k in pair} | {k: k for k in rows}

    def find(k: int) -> int:
        while root[k] != k:
            root[k] = root[root[k]]
            k = root[k]
        return k

    for a, b in together:
        ra, rb = find(a), find(b)
        root[max(ra, rb)] = min(ra, rb)
    members: dict[int, list[int]] = {}
    for k in sorted(rows):
        members.setdefault(find(k), []).append(k)
    groups: list[list[int]] = []
    size = 0
    for keys in members.values():
        n = sum(rows[k] for k in keys)
        if not groups or size + n > budget:
            groups.append([])
            size = 0
        groups[-1].extend(keys)
        size += n
    return groups
