"""A simulated Profibus DP line (FDL telegrams) written as a capture with its ground truth.

Our own fictional scenario ("mixing-line"): master 2 (a DP class-1 master) exchanges data
with slaves 10-17 in a cycle, then passes the token to master 3, which exchanges data with
its one slave 30 and passes the token back. Slave 13 drops out for a while; once it answers
again the master re-parameterises it (diagnosis, set-parameter, check-configuration,
diagnosis: the DP start-up on SAPs 60, 61, 62). Slave 15 loses answers now and then; the
master repeats the same telegram (same frame count bit) after its slot time. Slave 16 flags
a diagnosis now and then (answers "data high").

The telegrams are built here, independently of the decoder (layout: see
``decode/protocols/profibus_dp/fdl.py``; facts from memory). Bytes go through the same USB
adapter model as the Modbus simulator.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
from buswitness.capture.fileformat import CaptureHeader, CaptureWriter, PortInfo, RecordBatch
from buswitness.errors import OutputError, UsageError
from buswitness.serial import SerialFormat
from buswitness.simulate.adapter import AdapterModel
from buswitness.simulate.run import START_MONOTONIC_NS
from buswitness.simulate.scenario import Adapter

NAME = "mixing-line"
DESCRIPTION = ("Profibus DP: master 2 polls slaves 10-17, master 3 polls slave 30 (token passing); "
               "slave 13 drops out and is re-parameterised, slave 15 needs retries, slave 16 flags diagnosis")

# FDL bytes (from memory; see decode/protocols/profibus_dp/fdl.py)
_SD1, _SD2, _SD4, _SC, _ED = 0x10, 0x68, 0xDC, 0xE5, 0x16
_SRD_HIGH, _FCV, _FCB, _REQ = 0x0D, 0x10, 0x20, 0x40
_DL, _DH = 0x08, 0x0A
_SAP_DIAG, _SAP_PRM, _SAP_CFG, _SSAP_MASTER = 60, 61, 62, 62


def _sd2(da: int, sa: int, fc: int, du: bytes, dsap: int = -1, ssap: int = -1) -> bytes:
    ext = (bytes([dsap]) if dsap >= 0 else b"") + (bytes([ssap]) if ssap >= 0 else b"")
    body = bytes([da | (0x80 if dsap >= 0 else 0), sa | (0x80 if ssap >= 0 else 0), fc]) + ext + du
    return bytes([_SD2, len(body), len(body), _SD2]) + body + bytes([sum(body) & 0xFF, _ED])


@dataclass
class ProfibusScenario:
    baud: int = 1_500_000
    masters: dict = field(default_factory=lambda: {2: list(range(10, 18)), 3: [30]})
    dropout_slave: int = 13
    dropout_windows: tuple = ((0.30, 0.45), (0.70, 0.78))  #: shares of the run when it is silent
    retry_slave: int = 15
    retry_loss: float = 0.06       #: share of its answers lost
    diag_slave: int = 16
    diag_rate: float = 0.01
    max_retries: int = 2           #: repeats of an unanswered telegram before the slave counts as failed
    slave_delay_bits: tuple = (11, 60)
    adapter: Adapter = field(default_factory=lambda: Adapter(latency_ms=1.0, host_delay_ms=0.1,
                                                             host_delay_tail_rate=0.0, host_delay_tail_ms=0.0))

    @property
    def slot_bits(self) -> int:
        return 300 if self.baud >= 1_000_000 else 100  # typical settings (from memory)

    @property
    def serial(self) -> SerialFormat:
        return SerialFormat(self.baud, 8, "E", 1)


class _Truth:
    def __init__(self) -> None:
        self.stations: dict[int, dict] = {}
        self.tokens: dict[int, int] = {}
        self.telegrams = 0

    def st(self, a: int) -> dict:
        return self.stations.setdefault(a, {"requests": 0, "answered": 0, "timeouts": 0, "retries": 0,
                                            "diagnosis_flags": 0, "dropouts": 0, "reparameterisations": 0})


class ProfibusSim:
    def __init__(self, sc: ProfibusScenario, duration_s: float, seed: int) -> None:
        if not duration_s > 0:
            raise UsageError(f"a simulation must last more than zero seconds, not {duration_s!r}")
        self.sc, self.duration_s, self.seed = sc, float(duration_s), int(seed)
        self.truth = _Truth()
        ident = f"{NAME}|{seed}|{duration_s}|{sc.baud}"
        self.header = CaptureHeader(
            serial=sc.serial,
            ports=[PortInfo(0, "simulated adapter", latency_ms=sc.adapter.latency_ms, latency_source="simulated")],
            start_utc="2026-01-01T00:00:00+00:00", start_monotonic_ns=START_MONOTONIC_NS, host="simulator",
            notes=f"simulated scenario {NAME}, seed {seed}", source="simulate", timing="host",
            capture_id=hashlib.sha256(ident.encode()).hexdigest()[:32], extra={"protocol": "profibus-dp"})

    # -- the wire: (start time, bytes) of every telegram --------------------------------------------
    def _wire(self) -> Iterator[list[tuple[int, bytes]]]:
        sc, tr = self.sc, self.truth
        rng = np.random.default_rng(self.seed)
        bit = 1e9 / sc.baud
        char = 11 * bit
        t = START_MONOTONIC_NS + 1_000_000
        end = START_MONOTONIC_NS + int(self.duration_s * 1e9)
        fcb: dict[int, int] = {}
        failed: set[int] = set()
        down = [(START_MONOTONIC_NS + a * self.duration_s * 1e9, START_MONOTONIC_NS + b * self.duration_s * 1e9)
                for a, b in sc.dropout_windows]
        was_down = False
        out: list[tuple[int, bytes]] = []

        def send(raw: bytes) -> None:
            nonlocal t
            t += int(33 * bit)  # the idle before every telegram (TSYN)
            out.append((t, raw))
            t += int(len(raw) * char)
            tr.telegrams += 1

        def answers(slave: int) -> bool:
            if slave == sc.dropout_slave and any(a <= t < b for a, b in down):
                return False
            if slave == sc.retry_slave and rng.random() < sc.retry_loss:
                return False
            return True

        def exchange(master: int, slave: int, request: bytes, answer: bytes) -> bool:
            """One request with its retries; True when answered."""
            nonlocal t
            for attempt in range(sc.max_retries + 1):
                st = tr.st(slave)
                st["requests"] += 1
                st["retries"] += attempt > 0
                send(request)
                if answers(slave):
                    t += int(rng.integers(sc.slave_delay_bits[0], sc.slave_delay_bits[1] + 1) * bit) - int(33 * bit)
                    send(answer)
                    st["answered"] += 1
                    return True
                st["timeouts"] += 1
                t += int(sc.slot_bits * bit)
            return False

        def fc_for(master: int, slave: int) -> int:
            fcb[slave] = fcb.get(slave, 0) ^ _FCB
            return _REQ | _SRD_HIGH | _FCV | fcb[slave]

        while t < end:
            for master, slaves in sc.masters.items():
                for slave in slaves:
                    if slave in failed:
                        # a failed slave gets a diagnosis request each cycle until it answers; then the start-up
                        req = _sd2(slave, master, _REQ | _SRD_HIGH, b"", _SAP_DIAG, _SSAP_MASTER)
                        diag = _sd2(master, slave, _DL, b"\x02\x05\x00\xff\x00\x00", _SSAP_MASTER, _SAP_DIAG)
                        if exchange(master, slave, req, diag):
                            failed.discard(slave)
                            tr.st(slave)["reparameterisations"] += 1
                            exchange(master, slave, _sd2(slave, master, _REQ | _SRD_HIGH, b"\x80\x01\x02\x0b\x00\x00\x01",
                                                         _SAP_PRM, _SSAP_MASTER), bytes([_SC]))
                            exchange(master, slave, _sd2(slave, master, _REQ | _SRD_HIGH, b"\x21\x11",
                                                         _SAP_CFG, _SSAP_MASTER), bytes([_SC]))
                            exchange(master, slave, req, diag)
                        continue
                    n_out = 2 + slave % 5
                    req = _sd2(slave, master, fc_for(master, slave), rng.integers(0, 256, n_out, np.uint8).tobytes())
                    status = _DL
                    if slave == sc.diag_slave and rng.random() < sc.diag_rate:
                        status = _DH
                    ans = _sd2(master, slave, status, rng.integers(0, 256, 1 + slave % 4, np.uint8).tobytes())
                    if exchange(master, slave, req, ans):
                        if status == _DH:
                            tr.st(slave)["diagnosis_flags"] += 1
                    else:
                        failed.add(slave)
                        tr.st(slave)["dropouts"] += 1
                # the token to the next master in the ring
                others = list(sc.masters)
                nxt = others[(others.index(master) + 1) % len(others)]
                send(bytes([_SD4, nxt, master]))
                tr.tokens[master] = tr.tokens.get(master, 0) + 1
            if len(out) > 20000:
                yield out
                out = []
            if t >= end:
                break
            was_down = was_down  # (the drop-out windows are fixed shares of the run)
        if out:
            yield out

    # -- records -------------------------------------------------------------------------------------
    def batches(self) -> Iterator[RecordBatch]:
        sc = self.sc
        char = 11 * 1e9 / sc.baud
        adapter = AdapterModel(sc.adapter, np.random.default_rng(self.seed + 1), START_MONOTONIC_NS)
        for chunk in self._wire():
            starts = np.array([s for s, _ in chunk], dtype=np.int64)
            lens = np.array([len(r) for _, r in chunk], dtype=np.int64)
            values = np.frombuffer(b"".join(r for _, r in chunk), dtype=np.uint8)
            k = np.arange(values.size) - np.repeat(np.cumsum(lens) - lens, lens)
            arrival = np.repeat(starts, lens) + np.rint((k + 1) * char).astype(np.int64)
            batch = adapter.feed(arrival, values, np.zeros(values.size, np.uint8), int(arrival[-1]) - 5_000_000)
            if len(batch):
                yield batch
        batch = adapter.feed(np.zeros(0, np.int64), np.zeros(0, np.uint8), np.zeros(0, np.uint8), None)
        if len(batch):
            yield batch

    def truth_dict(self) -> dict:
        tr = self.truth
        return {"scenario": NAME, "protocol": "profibus-dp", "seed": self.seed, "duration_s": self.duration_s,
                "baud": self.sc.baud, "telegrams": tr.telegrams,
                "stations": {str(a): v for a, v in sorted(tr.stations.items())},
                "tokens_passed": {str(a): v for a, v in sorted(tr.tokens.items())},
                "faults": {"dropout_slave": self.sc.dropout_slave, "retry_slave": self.sc.retry_slave,
                           "diagnosis_slave": self.sc.diag_slave}}

    def write(self, capture_path: str | os.PathLike, truth_path: str | os.PathLike | None = None) -> dict:
        t0 = time.perf_counter()
        for path in (capture_path, truth_path):
            if path is not None and os.path.exists(path):
                raise OutputError(f"{path}: already exists; choose another name (nothing was overwritten)")
        records = data = 0
        with CaptureWriter(capture_path, self.header, fsync_interval_s=3600.0, flush_interval_s=3600.0,
                           max_block_records=16384) as writer:
            for batch in self.batches():
                writer.append_batch(batch)
                records += len(batch)
                data += int(batch.length.sum())
        if truth_path is not None:
            with open(truth_path, "w", encoding="utf-8") as f:
                json.dump(self.truth_dict(), f, indent=1, sort_keys=True)
        return {"records": records, "bytes": data, "seconds": time.perf_counter() - t0,
                "frames": self.truth.telegrams}


def simulate_profibus(duration_s: float = 20.0, seed: int = 1, baud: int | None = None) -> ProfibusSim:
    sc = ProfibusScenario() if baud is None else ProfibusScenario(baud=int(baud))
    return ProfibusSim(sc, duration_s, seed)
