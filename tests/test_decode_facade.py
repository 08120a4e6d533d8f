"""The decoder facade end to end: records in, frames and transactions out, objects and tables alike.

Outside check values carry their source inline (source: the MAP/MSL specifications,
TIMING.md or termios(3), as cited beside each).
"""

import pandas as pd
import pytest
from buswitness.capture.fileformat import Record, RecordBatch
from buswitness.decode import Decoder, DecoderConfig, Frame, Transaction, append_crc
from buswitness.errors import UsageError
from test_decode_wire import FMT_19200, decode_records, deliver, of_type

C_NS = FMT_19200.char_time_s * 1e9
# MAP V1.1b3 p15-17: read holding registers 03 00 6B 00 03 -> 03 06 02 2B 00 00 00 64 (station 1)
REQ = append_crc(bytes.fromhex("0103006B0003"))
RSP = append_crc(bytes.fromhex("010306022B00000064"))


def polls(n: int, turnaround_ns: float = 5e6, idle_ns: float = 30e6) -> tuple[list, list[float]]:
    frames, truth, t = [], [], 1e9
    for i in range(n):
        frames.append((t, REQ))
        end = t + len(REQ) * C_NS
        start = end + turnaround_ns + i * 1e5
        frames.append((start, RSP))
        truth.append((start - end) / 1e6)
        t = start + len(RSP) * C_NS + idle_ns
    return frames, truth


@pytest.mark.parametrize("latency_ms", [16.0, 1.0])
def test_polls_pair_into_ok_transactions_with_intervals_covering_truth(latency_ms):
    frames, truth = polls(20)
    cfg = DecoderConfig(serial=FMT_19200, latency_ms={0: latency_ms})
    out = decode_records(deliver(frames, C_NS, latency_ms * 1e6), cfg)
    txns = of_type(out, Transaction)
    assert [t.outcome for t in txns] == ["ok"] * 20
    assert all(t.response_ms_low <= rt <= t.response_ms_high for t, rt in zip(txns, truth))
    assert len(of_type(out, Frame)) == 40


def test_batch_tables_match_the_object_view():
    frames, _ = polls(10)
    records = deliver(frames, C_NS, 16e6)
    objs = decode_records(records)
    dec = Decoder(DecoderConfig(serial=FMT_19200))
    batch = RecordBatch.from_records([Record(0, t, d) for t, d in records])
    a, b = dec.feed_batch(batch), dec.flush()
    assert len(a.frames) + len(b.frames) == len(of_type(objs, Frame))
    txns = list(a.transactions.itertuples()) + list(b.transactions.itertuples())
    assert [t.outcome for t in txns] == [t.outcome for t in of_type(objs, Transaction)]
    # schema version 2 (docs/tables.md): version 1's columns unchanged, the protocol-neutral ones after them
    assert list(a.frames.columns) == ["t_start_ns", "t_end_ns", "t_end_lo_ns", "t_end_hi_ns", "port", "address",
                                      "function", "length", "direction", "raw",
                                      "protocol", "source", "destination", "service"]


def test_unknown_port_role_is_a_clear_error():
    with pytest.raises(UsageError, match="role 'boss' is not one of"):
        DecoderConfig(port_roles={0: "boss"})


def test_untimed_capture_pairs_but_states_no_response_time():
    # raw imports have synthetic times (header timing "none"): order is real, intervals are not
    frames, _ = polls(5)
    records = deliver(frames, C_NS, 16e6)
    batch = RecordBatch.from_records([Record(0, i, d) for i, (_t, d) in enumerate(records)])
    dec = Decoder(DecoderConfig(serial=FMT_19200, untimed=True))
    txns = pd.concat([dec.feed_batch(batch).transactions, dec.flush().transactions])
    assert list(txns.outcome.astype(str)) == ["ok"] * 5
    assert txns.response_ms.isna().all()


def test_flush_closes_a_request_still_waiting_as_a_timeout():
    dec = Decoder(DecoderConfig(serial=FMT_19200))
    early = dec.feed(0, 1_000_000_000, REQ)
    out = dec.flush()
    assert list(out.transactions.outcome.astype(str)) == ["timeout"]
    assert len(of_type(early, Frame)) + len(out.frames) == 1


def test_config_from_a_header_takes_latency_and_defaults():
    from buswitness.capture.fileformat import CaptureHeader, PortInfo
    header = CaptureHeader(serial=FMT_19200, ports=[PortInfo(0, "a", latency_ms=1.0), PortInfo(1, "b")],
                           timing="none")
    cfg = DecoderConfig.from_header(header)
    assert (cfg.latency_for(0), cfg.latency_for(1), cfg.host_delay_ms) == (1.0, 16.0, 1.0)
    assert cfg.untimed and cfg.role_for(0) == "both"
