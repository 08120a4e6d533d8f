"""``record`` options and views: rotation, --until, the status line, reconnecting by USB serial number.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
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
    with pytest.raises(argparse.ArgumentTypeError, match="neither a duration"):
        rotate_arg("soon")


def test_rotation_by_size_gives_numbered_parts_that_read_back_as_one(tmp_path):
    out = tmp_path / "rot.bwcap"
    payload = sample_bytes(30000, seed=21)
    with PtyAdapter(tmp_path / "ttyR") as adapter:
        proc = subprocess.Popen([sys.executable, "-m", "buswitness.cli.main", "record", str(adapter.link), "-o",
                                 str(out), "--rotate", "8KB", "--quiet"], stderr=subprocess.PIPE, text=True)
        end = time.monotonic() + 20
        while not (out.exists() and out.stat().st_size) and time.monotonic() < end:
            time.sleep(0.05)
        # Slow enough that several one-second blocks are written, each one a rotation chance.
        adapter.send(payload, 76800, chunk=64)
        time.sleep(0.5)
        proc.terminate()
        _, err = proc.communicate(timeout=30)
    assert proc.returncode == 0, err
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
