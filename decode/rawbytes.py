"""Frames' bytes kept as (start, length) into the buffer they were found in, made into ``bytes`` when read.

The bulk path finds thousands of frames per call; a ``bytes`` object for each one cost more than
the CRC checks that found them, and the analysis reads the bytes of a few dozen (the examples a
report lists). :class:`RawSlices` is the frames of one run, :class:`RawColumn` a table's column of
many runs (and of plain ``bytes`` lists from the sequential path), both read-only sequences of
``bytes``: ``raws[i]`` is the frame's bytes, ``len(raws[i])`` its length.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence

import numpy as np


class RawSlices(Sequence):
    """The bytes of frames ``buf[starts[i]:starts[i] + lens[i]]``, as a sequence of ``bytes``."""

    __slots__ = ("buf", "starts", "lens")

    def __init__(self, buf: bytes, starts: np.ndarray, lens: np.ndarray) -> None:
        self.buf = buf
        self.starts = starts
        self.lens = lens

    def __len__(self) -> int:
        return int(self.starts.shape[0])

    def __getitem__(self, i):  # type: ignore[override]
        if isinstance(i, slice):
            return RawSlices(self.buf, self.starts[i], self.lens[i])
        a = int(self.starts[i])
        return self.buf[a:a + int(self.lens[i])]

    def __iter__(self) -> Iterator[bytes]:
        buf = self.buf
        return (buf[a:a + n] for a, n in zip(self.starts.tolist(), self.lens.tolist()))

    def take(self, index: np.ndarray) -> list[bytes]:
        """The bytes of the frames at ``index``, in that order."""
        buf = self.buf
        return [buf[a:a + n] for a, n in zip(self.starts[index].tolist(), self.lens[index].tolist())]

    def joined(self) -> tuple[np.ndarray, bytes]:
        """Every frame's length, and their bytes end to end: gathered in one step, no ``bytes`` per frame."""
        lens = np.asarray(self.lens, np.int64)
        total = int(lens.sum())
        if not total:
            return lens, b""
        shift = np.asarray(self.starts, np.int64) - (np.cumsum(lens) - lens)  # buffer offset minus joined offset
        where = np.repeat(shift, lens) + np.arange(total, dtype=np.int64)
        return lens, np.frombuffer(self.buf, np.uint8)[where].tobytes()

    def __repr__(self) -> str:
        return f"RawSlices({len(self)} frames)"


class PickedRaws(Sequence):
    """The entries ``raws[index[i]]``: a bytes column's rows picked or reordered (a table sorted by
    time) without making a ``bytes`` of each; they are made only for the rows read."""

    __slots__ = ("raws", "index")

    def __init__(self, raws: Sequence, index: np.ndarray) -> None:
        self.raws = raws
        self.index = np.asarray(index, dtype=np.int64)

    def __len__(self) -> int:
        return int(self.index.shape[0])

    def __getitem__(self, i):  # type: ignore[override]
        if isinstance(i, slice):
            return PickedRaws(self.raws, self.index[i])
        return self.raws[int(self.index[i])]

    def __iter__(self) -> Iterator[bytes]:
        return iter(take(self.raws, self.index))

    def take(self, index: np.ndarray) -> list[bytes]:
        """The picked entries at ``index``, in that order."""
        return take(self.raws, self.index[np.asarray(index, dtype=np.int64)])

    def joined(self) -> tuple[np.ndarray, bytes]:
        """Every picked entry's length, and their bytes end to end (as :meth:`RawSlices.joined`)."""
        return joined(take(self.raws, self.index))

    def __repr__(self) -> str:
        return f"PickedRaws({len(self)} of {len(self.raws)})"


def joined(raws: Sequence) -> tuple[np.ndarray, bytes]:
    """The entries' lengths and their bytes end to end, whatever holds them: the same for the same
    bytes (what a digest of a bytes column reads)."""
    if isinstance(raws, (RawSlices, RawColumn, PickedRaws)):
        return raws.joined()
    values = [bytes(v) for v in raws]
    return np.fromiter(map(len, values), np.int64, len(values)), b"".join(values)


def take(raws: Sequence, index: np.ndarray) -> list[bytes]:
    """The entries of ``raws`` (a list, an object array, :class:`RawSlices` or :class:`RawColumn`) at ``index``."""
    if isinstance(raws, (RawSlices, RawColumn, PickedRaws)):
        return raws.take(index)
    if isinstance(raws, np.ndarray):
        return raws[index].tolist()
    return [raws[i] for i in np.asarray(index).tolist()]


class RawColumn(Sequence):
    """A table's bytes column: parts (runs' :class:`RawSlices`, lists of ``bytes``) joined end to end."""

    __slots__ = ("parts", "bounds")

    def __init__(self, parts: list) -> None:
        self.parts = [p for p in parts if len(p)]
        self.bounds = np.cumsum([0] + [len(p) for p in self.parts], dtype=np.int64)

    def __len__(self) -> int:
        return int(self.bounds[-1])

    def __getitem__(self, i):  # type: ignore[override]
        if isinstance(i, slice):
            return RawColumn([self.take(np.arange(len(self))[i])])
        i = int(i)
        if i < 0:
            i += len(self)
        if not 0 <= i < len(self):
            raise IndexError(i)
        k = int(np.searchsorted(self.bounds, i, "right")) - 1
        return self.parts[k][i - int(self.bounds[k])]

    def __iter__(self) -> Iterator[bytes]:
        for p in self.parts:
            yield from p

    def take(self, index: np.ndarray) -> list[bytes]:
        index = np.asarray(index, dtype=np.int64)
        if len(self.parts) == 1:
            return take(self.parts[0], index)
        part = np.searchsorted(self.bounds, index, "right") - 1
        got: list = [None] * index.shape[0]
        for k in np.unique(part).tolist():
            where = np.flatnonzero(part == k)
            for w, v in zip(where.tolist(), take(self.parts[k], index[where] - self.bounds[k])):
                got[w] = v
        return got

    def joined(self) -> tuple[np.ndarray, bytes]:
        """Every entry's length, and their bytes end to end (as :meth:`RawSlices.joined`)."""
        got = [joined(p) for p in self.parts]
        if not got:
            return np.zeros(0, np.int64), b""
        return np.concatenate([g[0] for g in got]), b"".join(g[1] for g in got)

    def __repr__(self) -> str:
        return f"RawColumn({len(self)} entries in {len(self.parts)} parts)"
