"""Profibus FDL framing checked against an independent encoder: the ``pyprofibus`` package's FDL
telegram classes (pyprofibus 1.13, ``pyprofibus/fdl.py``) build telegrams; ours must find them
and read the same fields, whole, byte by byte, in random chunkings, with noise around them.

Layout facts (delimiters 0x10/0x68/0xA2/0xDC/0xE5, end 0x16, FCS = sum mod 256, FC bits, SAPs):
from memory, and each agrees with pyprofibus 1.13's constants (checked below).
"""

from __future__ import annotations

import random

import pytest
from buswitness.decode import Decoder, DecoderConfig
from buswitness.decode.protocols.profibus_dp import fdl
from buswitness.decode.protocols.profibus_dp.scanner import FdlScanner, split_telegrams
from buswitness.decode.tables import DecodeOutput
from buswitness.serial import SerialFormat

pf = pytest.importorskip("pyprofibus.fdl")
pdp = pytest.importorskip("pyprofibus.dp")
T = pf.FdlTelegram


def test_constants_agree_with_the_independent_implementation():
    assert (fdl.SD1, fdl.SD2, fdl.SD3, fdl.SD4, fdl.SC, fdl.ED) == (T.SD1, T.SD2, T.SD3, T.SD4, T.SC, T.ED)
    assert fdl.FC_REQUEST == T.FC_REQ and fdl.FC_FCB == T.FC_FCB and fdl.FC_FCV == T.FC_FCV
    assert fdl.BROADCAST == T.ADDRESS_MCAST and fdl.ADDRESS_EXT == T.ADDRESS_EXT
    assert {v for k, v in vars(T).items() if k in ("FC_SRD_HI", "FC_SRD_LO", "FC_SDN_LO", "FC_SDA_LO",
                                                    "FC_FDL_STAT", "FC_DDB")} <= set(fdl.REQUEST_FUNCTIONS)
    assert {T.FC_OK, T.FC_UE, T.FC_RR, T.FC_RS, T.FC_DL, T.FC_NR, T.FC_DH, T.FC_RDL, T.FC_RDH} == \
        set(fdl.RESPONSE_STATUS)
    D = pdp.DpTelegram
    assert (fdl.SAP_DIAG, fdl.SAP_SET_PRM, fdl.SAP_CHK_CFG) == (D.DSAP_SLAVE_DIAG, D.DSAP_SET_PRM, D.DSAP_CHK_CFG)
    for sap, name in ((D.DSAP_GET_CFG, "get_config"), (D.DSAP_GLOBAL_CONTROL, "global_control"),
                      (D.DSAP_RD_INP, "read_inputs")):
        assert fdl.SAP_NAMES[sap] == name
    assert T.calcFCS(b"\x05\x02\x6d") == fdl.fcs(b"\x05\x02\x6d")


def _random_telegram(rng: random.Random):
    """A pyprofibus telegram object and the fields we expect to read from it."""
    kind = rng.choice(["sd1", "sd2", "sd2", "sd3", "sd4", "sc"])
    da, sa = rng.randrange(0, 128), rng.randrange(0, 127)
    request = rng.random() < 0.5
    fc = (0x40 | rng.choice([0x03, 0x04, 0x05, 0x06, 0x09, 0x0C, 0x0D]) | rng.choice([0, 0x10, 0x30])) if request \
        else rng.choice([0x00, 0x01, 0x02, 0x03, 0x08, 0x09, 0x0A]) | rng.choice([0, 0x10, 0x20, 0x30])
    if kind == "sd4":
        return pf.FdlTelegram_token(da=da, sa=sa), dict(sd=fdl.SD4, da=da, sa=sa, fc=-1)
    if kind == "sc":
        return pf.FdlTelegram_ack(), dict(sd=fdl.SC, da=-1, sa=-1, fc=-1)
    if kind == "sd1":
        return pf.FdlTelegram_stat0(da=da, sa=sa, fc=fc), dict(sd=fdl.SD1, da=da, sa=sa, fc=fc, du=b"")
    dae = bytes([rng.randrange(0, 64)]) if rng.random() < 0.6 else b""
    sae = bytes([rng.randrange(0, 64)]) if dae and rng.random() < 0.8 else b""
    if kind == "sd3":
        du = bytes(rng.randrange(256) for _ in range(8 - len(dae) - len(sae)))
        tel = pf.FdlTelegram_stat8(da=da, sa=sa, fc=fc, dae=dae, sae=sae, du=du)
        return tel, dict(sd=fdl.SD3, da=da, sa=sa, fc=fc, du=du, dsap=dae[0] if dae else -1,
                         ssap=sae[0] if sae else -1)
    du = bytes(rng.randrange(256) for _ in range(rng.randrange(0, 40)))
    tel = pf.FdlTelegram_var(da=da, sa=sa, fc=fc, dae=dae, sae=sae, du=du)
    return tel, dict(sd=fdl.SD2, da=da, sa=sa, fc=fc, du=du, dsap=dae[0] if dae else -1, ssap=sae[0] if sae else -1)


def _telegrams(seed: int, n: int = 300):
    rng = random.Random(seed)
    out = []
    for _ in range(n):
        tel, want = _random_telegram(rng)
        raw = bytes(tel.getRawData())
        # the independent decoder reads its own bytes back the same way
        assert type(pf.FdlTelegram.fromRawData(bytearray(raw))) is type(tel)
        out.append((raw, want))
    return out


def _check(raw: bytes, want: dict) -> None:
    got = fdl.parse(raw)
    assert got is not None
    for k, v in want.items():
        assert getattr(got, k) == v, (k, raw.hex())


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_whole_stream_decodes_to_the_encoders_fields(seed):
    tels = _telegrams(seed)
    data = b"".join(r for r, _ in tels)
    spans = split_telegrams(data)
    assert all(s.shape for s in spans)
    assert [data[s.start:s.end] for s in spans] == [r for r, _ in tels]
    for raw, want in tels:
        _check(raw, want)


def _scan_chunks(data: bytes, cuts: list[int], boundaries: set[int] = frozenset()) -> list[bytes]:
    """Feed ``data`` in pieces as a port stream does (buffer grows, settled bytes dropped)."""
    sc = FdlScanner()
    buf = bytearray()
    base = 0
    found: list[bytes] = []
    edges = [0] + cuts + [len(data)]
    for a, b in zip(edges, edges[1:]):
        if a in boundaries:
            sc.add_boundary(a - base)
        buf.extend(data[a:b])
        spans: list = []
        sc.scan(buf, len(buf), b == len(data), spans)
        found += [bytes(buf[s.start:s.end]) for s in spans if s.shape]
        settled = sc.settled
        del buf[:settled]
        base += settled
        sc.shift(settled)
    return found


@pytest.mark.parametrize("seed", [4, 5])
def test_byte_by_byte_and_random_chunkings_give_the_same_telegrams(seed):
    tels = _telegrams(seed, 150)
    data = b"".join(r for r, _ in tels)
    want = [r for r, _ in tels]
    assert _scan_chunks(data, list(range(1, len(data)))) == want
    rng = random.Random(seed)
    for _ in range(5):
        cuts = sorted(rng.sample(range(1, len(data)), rng.randrange(1, len(data) // 3)))
        assert _scan_chunks(data, cuts) == want


@pytest.mark.parametrize("seed", [6, 7, 8])
def test_noise_around_telegrams_is_stepped_over(seed):
    """Noise bursts, each ended by a silence (as on a real line between telegrams), then telegrams."""
    rng = random.Random(seed)
    tels = _telegrams(seed, 200)
    data = bytearray()
    boundaries: set[int] = set()
    for raw, _ in tels:
        if rng.random() < 0.3:
            data += bytes(rng.choice([b for b in range(256) if b != fdl.SC]) for _ in range(rng.randrange(1, 12)))
        boundaries.add(len(data))  # the idle before every telegram (33 bit times, more than a character)
        data += raw
    cuts = sorted(rng.sample(range(1, len(data)), len(data) // 5))
    cuts = sorted(set(cuts) | boundaries - {0})
    assert _scan_chunks(bytes(data), cuts, boundaries) == [r for r, _ in tels]


def test_decoder_pairs_profibus_requests_and_answers():
    """An SRD with its answer, a retry of an unanswered one, a short acknowledgement, a token, an SDN."""
    fmt = SerialFormat.parse("8E1", 187500)
    dec = Decoder(DecoderConfig(serial=fmt, protocol="profibus-dp", latency_ms={0: 1.0}))
    c = fmt.char_time_s * 1e9
    t = 10_000_000
    out: list = []

    def send(raw: bytes, pause_us: float = 300.0) -> None:
        nonlocal t
        t += int(len(raw) * c + pause_us * 1000)
        out.extend(dec.feed(0, t, raw))

    req = fdl.build(fdl.SD2, 5, 2, 0x40 | 0x0D | 0x10 | 0x20, b"\x01\x02")
    send(req)
    send(fdl.build(fdl.SD2, 2, 5, 0x08, b"\x10\x20"))
    lost = fdl.build(fdl.SD1, 6, 2, 0x40 | 0x0D | 0x10)
    send(lost, 2000)
    send(lost, 2000)  # the retry: same bytes, same frame count bit
    send(fdl.build(fdl.SD2, 2, 6, 0x0A, b"\x00"))  # answered, data high: diagnosis waiting
    send(fdl.build(fdl.SD1, 7, 2, 0x40 | 0x03 | 0x10))  # SDA
    send(bytes([fdl.SC]))
    send(fdl.build(fdl.SD2, 127, 2, 0x40 | 0x04, b"\x00\x01"))  # SDN broadcast
    send(fdl.build(fdl.SD4, 3, 2))
    send(fdl.build(fdl.SD1, 9, 3, 0x40 | 0x09))  # FDL status from master 3
    send(fdl.build(fdl.SD1, 3, 9, 0x03))  # no service
    out.extend(dec.flush_events())
    from buswitness.decode.events import Transaction
    txns = [x for x in out if isinstance(x, Transaction)]
    got = [(x.station, x.outcome, x.retry, x.exception_code) for x in txns]
    assert got == [(5, "ok", False, 0), (6, "timeout", False, 0), (6, "ok", True, 0), (7, "ok", False, 0),
                   (127, "broadcast", False, 0), (9, "exception", False, 3)]
    assert all(x.response_ms >= 0 for x in txns if x.outcome == "ok")


def test_tables_carry_the_protocol_neutral_columns():
    """Schema version 2 (docs/tables.md): protocol, source, destination, service, result code."""
    from buswitness.records import Record, RecordBatch
    fmt = SerialFormat.parse("8E1", 1_500_000)
    c = fmt.char_time_s * 1e9
    wire = [fdl.build(fdl.SD2, 5, 2, 0x40 | 0x0D | 0x10, b"\x01", dsap=61, ssap=62),
            fdl.build(fdl.SD1, 2, 5, 0x02),  # no resource
            fdl.build(fdl.SD4, 3, 2)]
    t, recs = 1_000_000, []
    for raw in wire:
        t += int(len(raw) * c) + 200_000
        recs.append(Record(0, t, raw))
    dec = Decoder(DecoderConfig(serial=fmt, protocol="profibus-dp", latency_ms={0: 0.1}))
    # the last read is framed once the input ends (a read waits for the one after it)
    out = DecodeOutput.concat([dec.feed_batch(RecordBatch.from_records(recs)), dec.flush()])
    frames, tx = out.frames, out.transactions
    assert frames["protocol"].astype(str).tolist() == ["profibus-dp"] * 3
    assert frames["source"].tolist() == [2, 5, 2] and frames["destination"].tolist() == [5, 2, 3]
    assert frames["service"].tolist() == ["SRD_high:set_param", "no_resource", "token"]
    row = tx.iloc[0]
    assert (row.source, row.destination, row.service, row.result_code, row.outcome) == \
        (2, 5, "SRD_high:set_param", 2, "exception")


def test_modbus_tables_carry_the_same_neutral_columns():
    """Modbus RTU: the master has no address (-1); service is the function's name (MAP V1.1b3 section 6.3,
    FC03 "Read Holding Registers"); the result code is the exception code."""
    from buswitness.decode import append_crc
    from buswitness.records import Record, RecordBatch
    fmt = SerialFormat.parse("8E1", 19200)
    c = fmt.char_time_s * 1e9
    wire = [append_crc(bytes([7, 3, 0, 0, 0, 1])), append_crc(bytes([7, 0x83, 2]))]
    t, recs = 1_000_000, []
    for raw in wire:
        t += int(len(raw) * c) + 5_000_000
        recs.append(Record(0, t, raw))
    dec = Decoder(DecoderConfig(serial=fmt, latency_ms={0: 0.1}))
    out = DecodeOutput.concat([dec.feed_batch(RecordBatch.from_records(recs)), dec.flush()])
    frames, tx = out.frames, out.transactions
    assert frames["source"].tolist() == [-1, 7] and frames["destination"].tolist() == [7, -1]
    assert frames["protocol"].astype(str).tolist() == ["modbus-rtu"] * 2
    row = tx.iloc[0]
    assert (row.source, row.destination, row.result_code, row.exception_code) == (-1, 7, 2, 2)
    assert "holding" in str(row.service).lower()


def test_figures_flag_two_stations_on_one_address_and_rotation_over_target():
    """Hand-built traffic: slave 5 answers data exchange in two shapes (two devices set to address 5); the
    token goes 2 -> 3 -> 2 with one slow round."""
    from buswitness.decode.protocols import get
    from buswitness.records import Record, RecordBatch
    fmt = SerialFormat.parse("8E1", 187500)
    c = fmt.char_time_s * 1e9
    dec = Decoder(DecoderConfig(serial=fmt, protocol="profibus-dp", latency_ms={0: 0.1}))
    t, outs = 1_000_000, []

    def send(raw: bytes, pause_us: float) -> None:
        nonlocal t
        t += int(len(raw) * c + pause_us * 1000)
        outs.append(dec.feed_batch(RecordBatch.from_records([Record(0, t, raw)])))

    for k in range(6):
        send(fdl.build(fdl.SD2, 5, 2, 0x40 | 0x0D | 0x10 | (0x20 * (k % 2)), b"\x00\x01"), 300)
        send(fdl.build(fdl.SD2, 2, 5, 0x08, b"\x11" if k % 2 else b"\x11\x22\x33"), 300)
        send(fdl.build(fdl.SD4, 3, 2), 300)
        send(fdl.build(fdl.SD4, 2, 3), 20_000 if k == 3 else 300)
    outs.append(dec.flush())
    figures = get("profibus-dp").new_figures(fmt, target_rotation_ms=10.0)
    for o in outs:
        figures.add(o.frames, o.transactions, o.events)
    res = figures.result()
    assert res["masters"][2]["tokens"] == 6 and res["masters"][3]["tokens"] == 6
    assert res["masters"][2]["over_target"] == 1
    kinds = {(f["kind"], f["station"]) for f in figures.findings()}
    assert ("two_on_one_address", 5) in kinds and ("rotation_over_target", 2) in kinds
