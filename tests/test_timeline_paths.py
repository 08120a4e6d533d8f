"""The timeline's one-record paths give exactly what its many-record paths give.

``Timeline.add`` and ``Timeline.end_bounds`` are plain-Python copies of ``add_many`` and
``end_bounds_many`` for one record or frame (the record-by-record path of a noisy line goes
through them for every record). Source: the checks compare the project's two paths with each
other; no check value comes from outside the project.
"""

from __future__ import annotations

import numpy as np
import pytest
from buswitness.decode.arrival import Timeline


def _reads(seed: int, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Record times and sizes: back-to-back polls, equal-instant parts, held-up and full-buffer reads."""
    rng = np.random.default_rng(seed)
    t = np.cumsum(rng.choice([0, 0, 200_000, 1_000_000, 3_000_000, 16_000_000, 40_000_000], size=count))
    n = rng.choice([1, 2, 5, 8, 13, 25, 62, 90, 200], size=count)
    return (t + 1_000_000_000).astype(np.int64), n.astype(np.int64)


def _timeline(untimed: bool = False) -> Timeline:
    return Timeline(char_ns=572_917.0, latency_ns=16e6, host_delay_ns=1e6, untimed=untimed)


@pytest.mark.parametrize("untimed", [False, True])
@pytest.mark.parametrize("seed", range(6))
def test_one_record_at_a_time_judges_reads_as_many_at_once(seed, untimed):
    t, n = _reads(seed, 400)
    one, many = _timeline(untimed), _timeline(untimed)
    got_pos, got_sil = [], []
    for a, b in zip(t.tolist(), n.tolist()):
        pos, sil = one.add(a, b)
        got_pos += pos.tolist()
        got_sil += sil.tolist()
        if len(one) > 150:
            one.drop_before(one.starts[50])
    want_pos, want_sil = many.add_many(t, n)
    assert got_pos == want_pos.tolist()
    assert got_sil == want_sil.tolist()
    held = len(one)
    assert one._ints[one._lo:one._n].tolist() == many._ints[many._n - held:many._n].tolist()
    assert one._floors[one._lo:one._n].tolist() == many._floors[many._n - held:many._n].tolist()
    assert [x.tolist() for x in one.finish()] == [x.tolist() for x in many.finish()]


@pytest.mark.parametrize("untimed", [False, True])
@pytest.mark.parametrize("seed", range(6))
def test_one_frame_is_bounded_as_in_a_run_of_frames(seed, untimed):
    t, n = _reads(seed, 300)
    tl = _timeline(untimed)
    tl.add_many(t, n)
    tl.finish()
    rng = np.random.default_rng(100 + seed)
    total = int(n.sum())
    first = np.sort(rng.integers(0, total - 300, size=200))
    last = first + rng.integers(2, 256, size=200)
    for a, b in zip(first.tolist(), last.tolist()):
        many = Timeline(**{k: getattr(tl, k) for k in ("char_ns", "latency_ns", "host_delay_ns", "untimed")})
        many._ints, many._floors, many._lo, many._n = tl._ints, tl._floors, tl._lo, tl._n
        lo, hi = many.end_bounds_many(np.array([a]), np.array([b]))
        before = tl.contradictions
        assert tl.end_bounds(a, b) == (int(lo[0]), int(hi[0]))
        assert tl.contradictions - before == many.contradictions
