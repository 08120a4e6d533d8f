"""``record`` options and views: rotation, --until, the status line, reconnecting by USB serial number.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import argparse
import time
from datetime import datetime

import pytest
from buswitness.capture import serialport
from buswitness.capture.fileformat import FLAG_REOPENED, CaptureReader
from buswitness.capture.recorder import Recorder, RecorderConfig
from buswitness.cli.cmd_record import rotate_arg, seconds_until, status_renderable, until_arg
from buswitness.decode.timing import SerialFormat
from ptyhelpers import PtyAdapter, sample_bytes
from rich.console import Console


def test_until_is_the_next_time_the_clock_shows_it():
    evening = datetime(2026, 12, 1, 18, 0, 0)
    assert seconds_until("07:00", evening) == 13 * 3600
    assert seconds_until("18:30", evening) == 1800
    assert seconds_until("18:00", evening) == 24 * 3600  # now means tomorrow, never zero
    with pytest.raises(argparse.ArgumentTypeError, match="not a time of day"):
        until_arg("25:00")


def test_rotate_takes_a_size_or_a_duration():
    assert rotate_arg("200MB") == ("bytes", 200_000_000)
    assert rotate_arg("1h") == ("time", 3600 * 10**9)
    assert rotate_arg("1h30m") == ("time", 5400 * 10**9)
    assert rotate_arg("1MB") == ("bytes", 1_000_000)
    with pytest.raises(argparse.ArgumentTypeError, match="needs a unit"):
        rotate_arg("soon")


@pytest.mark.parametrize("text", ["3600", "200", "0.5", "1e9"])
def test_rotate_without_a_unit_is_refused(text):
    with pytest.raises(argparse.ArgumentTypeError, match="needs a unit: a duration such as 1h"):
        rotate_arg(text)


@pytest.mark.parametrize("text, why", [("1s", "at least 1m"), ("59s", "at least 1m"), ("500ms", "needs a unit"),
                                       ("8KB", "at least 1MB"), ("999999B", "at least 1MB")])
def test_rotate_below_the_minimum_is_refused(text, why):
    with pytest.raises(argparse.ArgumentTypeError, match=why):
        rotate_arg(text)


def test_rotate_refusal_is_a_one_line_usage_error(capsys):
    from buswitness.cli.main import main

    with pytest.raises(SystemExit) as exc:
        main(["record", "/dev/ttyUSB9", "-o", "x.bwcap", "--rotate", "100"])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "needs a unit" in err


def test_rotation_by_size_gives_numbered_parts_that_read_back_as_one(tmp_path):
    out = tmp_path / "rot.bwcap"
    payload = sample_bytes(30000, seed=21)
    with PtyAdapter(tmp_path / "ttyR") as adapter:
        # Below the command line's 1MB minimum (MIN_ROTATE_BYTES), so the recorder is driven directly.
        rec = Recorder(RecorderConfig([str(adapter.link)], SerialFormat(), out, rotate_bytes=8000))
        rec.start()
        try:
            # Slow enough that several one-second blocks are written, each one a rotation chance.
            adapter.send(payload, 76800, chunk=64)
            time.sleep(0.5)
        finally:
            rec.join()
    reader = CaptureReader(out)
    assert len(reader.paths) >= 2 and reader.paths[1].name == "rot.0001.bwcap"
    assert b"".join(r.data for r in reader.iter_records()) == payload


def test_status_line_shows_elapsed_bytes_rate_part_and_last_error(tmp_path):
    with PtyAdapter(tmp_path / "ttyST") as adapter:
        rec = Recorder(RecorderConfig([str(adapter.link)], SerialFormat(), tmp_path / "st.bwcap"))
        rec.start()
        try:
            adapter.send(b"\x01\x02\x03" * 100, 115200)
            time.sleep(0.4)
            rec.stats[0].last_error = "port went away (test)"
            console = Console(record=True, width=200)
            console.print(status_renderable(rec))
            text = console.export_text()
        finally:
            rec.join()
    assert "recording 0:00:0" in text and "file st.bwcap" in text
    assert "300 B" in text and "B/s" in text and "last: port went away (test)" in text


def test_adapter_back_under_another_name_is_found_by_its_usb_serial_number(tmp_path, monkeypatch):
    first = tmp_path / "ttyUSB0"
    moved = tmp_path / "ttyUSB1"
    with PtyAdapter(first) as adapter:
        monkeypatch.setattr(serialport, "usb_serial_number", lambda device: "FT-TEST-0001")
        seen: list[str] = []
        rec = Recorder(RecorderConfig([str(first)], SerialFormat(), tmp_path / "moved.bwcap"),
                       on_message=seen.append)
        monkeypatch.setattr(serialport, "find_by_serial_number",
                            lambda number: str(moved) if number == "FT-TEST-0001" else None)
        rec.start()
        try:
            adapter.send(b"before", 115200)
            time.sleep(0.3)
            adapter.replug(moved)  # back as a new pty, under a new name only the serial number finds
            end = time.monotonic() + 15
            while not any("reopened" in m for m in seen) and time.monotonic() < end:
                time.sleep(0.05)
        finally:
            rec.join()
    assert any(f"now at {moved}" in m for m in seen), seen
    records = list(CaptureReader(tmp_path / "moved.bwcap").iter_records())
    assert records[0].data == b"before"
    assert any(r.flags & FLAG_REOPENED for r in records)
    assert rec.stats[0].reopens == 1


def test_roles_of_a_four_wire_bus_reach_the_decoder_through_the_header():
    from buswitness.capture.fileformat import CaptureHeader, PortInfo
    from buswitness.cli.cmd_record import config_from_args
    from buswitness.cli.common import roles_arg
    from buswitness.cli.main import build_parser
    from buswitness.decode import DecoderConfig
    args = build_parser().parse_args(["record", "/dev/a", "/dev/b", "-o", "x.bwcap",
                                                "--roles", "master,slaves"])
    cfg = config_from_args(args, args.ports)
    header = CaptureHeader(ports=[PortInfo(0, "/dev/a"), PortInfo(1, "/dev/b")], extra=dict(cfg.extra))
    assert DecoderConfig.from_header(header).port_roles == {0: "master", 1: "slaves"}
    with pytest.raises(argparse.ArgumentTypeError, match="one role per port"):
        roles_arg("master,sideways")
