"""Hostile and broken inputs, in-process: impossible record times, read errors (EIO) part-way through a
file, inputs and outputs that are not regular files, text inputs too large to read whole, and
numeric options outside their range or not written in ASCII digits.

Source: the checks compare with what each test itself wrote (records, bytes, offsets) and with
the project's own contract (docs/reliability.md); no check value comes from outside the project.
"""

from __future__ import annotations

import argparse
import os
import sys

import eiofile
import numpy as np
import pytest
from buswitness.capture.fileformat import (
    MAX_SPAN_NS,
    CaptureHeader,
    CaptureReader,
    CaptureWriter,
    PortInfo,
    read_header,
)
from buswitness.capture.importers import MAX_LINE_CHARS
from buswitness.capture.sources import open_capture
from buswitness.cli.main import build_parser
from buswitness.decode import SerialFormat
from buswitness.errors import InputFileError, OutputError, UsageError
from buswitness.fsutil import (
    atomic_write,
    check_input_file,
    check_output_dir,
    check_output_path,
    read_text_input,
)

POLL = b"\x01\x03\x00\x0a\x00\x02\xe4\x09"  # the sample poll of sample_captures/tiny-poll.hex
ANSWER = b"\x01\x03\x04\x00\x41\x00\xc8\xab\xb1"


def write_capture(path, times, per_block=10):
    header = CaptureHeader.new(SerialFormat.parse("8E1", 19200), [PortInfo(0, "/dev/ttyUSB0", 16.0, "sysfs")])
    header.start_monotonic_ns = times[0]
    with CaptureWriter(path, header, max_block_records=per_block) as w:
        for i, t in enumerate(times):
            w.append(0, t, POLL if i % 2 == 0 else ANSWER)
            if (i + 1) % per_block == 0:
                w.flush()
    return path


# -- impossible record times -------------------------------------------------------------------------


def test_records_with_impossible_times_are_left_out_and_counted(tmp_path):
    # Before: a record 2**62 ns after the first made per-minute figures for 146 years (a 10 GB
    # allocation), and one near 2**63 overflowed the decoder's arithmetic.
    t0 = 10**12
    times = [t0 + i * 20_000_000 for i in range(40)]
    times[15] = t0 + MAX_SPAN_NS + 1
    times[25] = 2**63 - 1
    times[26] = -(2**63)
    path = write_capture(tmp_path / "times.bwcap", times)
    reader = CaptureReader(path)
    kept = np.concatenate([b.t_ns for b in reader.iter_batches()])
    assert len(kept) == 37 and kept.max() - kept.min() < MAX_SPAN_NS
    assert reader.report.bad_time_records == 3 and not reader.report.clean
    assert any("impossible time" in w for w in reader.report.warnings)


def test_a_capture_whose_first_record_has_an_impossible_time_anchors_on_the_first_possible_one(tmp_path):
    t0 = 10**12
    times = [2**63 - 5] + [t0 + i * 20_000_000 for i in range(1, 20)]
    reader = CaptureReader(write_capture(tmp_path / "first.bwcap", times))
    batches = list(reader.iter_batches())
    payload = np.concatenate([b.payload for b in batches]).tobytes()
    assert sum(len(b) for b in batches) == 19 and reader.report.bad_time_records == 1
    assert payload == b"".join(ANSWER if i % 2 else POLL for i in range(1, 20))  # bytes stay with their records


# -- read errors (EIO) -------------------------------------------------------------------------------


def test_read_error_part_way_keeps_the_records_before_it_and_says_where(tmp_path):
    path = write_capture(tmp_path / "eio.bwcap", [10**12 + i * 20_000_000 for i in range(100)])
    whole = sum(len(b) for b in CaptureReader(path).iter_batches())
    eiofile.install(path, fail_at=path.stat().st_size // 2)
    try:
        reader = CaptureReader(path)
        kept = sum(len(b) for b in reader.iter_batches())
    finally:
        eiofile.uninstall()
    assert 0 < kept < whole
    assert reader.report.read_error == "Input/output error" and not reader.report.clean
    assert any("read error at about byte" in w and "kept" in w for w in reader.report.warnings)


def test_read_error_in_the_header_is_one_input_error(tmp_path):
    path = write_capture(tmp_path / "eio.bwcap", [10**12 + i * 20_000_000 for i in range(10)])
    eiofile.install(path, fail_at=0)
    try:
        with pytest.raises(InputFileError, match="cannot be read .Input/output error"):
            open_capture(path)
        with pytest.raises(InputFileError, match="cannot be read .Input/output error"):
            read_header(path)
    finally:
        eiofile.uninstall()


def test_read_error_in_hex_text_keeps_the_lines_before_it(tmp_path):
    path = tmp_path / "eio.hex"
    path.write_text("".join(f"{i * 0.02:.3f} 01 03 00 0A 00 02 E4 09\n" for i in range(2000)), encoding="utf-8")
    src = open_capture(path)
    eiofile.install(path, fail_at=path.stat().st_size // 2)
    try:
        kept = sum(len(b) for b in src.iter_batches())
    finally:
        eiofile.uninstall()
    assert 0 < kept < 2000 and src.report.read_error and not src.report.clean
    assert any("read error after line" in w for w in src.report.warnings)


def test_analysis_of_a_capture_with_a_read_error_keeps_and_reports(tmp_path):
    from buswitness.analysis import AnalysisOptions, analyze
    from buswitness.analysis.summary import summary_dict, text_summary

    path = write_capture(tmp_path / "eio.bwcap", [10**12 + i * 20_000_000 for i in range(200)])
    eiofile.install(path, fail_at=path.stat().st_size // 2)
    try:
        result = analyze(open_capture(path), AnalysisOptions(progress=False))
    finally:
        eiofile.uninstall()
    assert 0 < result.bus.frames < 200
    assert "read error" in text_summary(result)
    damage = summary_dict(result)["capture"]["damage"]
    assert not damage["clean"] and any("read error" in w for w in damage["warnings"])


# -- not a regular file ------------------------------------------------------------------------------


@pytest.fixture
def odd_paths(tmp_path):
    fifo = tmp_path / "fifo"
    os.mkfifo(fifo)
    folder = tmp_path / "folder"
    folder.mkdir()
    return {"a named pipe (FIFO)": fifo, "a character device": "/dev/zero", "a directory": folder}


def test_inputs_that_are_not_regular_files_are_refused_without_opening_them(odd_paths):
    for kind, path in odd_paths.items():
        with pytest.raises(InputFileError, match=f"is {kind.replace('(', '.').replace(')', '.')}, not a regular"):
            check_input_file(path)
        with pytest.raises(InputFileError, match="not a regular file"):
            open_capture(path, kind="raw", serial=SerialFormat())
        with pytest.raises(InputFileError, match="not a regular file"):
            read_text_input(path, "station map")


def test_outputs_that_are_not_regular_files_are_refused_except_the_terminal_streams(odd_paths, tmp_path):
    for path in odd_paths.values():
        with pytest.raises(OutputError, match="--html is"):
            check_output_path(path, "--html")
    check_output_dir(odd_paths["a directory"], "--csv")
    with pytest.raises(OutputError, match="not a folder"):
        check_output_dir(odd_paths["a named pipe (FIFO)"], "--csv")
    for stream in ("/dev/stdout", "/dev/stderr", "/dev/null", "/dev/fd/1"):
        check_output_path(stream, "--json")
    # The last line of defence: the atomic writer itself never blocks on a FIFO nobody reads.
    with pytest.raises(OutputError, match="nobody is reading this pipe"):
        with atomic_write(odd_paths["a named pipe (FIFO)"]) as f:
            f.write("x")
    with atomic_write("/dev/null") as f:
        f.write("fine")


def test_text_inputs_read_whole_have_a_size_limit(tmp_path):
    big = tmp_path / "stations.toml"
    big.write_bytes(b"# " + b"x" * 200 + b"\n" + b"[stations.7]\nname = 'a'\n")
    assert "stations.7" in read_text_input(big, "station map", max_bytes=1000)
    with pytest.raises(InputFileError, match="may be at most 100 bytes"):
        read_text_input(big, "station map", max_bytes=100)
    big.write_bytes(b"\xff\xfe")
    with pytest.raises(InputFileError, match="not UTF-8"):
        read_text_input(big, "station map")


def test_a_hex_file_with_no_line_breaks_is_a_bad_line_not_a_memory_hog(tmp_path):
    path = tmp_path / "oneline.hex"
    path.write_text("0.001 " + "01 " * (MAX_LINE_CHARS // 2) + "\n0.020 01 03 00 0A 00 02 E4 09\n", encoding="utf-8")
    src = open_capture(path, kind="hex", on_bad_line="skip")
    assert sum(len(b) for b in src.iter_batches()) == 1
    assert src.report.lines_skipped == 1 and "longer than" in src.report.warnings[0]
    with pytest.raises(InputFileError, match="line 1: longer than"):
        list(open_capture(path, kind="hex").iter_batches())


# -- numbers -----------------------------------------------------------------------------------------


def usage_error(argv):
    with pytest.raises(SystemExit) as exc:
        build_parser().parse_args(argv)
    return exc.value.code


@pytest.mark.parametrize("argv", [
    ["detect", "x", "--seconds", v] for v in ("nan", "inf", "-1", "0", "1e9", "\u0663", "3s", "1_0")
] + [
    ["detect", "x", "--top", v] for v in ("0", "-1", "1.5", "\u0663", "1e3", "99999999999999999999")
] + [
    ["simulate", "-o", "x.bwcap", "--duration", v] for v in ("8d", "inf", "nan", "\u0663\u0660s", "-5s", "0")
] + [
    ["demo", "--duration", v] for v in ("2d", "1e400", "\u0665h")
] + [
    ["simulate", "-o", "x.bwcap", "--latency-ms", v] for v in ("nan", "inf", "0", "1e300", "\u0661\u0666")
] + [
    ["simulate", "-o", "x.bwcap", "--seed", v] for v in ("-1", "\u0661", "1.0", "99999999999")
] + [
    ["evidence", "x", "--station", "\u0667"], ["analyze", "x", "--timeout", "\u0661\u0660\u0660"],
    ["record", "p", "-o", "x", "--duration", "400d"], ["record", "p", "-o", "x", "--rotate", "9999999TB"],
])
def test_numeric_options_outside_their_range_or_not_ascii_digits_are_usage_errors(argv, capsys):
    assert usage_error(argv) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and argv[-2] in err


@pytest.mark.parametrize("argv", [
    ["detect", "x", "--seconds", "0.5", "--top", "3"], ["simulate", "-o", "x.bwcap", "--duration", "7d"],
    ["demo", "--duration", "24h"], ["simulate", "-o", "x.bwcap", "--latency-ms", "16", "--seed", "0"],
    ["evidence", "x", "--station", "7"], ["analyze", "x", "--timeout", "200"],
])
def test_numeric_options_in_range_are_taken(argv):
    assert isinstance(build_parser().parse_args(argv), argparse.Namespace)


def test_a_port_that_is_not_a_serial_device_is_a_usage_error(odd_paths, tmp_path):
    from buswitness.cli.common import check_port

    for path in [*odd_paths.values(), sys.executable]:
        with pytest.raises(UsageError, match="not a serial port"):
            check_port(str(path))
    check_port("loop://")
    check_port(str(tmp_path / "not-plugged-in-yet"))


def test_hex_lines_more_than_a_year_from_the_start_are_bad_lines(tmp_path):
    # Before: a line at 9e9 s (285 years) passed and made per-minute figures for every minute in between.
    path = tmp_path / "far.hex"
    path.write_text("0.004 01 03 00 0A 00 02 E4 09\n9e9 01 03 04 00 41 00 C8 AB B1\n", encoding="utf-8")
    with pytest.raises(InputFileError, match="line 2: the time '9e9' is out of range .more than 366 days"):
        list(open_capture(path).iter_batches())
    src = open_capture(path, on_bad_line="skip")
    assert sum(len(b) for b in src.iter_batches()) == 1
