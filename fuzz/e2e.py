"""End-to-end fuzzing from generated captures: header fields and records through everything that
``analyze`` and ``evidence`` run, in-process.

Each case builds a small capture file in memory (one case in five: timestamped hex text with
settings comments that may be hostile, and now and then a time that is no number or far out of
range): a header made from valid fields with 0 to 4 of them replaced by a hostile value (wrong types, huge or negative numbers, dates near the year
9999, control characters, markup), and 0 to 40 records mixing CRC-valid Modbus RTU requests and
answers with random bytes, random ports and flags, and timestamps that step forwards, backwards
or jump towards the ends of int64. The case then runs the same functions the two verbs run:
``open_capture`` (kind auto) -> ``analyze`` -> ``text_summary`` -> ``summary_dict`` (JSON, no
NaN) -> ``render_dashboard`` -> ``render_evidence`` for each station seen. Only the writing of
the rendered pages to disk is left out (``core/fsutil.py`` is tested on its own).

A case passes when it finishes or raises a ``BuswitnessError`` (the command line's one line and
exit code); anything else is a failure, returned with the seed that reproduces it.

    python fuzz/fuzz_e2e.py --cases 1000000     # outside CI; prints counts and speed
    tests/test_reliability_fuzz_e2e.py           # in CI: 10,000 cases, slim analysis (see there)
"""

from __future__ import annotations

import json
import random
import struct
import tempfile
import traceback
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from buswitness.capture.fileformat import (
    BLOCK_SYNC,
    FORMAT_VERSION,
    INDEX_DTYPE,
    MAGIC,
)
from buswitness.decode.crc import append_crc
from buswitness.errors import BuswitnessError

HOSTILE_TEXT = ["", "\x1b[2J\x1b[31mRED", "<script>alert(1)</script>", "a\nstate        complete", "\x00\x07\x9b",
                "\u202egnp.exe", "x" * 300, "é漢字", "\r\r\r", "{{ 7*7 }}", "%s%s%n"]
HOSTILE_NUMBERS = [0, -1, 1, 255, 256, 65535, 2**31, 2**63 - 1, 2**63, -(2**63), 2**70, 1e300, -1e300, 0.5, 1e-300,
                   True, False, None]
HOSTILE_DATES = ["9999-12-31T23:59:59+00:00", "0001-01-01T00:00:00", "2999-12-31T23:59:59.999999+00:00",
                 "1970-01-01T00:00:00+00:00", "2026-12-02T22:00:00-23:59", "2026-13-40T99:99:99", "yesterday", ""]
TOP_FIELDS = ["serial", "ports", "start_utc", "start_monotonic_ns", "host", "tool_version", "notes", "source",
              "timing", "capture_id", "part", "extra", "format_version"]
EXTRA_FIELDS = ["host_delay_ms", "port_roles", "protocol"]
PORT_FIELDS = ["id", "name", "latency_ms", "latency_source", "serial_number", "line_errors"]
SERIAL_FIELDS = ["baud", "format"]


def hostile_value(rng: random.Random) -> object:
    kind = rng.randrange(7)
    if kind == 0:
        return rng.choice(HOSTILE_TEXT)
    if kind == 1:
        return rng.choice(HOSTILE_NUMBERS)
    if kind == 2:
        return rng.choice(HOSTILE_DATES)
    if kind == 3:
        return rng.choice([[], {}, [1, 2], {"0": "master"}, {"0": "boss"}, {"\u0663": "both"}, {"999": "slaves"}])
    if kind == 4:
        return rng.choice(["rtu", "ascii", "tcp", "host", "none", "8E1", "9Q1", "7O2", "8N2"])
    if kind == 5:
        return rng.choice([9600, 19200, 115200, 300, 50, 4_000_000, 0, -19200, "19200", "١٩٢٠٠"])
    return rng.uniform(-1e6, 1e6)


def base_header(rng: random.Random) -> dict:
    start_ns = rng.choice([0, 10**12, rng.randrange(1, 2**62)])
    return {
        "serial": {"baud": rng.choice([9600, 19200, 38400]), "format": rng.choice(["8E1", "8N2", "8N1"])},
        "ports": [{"id": i, "name": f"/dev/ttyUSB{i}", "latency_ms": rng.choice([None, 1.0, 16.0]),
                   "latency_source": "sysfs", "serial_number": None, "line_errors": rng.random() < 0.5}
                  for i in range(rng.choice([1, 1, 2]))],
        "start_utc": rng.choice(["2026-11-30T22:00:00+00:00", "2026-12-02T03:04:05.123456", ""]),
        "start_monotonic_ns": start_ns, "host": "fuzzhost", "tool_version": "0.1.0", "notes": "fuzz",
        "source": "record", "timing": rng.choice(["host", "host", "none"]), "capture_id": f"{rng.getrandbits(64):x}",
        "part": 0, "extra": {}, "format_version": FORMAT_VERSION,
    }


def mutate_header(rng: random.Random, header: dict) -> None:
    for _ in range(rng.choice([0, 0, 1, 1, 2, 3, 4])):
        where = rng.randrange(5)
        if where == 0:
            header[rng.choice(TOP_FIELDS)] = hostile_value(rng)
        elif where == 1 and isinstance(header.get("extra"), dict):
            header["extra"][rng.choice(EXTRA_FIELDS)] = hostile_value(rng)
        elif where == 2 and isinstance(header.get("ports"), list) and header["ports"] \
                and isinstance(header["ports"][0], dict):
            header["ports"][rng.randrange(len(header["ports"]))][rng.choice(PORT_FIELDS)] = hostile_value(rng)
        elif where == 3 and isinstance(header.get("serial"), dict):
            header["serial"][rng.choice(SERIAL_FIELDS)] = hostile_value(rng)
        else:
            header.pop(rng.choice(TOP_FIELDS), None)


def _frame(body: bytes) -> bytes:
    return append_crc(body)


def _modbus_pair(rng: random.Random) -> list[bytes]:
    station = rng.choice([1, 2, 7, 247, 0, 255, rng.randrange(256)])
    count = rng.randrange(1, 5)
    request = _frame(bytes([station, 3]) + struct.pack(">HH", rng.randrange(65536), count))
    kind = rng.randrange(4)
    if kind == 0:
        return [request]
    if kind == 1:
        return [request, _frame(bytes([station, 0x83, rng.randrange(1, 12)]))]
    answer = _frame(bytes([station, 3, 2 * count]) + rng.randbytes(2 * count))
    if kind == 3:
        return [request, answer[:rng.randrange(1, len(answer))], answer[rng.randrange(len(answer)):]]
    return [request, answer]


def records(rng: random.Random, start_ns: int, ports: int) -> list[tuple[int, int, int, bytes]]:
    """(t_ns, port, flags, data) tuples, t_ns within int64."""
    out: list[tuple[int, int, int, bytes]] = []
    t = start_ns + rng.choice([0, 1_000_000, -5 * 10**9, 10**15])
    for _ in range(rng.randrange(0, 41)):
        step = rng.choice([rng.randrange(0, 3_000_000), rng.randrange(0, 300_000_000), 0, -rng.randrange(10**9),
                           rng.choice([10**12, 2**62, -(2**62)])])
        t = max(-(2**63), min(2**63 - 1, t + step))
        r = rng.random()
        if r < 0.6:
            chunks = _modbus_pair(rng)
        elif r < 0.85:
            chunks = [rng.randbytes(rng.randrange(0, 40))]
        else:
            chunks = [b""]
        for chunk in chunks:
            flags = rng.choice([0] * 12 + [1, 2, 4, 8, 16, 32, 64, rng.randrange(256)])
            port = rng.choice([0] * 6 + [1, 1, 2, 255]) if ports > 1 or rng.random() < 0.1 else 0
            out.append((t, port, flags, chunk))
            t = min(2**63 - 1, t + rng.randrange(0, 20_000_000))
    return out


def capture_bytes(header: dict, recs: list[tuple[int, int, int, bytes]], rng: random.Random) -> bytes:
    raw = json.dumps(header).encode("utf-8")
    out = bytearray(MAGIC + struct.pack("<HI", FORMAT_VERSION, len(raw)) + raw + struct.pack("<I", zlib.crc32(raw)))
    per_block = rng.choice([1, 5, 40])
    for i in range(0, len(recs), per_block):
        chunk = recs[i:i + per_block]
        index = np.array([(t, len(d), p, f) for t, p, f, d in chunk], dtype=INDEX_DTYPE)
        payload = b"".join(d for _, _, _, d in chunk)
        body = index.tobytes() + payload
        head = BLOCK_SYNC + struct.pack("<II", len(chunk), len(payload))
        out += head + struct.pack("<I", zlib.crc32(head)) + body + struct.pack("<I", zlib.crc32(body))
    if out and rng.random() < 0.1:  # damage: cut the tail, or flip a byte past the header
        if rng.random() < 0.5:
            del out[rng.randrange(len(out)):]
        else:
            pos = rng.randrange(len(out))
            out[pos] ^= 1 << rng.randrange(8)
    return bytes(out)


def hex_text(rng: random.Random, recs: list[tuple[int, int, int, bytes]]) -> bytes:
    """The records as timestamped hex text, with settings comments that may be hostile."""
    lines = []
    for _ in range(rng.randrange(0, 4)):
        key = rng.choice(["baud", "format", "latency_ms", "port", "notes"])
        lines.append(f"# {key}: {hostile_value(rng) if rng.random() < 0.5 else rng.choice(['19200', '8E1', '16'])}")
    t0 = recs[0][0] if recs else 0
    epoch = rng.choice([0.0, 0.0, 1.7e9, 9e15])
    for t, _, _, data in recs:
        if not data:
            continue
        seconds = epoch + (t - t0) / 1e9
        stamp = rng.choice([f"{seconds:.6f}"] * 100 + ["nan", "-inf", "1e300", "x", f"{-seconds:.3f}"])
        lines.append(f"{stamp} {data.hex(' ').upper()}")
    text = "\n".join(lines).replace("\x00", "")
    return text.encode("utf-8", "replace")


def make_case(seed: int) -> bytes:
    """The capture file of case ``seed`` (the same seed gives the same bytes); one in five is hex text."""
    rng = random.Random(seed)
    header = base_header(rng)
    recs = records(rng, header["start_monotonic_ns"], len(header["ports"]))
    if rng.random() < 0.2:
        return hex_text(rng, recs)
    mutate_header(rng, header)
    return capture_bytes(header, recs, rng)


def run_verbs(path: Path) -> None:
    """What ``analyze`` and ``evidence`` run on an input, short of writing the pages to disk."""
    from buswitness.analysis import AnalysisOptions, analyze
    from buswitness.analysis.dashboard import render_dashboard
    from buswitness.analysis.evidence import render_evidence
    from buswitness.analysis.summary import summary_dict, text_summary
    from buswitness.capture.sources import open_capture

    result = analyze(open_capture(path), AnalysisOptions(progress=False))
    text_summary(result)
    json.dumps(summary_dict(result), allow_nan=False)
    render_dashboard(result)
    for s in result.stations:
        if s.requests or s.events:
            render_evidence(result, s.address)


@dataclass
class Tally:
    cases: int = 0
    refused: int = 0                       #: ended with a BuswitnessError (one line, exit 2/3)
    failures: list[tuple[int, str]] = field(default_factory=list)  #: (seed, traceback)


def run_cases(seeds, tally: Tally | None = None, workdir: str | None = None) -> Tally:
    tally = tally or Tally()
    with tempfile.TemporaryDirectory(dir=workdir) as d:
        path = Path(d) / "case.bwcap"
        for seed in seeds:
            path.write_bytes(make_case(seed))
            tally.cases += 1
            try:
                run_verbs(path)
            except BuswitnessError:
                tally.refused += 1
            except Exception:  # noqa: BLE001 - the harness records every unexpected error
                tally.failures.append((seed, traceback.format_exc()))
    return tally


class SlimRunner:
    """The CI form: each case's capture goes through the reader and every function of ``analyze`` and
    ``evidence`` that reads the header or the damage report, on figures decoded once from a pool.

    Decoding and accumulating figures cost about 0.15 s a case (pandas tables), too slow for 10,000 cases
    in CI; the records' own path is fuzzed by ``fuzz_decoder.py`` and by every ``full_every``-th case,
    which runs the whole of :func:`run_verbs`.
    """

    def __init__(self, pool_seeds=range(1000, 1008), full_every: int = 200, render_every: int = 50) -> None:
        from buswitness.analysis import AnalysisOptions, analyze
        from buswitness.capture.sources import open_capture

        self.full_every = full_every
        self.render_every = render_every
        self.pool = []
        with tempfile.TemporaryDirectory() as d:
            path = Path(d) / "pool.bwcap"
            for seed in pool_seeds:
                rng = random.Random(seed)
                header = base_header(rng)
                header["start_utc"] = "2026-11-30T22:00:00+00:00"
                recs = [r for _ in range(30) for r in records(rng, header["start_monotonic_ns"], 1)
                        if abs(r[0] - header["start_monotonic_ns"]) < 3600 * 10**9]
                path.write_bytes(capture_bytes(header, recs, random.Random(0)))
                self.pool.append(analyze(open_capture(path), AnalysisOptions(progress=False)))

    def run(self, seed: int, path: Path) -> None:
        import copy
        from dataclasses import replace

        from buswitness.analysis.dashboard import dashboard_data, render_dashboard
        from buswitness.analysis.evidence import evidence_data, render_evidence
        from buswitness.analysis.summary import summary_dict, text_summary
        from buswitness.capture.sources import open_capture
        from buswitness.decode import DecoderConfig

        if seed % self.full_every == 0:
            run_verbs(path)
            return
        source = open_capture(path)
        for _ in source.iter_batches():
            pass
        DecoderConfig.from_header(source.header)
        base = self.pool[seed % len(self.pool)]
        figures = copy.copy(base.figures)
        figures.t0_ns = source.header.start_monotonic_ns  # so the header's start anchors every clock time shown
        result = replace(base, header=source.header, damage=source.report, paths=[str(p) for p in source.paths],
                         figures=figures)
        text_summary(result)
        json.dumps(summary_dict(result), allow_nan=False)
        dashboard_data(result)
        if seed % self.render_every == 1:
            render_dashboard(result)
        for s in result.stations:
            if s.requests or s.events:
                evidence_data(result, s.address, identity=[])
        if result.stations and seed % 5 == 2:
            render_evidence(result, result.stations[0].address, identity=[])


def run_slim_cases(seeds, runner: SlimRunner, tally: Tally | None = None) -> Tally:
    tally = tally or Tally()
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "case.bwcap"
        for seed in seeds:
            path.write_bytes(make_case(seed))
            tally.cases += 1
            try:
                runner.run(seed, path)
            except BuswitnessError:
                tally.refused += 1
            except Exception:  # noqa: BLE001 - the harness records every unexpected error
                tally.failures.append((seed, traceback.format_exc()))
    return tally
