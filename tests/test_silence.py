"""Silence is loud: ``record`` and ``watch`` warn when no bytes, or no valid frames, arrive.

Source: the checks here compare with what the test itself made (bytes it wrote into a pty, the
project's own messages); no check value comes from outside the project. The bus's 19200 8E1 is
given to the timing model only: the pty itself runs 8N1 (this kernel keeps no parity on ptys).
"""

from __future__ import annotations

import re
import subprocess
import sys
import time

from buswitness.cli.silence import SilenceCheck
from buswitness.decode.crc import append_crc
from ptyhelpers import PtyAdapter, sample_bytes, wait_for_file


def test_no_bytes_in_the_first_window_is_one_warning_per_silent_spell():
    check = SilenceCheck(["/dev/ttyUSB0"], "19200 8E1", window_s=60)
    assert check.check(30, [0], 0) == []  # not yet a minute
    first = check.check(60, [0], 0)
    assert len(first) == 1 and first[0].startswith("/dev/ttyUSB0: no bytes at all in 60 s")
    assert check.check(120, [0], 0) == []  # said once, not every minute
    assert check.check(180, [500], 10) == ["/dev/ttyUSB0: bytes again"]


def test_bytes_without_a_valid_frame_name_the_setting_and_detect():
    check = SilenceCheck(["/dev/ttyUSB0"], "19200 8E1", window_s=60)
    [text] = check.check(60.4, [1234], 0)
    assert text == ("0 valid frames at 19200 8E1 in 60 s (1234 bytes received): check A/B wiring, baud and format, "
                    "or stop and run `buswitness detect /dev/ttyUSB0`")
    assert check.check(120.4, [2000], 0) == []
    assert check.check(180.4, [3000], 5) == ["valid frames again"]


def test_one_silent_port_of_two_is_named():
    check = SilenceCheck(["/dev/ttyUSB0", "/dev/ttyUSB1"], "9600 8N2", window_s=10)
    out = check.check(10, [800, 0], 40)
    assert len(out) == 1 and out[0].startswith("/dev/ttyUSB1: no bytes at all in 10 s")


def test_closing_summary_repeats_a_silent_recording_whatever_its_length():
    check = SilenceCheck(["/dev/ttyUSB0"], "19200 8E1", window_s=60)
    assert check.closing(5, [0], 0)[0].startswith("WARNING /dev/ttyUSB0: no bytes at all in 5 s")
    assert check.closing(3600, [99], 0)[0].startswith("WARNING 0 valid frames at 19200 8E1 in 1:00:00 (99 bytes")
    assert check.closing(3600, [99], 12) == ["12 valid frames at 19200 8E1"]
    assert check.closing(3600, [99], None) == []  # no decoder in this build: bytes only


def _run(verb: str, tmp_path, send: bytes | None, seconds: int = 4) -> str:
    out = tmp_path / f"{verb}.bwcap"
    with PtyAdapter(tmp_path / f"tty{verb}") as adapter:
        proc = subprocess.Popen([sys.executable, "-m", "buswitness.cli.main", verb, str(adapter.link), "-o", str(out),
                                 "--baud", "19200", "--format", "8E1", "--silence-window", "1.5s",
                                 "--duration", str(seconds)],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        wait_for_file(out, proc)
        started = time.monotonic()
        if send:
            adapter.send(send, 19200)
        stdout, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 0, stderr
    assert time.monotonic() - started < seconds + 30
    return stderr


def test_record_of_a_silent_port_warns_during_the_recording_and_in_the_summary(tmp_path):
    err = _run("record", tmp_path, None)
    warning, summary = err.split("recorded 0 bytes", 1)
    assert "warning: " in warning and re.search(r"no bytes at all in \d+ s", warning), err
    assert "WARNING" in summary and re.search(r"no bytes at all in \d+ s", summary), err


def test_record_of_noise_warns_of_no_valid_frames_at_the_bus_setting(tmp_path):
    err = _run("record", tmp_path, sample_bytes(1500, seed=4))
    assert "warning: 0 valid frames at 19200 8E1 in" in err, err
    assert "`buswitness detect " in err
    assert re.search(r"WARNING 0 valid frames at 19200 8E1 in \d+ s", err.split("recorded", 1)[1]), err


def test_watch_of_a_silent_port_warns_and_says_so_at_the_end(tmp_path):
    err = _run("watch", tmp_path, None)
    assert "warning: " in err and "no bytes at all" in err, err
    assert "WARNING" in err.split("recorded", 1)[1], err


def test_record_of_valid_frames_does_not_warn(tmp_path):
    req = append_crc(bytes([7, 3, 0, 0, 0, 1]))
    rsp = append_crc(bytes([7, 3, 2, 0, 42]))
    # Pauses far over t3.5 between frames (the pty itself has no character timing).
    out = tmp_path / "ok.bwcap"
    with PtyAdapter(tmp_path / "ttyok") as adapter:
        proc = subprocess.Popen([sys.executable, "-m", "buswitness.cli.main", "record", str(adapter.link), "-o",
                                 str(out), "--silence-window", "1.5s", "--duration", "3"],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        wait_for_file(out, proc)
        for _ in range(20):
            adapter.send(req, 19200)
            time.sleep(0.03)
            adapter.send(rsp, 19200)
            time.sleep(0.05)
        _, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    assert "warning: 0 valid frames" not in err and "WARNING" not in err, err
    assert "valid frames at 19200 8E1" in err
