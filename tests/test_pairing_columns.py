"""One owner of the pairing state: the columnar path (Pairing.pair_regular) and the per-frame
path (Pairing.on_frame) give the same transactions and leave the same learnt state (issue 13).

Frames are Modbus RTU read-holding-registers requests and answers (MAP V1.1b3 section 6.3:
FC03 request 8 bytes, answer 5 + 2N bytes; exception answer FC | 0x80 and a code, section 7),
CRC from crcmod's predefined "modbus" CRC (an outside reference).

Source: frames from MAP V1.1b3 §6.3 and crcmod's predefined "modbus" CRC, as named above; the check itself compares two paths of the project.
"""

from __future__ import annotations

import crcmod.predefined
import numpy as np
import pytest
from buswitness.decode.events import Frame
from buswitness.decode.lengths import REQUEST, RESPONSE
from buswitness.decode.messages import BulkRun, RegularRun
from buswitness.decode.pairing import Pairing
from buswitness.decode.tables import transactions_frame, transactions_table

CRC = crcmod.predefined.mkCrcFun("modbus")
CHAR_NS = 11 / 19200 * 1e9
T35_NS = 3.5 * CHAR_NS


def _crc(body: bytes) -> bytes:
    return body + CRC(body).to_bytes(2, "little")


def _run(seed: int, pairs: int):
    rng = np.random.default_rng(seed)
    raws, lo, hi, shapes = [], [], [], []
    t = 1_000_000_000
    for _ in range(pairs):
        station = int(rng.integers(1, 248))
        n = int(rng.integers(1, 10))
        req = _crc(bytes([station, 3, 0, 16, 0, n]))
        if rng.random() < 0.1:
            rsp = _crc(bytes([station, 0x83, 2]))
        else:
            rsp = _crc(bytes([station, 3, 2 * n]) + rng.integers(0, 256, 2 * n, dtype=np.uint8).tobytes())
        for raw, shape in ((req, REQUEST), (rsp, RESPONSE)):
            t += int(len(raw) * CHAR_NS)
            width = int(rng.integers(0, 2_000_000))
            raws.append(raw)
            lo.append(t - width)
            hi.append(t + width)
            shapes.append(shape)
            t += int(rng.integers(2_000_000, 40_000_000))  # turnaround / poll gap
    lens = np.array([len(r) for r in raws], dtype=np.int64)
    run = BulkRun(np.array(lo, np.int64), np.array(hi, np.int64), lens, np.array(shapes, np.int8),
                  np.array([r[0] for r in raws], np.uint8), np.array([r[1] for r in raws], np.uint8), raws)
    return run


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("timed", [True, False])
def test_columnar_pairing_equals_frame_by_frame(seed, timed):
    run = _run(seed, 200)
    t_end = (run.lo + run.hi) // 2
    t_start = t_end - np.rint(run.lens * CHAR_NS).astype(np.int64)

    columnar = Pairing(T35_NS, timed=timed)
    assert columnar.regular_run(run.shapes, run.addrs, run.fcs) == len(run) // 2
    cols, col_events = columnar.pair_regular(RegularRun(0, run, t_start, t_end, CHAR_NS, 0, len(run)))

    framewise = Pairing(T35_NS, timed=timed)
    txns, events = [], []
    for k, raw in enumerate(run.raws):
        frame = Frame(0, raw, int(run.lo[k]), int(run.hi[k]), CHAR_NS, "request" if k % 2 == 0 else "response")
        t, e = framewise.on_frame(frame)
        txns += t
        events += e
    txns += framewise.flush()

    a = transactions_frame([cols])
    b = transactions_table(txns)
    assert len(a) == len(b) == len(run) // 2
    for name in ("station", "function", "outcome", "exception_code", "retry", "t_request_end_ns",
                 "t_response_start_ns", "request_raw", "response_raw"):
        assert a[name].tolist() == b[name].tolist(), name
    for name in ("response_ms", "response_ms_low", "response_ms_high"):
        np.testing.assert_allclose(a[name].to_numpy(float), b[name].to_numpy(float), rtol=0, atol=1e-6,
                                   equal_nan=True)
    assert sorted((e.kind, e.t_ns) for e in col_events) == sorted((e.kind, e.t_ns) for e in events)
    # the same learnt state, whichever path taught it
    assert columnar.answers == framewise.answers
    for address, st in framewise.stations.items():
        mine = columnar.stations[address]
        assert mine.answers == st.answers
        assert mine.slowest_ns == pytest.approx(st.slowest_ns, abs=1) if timed else True
