"""The capture file: round trips, cut-off tails, rotation, damage and bounded-memory streaming.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

import os
import struct
import tracemalloc

import numpy as np
import pytest
from buswitness.capture.fileformat import (
    FLAG_LINE_ERROR,
    FLAG_REOPENED,
    FORMAT_VERSION,
    MAGIC,
    CaptureHeader,
    CaptureReader,
    CaptureWriter,
    PortInfo,
    Record,
    part_path,
    read_header,
)
from buswitness.decode.timing import SerialFormat
from buswitness.errors import InputFileError, NotACaptureError, OutputError, UnsupportedVersionError


def make_header(**kw):
    return CaptureHeader.new(SerialFormat.parse("8E1", 19200), [PortInfo(0, "/dev/ttyUSB0", 16.0, "sysfs")],
                             notes="pump station bus 2", **kw)


def write(path, records, **kw):
    with CaptureWriter(path, make_header(), **kw) as w:
        for r in records:
            w.append(r.port, r.t_ns, r.data, r.flags)
    return w


RECORDS = [Record(0, 1_000_000 * i, bytes([i % 256]) * (i % 7), FLAG_LINE_ERROR if i % 11 == 0 else 0)
           for i in range(1, 500)]


def test_records_round_trip_with_header(tmp_path):
    path = tmp_path / "night.bwcap"
    write(path, RECORDS, max_block_records=64)
    reader = CaptureReader(path)
    assert list(reader.iter_records()) == RECORDS
    assert reader.header.serial == SerialFormat.parse("8E1", 19200)
    assert reader.header.ports[0].latency_ms == 16.0
    assert reader.header.notes == "pump station bus 2"
    assert reader.header.format_version == FORMAT_VERSION
    assert reader.report.clean


def test_capture_file_is_private_to_its_owner(tmp_path):
    path = tmp_path / "c.bwcap"
    write(path, RECORDS[:3])
    assert os.stat(path).st_mode & 0o077 == 0


def test_writer_refuses_to_overwrite(tmp_path):
    path = tmp_path / "c.bwcap"
    path.write_bytes(b"precious")
    with pytest.raises(OutputError, match="already exists"):
        CaptureWriter(path, make_header())
    assert path.read_bytes() == b"precious"


def test_cut_off_last_block_keeps_every_complete_record(tmp_path):
    path = tmp_path / "c.bwcap"
    write(path, RECORDS, max_block_records=100)
    data = path.read_bytes()
    # Cut inside the payload of the last block: a crash mid-write.
    path.write_bytes(data[:-40])
    reader = CaptureReader(path)
    got = list(reader.iter_records())
    assert reader.report.truncated_tail
    assert got == RECORDS[: len(got)]
    assert len(got) >= 400 + 1  # 4 whole blocks plus salvaged records of the fifth
    assert reader.report.truncated_records_kept == len(got) - 400


@pytest.mark.parametrize("cut", range(0, 80, 7))
def test_truncation_anywhere_never_raises_after_the_header(tmp_path, cut):
    path = tmp_path / "c.bwcap"
    write(path, RECORDS[:50], max_block_records=10)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) - cut])
    got = list(CaptureReader(path).iter_records())
    assert got == RECORDS[: len(got)]


def test_damaged_block_is_skipped_and_the_rest_is_kept(tmp_path):
    path = tmp_path / "c.bwcap"
    write(path, RECORDS[:100], max_block_records=10)
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))
    reader = CaptureReader(path)
    got = list(reader.iter_records())
    assert 80 <= len(got) <= 90
    assert all(r in RECORDS for r in got)
    assert reader.report.bad_blocks + (reader.report.bytes_skipped > 0) >= 1


def test_rotated_set_of_three_parts_reads_back_as_one(tmp_path):
    base = tmp_path / "night.bwcap"
    recs = [Record(0, i * 10_000_000, b"\x01\x03\x00\x00\x00\x01\x84\x0a") for i in range(300)]
    w = write(base, recs, rotate_ns=1_000_000_000, max_block_records=10)
    assert len(w.parts) == 3
    assert w.parts[1] == part_path(base, 1) == tmp_path / "night.0001.bwcap"
    for p in w.parts:
        assert read_header(p).capture_id == read_header(base).capture_id
    assert list(CaptureReader(base).iter_records()) == recs
    # Opening any part finds the whole set.
    assert list(CaptureReader(w.parts[2]).iter_records()) == recs


def test_rotation_by_size(tmp_path):
    base = tmp_path / "s.bwcap"
    recs = [Record(0, i, bytes(100)) for i in range(1000)]
    w = write(base, recs, rotate_bytes=20_000, max_block_records=50)
    assert len(w.parts) >= 4
    assert all(p.stat().st_size < 20_000 + 6000 for p in w.parts)
    assert list(CaptureReader(base).iter_records()) == recs


def test_missing_middle_part_is_reported_and_the_rest_kept(tmp_path):
    base = tmp_path / "night.bwcap"
    recs = [Record(0, i * 10_000_000, b"\x05") for i in range(300)]
    w = write(base, recs, rotate_ns=1_000_000_000, max_block_records=10)
    w.parts[1].unlink()
    reader = CaptureReader(base)
    got = list(reader.iter_records())
    assert reader.report.missing_parts == [1]
    assert len(got) == 200
    assert "missing" in reader.report.summary()


def test_file_of_another_kind_is_refused_by_name(tmp_path):
    path = tmp_path / "photo.jpg"
    path.write_bytes(b"\xff\xd8\xff\xe0" + bytes(100))
    with pytest.raises(NotACaptureError, match="photo.jpg.*not a buswitness capture"):
        CaptureReader(path)


def test_empty_file_is_refused(tmp_path):
    path = tmp_path / "empty.bwcap"
    path.write_bytes(b"")
    with pytest.raises(NotACaptureError, match="empty"):
        CaptureReader(path)


def test_directory_is_refused(tmp_path):
    with pytest.raises(InputFileError, match="directory"):
        CaptureReader(tmp_path)


def test_unknown_version_names_file_and_versions(tmp_path):
    path = tmp_path / "future.bwcap"
    write(path, RECORDS[:5])
    data = bytearray(path.read_bytes())
    struct.pack_into("<H", data, len(MAGIC), 99)
    path.write_bytes(bytes(data))
    with pytest.raises(UnsupportedVersionError, match=r"future.bwcap.*version 99.*1 to 1"):
        CaptureReader(path)


def test_flags_only_marker_record_round_trips(tmp_path):
    path = tmp_path / "m.bwcap"
    recs = [Record(0, 5, b"\x01"), Record(0, 9, b"", FLAG_REOPENED), Record(1, 10, b"\x02")]
    write(path, recs)
    assert list(CaptureReader(path).iter_records()) == recs


def test_batches_are_columns(tmp_path):
    path = tmp_path / "b.bwcap"
    write(path, RECORDS[:20])
    batch = next(CaptureReader(path).iter_batches())
    assert batch.t_ns.dtype == np.int64
    assert int(batch.length.sum()) == batch.payload.size
    assert list(batch.records()) == RECORDS[:20]


def test_a_million_records_stream_in_bounded_memory(tmp_path):
    path = tmp_path / "big.bwcap"
    payload = bytes(range(8))
    with CaptureWriter(path, make_header()) as w:
        for i in range(1_000_000):
            w.append(0, i * 1000, payload)
    assert path.stat().st_size > 19_000_000
    tracemalloc.start()
    count = total = 0
    for batch in CaptureReader(path).iter_batches():
        count += len(batch)
        total += int(batch.length.sum())
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert count == 1_000_000 and total == 8_000_000
    assert peak < 8_000_000  # a few blocks at most, never the 20 MB file


def test_append_batch_reads_back_like_appending_each_record(tmp_path):
    from buswitness.capture.fileformat import RecordBatch
    batch = RecordBatch.from_records(RECORDS * 50)
    path = tmp_path / "bulk.bwcap"
    with CaptureWriter(path, make_header(), max_block_records=100) as w:
        w.append(0, 1, b"\x01")
        w.append_batch(batch)
    back = list(CaptureReader(path).iter_records())
    assert back == [Record(0, 1, b"\x01")] + RECORDS * 50
    assert w.records_written == 1 + len(batch)
