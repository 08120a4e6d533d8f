"""``buswitness record`` through real pseudo-terminals: every byte, in order, timed, two ports, signals.

A helper process (tests/ptyhelpers.py) plays the adapter: it owns a pty, points a symlink
at its slave end and paces bytes into the master end at 115200 baud.
Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import os
import signal
import subprocess
import time
from pathlib import Path

import numpy as np
from buswitness.capture.fileformat import (
    FLAG_DISCONNECTED,
    FLAG_REOPENED,
    CaptureReader,
    read_header,
)
from ptyhelpers import PtyAdapter, sample_bytes, start_record, wait_for_file

BAUD = 115200






def stop(proc: subprocess.Popen, sig: int = signal.SIGTERM) -> tuple[int, str, str]:
    proc.send_signal(sig)
    out, err = proc.communicate(timeout=30)
    return proc.returncode, out, err


def captured(path: Path, port: int | None = None) -> tuple[bytes, np.ndarray, CaptureReader]:
    reader = CaptureReader(path)
    data, times = bytearray(), []
    for rec in reader.iter_records():
        if port is None or rec.port == port:
            data += rec.data
            times.append(rec.t_ns)
    return bytes(data), np.array(times, dtype=np.int64), reader


def test_every_byte_written_is_captured_in_order_with_monotonic_times(tmp_path):
    out = tmp_path / "bus.bwcap"
    payload = sample_bytes(20000)  # ~1.7 s at 115200
    with PtyAdapter(tmp_path / "ttyBUS") as adapter:
        proc = start_record(str(adapter.link), "--baud", str(BAUD), "--format", "8E1", "-o", str(out), "--quiet")
        wait_for_file(out, proc)
        adapter.send(payload, BAUD)
        time.sleep(0.5)
        code, _, err = stop(proc)
    assert code == 0, err
    data, times, reader = captured(out)
    assert data == payload
    assert np.all(np.diff(times) >= 0)
    assert reader.report.clean
    header = read_header(out)
    # The bus format is kept in the header even though the pty itself was opened 8N1.
    assert header.serial.short_form == "8E1" and header.serial.baud == BAUD
    assert header.extra["opened_format"][str(adapter.link)] == "8N1"
    assert header.ports[0].line_errors is False
    assert "line errors are not observable" in err
    assert "recorded 20000 bytes" in err
    assert out.stat().st_mode & 0o077 == 0  # user-only: a capture may hold process data (issue 9 §5)


def test_two_ports_share_one_capture_with_records_tagged_per_port(tmp_path):
    out = tmp_path / "two.bwcap"
    a_bytes, b_bytes = sample_bytes(6000, seed=2), sample_bytes(6000, seed=3)
    with PtyAdapter(tmp_path / "ttyA") as a, PtyAdapter(tmp_path / "ttyB") as b:
        proc = start_record(str(a.link), str(b.link), "--baud", str(BAUD), "-o", str(out), "--quiet")
        wait_for_file(out, proc)
        a.send_async(a_bytes, BAUD)
        b.send_async(b_bytes, BAUD)
        a.wait_sent()
        b.wait_sent()
        time.sleep(0.5)
        code, _, err = stop(proc)
    assert code == 0, err
    assert captured(out, port=0)[0] == a_bytes
    assert captured(out, port=1)[0] == b_bytes
    _, times, reader = captured(out)
    assert np.all(np.diff(times) >= 0)  # one timeline across both ports
    assert [p.name for p in reader.header.ports] == [str(a.link), str(b.link)]


def test_device_gone_and_back_gives_a_marked_gap_and_the_capture_continues(tmp_path):
    out = tmp_path / "gap.bwcap"
    before, after = sample_bytes(3000, seed=4), sample_bytes(3000, seed=5)
    with PtyAdapter(tmp_path / "ttyGAP") as adapter:
        proc = start_record(str(adapter.link), "--baud", str(BAUD), "-o", str(out), "--quiet")
        wait_for_file(out, proc)
        adapter.send(before, BAUD)
        time.sleep(0.3)
        adapter.replug()
        # The recorder retries every second; the pty drops input written before it is reopened.
        deadline = time.monotonic() + 15
        while "reopened" not in _stderr_so_far(proc) and time.monotonic() < deadline:
            time.sleep(0.1)
        adapter.send(after, BAUD)
        time.sleep(0.5)
        seen = _stderr_so_far(proc)
        code, _, err = stop(proc)
    err = seen + err
    assert code == 0, err
    assert "reopened" in err and "went away" in err
    records = list(CaptureReader(out).iter_records())
    flags = [r.flags for r in records]
    i_gone = next(i for i, f in enumerate(flags) if f & FLAG_DISCONNECTED)
    i_back = next(i for i, f in enumerate(flags) if f & FLAG_REOPENED)
    assert i_gone < i_back
    assert b"".join(r.data for r in records[:i_gone]) == before
    assert b"".join(r.data for r in records[i_back:]) == after
    assert records[i_back].t_ns - records[i_gone].t_ns >= 1.0e9  # the helper kept the device away 1.2 s


_ERR_SEEN: dict[int, str] = {}


def _stderr_so_far(proc: subprocess.Popen) -> str:
    """Stderr collected so far without blocking (the recorder prints one line per event)."""
    import select

    assert proc.stderr is not None
    text = _ERR_SEEN.get(proc.pid, "")
    while select.select([proc.stderr], [], [], 0)[0]:
        chunk = os.read(proc.stderr.fileno(), 4096).decode(errors="replace")
        if not chunk:
            break
        text += chunk
    _ERR_SEEN[proc.pid] = text
    return text


def test_sigterm_and_sigint_close_the_file_cleanly(tmp_path):
    for sig in (signal.SIGTERM, signal.SIGINT):
        out = tmp_path / f"sig{int(sig)}.bwcap"
        payload = sample_bytes(4000, seed=int(sig))
        with PtyAdapter(tmp_path / f"ttyS{int(sig)}") as adapter:
            proc = start_record(str(adapter.link), "--baud", str(BAUD), "-o", str(out), "--quiet")
            wait_for_file(out, proc)
            adapter.send(payload, BAUD)
            time.sleep(0.3)
            code, _, err = stop(proc, sig)
        assert code == 0, err
        data, _, reader = captured(out)
        assert reader.report.clean, reader.report.summary()
        assert data == payload
        assert "recorded 4000 bytes" in err


def test_kill_9_loses_at_most_about_the_last_second(tmp_path):
    out = tmp_path / "killed.bwcap"
    payload = sample_bytes(40000, seed=9)  # ~3.5 s at 115200
    with PtyAdapter(tmp_path / "ttyK") as adapter:
        proc = start_record(str(adapter.link), "--baud", str(BAUD), "-o", str(out), "--quiet")
        wait_for_file(out, proc)
        adapter.send_async(payload, BAUD)
        time.sleep(2.5)
        t_kill = time.monotonic_ns()
        proc.kill()
        proc.wait(timeout=10)
        adapter.wait_sent()
    data, times, _ = captured(out)
    assert payload.startswith(data) and len(data) > 0
    # Blocks are written and fsynced every second; allow scheduling slack on a loaded 2-core machine.
    # CLOCK_MONOTONIC is one clock for every process, so the file's times compare with t_kill.
    assert t_kill - int(times[-1]) <= 1.6e9
