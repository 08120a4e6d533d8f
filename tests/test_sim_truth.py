"""The simulator's truth agrees with its own capture: bytes, CRC validity, timing, determinism.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

import numpy as np
import pytest
from buswitness.capture.fileformat import FLAG_BREAK, FLAG_LINE_ERROR, CaptureReader
from buswitness.decode.crc import crc_ok
from buswitness.simulate import START_MONOTONIC_NS, load_scenario, read_truth, simulate


def concat(batches):
    batches = list(batches)
    t = np.concatenate([b.t_ns for b in batches])
    n = np.concatenate([b.length for b in batches])
    flags = np.concatenate([b.flags for b in batches])
    payload = np.concatenate([b.payload for b in batches]).tobytes()
    return t, n, flags, payload


@pytest.fixture(scope="module")
def clean_run():
    res = simulate(load_scenario("clean"), duration_s=60, seed=3)
    return res, concat(res.batches())


@pytest.fixture(scope="module")
def demo_run():
    res = simulate(load_scenario("pumpstation"), duration_s=200, seed=2)
    return res, concat(res.batches())


def test_clean_capture_holds_exactly_the_frames_on_the_wire(clean_run):
    res, (_t, _n, flags, payload) = clean_run
    frames = res.truth.frames
    assert payload == b"".join(frames.raw)
    assert not flags.any()
    assert not frames.corrupted.any()


def test_crc_validity_of_truth_frames_is_what_their_bytes_say(demo_run):
    res, _ = demo_run
    f = res.truth.frames
    assert [crc_ok(r) for r in f.received] == f.crc_ok.tolist()
    clean = f[~f.corrupted]
    assert all(crc_ok(r) for r in clean.raw)
    assert (clean.received == clean.raw).all()
    assert (clean.line_errors == 0).all()
    noisy = f[f.noisy & ~f.collided]
    assert len(noisy) > 0
    # a bit error shows either as wrong bytes (bad CRC) or as a UART mark on the byte (parity/framing)
    assert ((~noisy.crc_ok) | (noisy.line_errors > 0)).all()


def test_every_colliding_pair_loses_at_least_one_frame(demo_run):
    res, _ = demo_run
    f = res.truth.frames.sort_values("t_first_bit_ns").reset_index(drop=True)
    col = f[f.collided]
    assert len(col) > 10
    intact = (col.received == col.raw) & (col.line_errors == 0)
    # an overlapped pair can leave one of the two readable, never both
    for i in col.index:
        if i + 1 in col.index and f.t_first_bit_ns[i + 1] < f.t_last_bit_ns[i]:
            assert not (intact[i] and intact[i + 1])


def test_chunk_timestamps_never_precede_their_last_byte_on_the_bus(clean_run):
    res, (t, n, _flags, _payload) = clean_run
    f = res.truth.frames
    c = res.scenario.serial.char_time_s * 1e9
    arrival = np.concatenate([s + (np.arange(len(r)) + 1) * c for s, r in zip(f.t_first_bit_ns, f.raw)])
    last_byte = np.cumsum(n) - 1
    assert (t >= arrival[last_byte] - 1).all()
    assert (n <= 62).all()
    assert (np.diff(t) >= 0).all()


def test_truth_times_are_on_the_capture_clock(demo_run):
    res, (t, _, _, _) = demo_run
    assert res.header.start_monotonic_ns == START_MONOTONIC_NS
    assert res.header.source == "simulate"
    assert res.header.host == "simulator"
    tx = res.truth.transactions
    assert tx.t_request_end_ns.min() > START_MONOTONIC_NS
    assert t[0] > tx.t_request_start_ns.min()


def test_transactions_use_the_shared_outcome_vocabulary(demo_run):
    res, _ = demo_run
    tx = res.truth.transactions
    assert set(tx.outcome.unique()) <= {"ok", "exception", "timeout", "late", "corrupt", "broadcast"}
    ok = tx[tx.outcome == "ok"]
    expect = (ok.t_response_start_ns - ok.t_request_end_ns) / 1e6
    assert np.allclose(ok.response_ms, expect)
    assert tx[tx.outcome == "timeout"].response_ms.isna().all() or (tx.outcome == "timeout").sum() == 0
    late = tx[tx.outcome == "late"]
    assert (late.response_ms > res.scenario.master.timeout_ms).all()
    assert (tx[tx.outcome == "broadcast"].station == 0).all()


def test_station_summary_counts_match_the_transaction_table(demo_run):
    res, _ = demo_run
    tx = res.truth.transactions
    for addr, s in res.truth.stations.items():
        mine = tx[tx.station == addr]
        assert s["requests"] == len(mine)
        assert s["answered"] == int(mine.outcome.isin(["ok", "exception"]).sum())
        assert s["timeouts"] == int((mine.outcome == "timeout").sum())
        assert s["late"] == int((mine.outcome == "late").sum())
        assert s["retries"] == int(mine.retry.sum())
        timed = mine[mine.outcome.isin(["ok", "exception", "late"]) & ~mine.request_corrupted]
        assert s["response_ms"]["count"] == len(timed)
    assert res.truth.stations[7]["late"] > 0          # the demo's late pump drive
    assert res.truth.stations[9]["collisions"] > 0    # the duplicate address pair


def test_same_seed_gives_the_same_capture_and_another_seed_does_not():
    sc = load_scenario("fault-duplicate")
    a = concat(simulate(sc, duration_s=20, seed=5).batches())
    b = concat(simulate(sc, duration_s=20, seed=5).batches())
    c = concat(simulate(sc, duration_s=20, seed=6).batches())
    assert all(np.array_equal(x, y) if isinstance(x, np.ndarray) else x == y for x, y in zip(a, b))
    assert a[3] != c[3]


def test_write_gives_a_capture_and_truth_that_read_back(tmp_path):
    res = simulate(load_scenario("fault-exceptions"), duration_s=20, seed=1)
    info = res.write(tmp_path / "x.bwcap", tmp_path / "x.truth.json")
    reader = CaptureReader(tmp_path / "x.bwcap")
    back = concat(reader.iter_batches())
    assert back[3] == concat(res.batches())[3]
    assert info["records"] == len(back[0])
    truth = read_truth(tmp_path / "x.truth.json")
    assert truth["scenario"] == "fault-exceptions"
    assert len(truth["frames"]) == len(res.truth.frames)
    assert truth["frames"].raw[0] == res.truth.frames.raw[0]
    assert truth["stations"]["2"]["exceptions"]["total"] > 0


def test_polarity_reversed_sniffer_sees_breaks_and_marked_garbage():
    res = simulate(load_scenario("clean"), duration_s=5, seed=1, sniffer_polarity_reversed=True)
    _t, _n, flags, payload = concat(res.batches())
    assert (flags & FLAG_BREAK).any()
    assert (flags & FLAG_LINE_ERROR).any()
    assert payload != b"".join(res.truth.frames.raw)
    assert not res.truth.frames.corrupted.any()   # the bus itself is healthy
