"""Modbus ASCII on the columnar path (decode/ascii.py AsciiBulk): the same tables as record by record.

Source: the frames are encoded by pymodbus's own ASCII framer (pymodbus.framer.FramerAscii, an
independent encoder: ':' hex LRC CR LF, MSL V1.02 section 2.5.2); the decoded frames are checked
against the bytes pymodbus put between ':' and CR LF. The other checks compare the decoder's two
paths (columns and record by record), over traffic with the damage a line shows added by the test.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from buswitness.capture.fileformat import RecordBatch
from buswitness.decode import Decoder, DecoderConfig, SerialFormat
from buswitness.decode.ascii import AsciiBulk, ascii_shape, ascii_shapes
from buswitness.decode.protocols.modbus_ascii import PROTOCOL
from pymodbus.framer import FramerAscii
from pymodbus.pdu import DecodePDU, ExceptionResponse
from pymodbus.pdu import bit_message as bm
from pymodbus.pdu import register_message as rm

TABLES = ("frames", "transactions", "events")
ENCODER = FramerAscii(DecodePDU(False))


def _exception(fc: int, code: int, station: int) -> ExceptionResponse:
    e = ExceptionResponse(fc, code)
    e.dev_id = station
    return e


def _transaction(rng: np.random.Generator, station: int) -> list[bytes]:
    """A request and its answer (or none), as pymodbus frames them."""
    kind = int(rng.integers(0, 5))
    addr = int(rng.integers(0, 1000))
    if kind == 0:
        n = int(rng.integers(1, 20))
        pair = (rm.ReadHoldingRegistersRequest(address=addr, count=n, dev_id=station),
                rm.ReadHoldingRegistersResponse(registers=rng.integers(0, 65536, n).tolist(), dev_id=station))
    elif kind == 1:
        value = int(rng.integers(0, 65536))
        pair = (rm.WriteSingleRegisterRequest(address=addr, registers=[value], dev_id=station),
                rm.WriteSingleRegisterResponse(address=addr, registers=[value], dev_id=station))
    elif kind == 2:
        n = int(rng.integers(1, 40))
        pair = (bm.ReadCoilsRequest(address=addr, count=n, dev_id=station),
                bm.ReadCoilsResponse(bits=(rng.random(8 * ((n + 7) // 8)) < 0.5).tolist(), dev_id=station))
    elif kind == 3:
        regs = rng.integers(0, 65536, int(rng.integers(1, 8))).tolist()
        pair = (rm.WriteMultipleRegistersRequest(address=addr, registers=regs, dev_id=station),
                rm.WriteMultipleRegistersResponse(address=addr, count=len(regs), dev_id=station))
    else:
        pair = (rm.ReadHoldingRegistersRequest(address=addr, count=3, dev_id=station),
                _exception(3, int(rng.integers(1, 5)), station))
    return [ENCODER.buildFrame(pdu) for pdu in pair]


def _damage(rng: np.random.Generator, frame: bytes) -> bytes:
    """One of the ways a line spoils an ASCII frame (the scanner's cases)."""
    k = int(rng.integers(0, 6))
    if k == 0:
        return bytes(rng.integers(0, 256, int(rng.integers(1, 6)), dtype=np.uint8)) + frame  # noise before it
    if k == 1:
        return frame[:int(rng.integers(2, len(frame) - 2))] + frame  # cut off by a new ':'
    if k == 2:
        return frame[:3] + (b"0" if frame[3:4] != b"0" else b"1") + frame[4:]  # a wrong character: bad LRC
    if k == 3:
        return frame[:-2] + b"\n"  # no CR
    if k == 4:
        return frame.lower()  # lower-case hex is still a frame
    return b":" + b"0" * 600 + b"\r\n" + frame  # an overlong run


def _traffic(seed: int, damage: float) -> tuple[DecoderConfig, list[RecordBatch], list[bytes]]:
    rng = np.random.default_rng(seed)
    fmt = SerialFormat.parse(str(rng.choice(["7E1", "8N1", "7N2"])), int(rng.choice([9600, 19200, 115200])))
    c = fmt.char_time_s * 1e9
    latency = float(rng.choice([1.0, 16.0]))
    stations = rng.integers(1, 248, int(rng.integers(1, 6))).tolist()
    wire, clean, t = [], [], 1e9
    for _ in range(int(rng.integers(200, 600))):
        frames = _transaction(rng, int(rng.choice(stations)))
        if rng.random() < 0.05:
            frames = frames[:1]  # no answer
        for frame in frames:
            clean.append(frame)
            sent = _damage(rng, frame) if rng.random() < damage else frame
            wire.append((t, sent))
            t += len(sent) * c + rng.uniform(0.5, 5.0) * 1e6
    ends = np.concatenate([t0 + (np.arange(len(w)) + 1) * c for t0, w in wire])
    data = np.frombuffer(b"".join(w for _, w in wire), np.uint8)
    period = latency * 1e6
    tick = np.ceil((ends - 0.4 * period) / period) * period + 0.4 * period + 150_000
    cuts = np.flatnonzero(np.r_[True, tick[1:] != tick[:-1]])
    lengths = np.diff(np.r_[cuts, tick.size])
    batches, size = [], int(rng.integers(200, 3000))
    offsets = np.r_[0, np.cumsum(lengths)]
    for a in range(0, cuts.size, size):
        b = min(a + size, cuts.size)
        batches.append(RecordBatch(tick[cuts[a:b]].astype(np.int64), lengths[a:b].astype(np.int64),
                                   np.zeros(b - a, np.uint8), np.zeros(b - a, np.uint8),
                                   data[offsets[a]:offsets[b]].copy()))
    return DecoderConfig(serial=fmt, protocol="modbus-ascii", latency_ms={0: latency}), batches, clean


def _decode(cfg, batches, columns: bool, monkeypatch) -> list[pd.DataFrame]:
    with monkeypatch.context() as m:
        if not columns:
            m.setattr(PROTOCOL, "bulk", None)
        dec = Decoder(cfg)
        outs = [dec.feed_batch(b) for b in batches] + [dec.flush()]
    return [pd.concat([getattr(o, t) for o in outs], ignore_index=True) for t in TABLES]


@pytest.mark.parametrize("damage", [0.0, 0.02, 0.2])
@pytest.mark.parametrize("seed", range(5))
def test_ascii_tables_in_columns_equal_record_by_record(seed, damage, monkeypatch):
    cfg, batches, clean = _traffic(seed, damage)
    records = _decode(cfg, batches, False, monkeypatch)
    columns = _decode(cfg, batches, True, monkeypatch)
    for name, a, b in zip(TABLES, records, columns):
        pd.testing.assert_frame_equal(a, b, obj=name)
    if damage == 0.0:
        # every frame is pymodbus's: address, PDU and LRC as it encoded them between ':' and CR LF
        assert columns[0]["raw"].tolist() == [bytes.fromhex(f[1:-2].decode()) for f in clean]
        assert (columns[1]["outcome"].astype(str) != "corrupt").all()


def test_the_columnar_path_finds_the_frames_pymodbus_wrote():
    rng = np.random.default_rng(3)
    frames = [f for _ in range(50) for f in _transaction(rng, int(rng.integers(1, 248)))]
    buf = b"".join(frames)
    starts, lens, data, first = AsciiBulk.frames(np.frombuffer(buf, np.uint8), 0, len(buf))
    assert lens.tolist() == [len(f) for f in frames]
    assert starts.tolist() == np.cumsum([0] + [len(f) for f in frames[:-1]]).tolist()
    assert AsciiBulk.frame_bytes(buf, starts, lens) == [bytes.fromhex(f[1:-2].decode()) for f in frames]


def test_shapes_in_columns_equal_the_scalar_rule():
    rng = np.random.default_rng(11)
    raws = []
    for _ in range(3000):
        n = int(rng.integers(2, 40))
        raw = bytes(rng.integers(0, 256, n, dtype=np.uint8))
        if rng.random() < 0.7:  # mostly codes with rules and plausible byte counts
            fc = int(rng.choice([1, 2, 3, 4, 5, 6, 7, 8, 0x0B, 0x0C, 0x0F, 0x10, 0x11, 0x14, 0x16, 0x17, 0x18, 0x2B,
                                 0x83, 0x90]))
            raw = raw[:1] + bytes([fc]) + bytes([max(0, n - 5)]) + raw[3:]
        raws.append(raw)
    n = np.array([len(r) for r in raws])
    data = np.frombuffer(b"".join(raws), np.uint8)
    assert ascii_shapes(data, np.cumsum(n) - n, n).tolist() == [ascii_shape(r) for r in raws]
