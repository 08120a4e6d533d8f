"""Capture faults not covered by tests/test_record.py and tests/test_record_faults.py, with the loss measured.

Those cover the adapter gone and back, disk full through a file-size limit, the output folder
removed, SIGTERM/SIGINT and SIGKILL. Here: a disk that is really full (a 256 kB tmpfs, where
the machine allows mounting one), SIGTERM while the adapter is away, and a capture killed with
SIGKILL analysed end to end. Each test writes what it measured to
``test-artifacts/reliability-faults.json`` (the figures in docs/reliability.md).
Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from buswitness.capture.fileformat import FLAG_DISCONNECTED, FLAG_REOPENED, CaptureReader
from ptyhelpers import PtyAdapter, sample_bytes, start_record, wait_for_file

ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"
SAMPLE_HEX = Path(__file__).resolve().parent.parent / "sample_captures" / "pumpstation-30s.hex"
BAUD = 115200


def note_figures(case: str, **figures) -> None:
    """Keep what a fault test measured, for the reliability summary."""
    ARTIFACTS.mkdir(exist_ok=True)
    path = ARTIFACTS / "reliability-faults.json"
    known = json.loads(path.read_text(encoding="utf-8")) if path.exists() else {}
    known[case] = figures
    path.write_text(json.dumps(known, indent=2, sort_keys=True) + "\n", encoding="utf-8")






def read_back(path: Path) -> tuple[bytes, CaptureReader]:
    reader = CaptureReader(path)
    return b"".join(r.data for r in reader.iter_records()), reader


@pytest.fixture
def small_disk(tmp_path):
    """A 256 kB tmpfs: a disk that really fills up (ENOSPC), unlike a file-size limit (EFBIG)."""
    mount = tmp_path / "stick"
    mount.mkdir()
    if os.geteuid() != 0:
        pytest.skip("mounting a small tmpfs needs root; tests/test_record_faults.py covers disk full by RLIMIT_FSIZE")
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=256k,mode=0700", "tmpfs", str(mount)], check=False,
                       capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"this machine does not allow mounting a tmpfs ({r.stderr.strip()})")
    try:
        yield mount
    finally:
        subprocess.run(["umount", "-l", str(mount)], check=False, capture_output=True)


def test_really_full_disk_exits_3_and_keeps_a_readable_prefix(small_disk, tmp_path):
    out = small_disk / "night.bwcap"
    payload = sample_bytes(600_000, seed=21)
    with PtyAdapter(tmp_path / "ttyFULL") as adapter:
        proc = start_record(str(adapter.link), "-o", str(out), "--quiet")
        wait_for_file(out, proc)
        adapter.send_async(payload, 2_000_000, chunk=4096)
        _, err = proc.communicate(timeout=60)
        adapter.kill()  # blocked writing into a pty nobody reads any more
    assert proc.returncode == 3, err
    assert "No space left on device" in err and "Traceback" not in err
    data, reader = read_back(out)
    assert payload.startswith(data) and len(data) > 100_000
    said = [s for s in err.splitlines() if "are missing" in s]
    assert said, err
    missing = int(said[0].split("at most ")[1].split(" ")[0])
    note_figures("disk_full_tmpfs_256k", file_bytes=out.stat().st_size, payload_bytes_read_back=len(data),
                 stated_missing_bytes=missing, reader_clean=reader.report.clean)


def test_sigterm_while_the_adapter_is_away_closes_cleanly_with_the_gap_marked(tmp_path):
    out = tmp_path / "away.bwcap"
    before = sample_bytes(3000, seed=22)
    with PtyAdapter(tmp_path / "ttyAWAY") as adapter:
        proc = start_record(str(adapter.link), "--baud", str(BAUD), "-o", str(out), "--quiet")
        wait_for_file(out, proc)
        adapter.send(before, BAUD)
        time.sleep(0.3)
        adapter.proc.stdin.write("replug\n")  # the device is away for 1.2 s from now
        adapter.proc.stdin.flush()
        time.sleep(0.4)
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=30)
        adapter.proc.stdout.readline()
    assert proc.returncode == 0, err
    data, reader = read_back(out)
    assert reader.report.clean, reader.report.summary()
    assert data == before
    flags = [r.flags for r in reader.iter_records()]
    assert any(f & FLAG_DISCONNECTED for f in flags) and not any(f & FLAG_REOPENED for f in flags)
    note_figures("sigterm_while_adapter_away", sent=len(before), read_back=len(data), lost=len(before) - len(data))


def modbus_bytes() -> bytes:
    """The demo bus's bytes (fictional pump station), as sent on the wire."""
    lines = [s.split()[1:] for s in SAMPLE_HEX.read_text(encoding="utf-8").splitlines() if s[:1].isdigit()]
    return bytes(int(b, 16) for line in lines for b in line)


def test_capture_killed_with_sigkill_is_analysed_end_to_end(tmp_path):
    out = tmp_path / "killed.bwcap"
    payload = modbus_bytes() * 4  # about 4.8 s at the pacing below: the kill comes mid-stream
    with PtyAdapter(tmp_path / "ttyKILL") as adapter:
        proc = start_record(str(adapter.link), "--baud", "19200", "--format", "8E1", "-o", str(out), "--quiet")
        wait_for_file(out, proc)
        adapter.send_async(payload, 19200 * 4)  # a pty ignores the baud rate: pace a little faster
        time.sleep(2.5)
        t_kill = time.monotonic_ns()
        proc.kill()
        proc.wait(timeout=10)
        t0, _t1 = adapter.wait_sent()
    data, reader = read_back(out)
    assert payload.startswith(data) and data
    # From the pacing: an upper bound (the helper never runs ahead of its schedule), so the loss is too.
    sent_by_kill = min(len(payload), int((t_kill - t0) / 1e9 * 19200 * 4 / 10))
    r = subprocess.run([sys.executable, "-m", "buswitness.cli.main", "analyze", str(out), "--no-progress",
                        "--json", str(tmp_path / "summary.json"), "--html", str(tmp_path / "report.html")],
                       check=False, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert "Traceback" not in r.stderr
    summary = json.loads((tmp_path / "summary.json").read_text(encoding="utf-8"))
    assert summary["bus"]["frames"] > 0
    note_figures("sigkill_then_analyze", sent_by_kill_estimate=sent_by_kill, read_back=len(data),
                 lost_estimate=max(0, sent_by_kill - len(data)), truncated_tail=reader.report.truncated_tail,
                 frames=summary["bus"]["frames"])
