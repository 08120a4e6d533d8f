"""An oracle that is not ours: pymodbus master and servers on an emulated multi-drop RS-485 line.

Issue 12 asks for test truth that does not share the decoder's assumptions. Here the Modbus
stack is pymodbus (its ``ModbusSerialClient`` as master, its ``ModbusSerialServer`` as every
station, run as subprocesses from ``tests/oracle/``), each party on its own pseudo-terminal.
Our own code is only:

* the **wire** (:class:`Wire`): reads what each party writes and delivers every byte to the
  other parties at character pace, noting for each byte when its stop bit ended on the line
  (monotonic ns). It also plays the line's and stations' physics the servers cannot:
  it holds a station's answer for its turnaround (a slow station's answers pass the master's
  timeout, first in first out), flips one bit in some answers of a noisy station, and marks a
  collision when two talkers' bytes overlap in time;
* the **tap** (:func:`tap_records`): what a sniffer's USB adapter would have delivered from the
  wire's byte times (a delivery grid of period L, early flush at 62 bytes, a small host delay),
  written as buswitness hex text with ``# baud:`` and ``# format:`` but no ``# latency_ms:``;
* the **comparison** (:func:`compare`): buswitness's public decoder against the truth.

Truth per master attempt (one request frame on the wire, retries included):

* what was sent and what pymodbus made of it: the pymodbus client's own log (trace hooks,
  each call's result);
* which answer belongs to which request: the pymodbus server's own log (requests it decoded
  for its address and the frames it sent, in order) with the wire's first-in-first-out hold;
* when: the wire's byte times (request's last stop bit end to answer's first start bit).

The ptys run 8N1 (the kernel refuses parity on a pty); the bus's own character format
(8E1 at 19200, 8N1 at 115200) lives only in the wire's timing model.
"""

from __future__ import annotations

import gc
import heapq
import json
import os
import random
import select
import subprocess
import sys
import tempfile
import time
import tty
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

ORACLE_DIR = Path(__file__).parent / "oracle"

#: Fictional plant: a cooling-water pump house. Address -> role.
PLANT = {
    11: "normal",      # supply pump drive
    12: "normal",      # return pump drive
    17: "slow",        # old flow computer: answers 20-350 ms after a request
    21: "noisy",       # tank level transmitter on a long, badly shielded run
    24: "exceptions",  # valve controller: only registers 0-15 exist
    30: "dead",        # chiller interface: configured in the master, nothing behind it
}
#: Bits per character of the bus's format (common practice: start + 8 data + parity/stop bits).
FORMAT_BITS = {"8E1": 11, "8O1": 11, "8N2": 11, "8N1": 10}
#: Turnaround a live station takes before its answer starts, drawn per answer (ms).
TURNAROUND_MS = (3.0, 12.0)
#: The slow station's turnaround (ms) and the band around the master's timeout it never uses:
#: an answer starting within that band would meet the master's retry on the wire.
SLOW_MS = (20.0, 350.0)
SLOW_GUARD_MS = (150.0, 240.0)
#: Silence a station keeps between two answers it sends back to back (ms).
STATION_GAP_MS = 5.0
#: Share of the noisy station's answers that get one bit flipped on the wire.
NOISE_SHARE = 0.25


def char_ns(baud: int, fmt: str) -> int:
    """One character time on the bus, ns (bits per character / baud)."""
    return round(FORMAT_BITS[fmt] * 1e9 / baud)


@dataclass
class Burst:
    """One party's write as it went onto the line: its bytes and their stop-bit end times."""

    party: str          # "master" or the station's address as text
    start_ns: int       # first start bit
    ends_ns: list[int]  # stop-bit end of every byte
    sent: bytes         # what the party wrote
    wire: bytes         # what the line carried (a noisy station's flipped bit shows here)
    read_ns: int        # when the wire read it from the party's pty
    collided: bool = False

    @property
    def end_ns(self) -> int:
        return self.ends_ns[-1]


@dataclass
class _Party:
    name: str
    role: str
    fd: int
    slave_fd: int
    path: str
    tx_free_ns: int = 0


class Wire:
    """The line: delivers every byte to every other party at character pace and logs its time.

    Single-threaded loop over the parties' pty master ends. A byte read from a party is put on
    the line when that party's transmitter is free (after the station's turnaround, for a
    station), byte k of a write ending k+1 character times after the write's start; it is
    delivered to the others once its end time has passed. Pacing on a loaded machine is only
    as good as the scheduler; the recorded times are the line's own schedule, which is what
    the tap uses, so the truth stays consistent.

    Who hears whom: the master's bytes go to every station, a station's bytes to the master
    (and the tap sees everything). Stations do not hear each other unless
    ``stations_hear_stations``: pymodbus 3.16's serial server frames by length and CRC alone,
    without the t3.5 silence, and when a CRC check fails it drops everything it holds, so a
    server that hears other stations' answers loses requests meant for it (seen in a short run:
    the servers decoded 29 of the 70 requests sent to them, station 24 one of 11; all of them
    when stations do not hear each other). A real device would not.

    Two talkers at once: both bursts are marked ``collided`` and their bytes reach the others
    (and the tap) interleaved in time order; no attempt is made to model the garbled levels.
    """

    def __init__(self, baud: int, fmt: str, seed: int, stations_hear_stations: bool = False) -> None:
        self.c = char_ns(baud, fmt)
        self.rng = random.Random(seed)
        self.parties: list[_Party] = []
        self.bursts: list[Burst] = []
        self.stations_hear_stations = stations_hear_stations
        self._queue: list[tuple[int, int, int, int]] = []  # (end_ns, seq, party index, byte)
        self._seq = 0
        self.lateness_ns: list[int] = []  # per byte: delivery to the parties after its stop bit ended

    def add_party(self, name: str, role: str) -> str:
        master_fd, slave_fd = os.openpty()
        tty.setraw(slave_fd)
        os.set_blocking(master_fd, False)
        self.parties.append(_Party(name, role, master_fd, slave_fd, os.ttyname(slave_fd)))
        return os.ttyname(slave_fd)

    def _turnaround_ns(self, role: str) -> int:
        if role == "slow":
            while True:
                ms = self.rng.uniform(*SLOW_MS)
                if not SLOW_GUARD_MS[0] <= ms <= SLOW_GUARD_MS[1]:
                    return round(ms * 1e6)
        return round(self.rng.uniform(*TURNAROUND_MS) * 1e6)

    def _put_on_line(self, idx: int, data: bytes, now: int) -> None:
        p = self.parties[idx]
        if p.role == "master":
            start = max(now, p.tx_free_ns)
        else:
            start = max(now + self._turnaround_ns(p.role), p.tx_free_ns + round(STATION_GAP_MS * 1e6))
        wire = bytearray(data)
        if p.role == "noisy" and self.rng.random() < NOISE_SHARE:
            k = self.rng.randrange(len(wire))
            wire[k] ^= 1 << self.rng.randrange(8)
        ends = [start + (k + 1) * self.c for k in range(len(data))]
        burst = Burst(p.name, start, ends, bytes(data), bytes(wire), now)
        for other in reversed(self.bursts):
            if other.end_ns < start - 2_000_000_000:
                break
            if other.party != p.name and other.start_ns < burst.end_ns and start < other.end_ns:
                other.collided = burst.collided = True
        self.bursts.append(burst)
        p.tx_free_ns = burst.end_ns
        for end, b in zip(ends, wire):
            heapq.heappush(self._queue, (end, self._seq, idx, b))
            self._seq += 1

    def _deliver_due(self, now: int) -> None:
        out: dict[int, bytearray] = {}
        while self._queue and self._queue[0][0] <= now:
            end, _, src, b = heapq.heappop(self._queue)
            self.lateness_ns.append(now - end)
            src_is_master = self.parties[src].role == "master"
            for i, p in enumerate(self.parties):
                if i == src:
                    continue
                if not src_is_master and p.role != "master" and not self.stations_hear_stations:
                    continue
                out.setdefault(i, bytearray()).append(b)
        for i, data in out.items():
            try:
                os.write(self.parties[i].fd, bytes(data))
            except (BlockingIOError, OSError):
                pass  # a party that stopped reading loses the bytes, as on a real line

    def run(self, until) -> None:
        """Carry bytes until ``until()`` is true and the line is quiet.

        The garbage collector is off meanwhile: a collection in a big test process can stall
        the loop for tens of ms (the times stay right, but pacing suffers).
        """
        was_enabled = gc.isenabled()
        gc.disable()
        try:
            self._loop(until)
        finally:
            if was_enabled:
                gc.enable()

    def _loop(self, until) -> None:
        fds = {p.fd: i for i, p in enumerate(self.parties)}
        while True:
            now = time.monotonic_ns()
            self._deliver_due(now)
            if not self._queue and until():
                return
            wait = 0.005
            if self._queue:
                wait = max(0.0, min(wait, (self._queue[0][0] - now) / 1e9))
            ready, _, _ = select.select(list(fds), [], [], wait)
            now = time.monotonic_ns()
            for fd in ready:
                try:
                    data = os.read(fd, 4096)
                except (BlockingIOError, OSError):
                    continue
                if data:
                    self._put_on_line(fds[fd], data, now)

    def close(self) -> None:
        for p in self.parties:
            for fd in (p.fd, p.slave_fd):
                try:
                    os.close(fd)
                except OSError:
                    pass


# --- running the bus ----------------------------------------------------------------------------


@dataclass
class BusRun:
    """Everything one run produced: the wire's bursts and the two stacks' own logs."""

    baud: int
    fmt: str
    plan: dict
    bursts: list[Burst]
    master_log: list[dict]
    station_log: list[dict]
    wall_s: float
    lateness_ns: list[int] = field(default_factory=list)  # the wire's delivery after each stop bit

    def save(self, path: Path) -> Path:
        """Write the run as JSON, so a tap can be remade and decoded again without the bus."""
        data = {"baud": self.baud, "fmt": self.fmt, "plan": self.plan, "wall_s": self.wall_s,
                "master_log": self.master_log, "station_log": self.station_log,
                "lateness_ns": self.lateness_ns,
                "bursts": [{"party": b.party, "start_ns": b.start_ns, "ends_ns": b.ends_ns, "sent": b.sent.hex(),
                            "wire": b.wire.hex(), "read_ns": b.read_ns, "collided": b.collided}
                           for b in self.bursts]}
        Path(path).write_text(json.dumps(data))
        return Path(path)

    @classmethod
    def load(cls, path: Path) -> BusRun:
        d = json.loads(Path(path).read_text())
        bursts = [Burst(b["party"], b["start_ns"], b["ends_ns"], bytes.fromhex(b["sent"]), bytes.fromhex(b["wire"]),
                        b["read_ns"], b["collided"]) for b in d["bursts"]]
        return cls(d["baud"], d["fmt"], d["plan"], bursts, d["master_log"], d["station_log"], d["wall_s"],
                   d["lateness_ns"])

    def pacing(self) -> str:
        """How well the wire kept character pace: delivery lateness percentiles."""
        if not self.lateness_ns:
            return "no bytes"
        p50, p95, p100 = np.percentile(self.lateness_ns, [50, 95, 100]) / 1e6
        return (f"bytes delivered {p50:.3f} ms (median), {p95:.3f} ms (p95), {p100:.3f} ms (max) after their "
                f"stop bit (character time {char_ns(self.baud, self.fmt) / 1e6:.3f} ms)")


def default_plan(seed: int = 12, cycles: int = 12) -> dict:
    """The polling plan of the fictional pump house (see :data:`PLANT`)."""
    return {"seed": seed, "cycles": cycles, "stations": {str(a): r for a, r in PLANT.items()},
            "timeout_s": 0.2, "retries": 2, "pause_s": [0.004, 0.020], "drain_s": 0.40, "dead_every": 2, "slow_polls": 2}


def run_bus(baud: int = 19200, fmt: str = "8E1", plan: dict | None = None, workdir: Path | None = None,
            stations_hear_stations: bool = False, timeout_s: float = 240.0) -> BusRun:
    """Run pymodbus master and servers over the wire once; return the wire's bytes and the logs."""
    plan = plan or default_plan()
    tmp = Path(workdir or tempfile.mkdtemp(prefix="oraclebus-"))
    tmp.mkdir(parents=True, exist_ok=True)
    wire = Wire(baud, fmt, plan["seed"] + 1, stations_hear_stations)
    master_port = wire.add_party("master", "master")
    specs = []
    for addr, role in sorted((int(a), r) for a, r in plan["stations"].items()):
        if role == "dead":
            continue  # nothing behind this address
        specs.append(f"{addr}={wire.add_party(str(addr), role)}:{role}")
    (tmp / "plan.json").write_text(json.dumps(plan))
    station_log, master_log = tmp / "stations.jsonl", tmp / "master.jsonl"
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    t_wall = time.monotonic()
    stations = subprocess.Popen([sys.executable, str(ORACLE_DIR / "stations.py"), str(station_log), str(baud),
                                 *specs], stdin=subprocess.PIPE, stdout=subprocess.PIPE, env=env, text=True)
    master = None
    try:
        line = stations.stdout.readline() if stations.stdout else ""
        if not line.startswith("ready"):
            raise RuntimeError(f"stations did not start: {line!r}")
        master = subprocess.Popen([sys.executable, str(ORACLE_DIR / "master.py"), master_port, str(baud),
                                   str(master_log), str(tmp / "plan.json")], env=env)
        deadline = time.monotonic() + timeout_s
        wire.run(lambda: master.poll() is not None or time.monotonic() > deadline)
        if master.poll() is None:
            raise RuntimeError(f"master did not finish within {timeout_s} s")
        if master.returncode:
            raise RuntimeError(f"master exited with {master.returncode}")
    finally:
        if master is not None and master.poll() is None:
            master.kill()
            master.wait()
        if stations.stdin:
            stations.stdin.close()
        try:
            stations.wait(timeout=10)
        except subprocess.TimeoutExpired:
            stations.kill()
            stations.wait()
        wire.close()
    wall = time.monotonic() - t_wall

    def load(p: Path) -> list[dict]:
        return [json.loads(x) for x in p.read_text().splitlines() if x.strip()] if p.exists() else []

    bursts = sorted(wire.bursts, key=lambda b: b.start_ns)  # a held answer was read before it started
    return BusRun(baud, fmt, plan, bursts, load(master_log), load(station_log), wall, wire.lateness_ns)


# --- the tap ------------------------------------------------------------------------------------


def tap_records(bursts: list[Burst], latency_ms: float, seed: int, packet_bytes: int = 62,
                host_delay_ms: tuple[float, float] = (0.03, 0.30), c_ns: int = 0,
                unbiased_line: bool = False) -> list[tuple[int, bytes]]:
    """What a USB sniffer adapter would hand the host: (read-return time ns, bytes) records.

    The adapter sends what it holds at each tick of its latency timer (a grid of period L), and
    at once when it holds ``packet_bytes`` (the timer then restarts: the grid re-phases); the
    host adds a small delay. Byte times are the wire's own.

    ``unbiased_line``: a line nobody holds idle, where each driver turning off leaves one more
    character after its frame (0x00 after the master, 0xFE after a station; issue 12, item 4),
    ``c_ns`` after the frame's last one. A real adapter would flag it with a framing error; the
    hex text format has no way to say so, so here it is a plain byte.
    """
    rng = random.Random(seed)
    stream = sorted((e, b) for burst in bursts for e, b in zip(burst.ends_ns, burst.wire))
    if unbiased_line:
        if c_ns <= 0:
            raise ValueError("an unbiased line needs the character time c_ns")
        stream = sorted(stream + [(b.end_ns + c_ns, 0x00 if b.party == "master" else 0xFE) for b in bursts])
    if not stream:
        return []
    period = round(latency_ms * 1e6)
    tick = stream[0][0] - stream[0][0] % period + rng.randrange(period)
    while tick < stream[0][0]:
        tick += period
    out: list[tuple[int, bytes]] = []
    buf = bytearray()
    last = 0

    def emit(at: int) -> None:
        nonlocal last, buf
        t = max(at + round(rng.uniform(*host_delay_ms) * 1e6), last)
        out.append((t, bytes(buf)))
        last, buf = t, bytearray()

    for end, b in stream:
        if tick < end:
            if buf:
                emit(tick)
            tick += -(-(end - tick) // period) * period  # next tick at or after this byte
        buf.append(b)
        if len(buf) >= packet_bytes:
            emit(end)
            tick = end + period
    if buf:
        emit(tick)
    return out


def write_hex(path: Path, records: list[tuple[int, bytes]], baud: int, fmt: str, t0_ns: int,
              note: str = "") -> Path:
    """Write records as buswitness hex text: '# baud:' and '# format:', no '# latency_ms:' line."""
    lines = [f"# oracle bus tap (fictional pump house){': ' + note if note else ''}",
             f"# baud: {baud}", f"# format: {fmt}",
             "# each line: seconds since the capture start (the read's return), then the bytes"]
    lines += [f"{(t - t0_ns) / 1e9:.7f} {data.hex(' ').upper()}" for t, data in records]
    Path(path).write_text("\n".join(lines) + "\n")
    return Path(path)


# --- truth ----------------------------------------------------------------------------------------


@dataclass
class Attempt:
    """One request frame the master put on the wire, and what truly became of it."""

    index: int
    station: int
    function: int
    req: Burst
    stack: str                 # pymodbus client's own view of this attempt: answer/exception/timeout/corrupt
    answer: Burst | None       # the frame the station sent to this very request (server log + FIFO)
    truth: str                 # ok / exception / timeout / late / corrupt / collision / edge
    rt_ns: int | None          # answer's first start bit - request's last stop bit end (wire)
    stack_took: Burst | None = None  # the frame the pymodbus client accepted in this attempt


def crc16(data: bytes) -> int:
    """CRC-16/MODBUS: init 0xFFFF, shift right, XOR 0xA001, low byte sent first (MSL V1.02 §6.2.2 p39-40)."""
    crc = 0xFFFF
    for b in data:
        crc ^= b
        for _ in range(8):
            crc = (crc >> 1) ^ 0xA001 if crc & 1 else crc >> 1
    return crc


def crc_ok(frame: bytes) -> bool:
    return len(frame) >= 4 and crc16(frame[:-2]) == int.from_bytes(frame[-2:], "little")


def build_truth(run: BusRun) -> list[Attempt]:
    """Per master attempt: its station, the stack's own outcome, its own answer and the true class."""
    master_bursts = [b for b in run.bursts if b.party == "master"]
    sends = [e for e in run.master_log if e["ev"] == "send"]
    if [bytes.fromhex(e["raw"]) for e in sends] != [b.sent for b in master_bursts]:
        raise AssertionError("the wire did not carry exactly what the pymodbus client says it sent")
    # each station's frames on the wire, in order (the wire's hold keeps each station's order)
    answers: dict[int, list[Burst]] = {}
    for b in run.bursts:
        if b.party != "master":
            answers.setdefault(int(b.party), []).append(b)
    # the stack's own outcome per attempt, from the client's events between one send and the next;
    # for an accepted answer, which frame it was: the station's last one ended before pymodbus took it
    stack: list[str] = []
    stack_took: list[Burst | None] = []
    events = run.master_log
    send_pos = [i for i, e in enumerate(events) if e["ev"] == "send"] + [len(events)]
    for k in range(len(sends)):
        chunk = events[send_pos[k] + 1:send_pos[k + 1]]
        pdus = [e for e in chunk if e["ev"] == "pdu"]
        recv = [e for e in chunk if e["ev"] == "recv"]
        took = None
        if pdus:
            stack.append("exception" if pdus[0]["fc"] & 0x80 else "answer")
            before = [b for b in answers.get(pdus[0]["dev"], []) if b.end_ns <= pdus[0]["t"]]
            took = before[-1] if before else None
        elif recv:
            stack.append("corrupt")
        else:
            stack.append("timeout")
        stack_took.append(took)
    # each station's own log: a pymodbus server answers the requests it decoded, first in first
    # out; the request is the master's latest attempt to that station that had ended by then
    attempts: list[Attempt] = []
    by_station: dict[int, list[int]] = {}
    for k, b in enumerate(master_bursts):
        by_station.setdefault(b.sent[0], []).append(k)
    own_answer: dict[int, Burst] = {}
    for addr in answers:
        log = [e for e in run.station_log if e.get("addr") == addr]
        rsps = [e for e in log if e["ev"] == "rsp"]
        if [bytes.fromhex(e["raw"]) for e in rsps] != [b.sent for b in answers[addr]]:
            raise AssertionError(f"station {addr}: the wire did not carry what its pymodbus server sent")
        cands = by_station.get(addr, [])
        used: set[int] = set()
        waiting: list[int | None] = []
        sent = iter(answers[addr])
        for e in log:
            if e["ev"] == "req":
                heard = [k for k in cands if master_bursts[k].end_ns <= e["t"] and k not in used]
                waiting.append(heard[-1] if heard else None)
                if heard:
                    used.add(heard[-1])
            else:
                burst = next(sent)
                asked = waiting.pop(0) if waiting else None
                if asked is not None:
                    own_answer[asked] = burst
    for k, b in enumerate(master_bursts):
        ans = own_answer.get(k)
        nxt = master_bursts[k + 1].start_ns if k + 1 < len(master_bursts) else None
        if b.collided or (ans is not None and ans.collided):
            truth = "collision"
        elif ans is None:
            truth = "timeout"
        elif not crc_ok(ans.wire):
            truth = "corrupt"
        elif nxt is not None and ans.start_ns >= nxt:
            truth = "late"
        elif stack[k] not in ("answer", "exception"):
            # a good answer that began before the master moved on, yet pymodbus did not take it
            # in time: a race at the timeout on a loaded host (left out of the scores, counted)
            truth = "edge"
        elif ans.wire[1] & 0x80:
            truth = "exception"
        else:
            truth = "ok"
        rt = ans.start_ns - b.end_ns if ans is not None else None
        attempts.append(Attempt(k, b.sent[0], b.sent[1], b, stack[k], ans, truth, rt, stack_took[k]))
    return attempts


# --- comparison -----------------------------------------------------------------------------------


@dataclass
class Figures:
    """How buswitness's decoding of a tap compares with the truth (see :func:`compare`)."""

    attempts: int = 0                   # master attempts scored (collisions left out)
    agree: int = 0
    extra_decoded: int = 0              # decoded transactions with no attempt of their own behind them
    agreement: float = float("nan")     # agree / (attempts + extra_decoded)
    dead_answers: int = 0               # decoded transactions to the dead station that got an "answer"
    dead_attempts: int = 0
    late_truth: int = 0
    late_paired: int = 0                # late answers decoded as paired with the station's answer to them
    late_pairing: float = float("nan")
    rt_checked: int = 0
    covered: int = 0
    coverage: float = float("nan")
    err_median_ms: float = float("nan")
    err_p95_ms: float = float("nan")
    collisions: int = 0                 # attempts left out: two talkers overlapped on the wire
    edges: int = 0                      # attempts left out: answer raced the client's timeout
    truth_counts: dict = field(default_factory=dict)
    decoded_counts: dict = field(default_factory=dict)
    stack_consistent: float = float("nan")  # true class agrees with the pymodbus client's own view
    stack_disagreements: list = field(default_factory=list)
    event_counts: dict = field(default_factory=dict)  # the decoder's events by kind
    stack_took_earlier: int = 0         # attempts where pymodbus itself accepted an earlier (late) answer
    mismatches: list = field(default_factory=list)

    def line(self) -> str:
        return (f"agreement {100 * self.agreement:.2f}% ({self.agree}/{self.attempts}, {self.extra_decoded} extra)"
                f"; dead-station answers {self.dead_answers} ({self.dead_attempts} attempts)"
                f"; late answers paired {self.late_paired}/{self.late_truth}"
                f"; coverage {self.covered}/{self.rt_checked}"
                f"; point error median {self.err_median_ms:.3f} ms, p95 {self.err_p95_ms:.3f} ms"
                f"; left out: {self.collisions} collided, {self.edges} raced the timeout")


#: The pymodbus client's view that matches each true class (a late answer is a timeout to it).
_STACK_VIEW = {"ok": "answer", "exception": "exception", "timeout": "timeout", "late": "timeout",
               "corrupt": "corrupt"}
_ANSWERED = ("ok", "exception", "late")


def decode_tap(path: Path, response_timeout_ms: float | None = None):
    """Decode a hex tap the way ``analyze`` does; returns (frames, transactions, events) tables.

    The same steps as ``buswitness.analysis.pipeline.analyze``: the adapter latency the file does
    not state is estimated from the records, the decoder records what the wire shows, and the
    answers are judged once against the master's timeout (given, else inferred from the traffic).
    """
    import pandas as pd
    from buswitness.analysis.figures import Accumulator
    from buswitness.analysis.pipeline import assess_delivery, delivery_headers
    from buswitness.analysis.timeout import infer_timeout
    from buswitness.capture.importers import HexTextSource
    from buswitness.decode.decoder import DecoderConfig, decode_source

    src = HexTextSource(Path(path))
    _reported, decoding = delivery_headers(src.header, assess_delivery(src))
    outs = list(decode_source(src, DecoderConfig.from_header(decoding)))
    frames = pd.concat([o.frames for o in outs], ignore_index=True)
    tx = pd.concat([o.transactions for o in outs], ignore_index=True)
    events = pd.concat([o.events for o in outs], ignore_index=True)
    tx = tx.sort_values("t_request_end_ns", kind="stable").reset_index(drop=True)
    timeout = response_timeout_ms
    if timeout is None:
        acc = Accumulator(t0_ns=int(tx.t_request_end_ns.min()) if len(tx) else 0, char_ns=decoding.serial.char_time_s * 1e9)
        acc.add_transactions(tx)
        timeout = infer_timeout(acc.move_on, acc.in_time).timeout_ms
    if timeout is not None:
        outcome = tx.outcome.astype(str)
        over = outcome.isin(["ok", "exception"]) & (tx.response_ms > timeout)
        tx["outcome"] = outcome.where(~over, "late")
    return (frames.sort_values("t_end_ns", kind="stable").reset_index(drop=True), tx, events)


def _frame_to_burst(frames, bursts: list[Burst]) -> dict[int, int]:
    """Which wire burst each decoded frame is: the two sequences aligned on their bytes, in order.

    Times are not used, so a decoder that misplaces a frame by many ms still has it named.
    """
    from difflib import SequenceMatcher

    a = [bytes(r) for r in frames["raw"]]
    b = [x.wire for x in bursts]
    out: dict[int, int] = {}
    for blk in SequenceMatcher(None, a, b, autojunk=False).get_matching_blocks():
        for k in range(blk.size):
            out[blk.a + k] = blk.b + k
    return out


def _nearest_frame(frames, t_start_ns: int, raw: bytes) -> int | None:
    """The decoded frame with these bytes that starts nearest ``t_start_ns`` (within 2 ms), if any."""
    best, best_d = None, 2_000_000
    for i, (t, r) in enumerate(zip(frames["t_start_ns"], frames["raw"])):
        d = abs(int(t) - t_start_ns)
        if d < best_d and bytes(r) == raw:
            best, best_d = i, d
    return best


def _nearest_burst(bursts: list[Burst], raw: bytes, start_ns: int) -> int | None:
    """The wire burst carrying ``raw`` that began nearest ``start_ns`` (within 30 ms), if any."""
    best, best_d = None, 30_000_000
    for i, b in enumerate(bursts):
        d = abs(b.start_ns - start_ns)
        if d < best_d and b.wire == raw:
            best, best_d = i, d
    return best


def compare(attempts: list[Attempt], bursts: list[Burst], frames, tx, t0_ns: int, dead: int) -> Figures:
    """Score buswitness's transactions against the truth, attempt by attempt.

    Decoded frames are named by aligning them with the wire's bursts on their bytes; a decoded
    transaction then belongs to the attempt whose request frame it names. It agrees when its
    outcome is the true class and, where there is an answer, its answer frame is the one the
    station sent to that very request. Response-time coverage and point error are measured on
    the transactions paired with the right answer.
    """
    fig = Figures()
    f2b = _frame_to_burst(frames, bursts)
    req_key = {(int(t), bytes(r)): i for i, (t, r) in enumerate(zip(frames["t_end_ns"], frames["raw"]))}
    rsp_key = {(int(t), bytes(r)): i for i, (t, r) in enumerate(zip(frames["t_start_ns"], frames["raw"]))}
    burst_index = {id(b): i for i, b in enumerate(bursts)}
    by_attempt: dict[int, int] = {}
    extra: list[int] = []
    for i, (t, r) in enumerate(zip(tx["t_request_end_ns"], tx["request_raw"])):
        fi = req_key.get((int(t), bytes(r)))
        bi = f2b.get(fi) if fi is not None else None
        if bi is None or bursts[bi].party != "master" or bi in by_attempt:
            extra.append(i)
        else:
            by_attempt[bi] = i
    errs: list[float] = []
    fig.stack_took_earlier = sum(a.stack_took is not None and a.stack_took is not a.answer for a in attempts)
    # the client's own view of an attempt speaks for that attempt's own answer unless it accepted
    # another request's (late) answer in it, as pymodbus does after a retry
    stack_ok = [a for a in attempts if a.truth in _STACK_VIEW and (a.stack_took is None or a.stack_took is a.answer)]
    if stack_ok:
        fig.stack_consistent = sum(_STACK_VIEW[a.truth] == a.stack for a in stack_ok) / len(stack_ok)
        fig.stack_disagreements = [
            f"attempt {a.index} at {(a.req.end_ns - t0_ns) / 1e6:.3f} ms: station {a.station} fc {a.function}: "
            f"truth {a.truth}, pymodbus client {a.stack}, response time "
            f"{'-' if a.rt_ns is None else f'{a.rt_ns / 1e6:.3f} ms'}"
            for a in stack_ok if _STACK_VIEW[a.truth] != a.stack]
    for a in attempts:
        fig.truth_counts[a.truth] = fig.truth_counts.get(a.truth, 0) + 1
        ti = by_attempt.get(burst_index[id(a.req)])
        row = tx.loc[ti] if ti is not None else None
        got = str(row["outcome"]) if row is not None else "missing"
        fig.decoded_counts[got] = fig.decoded_counts.get(got, 0) + 1
        answer_burst = None
        if row is not None and int(row["t_response_start_ns"]) >= 0:
            fi = rsp_key.get((int(row["t_response_start_ns"]), bytes(row["response_raw"])))
            if fi is None:
                fi = _nearest_frame(frames, int(row["t_response_start_ns"]), bytes(row["response_raw"]))
            bi = f2b.get(fi) if fi is not None else None
            if bi is None:
                # the byte alignment skipped it (runs of identical frames): the wire burst with the
                # same bytes that began nearest (the tap's clock starts at t0_ns), within 30 ms
                bi = _nearest_burst(bursts, bytes(row["response_raw"]), t0_ns + int(row["t_response_start_ns"]))
            answer_burst = bursts[bi] if bi is not None else None
        right = a.answer is not None and answer_burst is a.answer
        if a.station == dead:
            fig.dead_attempts += 1
            fig.dead_answers += got in _ANSWERED
        if a.truth in ("collision", "edge"):
            fig.collisions += a.truth == "collision"
            fig.edges += a.truth == "edge"
            continue
        fig.attempts += 1
        ok = got == a.truth and (a.truth not in _ANSWERED or right)
        if ok and a.truth == "exception" and row is not None and a.answer is not None:
            ok = int(row["exception_code"]) == a.answer.wire[2]
        fig.agree += ok
        if a.truth == "late":
            fig.late_truth += 1
            fig.late_paired += right
        if not ok and len(fig.mismatches) < 60:
            taken = "none" if answer_burst is None else (
                "its own" if right else f"{answer_burst.party}'s frame at {(answer_burst.start_ns - t0_ns) / 1e6:.3f} ms")
            fig.mismatches.append(f"attempt {a.index} at {(a.req.end_ns - t0_ns) / 1e6:.3f} ms: station {a.station} "
                                  f"fc {a.function}: truth {a.truth} (pymodbus client: {a.stack}), decoded {got}, "
                                  f"answer taken: {taken}")
        if right and row is not None and a.rt_ns is not None:
            lo, hi, mid = (float(row[k]) for k in ("response_ms_low", "response_ms_high", "response_ms"))
            rt = a.rt_ns / 1e6
            fig.rt_checked += 1
            fig.covered += bool(lo - 1e-6 <= rt <= hi + 1e-6)
            errs.append(abs(mid - rt))
    fig.extra_decoded = len(extra)
    for i in extra:
        got = str(tx.at[i, "outcome"])
        if int(tx.at[i, "station"]) == dead:
            fig.dead_answers += got in _ANSWERED
        if len(fig.mismatches) < 60:
            fig.mismatches.append(f"extra transaction: request at {int(tx.at[i, 't_request_end_ns']) / 1e6:.3f} ms "
                                  f"station {int(tx.at[i, 'station'])} fc {int(tx.at[i, 'function'])} "
                                  f"{bytes(tx.at[i, 'request_raw']).hex(' ')}: {got}")
    denom = fig.attempts + fig.extra_decoded
    fig.agreement = fig.agree / denom if denom else float("nan")
    if fig.late_truth:
        fig.late_pairing = fig.late_paired / fig.late_truth
    if fig.rt_checked:
        fig.coverage = fig.covered / fig.rt_checked
        fig.err_median_ms = float(np.median(errs))
        fig.err_p95_ms = float(np.percentile(errs, 95))
    return fig


def tap_and_compare(run: BusRun, attempts: list[Attempt], latency_ms: float, workdir: Path,
                    seed: int = 7, unbiased_line: bool = False, response_timeout_ms: float | None = None,
                    header_fmt: str | None = None) -> tuple[Figures, Path]:
    """Make the tap at latency L, write it as hex text, decode it and compare it with the truth.

    ``header_fmt`` states another character format in the file than the wire used (issue 12,
    item 7: an 11-bit bus read under an 8N1 header).
    """
    records = tap_records(run.bursts, latency_ms, seed, c_ns=char_ns(run.baud, run.fmt),
                          unbiased_line=unbiased_line)
    t0 = run.bursts[0].start_ns - 10_000_000
    Path(workdir).mkdir(parents=True, exist_ok=True)
    name = (f"tap-{run.baud}-{latency_ms:g}ms{'-unbiased' if unbiased_line else ''}"
            f"{'-as-' + header_fmt if header_fmt else ''}.hex")
    path = write_hex(Path(workdir) / name, records, run.baud, header_fmt or run.fmt, t0,
                     note=f"adapter latency {latency_ms:g} ms, not stated to the decoder")
    frames, tx, events = decode_tap(path, response_timeout_ms)
    dead = next(int(a) for a, r in run.plan["stations"].items() if r == "dead")
    fig = compare(attempts, run.bursts, frames, tx, t0, dead)
    fig.event_counts = {str(k): int(v) for k, v in events["kind"].value_counts().items() if v}
    return fig, path
