"""Every built-in scenario decodes to the same tables through the bulk path and record by record.

The record-by-record ``Decoder.feed`` path is the reference: it frames one read at a time
with the sequential framer and pairs one frame at a time. ``feed_batch`` (the bulk walk,
the timeline's columns, pairing in columns, the lazily built tables) must give exactly its
tables, however the records are cut into batches: as the simulator writes them, in
one-second blocks (a recording's flush) and in blocks of a few records.

Source: no value from outside the project is checked here; the reference is the project's own
record-by-record path (the independent-stack checks are in tests/test_oracle_stack.py).
"""

import numpy as np
import pandas as pd
import pytest
from buswitness.capture.fileformat import RecordBatch
from buswitness.decode import Decoder, DecoderConfig
from buswitness.decode.tables import DecodeOutput, add_neutral_columns
from buswitness.simulate import builtin_names, load_scenario, simulate
from test_decode_bulk import _same


def _reference(batches: list[RecordBatch], cfg: DecoderConfig) -> DecodeOutput:
    one = Decoder(cfg)
    objs: list = []
    for b in batches:
        for r in b.records():
            objs += one.feed(r.port, r.t_ns, r.data, r.flags)
    objs += one.flush_events()
    return add_neutral_columns(DecodeOutput.from_objects(objs), cfg.proto)


def _cut(batches: list[RecordBatch], how: str) -> list[RecordBatch]:
    """The same records in other batches: one-second blocks, or blocks of 7 records."""
    recs = [r for b in batches for r in b.records()]
    if how == "sim":
        return batches
    if how == "small":
        return [RecordBatch.from_records(recs[i:i + 7]) for i in range(0, len(recs), 7)]
    seconds = np.array([r.t_ns // 1_000_000_000 for r in recs])
    cuts = np.flatnonzero(np.diff(seconds)) + 1
    return [RecordBatch.from_records(recs[a:b]) for a, b in zip(np.r_[0, cuts].tolist(),
                                                                np.r_[cuts, len(recs)].tolist())]


def _check(name: str, seconds: float, latency_ms: float | None, cuts: tuple[str, ...]) -> None:
    res = simulate(load_scenario(name), duration_s=seconds, seed=5, latency_ms=latency_ms)
    batches = list(res.batches())
    cfg = DecoderConfig.from_header(res.header)
    ref = _reference(batches, cfg)
    for how in cuts:
        dec = Decoder(cfg)
        outs = [dec.feed_batch(b) for b in _cut(batches, how)] + [dec.flush()]
        joined = DecodeOutput.concat(outs)
        for table in ("frames", "transactions", "events"):
            _same(getattr(joined, table), getattr(ref, table))
            # the tables of each call, joined by pandas, are the same as the joined output
            _same(pd.concat([getattr(o, table) for o in outs], ignore_index=True), getattr(ref, table))


@pytest.mark.parametrize("name", builtin_names())
def test_every_builtin_scenario_decodes_the_same_in_bulk_and_record_by_record(name):
    _check(name, 20.0, None, ("sim", "blocks"))


@pytest.mark.parametrize("name", ["saturated115200", "pumpstation", "fault-gap", "noisy"])
def test_scenarios_at_a_1ms_adapter_decode_the_same_in_bulk_and_record_by_record(name):
    _check(name, 20.0, 1.0, ("blocks", "small"))
