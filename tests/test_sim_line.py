"""The bit-level line and UART receiver: collisions, bit errors, wrong baud rate, swapped wires."""

import json
import math

import numpy as np
from buswitness.capture.fileformat import FLAG_BREAK, FLAG_LINE_ERROR
from buswitness.decode.crc import append_crc
from buswitness.decode.timing import SerialFormat
from buswitness.simulate import simulate
from buswitness.simulate.line import char_bits, invert, low_intervals, merge_intervals, receive
from buswitness.simulate.scenario import parse_scenario

F8E1 = SerialFormat.parse("8E1", 19200)


def line_of(frames, fmt=F8E1):
    """Low intervals of several (start_ns, bytes) frames driven at once (a driven 0 wins)."""
    c = fmt.char_time_s * 1e9
    starts, values = [], []
    for t0, data in frames:
        starts.extend(t0 + np.arange(len(data)) * c)
        values.extend(data)
    bits = char_bits(np.array(values, np.uint8), fmt)
    return low_intervals(np.array(starts), bits, 1e9 / fmt.baud)


def test_character_bits_are_start_data_lsb_first_parity_stop():
    # MSL V1.02 section 2.5.1 p12: start, 8 data LSB first, even parity, stop
    assert char_bits(np.array([0x01], np.uint8), F8E1).tolist() == [[0, 1, 0, 0, 0, 0, 0, 0, 0, 1, 1]]
    assert char_bits(np.array([0x03], np.uint8), F8E1).tolist() == [[0, 1, 1, 0, 0, 0, 0, 0, 0, 0, 1]]
    # MSL V1.02 section 2.5.1 p12: no parity needs two stop bits
    assert char_bits(np.array([0x80], np.uint8), SerialFormat.parse("8N2")).tolist() == [[0] * 8 + [1, 1, 1]]


def test_receiver_reads_back_what_was_sent_in_every_common_format():
    frame = append_crc(bytes([0x11, 0x03, 0x00, 0x6B, 0x00, 0x03]))
    for short in ("8E1", "8O1", "8N2", "8N1"):
        fmt = SerialFormat.parse(short, 9600)
        s, e = line_of([(1e6, frame)], fmt)
        got = receive(s, e, [(0.0, 1e9)], fmt)
        assert got.value.tobytes() == frame
        assert not got.flags.any()
        c = fmt.char_time_s * 1e9
        assert np.allclose(got.t_end_ns, 1e6 + (np.arange(len(frame)) + 1) * c)


def test_two_overlapping_frames_give_corrupted_bytes():
    a = append_crc(bytes([0x07, 0x03, 0x04, 0x12, 0x34, 0x56, 0x78]))
    b = append_crc(bytes([0x07, 0x03, 0x04, 0x9A, 0xBC, 0xDE, 0xF0]))
    c = F8E1.char_time_s * 1e9
    s, e = line_of([(1e6, a), (1e6 + 2.3 * c, b)])
    got = receive(s, e, [(0.0, 1e9)], F8E1)
    assert got.value.tobytes() not in (a, b)
    assert got.flags.any() or a not in got.value.tobytes()


def test_merge_and_invert_intervals():
    s, e = merge_intervals(np.array([5.0, 0.0, 2.0]), np.array([6.0, 3.0, 4.0]))
    assert s.tolist() == [0.0, 5.0] and e.tolist() == [4.0, 6.0]
    s2, e2 = invert(s, e, -1.0, 10.0)
    assert s2.tolist() == [-1.0, 4.0, 6.0] and e2.tolist() == [0.0, 5.0, 10.0]


def test_line_held_low_is_a_break_and_a_low_stop_bit_a_framing_error():
    bit = 1e9 / 19200
    got = receive(np.array([0.0]), np.array([30 * bit]), [(-1.0, 1e9)], F8E1)
    assert got.flags.tolist() == [FLAG_BREAK] and got.value.tolist() == [0]
    # start bit and the data bits low, parity high, stop bit low
    s = np.array([0.0, 10 * bit])
    e = np.array([9 * bit, 11 * bit])
    got = receive(s, e, [(-1.0, 1e9)], F8E1)
    assert got.flags.tolist() == [FLAG_LINE_ERROR]


def test_a_sniffer_at_half_the_bus_rate_delivers_marked_bytes():
    frame = append_crc(bytes([0x01, 0x03, 0x00, 0x6B, 0x00, 0x03]))
    s, e = line_of([(1e6, frame)])
    got = receive(s, e, [(0.0, 1e9)], SerialFormat.parse("8E1", 9600))
    assert got.value.tobytes() != frame
    assert len(got.value) < len(frame)


def one_station(ber: float) -> str:
    return json.dumps({
        "name": "ber-check", "bus": {"baud": 19200, "format": "8E1"},
        "master": {"timeout_ms": 100, "retries": 0, "inter_poll_delay_ms": 2, "cycle_period_ms": 0,
                   "polls": [{"station": 1, "function": 3, "start": 0, "quantity": 2}]},
        "stations": [{"address": 1, "name": "Test station", "bit_error_rate": ber,
                      "response": {"fixed_ms": 5, "jitter_ms": 1}}],
    })


def test_bit_error_rate_gives_the_expected_fraction_of_bad_frames():
    p = 1e-3
    res = simulate(parse_scenario(one_station(p), "ber test"), duration_s=60, seed=11)
    f = res.truth.frames
    req = f[f.kind == "request"]
    n = len(req)
    expected = 1 - (1 - p) ** (8 * 11)   # 8-byte request, 11 bits a character (calc)
    observed = req.noisy.mean()
    # binomial standard deviation; 5 sigma keeps a seeded run from ever being near the edge
    bound = 5 * math.sqrt(expected * (1 - expected) / n)
    assert n > 2000
    assert abs(observed - expected) < bound
    bad = f[f.noisy]
    assert ((~bad.crc_ok) | (bad.line_errors > 0)).all()
    tx = res.truth.transactions
    assert (tx[tx.request_corrupted].outcome == "timeout").all()


def test_no_noise_means_no_bad_frames():
    res = simulate(parse_scenario(one_station(0.0), "ber test"), duration_s=10, seed=11)
    assert not res.truth.frames.corrupted.any()


def test_wrong_baud_sniffer_marks_bytes_and_the_right_one_does_not():
    sc = parse_scenario(one_station(0.0), "detect test")
    truth_setting = SerialFormat.parse("8N2", 9600)
    right = simulate(sc, duration_s=3, seed=1, baud=9600, bus_format="8N2", sniffer=truth_setting)
    wrong = simulate(sc, duration_s=3, seed=1, baud=9600, bus_format="8N2", sniffer=SerialFormat.parse("8E1", 19200))
    flags_right = np.concatenate([b.flags for b in right.batches()])
    flags_wrong = np.concatenate([b.flags for b in wrong.batches()])
    assert not flags_right.any()
    assert flags_wrong.mean() > 0.2
    assert wrong.header.serial == SerialFormat.parse("8E1", 19200)   # what the port was opened with
    assert wrong.truth.meta["bus_serial"] == {"baud": 9600, "format": "8N2"}
