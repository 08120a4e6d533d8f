"""``simulate()``: run a scenario in time slices into capture records and ground truth.

The run goes ten simulated minutes at a time (``slice_s``): the bus model makes the
frames, the sniffer model turns them into delivered bytes, the adapter model into host
records. Only one slice is in memory at once, plus the truth tables when they are kept.
Everything random comes from one seed, split into independent streams for the bus, the
line noise and the adapter, so a given seed always gives the same capture.
"""

from __future__ import annotations

import hashlib
import os
import time
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import pandas as pd
from buswitness.capture.fileformat import CaptureHeader, CaptureWriter, PortInfo, RecordBatch
from buswitness.decode.timing import t35_s
from buswitness.errors import OutputError, UsageError
from buswitness.serial import SerialFormat
from buswitness.simulate.adapter import AdapterModel
from buswitness.simulate.bus import Bus, expand_windows
from buswitness.simulate.fastpath import PlainSchedule, is_plain
from buswitness.simulate.scenario import Scenario, Sniffer
from buswitness.simulate.sniffer import receive_slice
from buswitness.simulate.truth import EVENT_COLUMNS, Truth

#: Monotonic time of the capture start: large, so every time in a capture is positive.
START_MONOTONIC_NS = 1_000_000_000_000
SLICE_S = 600.0


@dataclass
class SimResult:
    """A configured simulation. ``batches()`` streams the capture; ``truth`` and ``write`` run it whole."""

    scenario: Scenario
    duration_s: float
    seed: int
    sniffer: Sniffer
    header: CaptureHeader
    keep_tables: bool = True
    slice_s: float = SLICE_S

    def __post_init__(self) -> None:
        self._truth: Truth | None = None

    @property
    def bus_serial(self) -> SerialFormat:
        return self.scenario.serial

    @property
    def sniffer_serial(self) -> SerialFormat:
        return self.sniffer.serial or self.scenario.serial

    def batches(self) -> Iterator[RecordBatch]:
        """The records ``record`` would have written, in time order, one batch per slice."""
        return self._run(self.keep_tables)

    def _run(self, keep_tables: bool) -> Iterator[RecordBatch]:
        sc = self.scenario
        seq = np.random.SeedSequence(self.seed)
        bus_rng, line_rng, adapter_rng = (np.random.default_rng(s) for s in seq.spawn(3))
        t0 = START_MONOTONIC_NS
        bus = Bus(sc, bus_rng, t0, self.duration_s)
        schedule = PlainSchedule(bus) if is_plain(sc) else bus
        adapter = AdapterModel(sc.adapter, adapter_rng, t0)
        truth = Truth(self._meta(), _station_names(sc), keep_tables)
        bursts = bus.bursts
        sniff = self.sniffer_serial
        matches = sniff == sc.serial and not self.sniffer.polarity_reversed
        # a faster bus gets shorter slices, so a slice holds about as many bytes at any baud rate
        slice_ns = int(min(self.slice_s, SLICE_S * 19200 / max(sc.serial.baud, sniff.baud)) * 1e9)
        k = 1
        while True:
            ws = schedule.run_slice(t0 + k * slice_ns)
            k = max(k + 1, (bus.t - t0) // slice_ns + 1)
            rec = receive_slice(ws, sc.serial, sniff, self.sniffer.polarity_reversed, bursts, line_rng,
                                None if sc.fail_safe_bias else sc.release_bytes)
            truth.add_slice(ws, rec, matches)
            final = bus.finished
            batch = adapter.feed(rec.t_arrival_ns, rec.value, rec.flags, None if final else ws.t_end_ns)
            if len(batch):
                yield batch
            if final:
                break
        truth.finish(self._events(), self.duration_s)
        self._truth = truth

    @property
    def truth(self) -> Truth:
        """The ground truth (runs the simulation once if it has not run to the end yet)."""
        if self._truth is None:
            for _ in self.batches():
                pass
        assert self._truth is not None
        return self._truth

    def write(self, capture_path: str | os.PathLike, truth_path: str | os.PathLike | None = None) -> dict:
        """Write the capture (and the truth JSON); returns counts and the time it took."""
        t_start = time.perf_counter()
        records = data = 0
        if truth_path is not None and os.path.exists(truth_path):
            raise OutputError(f"{truth_path}: already exists; choose another name for the truth "
                              f"(nothing was overwritten)")
        with CaptureWriter(capture_path, self.header, fsync_interval_s=3600.0, flush_interval_s=3600.0,
                           max_block_records=16384) as writer:
            # without a truth file there is no need to hold the frame tables of a long run in memory
            tables = self.keep_tables and truth_path is not None
            for batch in self._run(tables):
                writer.append_batch(batch)
                records += len(batch)
                data += int(batch.length.sum())
        assert self._truth is not None
        frames = self._truth.bus.get("frames", 0)
        if truth_path is not None:
            self._truth.to_json(truth_path)
        elif self.keep_tables:
            self._truth = None  # its tables were not kept; asking for the truth runs it again, whole
        return {"records": records, "bytes": data, "seconds": time.perf_counter() - t_start, "frames": frames}

    # -- helpers -----------------------------------------------------------------------------
    def _meta(self) -> dict:
        sc = self.scenario
        sn = self.sniffer_serial
        return {
            "scenario": sc.name, "seed": self.seed, "duration_s": self.duration_s,
            "start_utc": self.header.start_utc, "start_monotonic_ns": self.header.start_monotonic_ns,
            "capture_id": self.header.capture_id,
            "bus_serial": sc.serial.to_dict(),
            "sniffer": {**sn.to_dict(), "polarity_reversed": self.sniffer.polarity_reversed},
            "line": {"fail_safe_bias": sc.fail_safe_bias,
                     "release_bytes": None if sc.fail_safe_bias else {"master": sc.release_bytes[0],
                                                                      "station": sc.release_bytes[1]}},
            "adapter": {"latency_ms": sc.adapter.latency_ms, "latency_stated": sc.adapter.state_latency,
                        "host_delay_ms": sc.adapter.host_delay_ms,
                        "host_delay_tail_rate": sc.adapter.host_delay_tail_rate,
                        "host_delay_tail_ms": sc.adapter.host_delay_tail_ms},
            "master": {"timeout_ms": sc.master.timeout_ms, "retries": sc.master.retries,
                       "inter_poll_delay_ms": sc.master.inter_poll_delay_ms,
                       "cycle_period_ms": sc.master.cycle_period_ms},
        }

    def _events(self) -> pd.DataFrame:
        sc = self.scenario
        t0 = START_MONOTONIC_NS
        t1 = t0 + int(self.duration_s * 1e9)
        rows: list[tuple[int, int, str, int, str]] = []
        names = _station_names(sc)
        for a, b, ev in expand_windows(sc, "silent", self.duration_s, t0):
            station = int(ev.station or 0)
            rows.append((a, b, "silent", station, ev.detail or f"{names.get(station, '?')} does not answer"))
        for a, b, ev in expand_windows(sc, "noise_burst", self.duration_s, t0):
            rows.append((a, b, "noise_burst", -1,
                         f"{ev.detail or 'noise burst on the line'} (bit-error rate {ev.bit_error_rate:g})"))
        present: dict[int, int] = {}
        t35_ms = t35_s(sc.serial) * 1e3
        for st in sc.stations:
            if st.absent:
                rows.append((t0, t1, "absent", st.address, f"{st.name} is never on the bus"))
                continue
            present[st.address] = present.get(st.address, 0) + 1
            r = st.response
            if r.fixed_ms + r.jitter_ms > sc.master.timeout_ms or r.tail_rate > 0:
                rows.append((t0, t1, "late_answers", st.address,
                             (f"{st.name} answers in {r.fixed_ms:g}+{r.jitter_ms:g} ms, with a tail of "
                             f"{r.tail_rate:g} of answers {r.tail_mean_ms:g} ms later on average "
                             f"(master timeout {sc.master.timeout_ms:g} ms)")))
            if r.fixed_ms < t35_ms:
                rows.append((t0, t1, "fast_turnaround", st.address,
                             f"{st.name} answers after {r.fixed_ms:g} ms, under t3.5 = {t35_ms:.3f} ms"))
            if st.gap_rate > 0:
                rows.append((t0, t1, "gap_in_frame", st.address,
                             (f"{st.gap_rate:g} of {st.name}'s answers have a {st.gap_chars:g}-character "
                             f"silence inside")))
            if st.exception_rate > 0:
                rows.append((t0, t1, "exceptions", st.address,
                             (f"{st.name} answers {st.exception_rate:g} of requests with exception code(s) "
                             f"{', '.join(str(c) for c in st.exception_codes)}")))
            ber = sc.station_ber(st)
            if ber > 0:
                rows.append((t0, t1, "line_noise", st.address,
                             (f"bit-error rate {ber:g} on frames to and from {st.name} "
                             f"({st.position_m:g} m along the cable)")))
        for a, count in present.items():
            if count > 1:
                rows.append((t0, t1, "duplicate_address", a, f"{names[a]} share address {a}"))
        if not sc.fail_safe_bias:
            rows.append((t0, t1, "no_fail_safe_bias", -1,
                         f"nothing holds the idle line: each driver letting go leaves one byte with a framing error "
                         f"(0x{sc.release_bytes[0]:02X} after the master, 0x{sc.release_bytes[1]:02X} after a station)"))
        if not sc.adapter.state_latency:
            rows.append((t0, t1, "latency_not_stated", -1,
                         f"the capture header does not state the adapter latency ({sc.adapter.latency_ms:g} ms)"))
        if self.sniffer.polarity_reversed:
            rows.append((t0, t1, "sniffer_polarity_reversed", -1, "the sniffer's A and B wires are swapped"))
        if self.sniffer_serial != sc.serial:
            rows.append((t0, t1, "sniffer_settings", -1,
                         f"the sniffer listens at {self.sniffer_serial}, the bus runs at {sc.serial}"))
        rows.sort(key=lambda r: (r[0], r[2], r[3]))
        return pd.DataFrame({c: [r[i] for r in rows] for i, c in enumerate(EVENT_COLUMNS)}).astype(
            {"t_start_ns": np.int64, "t_end_ns": np.int64, "station": np.int64})


def _station_names(sc: Scenario) -> dict[int, str]:
    names: dict[int, list[str]] = {}
    for st in sc.stations:
        names.setdefault(st.address, []).append(st.name)
    return {a: " / ".join(v) for a, v in names.items()}


def simulate(scenario: Scenario, duration_s: float | None = None, seed: int = 1, latency_ms: float | None = None,
             baud: int | None = None, *, bus_format: str | None = None, sniffer: SerialFormat | None = None,
             sniffer_polarity_reversed: bool | None = None, keep_tables: bool = True,
             slice_s: float = SLICE_S) -> SimResult:
    """Configure a simulation of ``scenario``; nothing runs until its batches, truth or write are used.

    ``baud``/``bus_format`` override the bus's settings, ``latency_ms`` the adapter timer;
    ``sniffer`` is the adapter's own setting when it differs from the bus (default: the
    scenario's sniffer, else the bus's), ``sniffer_polarity_reversed`` swaps its A and B.
    """
    if not isinstance(scenario, Scenario):
        raise UsageError("simulate() needs a Scenario; get one with load_scenario(name_or_path)")
    sc = scenario.with_overrides(baud=baud, bus_format=bus_format, latency_ms=latency_ms)
    duration = float(sc.duration_s if duration_s is None else duration_s)
    if not duration > 0:
        raise UsageError(f"a simulation must last more than zero seconds, not {duration_s!r}")
    if not isinstance(seed, (int, np.integer)) or isinstance(seed, bool) or seed < 0:
        raise UsageError(f"the seed must be a whole number of zero or more, not {seed!r}")
    sn = Sniffer(serial=sniffer if sniffer is not None else sc.sniffer.serial,
                 polarity_reversed=(sc.sniffer.polarity_reversed if sniffer_polarity_reversed is None
                                    else bool(sniffer_polarity_reversed)))
    sniff_serial = sn.serial or sc.serial
    ident = f"{sc.name}|{seed}|{duration}|{sc.serial}|{sniff_serial}|{sn.polarity_reversed}|{sc.adapter.latency_ms}"
    if not sc.adapter.state_latency:
        ident += "|latency not stated"
    header = CaptureHeader(
        serial=sniff_serial,
        ports=[PortInfo(0, "simulated adapter", latency_ms=sc.adapter.latency_ms if sc.adapter.state_latency else None,
                        latency_source="simulated" if sc.adapter.state_latency else "unknown", line_errors=True)],
        start_utc=sc.start_utc, start_monotonic_ns=START_MONOTONIC_NS, host="simulator",
        notes=f"simulated scenario {sc.name}, seed {seed}", source="simulate", timing="host",
        capture_id=hashlib.sha256(ident.encode()).hexdigest()[:32],
    )
    return SimResult(scenario=sc, duration_s=duration, seed=int(seed), sniffer=sn, header=header,
                     keep_tables=keep_tables, slice_s=slice_s)
