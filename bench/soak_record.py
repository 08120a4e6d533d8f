"""Soak test of ``buswitness record``: a saturated 115200 baud line through a pty for 10 minutes.

Not part of the test suite. Checks that every byte written is in the capture, in order,
and measures the CPU time ``record`` used (issue 8 target: under 5% of one core).

    python bench/soak_record.py [--minutes 10] [--baud 115200] [--chunk 62]

The writer paces 62-byte chunks (one full adapter packet, REFERENCES.md §5) at the line's
byte rate (8N1: 10 bits a character), with bytes drawn so 0xFF and 0x00 appear often.
"""

from __future__ import annotations

import argparse
import hashlib
import os
import random
import resource
import signal
import subprocess
import sys
import tempfile
import time
import tty
from pathlib import Path

from buswitness.capture.fileformat import CaptureReader


def chunk_source(seed: int, chunk: int):
    rng = random.Random(seed)
    pool = bytes(range(256)) + b"\xff" * 16 + b"\x00" * 8
    while True:
        yield bytes(rng.choices(pool, k=chunk))


def proc_cpu_s(pid: int) -> float:
    """utime + stime of a running process from /proc (Linux), in seconds."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--minutes", type=float, default=10.0)
    ap.add_argument("--baud", type=int, default=115200)
    ap.add_argument("--chunk", type=int, default=62)
    ns = ap.parse_args()

    work = Path(tempfile.mkdtemp(prefix="bw-soak-"))
    out = work / "soak.bwcap"
    master, slave = os.openpty()
    tty.setraw(slave)
    device = os.ttyname(slave)
    proc = subprocess.Popen([sys.executable, "-m", "buswitness.cli.main", "record", device, "--baud", str(ns.baud),
                             "--format", "8N1", "-o", str(out), "--quiet"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    while not (out.exists() and out.stat().st_size > 0):
        if proc.poll() is not None:
            print(proc.communicate()[1], file=sys.stderr)
            return 1
        time.sleep(0.05)
    time.sleep(0.5)  # let the reader thread start
    cpu_at_start = proc_cpu_s(proc.pid)

    per_chunk_s = ns.chunk * 10.0 / ns.baud
    seconds = ns.minutes * 60.0
    sent = hashlib.sha256()
    n_sent = 0
    late_max = 0.0
    source = chunk_source(1, ns.chunk)
    start = time.monotonic()
    k = 0
    while True:
        due = start + k * per_chunk_s
        if due - start >= seconds:
            break
        delay = due - time.monotonic()
        if delay > 0:
            time.sleep(delay)
        else:
            late_max = max(late_max, -delay)
        data = next(source)
        view = memoryview(data)
        while view:
            view = view[os.write(master, view):]
        sent.update(data)
        n_sent += len(data)
        k += 1
    wall_write = time.monotonic() - start
    time.sleep(1.5)
    steady_cpu = proc_cpu_s(proc.pid) - cpu_at_start
    steady_wall = time.monotonic() - start
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    wall_record = time.monotonic() - start
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = usage.ru_utime + usage.ru_stime

    got = hashlib.sha256()
    n_got = 0
    reader = CaptureReader(out)
    for batch in reader.iter_batches():
        got.update(batch.payload.tobytes())
        n_got += int(batch.length.sum())
    ok = got.digest() == sent.digest() and n_got == n_sent
    print(f"soak: {ns.minutes:g} min at {ns.baud} baud 8N1 saturated, {ns.chunk}-byte chunks")
    print(f"bytes sent {n_sent}, captured {n_got}, identical: {ok}, lost: {n_sent - n_got}")
    print(f"record exit code {proc.returncode}; reader clean: {reader.report.clean}")
    print(f"record CPU {cpu:.2f} s over {wall_record:.1f} s wall = {100 * cpu / wall_record:.2f}% of one core "
          f"(includes interpreter start-up)")
    print(f"record CPU while recording (from /proc, start-up excluded) {steady_cpu:.2f} s over {steady_wall:.1f} s "
          f"= {100 * steady_cpu / steady_wall:.2f}% of one core")
    print(f"writer pacing: {wall_write:.1f} s, worst lateness {1000 * late_max:.1f} ms")
    print(f"capture file {out.stat().st_size} bytes; peak RSS of record {usage.ru_maxrss / 1024:.1f} MiB")
    print(err.strip().splitlines()[-2] if err.strip() else "")
    os.close(master)
    os.close(slave)
    return 0 if ok and proc.returncode == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
