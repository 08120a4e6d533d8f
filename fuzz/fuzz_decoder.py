"""Coverage-guided fuzzing of the decoder and the pairing state machine (atheris).

Run outside CI for a fixed budget, e.g.::

    pip install atheris
    nice -n 10 python fuzz/fuzz_decoder.py -atheris_runs=300000 /tmp/corpus-decoder fuzz/seeds/decoder

One input is either a run of records (port, time step, flags, bytes) cut into arbitrary
chunks and fed to a :class:`~buswitness.decode.Decoder` through ``feed`` or ``feed_batch``,
or a sequence of frames and damage fed straight to :class:`~buswitness.decode.pairing.Pairing`.
Anything but documented events (``docs/tables.md``) is a crash, and so is an input that costs
more than :data:`BUDGET_S_PER_BYTE` seconds a byte; each crash becomes a test in
``tests/test_regressions.py``.
"""

from __future__ import annotations

import sys
import time

import atheris

with atheris.instrument_imports():
    from buswitness.capture.fileformat import Record, RecordBatch
    from buswitness.decode import Damage, Decoder, DecoderConfig, Frame, SerialFormat, Transaction
    from buswitness.decode.events import EVENT_KINDS, OUTCOMES
    from buswitness.decode.pairing import Pairing

#: Generous: the decoder does well under 10 us a byte; a quadratic resync would blow this on 4 kB.
BUDGET_S_PER_BYTE = 0.002
BUDGET_FLOOR_S = 2.0

_BAUDS = (1200, 9600, 19200, 115200)
_FORMATS = ("8E1", "8N1", "8N2", "7E1")
_FLAGS = (0, 0, 0, 0x01, 0x02, 0x04, 0x08, 0x10, 0x20, 0x40)
_KINDS = ("crc_error", "truncated", "stray_bytes", "line_error", "break", "collision", "bytes_lost", "port_gap")


def _check_objects(items: list) -> None:
    for x in items:
        if isinstance(x, Damage):
            if x.kind not in EVENT_KINDS:
                raise AssertionError(f"undocumented event kind {x.kind!r}")
        elif isinstance(x, Transaction):
            if x.outcome not in OUTCOMES:
                raise AssertionError(f"undocumented outcome {x.outcome!r}")
        elif not isinstance(x, Frame):
            raise TypeError(f"decoder returned {type(x).__name__}")


def _check_tables(out) -> None:
    kinds = set(out.events["kind"].astype(str))
    if not kinds <= set(EVENT_KINDS):
        raise AssertionError(f"undocumented event kinds {kinds - set(EVENT_KINDS)}")
    outcomes = set(out.transactions["outcome"].astype(str))
    if not outcomes <= set(OUTCOMES):
        raise AssertionError(f"undocumented outcomes {outcomes - set(OUTCOMES)}")


def _config(fdp: atheris.FuzzedDataProvider) -> DecoderConfig:
    serial = SerialFormat.parse(_FORMATS[fdp.ConsumeIntInRange(0, 3)], _BAUDS[fdp.ConsumeIntInRange(0, 3)])
    return DecoderConfig(serial=serial, latency_ms={0: float(fdp.ConsumeIntInRange(1, 32))},
                         protocol="ascii" if fdp.ConsumeIntInRange(0, 5) == 0 else "rtu",
                         untimed=fdp.ConsumeBool(),
                         port_roles={1: ("master", "slaves", "both")[fdp.ConsumeIntInRange(0, 2)]})


def _records(fdp: atheris.FuzzedDataProvider) -> list[Record]:
    records, t = [], fdp.ConsumeIntInRange(0, 1 << 40)
    while fdp.remaining_bytes() > 0:
        port = fdp.ConsumeIntInRange(0, 2)
        t += fdp.ConsumeIntInRange(0, 100_000_000)
        flags = _FLAGS[fdp.ConsumeIntInRange(0, len(_FLAGS) - 1)]
        data = fdp.ConsumeBytes(fdp.ConsumeIntInRange(0, 300))
        records.append(Record(port, t, data, flags))
    return records


def _decode(fdp: atheris.FuzzedDataProvider) -> int:
    dec = Decoder(_config(fdp))
    batched = fdp.ConsumeBool()
    records = _records(fdp)
    if batched:
        cut = len(records) // 2
        for part in (records[:cut], records[cut:]):
            _check_tables(dec.feed_batch(RecordBatch.from_records(part)))
        _check_tables(dec.flush())
    else:
        for r in records:
            _check_objects(dec.feed(r.port, r.t_ns, r.data, r.flags))
        _check_objects(dec.flush_events())
    return sum(len(r.data) for r in records)


def _pair(fdp: atheris.FuzzedDataProvider) -> int:
    """Frames and damage in time order straight into the state machine; its invariants must hold."""
    pairing = Pairing(2_000_000.0, timed=fdp.ConsumeBool())
    t, requests, txns = 1_000_000_000, 0, []
    while fdp.remaining_bytes() > 0:
        t += fdp.ConsumeIntInRange(0, 300_000_000)
        if fdp.ConsumeIntInRange(0, 4) == 0:
            damage = Damage(_KINDS[fdp.ConsumeIntInRange(0, len(_KINDS) - 1)], fdp.ConsumeIntInRange(0, 1), t,
                            fdp.ConsumeBytes(fdp.ConsumeIntInRange(0, 8)), fdp.ConsumeIntInRange(-1, 255))
            if pairing.on_damage(damage).kind != damage.kind:
                raise AssertionError("pairing changed an event's kind")
            continue
        raw = bytes([fdp.ConsumeIntInRange(0, 3), fdp.ConsumeIntInRange(0, 255)]) + \
            fdp.ConsumeBytes(fdp.ConsumeIntInRange(1, 6)).ljust(1, b"\x00")
        direction = "request" if fdp.ConsumeBool() else "response"
        requests += direction == "request"
        done, events = pairing.on_frame(Frame(fdp.ConsumeIntInRange(0, 1), raw, t, t + 500_000, 520_000.0,
                                              direction))
        _check_objects(done + events)
        txns += done
    txns += pairing.flush()
    _check_objects(txns)
    if len(txns) != requests:
        raise AssertionError(f"{requests} requests became {len(txns)} transactions")
    ends = [x.t_request_end_ns for x in txns]
    if ends != sorted(ends):
        raise AssertionError("transactions left the state machine out of request order")
    return requests


def one_input(data: bytes) -> None:
    start = time.perf_counter()
    fdp = atheris.FuzzedDataProvider(data)
    if fdp.ConsumeIntInRange(0, 3) == 0:
        _pair(fdp)
    else:
        _decode(fdp)
    spent = time.perf_counter() - start
    if spent > BUDGET_FLOOR_S + BUDGET_S_PER_BYTE * len(data):
        raise AssertionError(f"{len(data)} bytes took {spent:.2f} s")


def main() -> None:
    atheris.Setup(sys.argv, one_input)
    atheris.Fuzz()


if __name__ == "__main__":
    main()
