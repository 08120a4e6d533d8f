"""The scenarios of issue 12 put their pattern on the wire, as the truth and the capture show.

Dead station polled with echo writes, a slow station answering in order past the timeout
while the master retries, a damaged answer then a retry, a line with no fail-safe bias, a
two-stop-bit bus under an 8N1 header, a header that does not state the adapter latency.
These pin the simulator only; the decoder is checked against them elsewhere.

Outside check values carry their source inline (MAP V1.1b3: Modbus application protocol;
MSL V1.02: Modbus over serial line), or are marked common practice.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from buswitness.capture.fileformat import FLAG_LINE_ERROR, CaptureReader
from buswitness.errors import InputFileError
from buswitness.simulate import load_scenario, simulate
from buswitness.simulate.scenario import parse_scenario

DURATION_S = 120


def _run(name: str, duration_s: float = DURATION_S, seed: int = 1):
    res = simulate(load_scenario(name), duration_s=duration_s, seed=seed)
    batches = list(res.batches())
    return res, res.truth, batches


def _payload(batches) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every delivered byte: its value, its record's flags and its record's time."""
    values, flags, times = [], [], []
    for b in batches:
        values.append(b.payload)
        flags.append(np.repeat(b.flags, b.length))
        times.append(np.repeat(b.t_ns, b.length))
    return np.concatenate(values), np.concatenate(flags), np.concatenate(times)


# -- fault-dead-echo ---------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def dead_echo():
    return _run("fault-dead-echo")


def test_dead_station_sends_nothing_and_every_request_to_it_times_out(dead_echo):
    _res, truth, _b = dead_echo
    f, tx = truth.frames, truth.transactions
    assert not (f.talker.astype(str) == "5").any()
    assert not ((f.kind.astype(str) == "response") & (f.station == 5)).any()
    mine = tx[tx.station == 5]
    assert len(mine) > 0 and (mine.outcome.astype(str) == "timeout").all()
    assert set(mine.function) == {3, 5, 6}
    assert truth.stations[5]["answered"] == 0


def test_master_repeats_each_request_to_the_dead_station_identically_after_its_timeout(dead_echo):
    res, truth, _b = dead_echo
    tx = truth.transactions.set_index("transaction")
    sc = res.scenario
    mine = tx[tx.station == 5]
    assert set(mine.attempt) == {0, 1, 2}                     # retries: 2 in the scenario
    retries = mine[mine.attempt > 0]
    assert len(retries) >= 2 * (mine.attempt == 0).sum() - 2          # the run may end inside a retry chain
    for x, row in retries.iterrows():
        first = tx.loc[row.retry_of]
        prev = tx.loc[x - 1]
        assert row.request_raw == first.request_raw == prev.request_raw
        assert prev.station == 5 and prev.attempt == row.attempt - 1
        gap_ns = row.t_request_start_ns - prev.t_request_end_ns
        assert gap_ns == int(sc.master.timeout_ms * 1e6) + int(sc.master.inter_poll_delay_ms * 1e6)
    assert truth.stations[5]["retries"] == len(retries)


def test_live_stations_answer_fc05_and_fc06_with_an_echo_of_the_request(dead_echo):
    _res, truth, _b = dead_echo
    tx = truth.transactions
    writes = tx[tx.function.isin([5, 6]) & (tx.station != 5)]
    assert set(writes.function) == {5, 6} and (writes.outcome.astype(str) == "ok").all()
    # MAP V1.1b3 §6.5 and §6.6 (p19): the normal response to FC05/FC06 is an echo of the request
    assert (writes.response_raw == writes.request_raw).all()


# -- fault-late-retry --------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def late_retry():
    return _run("fault-late-retry", 300)


def _answers_by_talker(truth):
    f = truth.frames
    return {t: g.sort_values("t_first_bit_ns") for t, g in
            f[f.kind.astype(str) == "response"].groupby(f.talker.astype(str))}


@pytest.mark.parametrize("name", ["fault-late-retry", "fault-late", "pumpstation"])
def test_a_station_answers_in_the_order_it_received_and_never_overlaps_itself(name, late_retry):
    truth = late_retry[1] if name == "fault-late-retry" else simulate(load_scenario(name), duration_s=300).truth
    judged = 0
    for _talker, g in _answers_by_talker(truth).items():
        if g.transaction.duplicated().any():
            continue  # two stations share this address (pumpstation): their answers overlap by design
        assert (np.diff(g.transaction.to_numpy()) > 0).all()
        assert (g.t_first_bit_ns.to_numpy()[1:] >= g.t_last_bit_ns.to_numpy()[:-1]).all()
        judged += 1
    assert judged >= 3


def test_slow_station_answers_the_first_request_while_the_master_waits_on_its_retry(late_retry):
    res, truth, _b = late_retry
    timeout_ns = res.scenario.master.timeout_ms * 1e6
    tx = truth.transactions.set_index("transaction")
    f = truth.frames
    answer_of = {int(x): row for x, row in f[f.kind.astype(str) == "response"].set_index("transaction").iterrows()}
    taken = tx[(tx.master_answer >= 0) & (tx.master_answer < tx.index)]
    assert len(taken) >= 50
    for x, retry in taken.iterrows():
        first = tx.loc[retry.master_answer]
        assert retry.retry_of == retry.master_answer and retry.attempt == 1
        assert retry.request_raw == first.request_raw
        assert first.outcome == "late" and first.response_ms > res.scenario.master.timeout_ms
        # the first answer started after the retry was sent, within the retry's wait
        assert retry.t_request_end_ns < first.t_response_start_ns <= retry.t_request_end_ns + timeout_ns
        # and it is measured from the request it answers
        assert first.response_ms == pytest.approx((first.t_response_start_ns - first.t_request_end_ns) / 1e6)
        # the station answers the retry too, later: after its first answer has ended
        if x in answer_of:
            assert answer_of[x].t_first_bit_ns >= answer_of[int(retry.master_answer)].t_last_bit_ns
    assert truth.stations[9]["master_took_earlier"] == len(taken)
    assert truth.stations[9]["late"] > 0 and truth.stations[9]["retries"] > 0


def test_only_the_slow_station_is_ever_late(late_retry):
    _res, truth, _b = late_retry
    tx = truth.transactions
    assert set(tx[tx.outcome.astype(str) == "late"].station) == {9}
    assert (tx[tx.station != 9].outcome.astype(str) == "ok").all()


# -- fault-damaged-retry -----------------------------------------------------------------------------

def test_damaged_answer_is_followed_by_an_identical_retry_and_nothing_overlaps():
    res, truth, _b = _run("fault-damaged-retry", 300)
    tx = truth.transactions.set_index("transaction")
    f = truth.frames
    assert not f.collided.any()
    assert not tx.request_corrupted.any()                       # noise only on the station's answers
    assert set(tx.outcome.astype(str)) == {"ok", "corrupt"}
    damaged = tx[tx.outcome.astype(str) == "corrupt"]
    assert len(damaged) >= 10 and set(damaged.station) == {3}
    answers = f[f.kind.astype(str) == "response"].set_index("transaction")
    good_retries = 0
    for x, row in damaged.iterrows():
        assert answers.loc[x].noisy and not answers.loc[x].crc_ok or answers.loc[x].line_errors > 0
        if row.attempt == 0 and x + 1 in tx.index:
            retry = tx.loc[x + 1]
            assert retry.retry_of == x and retry.request_raw == row.request_raw
            assert retry.t_request_start_ns > answers.loc[x].t_last_bit_ns
            good_retries += retry.outcome == "ok"
    assert good_retries >= 0.8 * (damaged.attempt == 0).sum()


# -- fault-unbiased ----------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def unbiased():
    return _run("fault-unbiased")


def test_unbiased_line_leaves_one_marked_byte_after_every_frame(unbiased):
    res, truth, batches = unbiased
    f = truth.frames.sort_values("t_first_bit_ns")
    master = f.talker.astype(str) == "master"
    # common practice: a floating line reads 0x00 after the master, 0xFE after a station (issue 12)
    assert (f[master].idle_byte_after == 0x00).all()
    assert (f[~master].idle_byte_after == 0xFE).all()
    assert truth.bus["idle_line_bytes"] == {"master": int(master.sum()), "stations": int((~master).sum())}
    for a, s in truth.stations.items():
        assert s["idle_line_bytes"] == int(((f.talker.astype(str) == str(a))).sum())
    value, flags, t_rec = _payload(batches)
    marked = flags & FLAG_LINE_ERROR != 0
    # every marked byte is a record of its own
    for b in batches:
        assert (b.length[b.flags & FLAG_LINE_ERROR != 0] == 1).all()
    # the capture is each frame's bytes, then its one marked byte: 0x00 after the master, 0xFE after a station
    expected, expected_marks = [], []
    for raw, is_master in zip(f.raw, master):
        expected.append(bytes(raw) + (b"\x00" if is_master else b"\xfe"))
        expected_marks.extend([False] * len(raw) + [True])
    assert value.tobytes() == b"".join(expected)
    assert marked.tolist() == expected_marks
    # the marked byte reaches the host no earlier than one character after the frame's last stop bit
    char_ns = res.sniffer_serial.char_time_s * 1e9
    assert (t_rec[marked] >= f.t_last_bit_ns.to_numpy() + char_ns - 1).all()


def test_a_biased_line_leaves_nothing_between_frames():
    _res, truth, batches = _run("clean", 30)
    assert (truth.frames.idle_byte_after == -1).all()
    assert truth.bus["idle_line_bytes"] == {"master": 0, "stations": 0}
    assert not any((b.flags & FLAG_LINE_ERROR).any() for b in batches)


# -- fault-two-stop-bits -----------------------------------------------------------------------------

def test_two_stop_bit_characters_are_11_bits_apart_and_read_cleanly_at_8n1():
    res, truth, batches = _run("fault-two-stop-bits", 60)
    assert str(res.header.serial) == "19200 8N1"                 # what the sniffer's port was set to
    assert truth.meta["bus_serial"] == {"baud": 19200, "format": "8N2"}
    assert res.header.ports[0].latency_ms == 1.0
    f = truth.frames.sort_values("t_first_bit_ns")
    # MSL V1.02 §2.5.1 (p12): no parity needs 2 stop bits: 1 start + 8 data + 2 stop = 11 bits a character
    pitch_ns = 11 / 19200 * 1e9
    n = f.raw.map(len).to_numpy()
    assert np.abs((f.t_last_bit_ns - f.t_first_bit_ns).to_numpy() - n * pitch_ns).max() <= 1
    # an 8N1 receiver takes the second stop bit for idle line: every byte arrives clean
    assert (f.received == f.raw).all() and f.crc_ok.all() and (f.line_errors == 0).all()
    value, flags, t_rec = _payload(batches)
    assert value.tobytes() == b"".join(bytes(r) for r in f.raw) and not flags.any()
    # the byte times the 1 ms adapter delivers show the 11-bit pitch, not the 10 bits 8N1 would give
    ends = np.cumsum(n)
    long = n >= 20
    spans = (t_rec[ends[long] - 1] - t_rec[ends[long] - n[long]]) / (n[long] - 1)
    assert float(np.median(spans)) == pytest.approx(pitch_ns, rel=0.05)


# -- fault-latency-unstated --------------------------------------------------------------------------

def test_header_can_leave_the_adapter_latency_out(tmp_path):
    res = simulate(load_scenario("fault-latency-unstated"), duration_s=20, seed=1)
    path = tmp_path / "x.bwcap"
    res.write(path)
    port = CaptureReader(path).header.ports[0]
    assert port.latency_ms is None and port.latency_source == "unknown"
    assert res.truth.meta["adapter"]["latency_ms"] == 1.0 and res.truth.meta["adapter"]["latency_stated"] is False
    assert "latency_not_stated" in set(res.truth.events.kind)
    # the adapter still works on its 1 ms grid: no two records of one packet stream are closer than that
    t = np.concatenate([b.t_ns for b in res.batches()])
    assert np.median(np.diff(np.unique(t))) >= 0.9e6


def test_the_same_bus_with_the_latency_stated_says_so():
    sc = load_scenario("fault-latency-unstated")
    data = {"name": "stated", "adapter": {"latency_ms": 1},
            "master": {"polls": [{"station": s.address, "function": 3} for s in sc.stations]},
            "stations": [{"address": s.address, "name": s.name} for s in sc.stations]}
    port = simulate(parse_scenario(json.dumps(data), "stated.json"), duration_s=2).header.ports[0]
    assert port.latency_ms == 1.0 and port.latency_source == "simulated"


# -- scenario fields ---------------------------------------------------------------------------------

@pytest.mark.parametrize("bus, station, adapter, message", [
    ({"fail_safe_bias": "no"}, {}, {}, r"bus\.fail_safe_bias.*true or false"),
    ({"release_byte_station": 300}, {}, {}, r"bus\.release_byte_station.*outside 0 to 255"),
    ({}, {"noise_on": "requests"}, {}, r"stations\[0\]\.noise_on.*'both'"),
    ({}, {}, {"state_latency": 0}, r"adapter\.state_latency.*true or false"),
])
def test_new_scenario_fields_are_checked(bus, station, adapter, message):
    data = {"name": "x", "bus": bus, "adapter": adapter, "master": {"polls": [{"station": 2, "function": 3}]},
            "stations": [{"address": 2, "name": "Sump pump", **station}]}
    with pytest.raises(InputFileError, match=message):
        parse_scenario(json.dumps(data), "x.json")
