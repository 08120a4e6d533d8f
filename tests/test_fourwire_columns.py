"""Four-wire bus (one port hears the master, one the stations): pairing in columns gives exactly the
tables of pairing frame by frame (issue 14).

Source: no check value comes from outside the project; each check compares the decoder's columnar
two-port path (Pairing.pair_two_port) with its own frame-by-frame path (Pairing.on_frame), over the
built-in scenarios of the project's simulator re-read as a two-port capture (simulate/fourwire.py)
and over generated two-port traffic. Frames are Modbus RTU (MAP V1.1b3 §6.3 FC03 request 8 bytes,
answer 5 + 2N bytes; exception answer FC | 0x80 and a code, §7) with CRCs from crcmod's predefined
"modbus" CRC.
"""

from __future__ import annotations

from pathlib import Path

import crcmod.predefined
import numpy as np
import pandas as pd
import pytest
from buswitness.capture.fileformat import RecordBatch
from buswitness.decode import Decoder, DecoderConfig
from buswitness.decode.pairing import Pairing
from buswitness.serial import SerialFormat
from buswitness.simulate import load_scenario, simulate
from buswitness.simulate.fourwire import four_wire_batches, four_wire_header

CRC = crcmod.predefined.mkCrcFun("modbus")
SCENARIOS = sorted(p.stem for p in (Path(__file__).resolve().parent.parent / "simulate" / "scenarios").glob("*.json"))
TABLES = ("frames", "transactions", "events")


def _crc(body: bytes) -> bytes:
    return body + CRC(body).to_bytes(2, "little")


def _decode(cfg: DecoderConfig, batches: list[RecordBatch], columnar: bool, monkeypatch) -> tuple[list, int]:
    """The three tables, whole, and how many frames the columnar pairing took."""
    taken = [0]
    original = Pairing.pair_two_port

    def counting(self, rr, is_req):
        j, cols, events = original(self, rr, is_req)
        taken[0] += j - rr.i
        return j, cols, events

    with monkeypatch.context() as m:
        m.setattr(Decoder, "COLUMNAR_PORTS", columnar)
        m.setattr(Pairing, "pair_two_port", counting)
        dec = Decoder(cfg)
        outs = [dec.feed_batch(b) for b in batches] + [dec.flush()]
    return [pd.concat([getattr(o, t) for o in outs], ignore_index=True) for t in TABLES], taken[0]


def _same(cfg, batches, monkeypatch) -> int:
    framewise, none = _decode(cfg, batches, False, monkeypatch)
    columnar, taken = _decode(cfg, batches, True, monkeypatch)
    assert none == 0
    for name, a, b in zip(TABLES, framewise, columnar):
        pd.testing.assert_frame_equal(a, b, obj=name)
    return taken


@pytest.mark.parametrize("latency_ms", [16.0, 1.0])
@pytest.mark.parametrize("scenario", SCENARIOS)
def test_built_in_scenarios_on_two_ports_pair_the_same_in_columns(scenario, latency_ms, monkeypatch):
    sim = simulate(load_scenario(scenario), duration_s=40, seed=5)
    batches = list(four_wire_batches(sim, latency_ms, batch_records=700))
    cfg = DecoderConfig.from_header(four_wire_header(sim, latency_ms))
    _same(cfg, batches, monkeypatch)


def test_the_columnar_path_takes_most_frames_of_a_regular_four_wire_capture(monkeypatch):
    sim = simulate(load_scenario("saturated115200"), duration_s=20, seed=2)
    batches = list(four_wire_batches(sim, 1.0, batch_records=2000))
    cfg = DecoderConfig.from_header(four_wire_header(sim, 1.0))
    frames = len(sim.truth.frames)
    assert _same(cfg, batches, monkeypatch) > 0.9 * frames


def _generated(seed: int) -> tuple[DecoderConfig, list[RecordBatch]]:
    """Two-port traffic with every turn the pairing knows: answers, exceptions, silence, late answers,
    retries, broadcasts, two stations with one address, polls faster than the adapters' period."""
    rng = np.random.default_rng(seed)
    fmt = SerialFormat.parse(str(rng.choice(["8E1", "8N1"])), int(rng.choice([9600, 19200, 115200])))
    c = fmt.char_time_s * 1e9
    latency = float(rng.choice([1.0, 4.0, 16.0]))
    stations = rng.choice(np.arange(1, 248), size=int(rng.integers(1, 7)), replace=False).tolist()
    bad = float(rng.choice([0.0, 0.2, 1.0]))  # how often things go wrong, from never to often
    sent: list[tuple[int, float, bytes]] = []  # (port, first bit, bytes)
    t = 1e9
    for _ in range(int(rng.integers(300, 1200))):
        st = int(rng.choice(stations)) if rng.random() > 0.02 * bad else 0
        n = int(rng.integers(1, 12))
        req = _crc(bytes([st, 3, 0, int(rng.integers(0, 200)), 0, n]))
        repeats = 2 if rng.random() < 0.05 * bad else 1
        for _ in range(repeats):
            sent.append((0, t, req))
            t += len(req) * c + rng.uniform(0.2, 3.0) * 1e6
            fate = rng.random()
            if bad == 0.0:
                fate = 0.1 + 0.85 * fate  # answered, in time, by one station
            if st == 0 or fate < 0.06 * bad:
                t += rng.uniform(5, 120) * 1e6  # no answer: the master's wait
                continue
            if fate < 0.12:
                rsp = _crc(bytes([st, 0x83, int(rng.integers(1, 5))]))
            else:
                rsp = _crc(bytes([st, 3, 2 * n]) + rng.integers(0, 256, 2 * n, dtype=np.uint8).tobytes())
            if fate > 1 - 0.03 * bad:  # a late answer, after the master moved on
                sent.append((1, t + rng.uniform(30, 90) * 1e6, rsp))
                continue
            if fate > 1 - 0.05 * bad:
                sent.append((1, t, rsp))  # a second station with the same address
                t += len(rsp) * c + rng.uniform(0.1, 1.0) * 1e6
            sent.append((1, t, rsp))
            t += len(rsp) * c + rng.uniform(0.1, 2.0) * 1e6
    # each port's adapter returns what arrived in each of its periods (a phase of its own)
    records = []
    for port, phase in ((0, 0.31), (1, 0.77)):
        ends, data = [], []
        for p, t0, raw in sent:
            if p == port:
                ends.extend(t0 + (k + 1) * c for k in range(len(raw)))
                data.extend(raw)
        order = np.argsort(ends, kind="stable")
        ends_a, data_a = np.asarray(ends)[order], np.asarray(data, np.uint8)[order]
        period = latency * 1e6
        tick = np.ceil((ends_a - phase * period) / period) * period + phase * period + 200_000
        cuts = np.flatnonzero(np.r_[True, tick[1:] != tick[:-1]])
        for a, b in zip(cuts, np.r_[cuts[1:], tick.size]):
            records.append((int(tick[a]), port, data_a[a:b].tobytes()))
    records.sort(key=lambda r: (r[0], r[1]))
    batches = []
    size = int(rng.integers(1000, 6000))
    for a in range(0, len(records), size):
        part = records[a:a + size]
        batches.append(RecordBatch(np.array([r[0] for r in part], np.int64),
                                   np.array([len(r[2]) for r in part], np.int64),
                                   np.array([r[1] for r in part], np.uint8), np.zeros(len(part), np.uint8),
                                   np.frombuffer(b"".join(r[2] for r in part), np.uint8).copy()))
    cfg = DecoderConfig(serial=fmt, latency_ms={0: latency, 1: latency}, port_roles={0: "master", 1: "slaves"})
    return cfg, batches


@pytest.mark.parametrize("seed", range(12))
def test_generated_two_port_traffic_pairs_the_same_in_columns(seed, monkeypatch):
    cfg, batches = _generated(seed)
    _same(cfg, batches, monkeypatch)
