"""Damaged capture files and hex text: every readable record kept, only typed errors, never a crash.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

import random

import pytest
from buswitness.capture.fileformat import CaptureHeader, CaptureReader, CaptureWriter, PortInfo, Record
from buswitness.capture.sources import open_capture
from buswitness.decode.timing import SerialFormat
from buswitness.errors import BuswitnessError
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

RECORDS = [Record(i % 2, 1_000 * i, bytes([(i * 7 + k) % 256 for k in range(i % 9)]), 0) for i in range(60)]


@pytest.fixture(scope="module")
def small_capture(tmp_path_factory):
    path = tmp_path_factory.mktemp("cap") / "small.bwcap"
    header = CaptureHeader.new(SerialFormat(), [PortInfo(0, "a"), PortInfo(1, "b")])
    with CaptureWriter(path, header, max_block_records=8) as w:
        for r in RECORDS:
            w.append(r.port, r.t_ns, r.data, r.flags)
    return path.read_bytes()


def read_all(path):
    reader = CaptureReader(path, single_file=True)
    return list(reader.iter_records()), reader.report


def test_truncation_at_every_offset_keeps_a_prefix_or_says_why(small_capture, tmp_path):
    path = tmp_path / "t.bwcap"
    header_end = None
    for cut in range(len(small_capture) + 1):
        path.write_bytes(small_capture[:cut])
        try:
            got, report = read_all(path)
        except BuswitnessError as exc:
            assert header_end is None, f"cut {cut}: refused after a readable header: {exc}"
            continue
        header_end = header_end if header_end is not None else cut
        assert got == RECORDS[: len(got)], f"cut {cut}"
        # A cut exactly between two blocks looks like a complete shorter file; anywhere else it is reported.
        assert report.truncated_tail or len(got) % 8 == 0 or len(got) == len(RECORDS)
    assert header_end is not None
    path.write_bytes(small_capture)
    assert read_all(path)[0] == RECORDS


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(flips=st.lists(st.tuples(st.integers(min_value=0), st.integers(min_value=1, max_value=255)),
                      min_size=1, max_size=6))
def test_flipped_bytes_lose_only_damaged_blocks(small_capture, tmp_path, flips):
    data = bytearray(small_capture)
    for pos, mask in flips:
        data[pos % len(data)] ^= mask
    path = tmp_path / "f.bwcap"
    path.write_bytes(bytes(data))
    try:
        got, report = read_all(path)
    except BuswitnessError:
        return  # the header itself was hit: a typed error, as documented
    # Every record returned is a real one, in order, and nothing outside damaged blocks is lost.
    positions = [RECORDS.index(r) for r in got]
    assert positions == sorted(positions)
    assert len(got) >= len(RECORDS) - 8 * len(flips) - 8
    if len(got) < len(RECORDS):
        assert not report.clean


@settings(max_examples=200, deadline=None)
@given(text=st.text(max_size=400))
def test_any_text_as_hex_capture_gives_records_or_a_typed_error(tmp_path_factory, text):
    path = tmp_path_factory.mktemp("hex") / "x.hex"
    path.write_text(text, encoding="utf-8")
    for mode in ("stop", "skip"):
        try:
            src = open_capture(path, kind="hex", on_bad_line=mode)
            for batch in src.iter_batches():
                assert int(batch.length.sum()) == batch.payload.size
        except BuswitnessError as exc:
            assert mode == "stop", f"skip mode raised: {exc}"


@settings(max_examples=100, deadline=None)
@given(blob=st.binary(max_size=2000))
def test_any_bytes_as_capture_give_a_typed_error_or_records(tmp_path_factory, blob):
    path = tmp_path_factory.mktemp("bin") / "x.bwcap"
    path.write_bytes(blob)
    try:
        src = open_capture(path)
        list(src.iter_batches())
    except BuswitnessError:
        pass


def test_random_garbage_after_a_good_capture_is_skipped(small_capture, tmp_path):
    rnd = random.Random(5)
    path = tmp_path / "g.bwcap"
    path.write_bytes(small_capture + bytes(rnd.randrange(256) for _ in range(5000)))
    got, report = read_all(path)
    assert got == RECORDS
    assert report.bytes_skipped > 0
