"""Every verb probed with what an attacker or an unlucky user gives it: a FIFO, ``/dev/zero``, a directory,
a capture whose header says it started in the year 9999, and a file whose every read fails (EIO),
in each place the verb takes a path (input, ``--stations``, ``--scenario``, port, output).

Each run is a subprocess with a 5 s timeout (a hang fails as ``TimeoutExpired``): it must end
with exit 2 (usage) or 3 (input or output file) and exactly one line on stderr, no traceback.
The EIO file is simulated in the subprocess by ``tests/eiofile.py`` (a file object whose reads
fail), installed before the command line's ``main`` runs.
Source: the checks compare with the project's own contract (exit codes in DEVELOPERS.md, one
line per expected error); no check value comes from outside the project.
"""

from __future__ import annotations

import json
import os
import struct
import subprocess
import sys
import zlib
from pathlib import Path

import pytest
from buswitness.capture.fileformat import MAGIC, CaptureHeader, CaptureWriter, PortInfo
from buswitness.decode import SerialFormat

TESTS = Path(__file__).resolve().parent
TIMEOUT_S = 5

#: Where each verb takes a path; ``{}`` is replaced by the hostile path. ``kinds`` limits a place to
#: the hostile things that are wrong there (a regular file is a fine output for analyze).
ALL = ("fifo", "zero", "dir", "y9999", "eio")
SPECIAL = ("fifo", "zero", "dir")
PLACES = [
    ("analyze", ["analyze", "{}", "--no-progress"], ALL),
    ("analyze --stations", ["analyze", "good.bwcap", "--stations", "{}", "--no-progress"], ALL),
    ("analyze --html", ["analyze", "good.bwcap", "--html", "{}", "--no-progress"], SPECIAL),
    ("analyze --json", ["analyze", "good.bwcap", "--json", "{}", "--no-progress"], SPECIAL),
    ("analyze --csv", ["analyze", "good.bwcap", "--csv", "{}", "--no-progress"], ("fifo", "zero", "y9999")),
    ("evidence", ["evidence", "{}", "--station", "1", "--no-progress"], ALL),
    ("evidence --stations", ["evidence", "good.bwcap", "--station", "1", "--stations", "{}"], ALL),
    ("evidence -o", ["evidence", "good.bwcap", "--station", "1", "-o", "{}", "--no-progress"], SPECIAL),
    ("inspect", ["inspect", "{}"], ALL),
    ("detect", ["detect", "{}", "--seconds", "0.1"], ALL),
    ("record port", ["record", "{}", "-o", "new.bwcap", "--duration", "1s"], ALL),
    ("record -o", ["record", "loop://", "-o", "{}", "--duration", "1s"], ALL),
    ("watch port", ["watch", "{}", "--duration", "1s"], ALL),
    ("simulate --scenario", ["simulate", "--scenario", "{}", "-o", "new.bwcap", "--duration", "1s"], ALL),
    ("simulate -o", ["simulate", "-o", "{}", "--duration", "1s"], ALL),
    ("simulate --truth", ["simulate", "-o", "new.bwcap", "--truth", "{}", "--duration", "1s"], ALL),
    ("demo --dir", ["demo", "--dir", "{}", "--duration", "1s", "--no-progress"], ("fifo", "zero", "y9999", "eio")),
]
CASES = [pytest.param(kind, argv, id=f"{name}-{kind}") for name, argv, kinds in PLACES for kind in kinds]


def small_capture(path: Path, start_utc: str | None = None) -> Path:
    header = CaptureHeader.new(SerialFormat.parse("8E1", 19200), [PortInfo(0, "/dev/ttyUSB0", 16.0, "sysfs")])
    with CaptureWriter(path, header, max_block_records=5) as w:
        for i in range(40):
            w.append(0, header.start_monotonic_ns + i * 20_000_000,
                     b"\x01\x03\x00\x0a\x00\x02\xe4\x09" if i % 2 == 0 else b"\x01\x03\x04\x00\x41\x00\xc8\xab\xb1")
            if i % 5 == 4:
                w.flush()
    if start_utc is not None:
        data = path.read_bytes()
        n = struct.unpack_from("<I", data, len(MAGIC) + 2)[0]
        start = len(MAGIC) + 6
        h = json.loads(data[start:start + n])
        h["start_utc"] = start_utc
        raw = json.dumps(h).encode("utf-8")
        path.write_bytes(data[:len(MAGIC) + 2] + struct.pack("<I", len(raw)) + raw
                         + struct.pack("<I", zlib.crc32(raw)) + data[start + n + 4:])
    return path


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    d = tmp_path_factory.mktemp("probe")
    small_capture(d / "good.bwcap")
    small_capture(d / "y9999.bwcap", "9999-12-31T23:59:59+00:00")
    small_capture(d / "eio.json")  # named .json so that --scenario reads it too
    os.mkfifo(d / "fifo")
    (d / "dir").mkdir()
    return d


def run(site: Path, kind: str, argv: list[str], fail_at: int = 0) -> subprocess.CompletedProcess:
    target = {"fifo": "fifo", "zero": "/dev/zero", "dir": "dir", "y9999": "y9999.bwcap", "eio": "eio.json"}[kind]
    args = [a.replace("{}", target) for a in argv]
    shim = ""
    if kind == "eio":
        shim = f"import eiofile; eiofile.install({target!r}, {fail_at}); "
    code = (f"import sys; sys.path.insert(0, {str(TESTS)!r}); {shim}"
            f"from buswitness.cli.main import main; sys.exit(main(sys.argv[1:]))")
    env = {**os.environ, "COLUMNS": "200"}
    return subprocess.run([sys.executable, "-c", code, *args], cwd=site, capture_output=True, text=True,
                          timeout=TIMEOUT_S, env=env, stdin=subprocess.DEVNULL)


@pytest.mark.parametrize("kind, argv", CASES)
def test_every_verb_refuses_hostile_paths_at_once_with_one_line(site, kind, argv):
    r = run(site, kind, argv)
    assert r.returncode in (2, 3), (r.returncode, r.stdout, r.stderr)
    assert "Traceback" not in r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert lines[0].startswith(f"buswitness {argv[0]}: ")
    assert not (site / "new.bwcap").exists()


def test_a_read_error_part_way_is_analysed_up_to_it_and_reported(site):
    size = (site / "eio.json").stat().st_size
    r = run(site, "eio", ["analyze", "{}", "--no-progress", "--json", "eio-summary.json", "--html", "eio.html"],
            fail_at=size * 2 // 3)
    assert r.returncode == 0, r.stderr
    assert "Traceback" not in r.stderr
    assert "read error" in r.stdout
    damage = json.loads((site / "eio-summary.json").read_text(encoding="utf-8"))["capture"]["damage"]
    assert not damage["clean"] and 0 < damage["records"] < 40
