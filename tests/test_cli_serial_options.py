"""``--baud`` and ``--format`` each replace only their own half of the input's serial setting.

Source: the checks compare with settings the test itself wrote into its inputs; the defaults
(19200 baud, 8E1) are the Modbus over serial line specification's (MSL V1.02 §2.5.1: even
parity required, 19200 baud the default rate) as the project's SerialFormat states them.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from buswitness.capture.fileformat import CaptureHeader, CaptureWriter, PortInfo
from buswitness.capture.sources import open_capture
from buswitness.cli.main import main
from buswitness.decode.timing import SerialFormat

SAMPLES = Path(__file__).resolve().parent.parent / "sample_captures"

# one FC03 poll and its answer (MSL V1.02 appendix example framing; CRC computed by the project's own
# crc16 and checked in tests/test_crc.py against crcmod's predefined CRC-16/MODBUS)
_POLL = bytes.fromhex("01 03 00 6b 00 03 74 17")


def _hex_file(path, baud: int | None = 9600, fmt: str | None = "8E1"):
    lines = []
    if baud is not None:
        lines.append(f"# baud: {baud}")
    if fmt is not None:
        lines.append(f"# format: {fmt}")
    lines.append(f"12.004311 {_POLL.hex(' ')}")
    path.write_text("\n".join(lines) + "\n")
    return path


def _bwcap(path, serial: SerialFormat):
    header = CaptureHeader(serial=serial, ports=[PortInfo(0, "test")], start_utc="2026-11-30T22:00:00+00:00",
                           start_monotonic_ns=5_000_000_000, source="record")
    with CaptureWriter(path, header) as w:
        w.append(0, 5_100_000_000, _POLL)
    return path


@pytest.mark.parametrize("kind", ["hex", "capture"])
def test_format_alone_keeps_the_files_baud_rate(tmp_path, kind):
    path = (_hex_file(tmp_path / "a.hex") if kind == "hex"
            else _bwcap(tmp_path / "a.bwcap", SerialFormat(9600, 8, "E", 1)))
    src = open_capture(path, char_format="8N2")
    assert src.header.serial == SerialFormat(9600, 8, "N", 2)


@pytest.mark.parametrize("kind", ["hex", "capture"])
def test_baud_alone_keeps_the_files_character_format(tmp_path, kind):
    path = (_hex_file(tmp_path / "a.hex", fmt="8N2") if kind == "hex"
            else _bwcap(tmp_path / "a.bwcap", SerialFormat(9600, 8, "N", 2)))
    src = open_capture(path, baud=38400)
    assert src.header.serial == SerialFormat(38400, 8, "N", 2)


def test_a_file_that_states_nothing_fills_the_missing_half_from_the_defaults(tmp_path):
    src = open_capture(_hex_file(tmp_path / "a.hex", baud=None, fmt=None), char_format="8N1")
    assert src.header.serial == SerialFormat(19200, 8, "N", 1)
    raw = tmp_path / "a.bin"
    raw.write_bytes(_POLL)
    assert open_capture(raw, kind="raw", baud=9600).header.serial == SerialFormat(9600, 8, "E", 1)


def test_neither_option_keeps_the_files_setting(tmp_path):
    src = open_capture(_hex_file(tmp_path / "a.hex", baud=9600, fmt="8O1"))
    assert src.header.serial == SerialFormat(9600, 8, "O", 1)


def test_overridden_replaces_each_half_on_its_own():
    base = SerialFormat(9600, 7, "E", 1)
    assert base.overridden() is base
    assert base.overridden(short_form="8N2") == SerialFormat(9600, 8, "N", 2)
    assert base.overridden(baud=115200) == SerialFormat(115200, 7, "E", 1)
    assert base.overridden(4800, "8N1") == SerialFormat(4800, 8, "N", 1)


def test_analyze_format_on_a_9600_file_keeps_9600(tmp_path):
    out = tmp_path / "s.json"
    assert main(["analyze", str(_hex_file(tmp_path / "a.hex")), "--format", "8N2", "--json", str(out),
                 "--no-progress"]) == 0
    assert json.loads(out.read_text())["capture"]["serial"] == {"baud": 9600, "format": "8N2"}


def test_analyze_baud_alone_keeps_the_files_format(tmp_path):
    out = tmp_path / "s.json"
    path = _bwcap(tmp_path / "a.bwcap", SerialFormat(9600, 8, "N", 2))
    assert main(["analyze", str(path), "--baud", "19200", "--json", str(out), "--no-progress"]) == 0
    assert json.loads(out.read_text())["capture"]["serial"] == {"baud": 19200, "format": "8N2"}


def test_evidence_format_on_a_9600_file_keeps_9600(tmp_path):
    html = tmp_path / "e.html"
    path = tmp_path / "a.hex"
    path.write_text((SAMPLES / "tiny-poll.hex").read_text().replace("# baud: 19200", "# baud: 9600"))
    assert main(["evidence", str(path), "--station", "1", "--format", "8N2", "-o", str(html),
                 "--no-progress"]) == 0
    assert "9600 8N2" in html.read_text()


def test_inspect_baud_alone_keeps_the_files_format(tmp_path, capsys):
    assert main(["inspect", str(_hex_file(tmp_path / "a.hex", fmt="8O1")), "--baud", "4800"]) == 0
    assert re.search(r"serial\s+4800 8O1", capsys.readouterr().out)


@pytest.mark.parametrize("verb", ["analyze", "evidence", "inspect"])
def test_help_states_the_defaults_of_baud_and_format(verb, capsys):
    with pytest.raises(SystemExit):
        main([verb, "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "default: the capture's own setting, else 19200" in text
    assert "default: the capture's own setting, else 8E1" in text
    assert "changes only the baud rate" in text and "changes only the format" in text


def test_record_help_states_its_defaults(capsys):
    with pytest.raises(SystemExit):
        main(["record", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "(default: 19200)" in text and "(default: 8E1)" in text


def test_simulate_help_states_the_scenarios_setting_is_the_default(capsys):
    with pytest.raises(SystemExit):
        main(["simulate", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "override the bus baud rate only (default: the scenario's own)" in text
