"""A stand-in serial adapter for tests: a helper process that owns a pty and paces bytes into it.

The helper process creates a pseudo-terminal, points a symlink at its slave end (the
"device" the recorder opens) and obeys one-line commands on stdin:

* ``send FILE BAUD CHUNK``: write FILE's bytes to the master end, CHUNK bytes at a time, at
  the pace of BAUD baud 8N1 (10 bits a character), then answer ``done T_START T_END`` (monotonic ns);
* ``replay CAPTURE [SPEED]``: write a capture file's bytes at their recorded pace, answer ``done T_START T_END``;
* ``replug [NEWLINK]``: close the pty (the device goes away), remove the symlink, wait, make a
  new pty and point the symlink (or a new one, as when an adapter comes back under another
  name) at it (the device comes back), answer ``done``;
* ``quit``.

Run directly (``python ptyhelpers.py LINK``) it is the helper; tests use :class:`PtyAdapter`.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
import tty
from pathlib import Path


def _make_pty(link: Path) -> tuple[int, int]:
    master, slave = os.openpty()
    tty.setraw(slave)  # no echo or line editing before the recorder takes the port over
    tmp = link.with_name(link.name + ".new")
    if tmp.is_symlink():
        tmp.unlink()
    os.symlink(os.ttyname(slave), tmp)
    os.replace(tmp, link)
    return master, slave


def _pace(master: int, data: bytes, baud: int, chunk: int) -> tuple[int, int]:
    per_byte = 10.0 / baud
    start = time.monotonic()
    t0 = time.monotonic_ns()
    for pos in range(0, len(data), chunk):
        due = start + pos * per_byte
        delay = due - time.monotonic()
        if delay > 0:
            time.sleep(delay)
        view = memoryview(data)[pos:pos + chunk]
        while view:
            n = os.write(master, view)
            view = view[n:]
    return t0, time.monotonic_ns()


def _replay(master: int, capture: Path, speed: float) -> tuple[int, int]:
    """Write each record of ``capture`` at its own time (relative to the first), ``speed`` times as fast."""
    from buswitness.capture.fileformat import CaptureReader

    start = time.monotonic()
    t0 = time.monotonic_ns()
    first = None
    for rec in CaptureReader(capture).iter_records():
        if not rec.data:
            continue
        first = rec.t_ns if first is None else first
        delay = start + (rec.t_ns - first) / 1e9 / speed - time.monotonic()
        if delay > 0:
            time.sleep(delay)
        view = memoryview(rec.data)
        while view:
            n = os.write(master, view)
            view = view[n:]
    return t0, time.monotonic_ns()


def helper_main(link: Path) -> None:
    master, slave = _make_pty(link)
    print("ready", os.ttyname(slave), flush=True)
    for line in sys.stdin:
        cmd = line.split()
        if not cmd:
            continue
        if cmd[0] == "send":
            data = Path(cmd[1]).read_bytes()
            t0, t1 = _pace(master, data, int(cmd[2]), int(cmd[3]))
            print("done", t0, t1, flush=True)
        elif cmd[0] == "replay":
            t0, t1 = _replay(master, Path(cmd[1]), float(cmd[2]) if len(cmd) > 2 else 1.0)
            print("done", t0, t1, flush=True)
        elif cmd[0] == "replug":
            os.close(master)
            os.close(slave)
            link.unlink()
            if len(cmd) > 1:
                link = Path(cmd[1])
            time.sleep(1.2)
            master, slave = _make_pty(link)
            print("done", flush=True)
        elif cmd[0] == "quit":
            break
    os.close(master)
    os.close(slave)


class PtyAdapter:
    """Controls one helper process: a fake adapter at ``link`` that tests can feed and unplug."""

    def __init__(self, link: Path) -> None:
        self.link = Path(link)
        self.proc = subprocess.Popen([sys.executable, __file__, str(self.link)], stdin=subprocess.PIPE,
                                     stdout=subprocess.PIPE, text=True)
        ready = self.proc.stdout.readline().split()  # type: ignore[union-attr]
        if not ready or ready[0] != "ready":
            raise RuntimeError("the pty helper did not start")
        self._n = 0

    def _command(self, text: str) -> list[str]:
        assert self.proc.stdin is not None and self.proc.stdout is not None
        self.proc.stdin.write(text + "\n")
        self.proc.stdin.flush()
        answer = self.proc.stdout.readline().split()
        if not answer or answer[0] != "done":
            raise RuntimeError(f"the pty helper failed on {text!r}")
        return answer[1:]

    def send(self, data: bytes, baud: int = 115200, chunk: int = 16) -> tuple[int, int]:
        """Pace ``data`` into the pty; returns the monotonic ns when writing started and ended."""
        self._n += 1
        path = self.link.with_name(f"{self.link.name}.data{self._n}")
        path.write_bytes(data)
        t0, t1 = self._command(f"send {path} {baud} {chunk}")
        return int(t0), int(t1)

    def send_async(self, data: bytes, baud: int = 115200, chunk: int = 16) -> None:
        """Start pacing ``data`` and return at once; :meth:`wait_sent` collects the answer."""
        assert self.proc.stdin is not None
        self._n += 1
        path = self.link.with_name(f"{self.link.name}.data{self._n}")
        path.write_bytes(data)
        self.proc.stdin.write(f"send {path} {baud} {chunk}\n")
        self.proc.stdin.flush()

    def wait_sent(self) -> tuple[int, int]:
        assert self.proc.stdout is not None
        answer = self.proc.stdout.readline().split()
        return int(answer[1]), int(answer[2])

    def replay(self, capture: Path, speed: float = 1.0) -> tuple[int, int]:
        """Write a capture's bytes into the pty at their recorded pace (``speed`` times as fast)."""
        t0, t1 = self._command(f"replay {capture} {speed}")
        return int(t0), int(t1)

    def replay_async(self, capture: Path, speed: float = 1.0) -> None:
        """Start :meth:`replay` and return at once; :meth:`wait_sent` collects the answer."""
        assert self.proc.stdin is not None
        self.proc.stdin.write(f"replay {capture} {speed}\n")
        self.proc.stdin.flush()

    def replug(self, new_link: Path | None = None) -> None:
        """Make the device vanish (the pty closes, the path disappears) and come back as a new pty."""
        if new_link is None:
            self._command("replug")
        else:
            self._command(f"replug {new_link}")
            self.link = Path(new_link)

    def kill(self) -> None:
        """Stop the helper at once (e.g. when it is blocked writing to a pty nobody reads any more)."""
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait()

    def close(self) -> None:
        if self.proc.poll() is None:
            try:
                assert self.proc.stdin is not None
                self.proc.stdin.write("quit\n")
                self.proc.stdin.flush()
            except (BrokenPipeError, OSError):
                pass
            try:
                self.proc.wait(timeout=5)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()

    def __enter__(self) -> PtyAdapter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def sample_bytes(n: int, seed: int = 1) -> bytes:
    """Deterministic bytes with plenty of 0xFF and 0x00 (the PARMRK escape bytes) among them."""
    import random

    rng = random.Random(seed)
    pool = bytes(range(256)) + b"\xff" * 16 + b"\x00" * 8
    return bytes(rng.choice(pool) for _ in range(n))


def start_record(*args: str, **kw) -> subprocess.Popen:
    """``buswitness record ARGS`` as a child process, its output captured as text."""
    return subprocess.Popen([sys.executable, "-m", "buswitness.cli.main", "record", *args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, **kw)


def wait_for_file(path: Path, proc: subprocess.Popen, timeout: float = 20.0) -> None:
    """Wait until ``record`` has opened its ports and written the capture header."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if path.exists() and path.stat().st_size > 0:
            return
        if proc.poll() is not None:
            raise AssertionError(f"record exited early: {proc.communicate()}")
        time.sleep(0.05)
    raise AssertionError("record did not create its capture file")


if __name__ == "__main__":
    helper_main(Path(sys.argv[1]))
