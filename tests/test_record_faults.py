"""``record`` when things go wrong: disk full, output directory removed, ports that cannot be opened,
a writer that falls behind, and the adapter latency timer in sysfs.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import os
import resource
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from buswitness.capture import serialport
from buswitness.capture.fileformat import FLAG_LOST, CaptureReader
from buswitness.capture.recorder import Recorder, RecorderConfig
from buswitness.decode.timing import SerialFormat
from buswitness.errors import DeviceError
from ptyhelpers import PtyAdapter, sample_bytes, start_record, wait_for_file

FAST = 2_000_000  # pacing for the helper: a pty ignores the baud rate, so fill files quickly






def _limit_file_size(limit: int):
    def apply() -> None:
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # also for Python's own .pyc writes before main runs
    return apply


def test_disk_full_exits_3_with_one_clear_line_and_the_file_reads_back(tmp_path):
    out = tmp_path / "full.bwcap"
    limit = 256 * 1024
    payload = sample_bytes(600_000, seed=11)
    with PtyAdapter(tmp_path / "ttyF") as adapter:
        proc = start_record(str(adapter.link), "-o", str(out), "--quiet", preexec_fn=_limit_file_size(limit))
        wait_for_file(out, proc)
        adapter.send_async(payload, FAST, chunk=4096)
        _, err = proc.communicate(timeout=60)
        adapter.kill()  # it is blocked writing into a pty that nobody reads any more
    assert proc.returncode == 3, err
    assert "cannot write the capture (File too large)" in err
    assert "are missing (lost to the output fault)" in err
    assert "Traceback" not in err
    reader = CaptureReader(out)
    data = b"".join(r.data for r in reader.iter_records())
    assert len(data) > 100_000 and payload.startswith(data)
    assert out.stat().st_size <= limit


def test_output_directory_removed_mid_capture_is_reported_and_the_data_rescued(tmp_path):
    outdir = tmp_path / "stick"
    outdir.mkdir()
    rescue_dir = tmp_path / "rescue"
    rescue_dir.mkdir()
    out = outdir / "night.bwcap"
    payload = sample_bytes(5000, seed=12)
    env = {**os.environ, "TMPDIR": str(rescue_dir)}
    with PtyAdapter(tmp_path / "ttyD") as adapter:
        proc = start_record(str(adapter.link), "-o", str(out), "--quiet", env=env)
        wait_for_file(out, proc)
        adapter.send(payload, 115200)
        time.sleep(0.3)
        shutil.rmtree(outdir)
        _, err = proc.communicate(timeout=30)
    assert proc.returncode == 3, err
    assert "was removed while recording" in err
    assert "at most 0 byte(s)" in err  # the rescued copy holds everything
    rescued = list(rescue_dir.glob("night.rescued-*.bwcap"))
    assert len(rescued) == 1 and str(rescued[0]) in err
    reader = CaptureReader(rescued[0])
    assert b"".join(r.data for r in reader.iter_records()) == payload
    assert reader.report.clean


def test_missing_port_exits_4_and_lists_the_ports_seen(tmp_path):
    out = subprocess.run([sys.executable, "-m", "buswitness.cli.main", "record", str(tmp_path / "ttyNONE"),
                          "-o", str(tmp_path / "x.bwcap")], capture_output=True, text=True, check=False, timeout=60)
    assert out.returncode == 4
    assert "no such serial port" in out.stderr and "Serial ports seen now:" in out.stderr
    assert not (tmp_path / "x.bwcap").exists()


def test_permission_denied_names_the_dialout_group():
    exc = serialport._open_error("/dev/ttyUSB0", PermissionError(13, "Permission denied"))
    assert isinstance(exc, DeviceError) and exc.exit_code == 4
    assert "dialout group" in str(exc)


def test_existing_output_is_never_overwritten(tmp_path):
    out = tmp_path / "old.bwcap"
    out.write_bytes(b"keep me")
    with PtyAdapter(tmp_path / "ttyO") as adapter:
        res = subprocess.run([sys.executable, "-m", "buswitness.cli.main", "record", str(adapter.link),
                              "-o", str(out), "--quiet"], capture_output=True, text=True, check=False, timeout=60)
    assert res.returncode == 3 and "already exists" in res.stderr
    assert out.read_bytes() == b"keep me"


def _fake_sysfs(root: Path, tty: str, value: str) -> Path:
    d = root / "bus" / "usb-serial" / "devices" / tty
    d.mkdir(parents=True)
    (d / "latency_timer").write_text(value)
    return d / "latency_timer"


def test_latency_timer_is_read_through_symlinks_and_set_only_when_asked(tmp_path):
    dev = tmp_path / "dev" / "ttyUSB3"
    dev.parent.mkdir()
    dev.write_text("")
    by_id = tmp_path / "by-id"
    by_id.symlink_to(dev)
    timer = _fake_sysfs(tmp_path / "sys", "ttyUSB3", "16\n")
    assert serialport.read_latency_ms(str(by_id), str(tmp_path / "sys")) == 16
    assert timer.read_text() == "16\n"  # reading never changes it
    value, text = serialport.set_low_latency(str(by_id), str(tmp_path / "sys"))
    assert value == 1 and "checked by reading it back" in text


def test_latency_without_permission_prints_the_udev_rule(tmp_path, monkeypatch):
    dev = tmp_path / "ttyUSB4"
    timer = _fake_sysfs(tmp_path / "sys", "ttyUSB4", "16\n")

    def refuse(self, *a, **k):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(Path, "write_text", refuse)
    value, text = serialport.set_low_latency(str(dev), str(tmp_path / "sys"))
    assert value == 16
    assert "needs root" in text and "udev" in text and 'ATTR{latency_timer}="1"' in text
    assert timer.read_text() == "16\n"


def test_no_latency_setting_is_said_plainly(tmp_path):
    value, text = serialport.set_low_latency(str(tmp_path / "ttyACM0"), str(tmp_path / "sys"))
    assert value is None and "no latency timer setting" in text


def test_writer_falling_behind_marks_lost_bytes_instead_of_blocking_the_reader(tmp_path):
    with PtyAdapter(tmp_path / "ttyL") as adapter:
        cfg = RecorderConfig(devices=[str(adapter.link)], bus=SerialFormat.parse("8E1", 19200),
                             output=tmp_path / "lost.bwcap", queue_cap_bytes=100)
        rec = Recorder(cfg)
        rec.start()
        try:
            # Simulate a stalled writer: hand off directly past the cap, as a reader would.
            t = time.monotonic_ns()
            rec._queued_bytes = 100
            rec.hand_off(0, t, b"dropped")
            rec._queued_bytes = 0
            rec.hand_off(0, t + 1, b"kept")
        finally:
            rec.join()
    records = list(CaptureReader(tmp_path / "lost.bwcap").iter_records())
    assert [(r.data, bool(r.flags & FLAG_LOST)) for r in records] == [(b"kept", True)]
    assert rec.stats[0].lost_reads == 1


def test_port_that_cannot_be_opened_at_start_raises_device_error(tmp_path):
    cfg = RecorderConfig(devices=[str(tmp_path / "ttyGONE")], bus=SerialFormat(), output=tmp_path / "n.bwcap")
    with pytest.raises(DeviceError, match="no such serial port"):
        Recorder(cfg).start()
    assert not (tmp_path / "n.bwcap").exists()


def test_low_latency_on_a_port_without_the_setting_says_so_and_records_anyway(tmp_path):
    seen: list[str] = []
    with PtyAdapter(tmp_path / "ttyLL") as adapter:
        cfg = RecorderConfig(devices=[str(adapter.link)], bus=SerialFormat(), output=tmp_path / "ll.bwcap",
                             low_latency=True, sysfs_root=str(tmp_path / "sys"))
        rec = Recorder(cfg, on_message=seen.append)
        rec.start()
        adapter.send(b"abc", 115200)
        time.sleep(0.3)
        rec.join()
    assert any("low-latency flag" in m or "no latency timer setting" in m for m in seen), seen
    header = CaptureReader(tmp_path / "ll.bwcap").header
    assert header.ports[0].latency_source == "unknown" and header.ports[0].latency_ms is None


def test_latency_from_sysfs_is_kept_in_the_header_with_a_warning_above_2_ms(tmp_path, monkeypatch):
    seen: list[str] = []
    with PtyAdapter(tmp_path / "ttyUSB7") as adapter:
        # The pty's kernel name is pts/N: give the fake sysfs that name.
        name = os.path.basename(os.path.realpath(adapter.link))
        _fake_sysfs(tmp_path / "sys", name, "16\n")
        cfg = RecorderConfig(devices=[str(adapter.link)], bus=SerialFormat(), output=tmp_path / "lat.bwcap",
                             sysfs_root=str(tmp_path / "sys"))
        rec = Recorder(cfg, on_message=seen.append)
        rec.start()
        rec.join()
    port = CaptureReader(tmp_path / "lat.bwcap").header.ports[0]
    assert (port.latency_ms, port.latency_source) == (16.0, "sysfs")
    assert any("latency timer is 16 ms" in m and "coarse" in m for m in seen), seen
