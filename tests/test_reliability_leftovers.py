"""Nothing left behind: stale hidden ``.part`` files of a killed run are removed by the next run (its own,
by name and age, never a live writer's), and recording onto a disk too full for even the capture
header leaves no empty file and says that nothing was recorded.

Source: the checks compare with what each test itself made (file names, times, sizes) and with
the project's own contract (docs/reliability.md); no check value comes from outside the project.
"""

from __future__ import annotations

import errno
import os
import resource
import signal
import subprocess
import sys
import time

import pytest
from buswitness.capture.fileformat import CaptureHeader, CaptureWriter, PortInfo
from buswitness.decode import SerialFormat
from buswitness.errors import OutputError
from buswitness.fsutil import STALE_PART_S, atomic_write, remove_stale_parts
from ptyhelpers import PtyAdapter, start_record


def dead_pid() -> int:
    """A process id that no process has right now."""
    for pid in range(4_000_000, 3_000_000, -1):
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return pid
        except OSError:
            continue
    raise AssertionError("no free pid found")


def leftover(folder, name, age_s):
    path = folder / name
    path.write_text("half a report")
    old = time.time() - age_s
    os.utime(path, (old, old))
    return path


def test_stale_part_files_of_the_same_output_are_removed_by_the_next_write(tmp_path):
    old = STALE_PART_S + 60
    dead = dead_pid()
    stale = [leftover(tmp_path, f".report.html.{dead}-k3j2h1.part", old),
             leftover(tmp_path, ".report.html.x8y7z6.part", old)]  # written before the PID was in the name
    kept = [leftover(tmp_path, f".report.html.{dead}-fresh1.part", 5),            # a run that may still be writing
            leftover(tmp_path, f".report.html.{os.getppid()}-live01.part", old),  # its writer is alive
            leftover(tmp_path, f".summary.json.{dead}-other1.part", old),         # another output's file
            leftover(tmp_path, "report.html.part", old)]                          # not our name pattern
    with atomic_write(tmp_path / "report.html") as f:
        f.write("<html></html>")
    assert not any(p.exists() for p in stale)
    assert all(p.exists() for p in kept)
    assert (tmp_path / "report.html").read_text() == "<html></html>"
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".report.html.") and p not in kept]


def test_stale_part_removal_is_limited_to_the_target_folder(tmp_path):
    (tmp_path / "sub").mkdir()
    inner = leftover(tmp_path / "sub", f".report.html.{dead_pid()}-aaaaaa.part", STALE_PART_S + 60)
    assert remove_stale_parts(tmp_path / "report.html") == []
    assert inner.exists()


def test_analyze_removes_what_a_killed_analyze_left(tmp_path):
    r = subprocess.run([sys.executable, "-m", "buswitness.cli.main", "simulate", "--duration", "5s", "-o", "s.bwcap"],
                       cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    (tmp_path / "csv").mkdir()
    dead = dead_pid()
    stale = [leftover(tmp_path, f".report.html.{dead}-aaaaaa.part", STALE_PART_S + 60),
             leftover(tmp_path / "csv", f".frames.csv.{dead}-bbbbbb.part", STALE_PART_S + 60)]
    r = subprocess.run([sys.executable, "-m", "buswitness.cli.main", "analyze", "s.bwcap", "--no-progress",
                        "--html", "report.html", "--csv", "csv"], cwd=tmp_path, capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 0, r.stderr
    assert not any(p.exists() for p in stale)
    assert not [p.name for p in [*tmp_path.iterdir(), *(tmp_path / "csv").iterdir()] if p.name.endswith(".part")]


def test_capture_writer_that_cannot_write_its_header_leaves_no_file(tmp_path, monkeypatch):
    import buswitness.capture.fileformat as ff

    def full(fd, data):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(ff.os, "write", full)
    header = CaptureHeader.new(SerialFormat.parse("8E1", 19200), [PortInfo(0, "/dev/ttyUSB0")])
    with pytest.raises(OutputError, match=r"cannot write the capture \(No space left on device\); nothing was recorded"):
        CaptureWriter(tmp_path / "night.bwcap", header)
    assert not (tmp_path / "night.bwcap").exists()


def _limit_file_size(limit: int):
    def apply() -> None:
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    return apply


@pytest.mark.parametrize("limit", [0, 100])  # not one byte of the header fits / the header is cut
def test_recording_onto_a_full_disk_at_start_leaves_no_capture_and_says_nothing_was_recorded(tmp_path, limit):
    out = tmp_path / "night.bwcap"
    with PtyAdapter(tmp_path / "ttyS") as adapter:
        proc = start_record(str(adapter.link), "-o", str(out), "--quiet", "--duration", "5s",
                            preexec_fn=_limit_file_size(limit))
        _, err = proc.communicate(timeout=60)
    assert proc.returncode == 3, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err
    assert "cannot write the capture (File too large); nothing was recorded" in lines[0]
    assert not out.exists()
