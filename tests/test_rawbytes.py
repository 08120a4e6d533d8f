"""Frames' bytes kept as slices of the buffer they were found in (decode/rawbytes.py).

Source: every check compares with what the test itself made (the same bytes as plain ``bytes``
objects); no check value comes from outside the project.
"""

import numpy as np
from buswitness.decode.rawbytes import PickedRaws, RawColumn, RawSlices, joined


def _slices(rng: np.random.Generator, n: int) -> RawSlices:
    buf = rng.integers(0, 256, 4000, dtype=np.uint8).tobytes()
    lens = rng.integers(0, 40, n)
    starts = rng.integers(0, 4000 - 40, n)
    return RawSlices(buf, starts, lens)


def test_joined_bytes_are_every_entry_end_to_end_whatever_holds_them():
    rng = np.random.default_rng(5)
    parts = [_slices(rng, 50), [b"\x01\x03", b"", b"\xff" * 7], _slices(rng, 0), _slices(rng, 1)]
    column = RawColumn(parts)
    entries = list(column)
    lens, data = column.joined()
    assert lens.tolist() == [len(e) for e in entries]
    assert data == b"".join(entries)
    # the same bytes held another way give the same answer (a digest of a step reads it)
    for other in (entries, np.array(entries, dtype=object), RawColumn([entries])):
        got_lens, got_data = joined(other)
        assert got_lens.tolist() == lens.tolist() and got_data == data


def test_an_empty_column_joins_to_nothing():
    lens, data = RawColumn([]).joined()
    assert lens.size == 0 and data == b""
    lens, data = RawSlices(b"abc", np.zeros(2, np.int64), np.zeros(2, np.int64)).joined()
    assert lens.tolist() == [0, 0] and data == b""


def test_picked_rows_read_as_the_rows_of_the_column_they_were_picked_from():
    rng = np.random.default_rng(8)
    column = RawColumn([_slices(rng, 30), [b"\x05", b"\x06\x07"]])
    entries = list(column)
    order = rng.permutation(len(entries))
    picked = PickedRaws(column, order)
    assert len(picked) == len(entries)
    assert list(picked) == [entries[i] for i in order]
    assert picked[3] == entries[order[3]]
    assert picked.take(np.array([5, 0, 5])) == [entries[order[5]], entries[order[0]], entries[order[5]]]
    assert list(picked[2:6]) == [entries[i] for i in order[2:6]]
    lens, data = joined(picked)
    assert lens.tolist() == [len(entries[i]) for i in order] and data == b"".join(entries[i] for i in order)
