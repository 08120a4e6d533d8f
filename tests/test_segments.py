"""Decoding in segments on several cores gives exactly what one pass gives.

The oracle is the decoder's own single pass over the same capture (itself checked against the
simulator's truth and, in test_oracle_stack.py, against pymodbus's own client and servers):
joined segments must not change a single row. Source: every check compares with what the test
itself made; no check value comes from outside the project.
"""

from __future__ import annotations

import json
from dataclasses import asdict
from pathlib import Path

import pandas as pd
import pytest
from buswitness.analysis import segments
from buswitness.analysis.pipeline import AnalysisOptions, analyze, assess_delivery, delivery_headers
from buswitness.analysis.summary import summary_dict
from buswitness.capture.fileformat import BLOCK_SYNC, CaptureHeader, CaptureReader, CaptureWriter, PortInfo
from buswitness.decode import Decoder, DecoderConfig
from buswitness.serial import SerialFormat
from buswitness.simulate import load_scenario, simulate

SCENARIOS = sorted(p.stem for p in (Path(segments.__file__).parent.parent / "simulate" / "scenarios").glob("*.json"))


@pytest.fixture
def small_segments(monkeypatch):
    """Segments small enough for a test capture: a few kB of warm-up, steps of a few records."""
    monkeypatch.setattr(segments, "STEP_RECORDS", 16)
    monkeypatch.setattr(segments, "WARM_BYTES", 6000)
    monkeypatch.setattr(segments, "PARALLEL_MIN_BYTES", 0)


def _one_pass(path: Path):
    reader = CaptureReader(path)
    _reported, decoding = delivery_headers(reader.header, assess_delivery(reader))
    cfg = DecoderConfig.from_header(decoding)
    decoder = Decoder(cfg)
    outs = [decoder.feed_batch(b) for b in reader.iter_batches()] + [decoder.flush()]
    return reader, cfg, outs


def _tables(outs) -> list[pd.DataFrame]:
    return [pd.concat([o.to_frames()[i] for o in outs], ignore_index=True) for i in range(3)]


def _assert_same_tables(a, b) -> None:
    for x, y, name in zip(_tables(a), _tables(b), ("frames", "transactions", "events")):
        pd.testing.assert_frame_equal(x, y, check_exact=True, obj=name)


def _summary(result) -> str:
    d = summary_dict(result)
    d.pop("analysed_utc", None)
    return json.dumps(d, default=str, sort_keys=True)


def _joined(path: Path, jobs: int):
    reader, cfg, serial = _one_pass(path)
    joined = segments.segmented_outputs([str(path)], reader.header, cfg, jobs)
    return serial, joined


@pytest.mark.slow
@pytest.mark.parametrize("scenario", SCENARIOS)
def test_segments_give_the_tables_of_one_pass_on_every_scenario(tmp_path, small_segments, monkeypatch, scenario):
    """Where a seam joins, the joined tables are those of one pass, row for row. Where the later decoder
    cannot reach the earlier one's state (a short capture's history: the master's last 64 waits, a
    station's last 256 answers), the seam is refused and analyze decodes in one pass."""
    path = tmp_path / f"{scenario}.bwcap"
    simulate(load_scenario(scenario), duration_s=150.0, seed=11).write(path)
    if path.stat().st_size < 8 * segments.WARM_BYTES:
        pytest.skip("too little traffic to cut")
    monkeypatch.setattr(segments, "WARM_BYTES", path.stat().st_size * 2 // 5)  # a long history before the cut
    serial, joined = _joined(path, 2)
    if joined is not None:
        _assert_same_tables(serial, joined)


def test_a_long_regular_capture_joins_and_gives_the_tables_of_one_pass(tmp_path, small_segments, monkeypatch):
    path = tmp_path / "saturated.bwcap"
    simulate(load_scenario("saturated115200"), duration_s=90.0, seed=4).write(path)
    monkeypatch.setattr(segments, "WARM_BYTES", path.stat().st_size // 8)
    serial, joined = _joined(path, 2)
    assert joined is not None, "the seam of a regular capture did not join"
    _assert_same_tables(serial, joined)


@pytest.mark.parametrize("scenario", ["fault-late", "noisy", "fault-exceptions", "fault-gap", "pumpstation"])
def test_analysis_on_several_cores_equals_one_pass(tmp_path, small_segments, scenario):
    path = tmp_path / f"{scenario}.bwcap"
    simulate(load_scenario(scenario), duration_s=240.0, seed=11).write(path)
    notes: list = []
    one = analyze(CaptureReader(path), AnalysisOptions(jobs=1))
    two = analyze(CaptureReader(path), AnalysisOptions(jobs=2, notice=notes.append))
    three = analyze(CaptureReader(path), AnalysisOptions(jobs=3, notice=notes.append))
    assert _summary(two) == _summary(one)
    assert _summary(three) == _summary(one)
    assert two.delivery == one.delivery
    assert two.damage == one.damage
    for s in one.stations:
        assert two.late_answers(s.address) == one.late_answers(s.address)
    assert two.worst_transactions() == one.worst_transactions()


def test_a_seam_whose_decodes_never_agree_falls_back_to_one_pass(tmp_path, small_segments, monkeypatch):
    """The first segment's decoder goes on to the capture's end: one pass, each record decoded once
    in this process (the later segment's work is lost, the first segment's is not)."""
    path = tmp_path / "late.bwcap"
    simulate(load_scenario("fault-late"), duration_s=120.0, seed=2).write(path)
    monkeypatch.setattr(segments, "output_digest", lambda out, c=(): str(id(out)))  # no two steps agree
    fed = [0]
    feed = Decoder.feed_batch

    def counted(self, batch):
        fed[0] += len(batch)
        return feed(self, batch)

    monkeypatch.setattr(Decoder, "feed_batch", counted)  # counts in this process only (workers are forked)
    notes: list = []
    result = analyze(CaptureReader(path), AnalysisOptions(jobs=2, notice=notes.append))
    assert any("one pass" in n for n in notes)
    assert fed[0] == sum(len(b) for b in CaptureReader(path).iter_batches())
    assert _summary(result) == _summary(analyze(CaptureReader(path), AnalysisOptions(jobs=1)))
    assert result.damage == analyze(CaptureReader(path), AnalysisOptions(jobs=1)).damage


def test_short_captures_table_outputs_and_other_inputs_stay_in_one_pass(tmp_path, monkeypatch):
    path = tmp_path / "short.bwcap"
    simulate(load_scenario("clean"), duration_s=30.0, seed=1).write(path)
    reader = CaptureReader(path)
    from buswitness.decode.protocols import get
    proto = get("modbus-rtu")
    assert segments.jobs_for(AnalysisOptions(jobs=4), reader, proto, False) == 1  # too short
    assert segments.jobs_for(AnalysisOptions(jobs=1), reader, proto, False) == 1
    monkeypatch.setattr(segments, "PARALLEL_MIN_BYTES", 0)
    monkeypatch.setattr(segments, "WARM_BYTES", 1000)
    assert segments.jobs_for(AnalysisOptions(jobs=2), reader, proto, False) == 2
    assert segments.jobs_for(AnalysisOptions(jobs=2), reader, proto, True) == 1  # --csv and the like
    reader.header.capture_id = ""  # segments merge by the capture's id
    assert segments.jobs_for(AnalysisOptions(jobs=2), reader, proto, False) == 1


@pytest.mark.slow
def test_an_oracle_stack_capture_joins_like_one_pass_or_not_at_all(tmp_path, small_segments, monkeypatch):
    """pymodbus's own client and servers on the emulated line (tests/oraclebus.py), tapped at 1 ms and
    16 ms and written as a capture file. Its stations are all history (a dead one, a slow one, retries),
    so a decoder started late may stay in another state: then the seam must be refused, and the
    analysis is that of one pass either way."""
    pytest.importorskip("pymodbus")
    import oraclebus as ob
    run = ob.run_bus(19200, "8E1", ob.default_plan(seed=12, cycles=12), workdir=tmp_path / "bus")
    for latency in (1.0, 16.0):
        records = ob.tap_records(run.bursts, latency, seed=3)
        header = CaptureHeader(serial=SerialFormat(19200, 8, "E", 1), ports=[PortInfo(0, "tap")],
                               capture_id=f"oracle{latency:g}")
        path = tmp_path / f"oracle-{latency:g}.bwcap"
        with CaptureWriter(path, header) as w:
            for t, data in records:
                w.append(0, t, data)
        monkeypatch.setattr(segments, "WARM_BYTES", max(2000, path.stat().st_size // 4))
        serial, joined = _joined(path, 2)
        if joined is not None:
            _assert_same_tables(serial, joined)
        one = analyze(CaptureReader(path), AnalysisOptions(jobs=1))
        two = analyze(CaptureReader(path), AnalysisOptions(jobs=2))
        assert _summary(two) == _summary(one)


def test_steps_join_small_blocks_and_cut_large_ones_the_same_in_every_process(monkeypatch):
    """A recording writes a block a second: steps join them (the decoder's cost is per call), cut a
    block larger than a step, and number and place them only by the file, so every process agrees."""
    import numpy as np
    from buswitness.records import RecordBatch
    monkeypatch.setattr(segments, "STEP_RECORDS", 25)

    def block(t0: int, n: int) -> RecordBatch:
        return RecordBatch(np.arange(t0, t0 + n, dtype=np.int64), np.full(n, 2, np.int64),
                           np.zeros(n, np.uint8), np.zeros(n, np.uint8), np.arange(2 * n, dtype=np.uint8))

    class Reader:
        def iter_batches(self):
            t = 0
            for n in (10, 10, 10, 60, 0, 7):
                yield block(t, n)
                t += n

    got = list(segments.steps(Reader()))
    assert [len(b) for _i, _p, b in got] == [30, 25, 25, 17]  # 10+10+10; 25 of 60; 25; 10 of 60 + 7
    assert [i for i, _p, _b in got] == [0, 1, 2, 3]
    per_record = 2 + segments._RECORD_BYTES
    assert [p for _i, p, _b in got] == [0, 30 * per_record, 55 * per_record, 80 * per_record]
    assert np.concatenate([b.t_ns for _i, _p, b in got]).tolist() == list(range(97))
    again = list(segments.steps(Reader()))
    assert [(i, p, b.t_ns.tolist()) for i, p, b in again] == [(i, p, b.t_ns.tolist()) for i, p, b in got]


def test_a_later_segment_skipping_the_start_gets_the_very_steps_of_a_full_reading(monkeypatch):
    """Steps before a later segment's warm-up are numbered and placed but not built: the steps it
    does get are the ones a full reading gives, index, place and records alike."""
    import numpy as np
    from buswitness.records import RecordBatch
    monkeypatch.setattr(segments, "STEP_RECORDS", 25)
    monkeypatch.setattr(segments, "STEP_BYTES", 70)
    rng = np.random.default_rng(3)
    blocks = [rng.integers(1, 6, size=n) for n in rng.choice([0, 1, 3, 10, 24, 25, 26, 60], size=80)]

    class Reader:
        def iter_batches(self):
            t = 0
            for lengths in blocks:
                n = len(lengths)
                yield RecordBatch(np.arange(t, t + n, dtype=np.int64), lengths.astype(np.int64),
                                  np.zeros(n, np.uint8), np.zeros(n, np.uint8),
                                  np.zeros(int(lengths.sum()), np.uint8))
                t += n

    full = [(i, p, b.t_ns.tolist()) for i, p, b in segments.steps(Reader())]
    assert len(full) > 20
    for skip in sorted({p for _i, p, _b in full} | {1, 500, 10**9}):
        got = [(i, p, b.t_ns.tolist()) for i, p, b in segments.steps(Reader(), skip)]
        assert got == [s for s in full if s[1] >= skip], skip


def _in_small_blocks(tmp_path: Path, scenario: str, seconds: float, seed: int, per_block: int = 40) -> Path:
    """A simulated capture written in many small blocks, as a recording writes a busy line."""
    sim = simulate(load_scenario(scenario), duration_s=seconds, seed=seed)
    path = tmp_path / f"{scenario}-blocks.bwcap"
    with CaptureWriter(path, sim.header, fsync_interval_s=3600.0, flush_interval_s=3600.0,
                       max_block_records=per_block) as writer:
        for batch in sim.batches():
            writer.append_batch(batch)
    return path


def _block_at(path: Path, share: float) -> int:
    """Byte offset of the first block that starts at or after ``share`` of the file."""
    data = path.read_bytes()
    return data.index(BLOCK_SYNC, int(len(data) * share))


def test_a_later_segment_skims_the_capture_start_and_joins_a_full_reading(tmp_path, small_segments, monkeypatch):
    """The later segment passes over the blocks before its warm-up by their headers alone; where it
    takes over, the earlier segment's full reading stands at the same block with the same count
    before it, so the seam joins, the tables are one pass's, and the read report added up from the
    segments' readers is the one a single reading gives."""
    path = _in_small_blocks(tmp_path, "saturated115200", 90.0, 11)
    monkeypatch.setattr(segments, "WARM_BYTES", path.stat().st_size // 8)  # a regular line joins after it
    reader, cfg, serial = _one_pass(path)
    plan = segments.Plan(path.stat().st_size, 2)
    parts = [segments.run_segment([str(path)], reader.header, cfg, plan, k, keep_tables=True) for k in range(2)]
    head = parts[1].head_watch
    assert head is not None and head.place > plan.warm(1) // 2
    assert head.report.blocks == 1  # of all the blocks before its warm-up, it read only the first (the clock's anchor)
    assert segments.seams_agree(parts) == []
    _assert_same_tables(serial, [o for p in parts for o in p.tables])
    assert asdict(segments.read_report(parts)) == asdict(reader.report)


@pytest.mark.parametrize("where", ["skimmed", "after the seam", "cut-off tail"])
def test_damage_anywhere_is_reported_by_segments_as_one_pass_reports_it(tmp_path, small_segments, monkeypatch,
                                                                       where):
    """A damaged block where the later segment only skimmed is passed over as a full reading passes
    over it (its checksum is checked), so the seam joins; so it does with damage after the seam or
    a cut-off tail, and the segments' read reports add up to one reading's."""
    path = _in_small_blocks(tmp_path, "saturated115200", 90.0, 11)
    monkeypatch.setattr(segments, "WARM_BYTES", path.stat().st_size // 8)
    data = bytearray(path.read_bytes())
    if where == "cut-off tail":
        del data[-7:]
    else:
        at = _block_at(path, 0.15 if where == "skimmed" else 0.85)
        data[at + 20] ^= 0x5A  # a byte of the block's records: its checksum no longer matches
    path.write_bytes(bytes(data))
    notes: list = []
    one = analyze(CaptureReader(path), AnalysisOptions(jobs=1))
    two = analyze(CaptureReader(path), AnalysisOptions(jobs=2, notice=notes.append))
    assert not one.damage.clean
    assert two.damage == one.damage
    assert _summary(two) == _summary(one)
    assert not any("one pass" in n for n in notes), notes
