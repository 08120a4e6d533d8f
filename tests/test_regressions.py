"""Every crash a fuzzer or property test found, kept as a test (fuzz/fuzz_reader.py, fuzz/fuzz_decoder.py, hypothesis).

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import json

import pytest
from buswitness.capture.sources import open_capture
from buswitness.errors import InputFileError


# fuzz_reader, 2026-12-02: a hex line whose time is a huge number (here "333...3", 88 digits) was taken
# for a calendar time and crashed datetime (OverflowError / ValueError), and a later line's huge
# time overflowed the nanosecond conversion. Now each such line is a bad line like any other.
@pytest.mark.parametrize("text, kept", [
    ("3" * 88 + " 01 03\n", 0),
    ("9e15 01 02\n", 0),          # year 285 million: past what a date can show
    ("1e300 01 02\n", 0),
    ("1.0 01\n1e300 01 02\n", 1),
    ("1e11 01\n-1e300 01\n", 1),  # an epoch start, then a time far before it
])
def test_hex_line_with_a_time_out_of_range_is_a_bad_line(tmp_path, text, kept):
    path = tmp_path / "huge-time.hex"
    path.write_text(text, encoding="utf-8")
    src = open_capture(path, kind="hex", on_bad_line="skip")
    assert sum(len(b) for b in src.iter_batches()) == kept
    assert any("out of range" in w for w in src.report.warnings)
    with pytest.raises(InputFileError, match=r"line \d: the time .* is out of range"):
        list(open_capture(path, kind="hex", on_bad_line="stop").iter_batches())


def test_last_representable_date_is_still_a_calendar_start(tmp_path):
    path = tmp_path / "far-future.hex"
    path.write_text("253402300799 01 02\n", encoding="utf-8")
    src = open_capture(path, kind="hex")
    assert src.header.start_utc.startswith("9999-12-31T23:59:59")
    assert sum(len(b) for b in src.iter_batches()) == 1


# test_reliability_headers (hypothesis), 2026-12-02: a header with "host_delay_ms": null and a valid
# checksum passed the reader and crashed DecoderConfig.from_header with a TypeError.
@pytest.mark.parametrize("key", ["host_delay_ms", "protocol"])
def test_null_decoder_setting_in_the_header_is_header_damage(tmp_path, key):
    from buswitness.capture.fileformat import MAGIC, CaptureReader
    from test_reliability_headers import base_capture, with_header
    data = base_capture(tmp_path / "base.bwcap")
    n = int.from_bytes(data[len(MAGIC) + 2:len(MAGIC) + 6], "little")
    header = json.loads(data[len(MAGIC) + 6:len(MAGIC) + 6 + n])
    header[key] = None
    (tmp_path / "null.bwcap").write_bytes(with_header(data, header))
    with pytest.raises(InputFileError, match=f"header is damaged.*{key}"):
        CaptureReader(tmp_path / "null.bwcap")
