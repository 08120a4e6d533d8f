"""Safe defaults: captures are only ever read by ``analyze``, reports are replaced whole or not at all,
and capture files are private to their owner.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import errno
import os
import resource
import stat
import subprocess
import sys
from pathlib import Path

import pytest
from buswitness import fsutil
from buswitness.analysis import dashboard, summary
from buswitness.capture.fileformat import CaptureHeader, CaptureReader, CaptureWriter, PortInfo
from buswitness.cli.main import main
from buswitness.decode.timing import SerialFormat
from buswitness.errors import OutputError

WRITE_FLAGS = os.O_WRONLY | os.O_RDWR | os.O_CREAT | os.O_TRUNC | os.O_APPEND
_OPENS: list[tuple[str, int]] = []
_WATCH: list[str] = []


def _audit(event: str, args: tuple) -> None:
    if event == "open" and _WATCH and isinstance(args[0], (str, bytes, os.PathLike)):
        path = os.path.abspath(os.fsdecode(args[0]))
        if any(path.startswith(w) for w in _WATCH):
            _OPENS.append((path, int(args[2])))


sys.addaudithook(_audit)


@pytest.fixture(scope="module")
def capture(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("safe")
    assert main(["simulate", "--scenario", "pumpstation", "--duration", "20s", "-o", str(d / "bus.bwcap")]) == 0
    return d / "bus.bwcap"


@pytest.fixture
def watch_opens():
    _OPENS.clear()
    yield _WATCH
    _WATCH.clear()


def test_analyze_opens_the_capture_read_only_and_creates_nothing_beside_it(capture, tmp_path, watch_opens):
    folder = tmp_path / "evidence-folder"
    folder.mkdir()
    path = folder / "bus.bwcap"
    path.write_bytes(capture.read_bytes())
    path.chmod(0o444)
    folder.chmod(0o555)
    before = path.stat()
    watch_opens.append(str(folder))
    try:
        assert main(["analyze", str(path), "--no-progress", "--json", str(tmp_path / "s.json"),
                     "--html", str(tmp_path / "r.html")]) == 0
        assert main(["evidence", str(path), "--station", "1", "--no-progress", "-o", str(tmp_path / "e.html")]) == 0
    finally:
        folder.chmod(0o755)
    assert _OPENS, "the audit hook saw no open of the capture"
    assert all(flags & WRITE_FLAGS == 0 for _p, flags in _OPENS), _OPENS
    assert sorted(p.name for p in folder.iterdir()) == ["bus.bwcap"]
    after = path.stat()
    assert (after.st_mtime_ns, after.st_size, stat.S_IMODE(after.st_mode)) == \
        (before.st_mtime_ns, before.st_size, 0o444)


def _first_run(capture: Path, out: Path) -> tuple[bytes, bytes]:
    assert main(["analyze", str(capture), "--no-progress", "--html", str(out / "report.html"),
                 "--json", str(out / "summary.json")]) == 0
    return (out / "report.html").read_bytes(), (out / "summary.json").read_bytes()


def _leftovers(out: Path) -> list[str]:
    return [p.name for p in out.iterdir() if p.name.endswith(".part")]


def test_renderer_failing_leaves_the_earlier_report_untouched(capture, tmp_path, monkeypatch):
    html, _js = _first_run(capture, tmp_path)

    def broken(result, detail=None):
        raise RuntimeError("renderer fault injected by the test")

    monkeypatch.setattr(dashboard, "render_dashboard", broken)
    with pytest.raises(RuntimeError, match="injected"):
        main(["analyze", str(capture), "--no-progress", "--html", str(tmp_path / "report.html")])
    assert (tmp_path / "report.html").read_bytes() == html
    assert _leftovers(tmp_path) == []


def test_summary_failing_half_written_leaves_the_earlier_summary_untouched(capture, tmp_path, monkeypatch):
    _html, js = _first_run(capture, tmp_path)
    real = summary.summary_dict

    def half(result):
        d = real(result)
        d["zz_after_everything"] = object()  # json.dump writes the rest, then fails here
        return d

    monkeypatch.setattr(summary, "summary_dict", half)
    with pytest.raises(TypeError, match="not JSON serializable"):
        main(["analyze", str(capture), "--no-progress", "--json", str(tmp_path / "summary.json")])
    assert (tmp_path / "summary.json").read_bytes() == js
    assert _leftovers(tmp_path) == []


def test_disk_full_while_writing_the_report_is_one_line_and_keeps_the_earlier_one(capture, tmp_path, monkeypatch,
                                                                                 capsys):
    html, _js = _first_run(capture, tmp_path)

    def full(fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(fsutil.os, "fsync", full)
    capsys.readouterr()
    assert main(["analyze", str(capture), "--no-progress", "--html", str(tmp_path / "report.html")]) == 3
    err = capsys.readouterr().err.strip()
    assert "No space left on device" in err and "earlier file there is unchanged" in err and "\n" not in err
    assert (tmp_path / "report.html").read_bytes() == html
    assert _leftovers(tmp_path) == []


def test_file_size_limit_hit_by_the_report_exits_3_in_a_real_process(capture, tmp_path):
    html, _js = _first_run(capture, tmp_path)
    limit = len(html) // 4  # the dashboard cannot fit; reading the capture needs no writes

    def cap() -> None:
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    r = subprocess.run([sys.executable, "-m", "buswitness.cli.main", "analyze", str(capture), "--no-progress",
                        "--html", str(tmp_path / "report.html")], check=False, capture_output=True, text=True,
                       timeout=300, preexec_fn=cap)
    assert r.returncode == 3, r.stderr
    assert "Traceback" not in r.stderr and len(r.stderr.strip().splitlines()) == 1
    assert "cannot write" in r.stderr
    assert (tmp_path / "report.html").read_bytes() == html
    assert _leftovers(tmp_path) == []


def _header() -> CaptureHeader:
    return CaptureHeader.new(SerialFormat.parse("8E1", 19200), [PortInfo(0, "/dev/ttyUSB0")])


def test_capture_parts_are_user_only_whatever_the_umask(tmp_path):
    old = os.umask(0)
    try:
        with CaptureWriter(tmp_path / "night.bwcap", _header(), rotate_bytes=4096, max_block_records=20) as w:
            for i in range(2000):
                w.append(0, i * 1_000_000, b"\x01\x03\x00\x00\x00\x01\x84\x0a")
    finally:
        os.umask(old)
    assert len(w.parts) >= 3
    assert {stat.S_IMODE(p.stat().st_mode) for p in w.parts} == {0o600}
    assert len(list(CaptureReader(tmp_path / "night.bwcap").iter_records())) == 2000


def test_simulated_capture_is_user_only_whatever_the_umask(tmp_path):
    program = "import os, sys; os.umask(0); from buswitness.cli.main import main; sys.exit(main(sys.argv[1:]))"
    r = subprocess.run([sys.executable, "-c", program, "simulate", "--duration", "2s", "-o", "sim.bwcap"],
                       check=False, cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert stat.S_IMODE((tmp_path / "sim.bwcap").stat().st_mode) == 0o600


def test_output_through_a_symlink_keeps_the_link_and_replaces_its_file(tmp_path):
    real = tmp_path / "reports" / "summary.json"
    real.parent.mkdir()
    real.write_text("old", encoding="utf-8")
    link = tmp_path / "latest.json"
    link.symlink_to(real)
    with fsutil.atomic_write(link) as f:
        f.write("new")
    assert link.is_symlink() and real.read_text(encoding="utf-8") == "new"


def test_output_to_a_pipe_is_written_through_not_renamed_over(tmp_path):
    # Found while probing `analyze --json /dev/full`: the rename replaced the device node with a file.
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    reader = subprocess.Popen(["cat", str(fifo)], stdout=subprocess.PIPE)
    with fsutil.atomic_write(fifo) as f:
        f.write("{}\n")
    assert reader.communicate(timeout=30)[0] == b"{}\n"
    assert stat.S_ISFIFO(fifo.stat().st_mode)
    assert [p.name for p in tmp_path.iterdir()] == ["pipe"]


@pytest.mark.skipif(os.geteuid() != 0, reason="making a device node needs root")
def test_output_to_a_device_node_writes_into_the_device_and_leaves_the_node(tmp_path):
    node = tmp_path / "null"
    os.mknod(node, 0o666 | stat.S_IFCHR, os.makedev(1, 3))  # the null device (Linux devices.txt: 1, 3)
    with fsutil.atomic_write(node) as f:
        f.write("discarded")
    assert stat.S_ISCHR(node.stat().st_mode)


@pytest.mark.skipif(os.geteuid() != 0, reason="making a device node needs root")
def test_output_to_a_full_device_is_one_clear_error(tmp_path):
    node = tmp_path / "full"
    os.mknod(node, 0o666 | stat.S_IFCHR, os.makedev(1, 7))  # the always-full device (Linux devices.txt: 1, 7)
    with pytest.raises(OutputError, match=r"full: cannot write \(No space left on device\)"), \
            fsutil.atomic_write(node) as f:
        f.write("x" * 10000)
    assert stat.S_ISCHR(node.stat().st_mode)
