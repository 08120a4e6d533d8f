"""Control characters from outside (capture headers, hex-file comments, port names, notes, station maps,
file names) never reach the terminal raw: ``inspect``, ``analyze``, ``evidence``, ``record``'s status
line and every error line show them as visible escapes.

Source: ESC (0x1b), BEL (0x07), CSI (0x9b) and the right-to-left override (U+202E) are the
control characters of ECMA-48 and Unicode UAX #9 (from memory); every other check compares with
what the test itself wrote.
"""

from __future__ import annotations

import io
import json
import struct
import subprocess
import sys
import time
import zlib
from types import SimpleNamespace

from buswitness.capture.fileformat import MAGIC, CaptureHeader, CaptureWriter, PortInfo
from buswitness.decode import SerialFormat
from buswitness.textsafe import visible

HOSTILE = "\x1b[2J\x1b]0;owned\x07\x9b31m\u202eevil\nstate        complete"
RAW = ("\x1b", "\x07", "\x9b", "\u202e")


def cli(*args, cwd):
    return subprocess.run([sys.executable, "-m", "buswitness.cli.main", *map(str, args)], cwd=cwd, check=False,
                          capture_output=True, text=True, timeout=120)


def assert_no_raw_controls(text: str) -> None:
    for c in RAW:
        assert c not in text, repr(text)


def test_visible_escapes_controls_and_keeps_ordinary_text():
    assert visible("a\x1b[2Jb") == "a\\x1b[2Jb"
    assert visible("\x9b\x07\x00\x7f") == "\\x9b\\x07\\x00\\x7f"
    assert visible("\u202egnp.exe") == "\\u202egnp.exe"
    assert visible("line\nnext") == "line\\x0anext"
    assert visible("line\nnext", keep_newlines=True) == "line\nnext"
    assert visible("Pumpe Süd, 漢字, 42 °C") == "Pumpe Süd, 漢字, 42 °C"


def crafted_capture(path):
    header = CaptureHeader.new(SerialFormat.parse("8E1", 19200), [PortInfo(0, HOSTILE, 16.0, "sysfs")],
                               notes=HOSTILE)
    header.host = HOSTILE
    with CaptureWriter(path, header) as w:
        for i in range(20):
            w.append(0, header.start_monotonic_ns + i * 20_000_000,
                     b"\x01\x03\x00\x0a\x00\x02\xe4\x09" if i % 2 == 0 else b"\x01\x03\x04\x00\x41\x00\xc8\xab\xb1")
    return path


def test_inspect_shows_header_text_with_escapes(tmp_path):
    crafted_capture(tmp_path / "c.bwcap")
    r = cli("inspect", "c.bwcap", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert_no_raw_controls(r.stdout)
    assert "notes        \\x1b[2J\\x1b]0;owned\\x07\\x9b31m\\u202eevil\\x0astate        complete" in r.stdout
    assert [line for line in r.stdout.splitlines() if line.startswith("state")] == ["state        complete"]


def test_inspect_shows_hex_comment_settings_with_escapes(tmp_path):
    (tmp_path / "c.hex").write_text("# port: \x1b[31mCOM9\n# notes: \x1b]0;owned\x07\n"
                                    "0.004 01 03 00 0A 00 02 E4 09\n", encoding="utf-8")
    r = cli("inspect", "c.hex", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert_no_raw_controls(r.stdout)
    assert "\\x1b[31mCOM9" in r.stdout and "\\x1b]0;owned\\x07" in r.stdout


def test_analyze_and_evidence_show_station_names_and_paths_with_escapes(tmp_path):
    crafted_capture(tmp_path / "c.bwcap")
    (tmp_path / "s.toml").write_text('[stations.1]\nname = "\\u001b[2JPump\\u202e"\n', encoding="utf-8")
    out = "out\x1b[2J.html"
    for r in (cli("analyze", "c.bwcap", "--stations", "s.toml", "--no-progress", "--html", out, cwd=tmp_path),
              cli("evidence", "c.bwcap", "--stations", "s.toml", "--station", "1", "--no-progress", "-o", out,
                  cwd=tmp_path)):
        assert r.returncode == 0, r.stderr
        assert_no_raw_controls(r.stdout + r.stderr)
        assert "\\x1b[2JPump\\u202e" in r.stdout and "out\\x1b[2J.html" in r.stdout


def test_error_lines_show_file_names_with_escapes(tmp_path):
    r = cli("inspect", "no\x1b[2Jsuch\nfile.bwcap", cwd=tmp_path)
    assert r.returncode == 3
    assert_no_raw_controls(r.stderr)
    assert r.stderr.strip() == "buswitness inspect: no\\x1b[2Jsuch\\x0afile.bwcap: no such file"


def test_crafted_header_damage_line_shows_the_value_with_escapes(tmp_path):
    path = crafted_capture(tmp_path / "c.bwcap")
    data = path.read_bytes()
    n = struct.unpack_from("<I", data, len(MAGIC) + 2)[0]
    start = len(MAGIC) + 6
    header = json.loads(data[start:start + n])
    header["timing"] = "\x1b[2J"
    raw = json.dumps(header).encode("utf-8")
    path.write_bytes(data[:len(MAGIC) + 2] + struct.pack("<I", len(raw)) + raw + struct.pack("<I", zlib.crc32(raw))
                     + data[start + n + 4:])
    r = cli("analyze", "c.bwcap", "--no-progress", cwd=tmp_path)
    assert r.returncode == 3 and len(r.stderr.strip().splitlines()) == 1
    assert_no_raw_controls(r.stderr)


def test_record_status_line_and_summary_show_port_names_with_escapes():
    from buswitness.cli.cmd_record import status_renderable, summary
    from rich.console import Console

    stats = [SimpleNamespace(name=HOSTILE, connected=False, last_error="\x1b[5mgone", bytes=10, records=2, reads=2,
                             line_errors=0, breaks=0, disconnects=0, reopens=0, lost_reads=0)]
    rec = SimpleNamespace(start_ns=time.monotonic_ns() - 10**9, current_part=None, stats=stats, error=None,
                          writer=SimpleNamespace(parts=[HOSTILE], bytes_written=10, records_written=2))
    buf = io.StringIO()
    Console(file=buf, width=300, color_system=None, force_terminal=False).print(status_renderable(rec))
    assert_no_raw_controls(buf.getvalue())
    assert "\\x1b[2J" in buf.getvalue() and "\\x1b[5mgone" in buf.getvalue()
    text = summary(rec)
    assert_no_raw_controls(text)
    assert "\\x1b]0;owned\\x07" in text
