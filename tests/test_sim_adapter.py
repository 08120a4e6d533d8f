"""The adapter delivery model: latency-timer grid, full-buffer packets, host delay, marked bytes.

The model itself is the one in /work/shared/TIMING.md, after FTDI AN232B-04 ("Small Amounts of
Data": a packet when 62 data bytes are buffered or when the latency timer expires; the timer
restarts after each packet) and REFERENCES.md section 5.
Outside check values carry their source inline (source: the MAP/MSL specifications,
TIMING.md or termios(3), as cited beside each).
"""

import dataclasses

import numpy as np
import pytest
from buswitness.capture.fileformat import FLAG_LINE_ERROR
from buswitness.simulate import load_scenario, simulate
from buswitness.simulate.adapter import AdapterModel, packet_times
from buswitness.simulate.scenario import Adapter

MS = 1_000_000


def test_bytes_trickling_in_leave_on_the_timer_grid():
    arrival = np.array([1, 2, 3, 17, 18, 40]) * MS + 500_000
    ends, times, _ = packet_times(arrival, 16 * MS, 0)
    assert ends.tolist() == [3, 5, 6]            # bytes up to 16 ms, up to 32 ms, up to 48 ms
    assert times.tolist() == [16 * MS, 32 * MS, 48 * MS]


def test_sixty_two_buffered_bytes_leave_at_once_and_rephase_the_timer():
    # 115200 8N1: one byte every 86.8 us, far more than 62 bytes within 16 ms  # AN232B-04
    arrival = (np.arange(200) * 86_806 + 86_806).astype(np.int64)
    ends, times, phases = packet_times(arrival, 16 * MS, 0)
    assert ends.tolist() == [62, 124, 186, 200]
    assert times[:3].tolist() == arrival[[61, 123, 185]].tolist()
    assert times[3] == arrival[185] + 16 * MS    # the rest waits for the timer restarted at the last packet
    assert phases[2] == arrival[185]


def test_a_byte_exactly_on_a_tick_goes_with_that_tick():
    _ends, times, _ = packet_times(np.array([16 * MS]), 16 * MS, 0)
    assert times.tolist() == [16 * MS]


@pytest.mark.parametrize("latency_ms", [1, 16])
def test_simulated_record_times_follow_the_configured_timer(latency_ms):
    sc = load_scenario("clean")
    sc = dataclasses.replace(sc, adapter=Adapter(latency_ms=latency_ms, host_delay_ms=0.0, host_delay_tail_rate=0.0))
    res = simulate(sc, duration_s=20, seed=4)
    t = np.concatenate([b.t_ns for b in res.batches()])
    n = np.concatenate([b.length for b in res.batches()])
    assert (n <= 62).all()
    steps = np.diff(np.unique(t))
    # 19200 8E1 carries 28 bytes in 16 ms, never a full buffer: every packet falls on the grid
    assert (steps % (latency_ms * MS) == 0).all()
    assert res.header.ports[0].latency_ms == latency_ms
    assert res.header.ports[0].latency_source == "simulated"


def test_host_delay_is_small_with_an_occasional_long_tail():
    cfg = Adapter(latency_ms=16, host_delay_ms=0.2, host_delay_tail_rate=0.01, host_delay_tail_ms=4.0)
    d = AdapterModel(cfg, np.random.default_rng(1), 0)._host_delay(20000) / 1e6
    assert 0.15 < np.median(d) < 0.25
    assert 0.005 < (d > 1.5).mean() < 0.015
    assert d.max() < 0.2 * 20 + 6.0


def test_a_marked_byte_is_a_record_of_its_own_with_its_chunk_timestamp():
    model = AdapterModel(Adapter(latency_ms=16, host_delay_ms=0.0, host_delay_tail_rate=0.0),
                         np.random.default_rng(1), 0)
    arrival = np.array([1, 2, 3, 4]) * MS
    batch = model.feed(arrival, np.array([1, 2, 3, 4], np.uint8), np.array([0, FLAG_LINE_ERROR, 0, 0], np.uint8),
                       None)
    assert batch.length.tolist() == [1, 1, 2]
    assert batch.flags.tolist() == [0, FLAG_LINE_ERROR, 0]
    assert len(set(batch.t_ns.tolist())) == 1
    assert batch.payload.tobytes() == b"\x01\x02\x03\x04"


def test_bytes_of_a_packet_still_open_at_a_slice_cut_wait_for_the_next_slice():
    model = AdapterModel(Adapter(latency_ms=16, host_delay_ms=0.0, host_delay_tail_rate=0.0),
                         np.random.default_rng(1), 0)
    first = model.feed(np.array([1, 2]) * MS, np.array([1, 2], np.uint8), np.zeros(2, np.uint8), 10 * MS)
    second = model.feed(np.array([12]) * MS, np.array([3], np.uint8), np.zeros(1, np.uint8), None)
    assert len(first) == 0
    assert second.length.tolist() == [3]
    assert second.t_ns.tolist() == [16 * MS]


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_records_never_precede_their_last_byte_and_wait_at_most_one_timer_period(seed):
    rng = np.random.default_rng(seed)
    # bursts of back-to-back bytes at 115200 8N1 with idle gaps between them, cut into three slices
    gaps = rng.choice([86_806, 86_806, 86_806, 30 * MS], size=3000)
    arrival = np.cumsum(gaps).astype(np.int64)
    cfg = Adapter(latency_ms=16, host_delay_ms=0.2, host_delay_tail_rate=0.01, host_delay_tail_ms=4.0)
    model = AdapterModel(cfg, np.random.default_rng(seed), 0)
    cuts = [int(arrival[1000]) + 1, int(arrival[2000]) + 1, None]
    batches, lo = [], 0
    for cut in cuts:
        hi = len(arrival) if cut is None else int(np.searchsorted(arrival, cut))
        batches.append(model.feed(arrival[lo:hi], np.zeros(hi - lo, np.uint8), np.zeros(hi - lo, np.uint8), cut))
        lo = hi
    t = np.concatenate([b.t_ns for b in batches])
    n = np.concatenate([b.length for b in batches])
    last = arrival[np.cumsum(n) - 1]
    assert n.sum() == len(arrival)
    assert (n <= 62).all()
    assert (t >= last).all()
    assert (t - last <= 16 * MS + 0.2 * MS * 20 + 6 * MS).all()
    assert (np.diff(t) >= 0).all()
