"""The scenario model: a bus, its stations, the master's poll schedule and timed events.

A scenario is a JSON or TOML file (``docs/scenario-format.md``). Built-in scenarios ship as
package data in ``simulate/scenarios``; ``load_scenario("pumpstation")`` finds one by name,
``load_scenario("my-bus.toml")`` reads a user's file. Every field is checked here, so a
mistake gives one clear message naming the file and the field instead of a traceback later.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field, replace
from datetime import datetime
from importlib import resources
from pathlib import Path
from typing import Any

from buswitness.errors import InputFileError, SerialFormatError, UsageError
from buswitness.serial import SerialFormat
from buswitness.tomlcompat import tomllib

#: Function codes the simulated master can poll, with what the request carries.
READ_FUNCTIONS = (1, 2, 3, 4)
WRITE_SINGLE_FUNCTIONS = (5, 6)
WRITE_MULTIPLE_FUNCTIONS = (15, 16)
#: Requests a station answers with its identification text: report server ID (FC 17) and read
#: device identification (FC 43, MEI type 14) (MAP V1.1b3 p31 and p43).
IDENT_FUNCTIONS = (17, 43)
POLL_FUNCTIONS = READ_FUNCTIONS + WRITE_SINGLE_FUNCTIONS + WRITE_MULTIPLE_FUNCTIONS + IDENT_FUNCTIONS
#: Longest identification text a simulated station sends (it must fit one frame).
MAX_DEVICE_ID_BYTES = 200
#: Quantity limits per function code (MAP V1.1b3 p11-31).
QUANTITY_LIMITS = {1: 2000, 2: 2000, 3: 125, 4: 125, 15: 1968, 16: 123}
#: Exception codes a station may answer with (MAP V1.1b3 p48-49).
EXCEPTION_CODES = (1, 2, 3, 4, 5, 6, 8, 10, 11)
EVENT_KINDS = ("silent", "noise_burst")


@dataclass(frozen=True)
class ResponseTime:
    """A station's turnaround: fixed part, uniform jitter, and a rare long tail (exponential)."""

    fixed_ms: float = 5.0
    jitter_ms: float = 1.0
    tail_rate: float = 0.0
    tail_mean_ms: float = 0.0


@dataclass(frozen=True)
class Station:
    """One slave on the bus (two may share an address: that is the duplicate-address fault)."""

    address: int
    name: str
    position_m: float = 0.0
    response: ResponseTime = field(default_factory=ResponseTime)
    exception_rate: float = 0.0
    exception_codes: tuple[int, ...] = (2,)
    bit_error_rate: float | None = None  # None: from the bus's noise per km and the position
    absent: bool = False
    gap_rate: float = 0.0       # fraction of responses with a silence inside the frame
    gap_chars: float = 3.0      # that silence, in character times (over t1.5 when > 1.5)
    device_id: str = ""         # text answered to FC 17 and FC 43/14 (UTF-8 on the wire)
    noise_on: str = "both"      # "both": bit errors on frames to and from it; "answers": only on its answers


@dataclass(frozen=True)
class Poll:
    """One request of the master's cycle; ``every_cycles`` > 1 sends it only every n-th cycle."""

    station: int
    function: int
    start: int = 0
    quantity: int = 1
    value: int = 0
    every_cycles: int = 1


@dataclass(frozen=True)
class Master:
    timeout_ms: float = 200.0
    retries: int = 1
    inter_poll_delay_ms: float = 5.0
    cycle_period_ms: float = 1000.0
    broadcast_delay_ms: float = 100.0
    polls: tuple[Poll, ...] = ()


@dataclass(frozen=True)
class Event:
    """A timed event: a station silent for a while, or a noise burst on the whole line."""

    kind: str
    start_s: float
    duration_s: float
    station: int | None = None
    bit_error_rate: float = 0.0
    repeat_every_s: float | None = None
    detail: str = ""


@dataclass(frozen=True)
class Adapter:
    latency_ms: float = 16.0
    host_delay_ms: float = 0.2
    host_delay_tail_rate: float = 0.002
    host_delay_tail_ms: float = 4.0
    state_latency: bool = True  #: False: the capture header does not state the latency (as a foreign log)


@dataclass(frozen=True)
class Sniffer:
    """The listening adapter's own settings when they differ from the bus (``None``: same as the bus)."""

    serial: SerialFormat | None = None
    polarity_reversed: bool = False


@dataclass(frozen=True)
class Scenario:
    """Everything needed to simulate one bus; see ``docs/scenario-format.md``."""

    name: str
    description: str = ""
    serial: SerialFormat = field(default_factory=SerialFormat)
    noise_ber_per_km: float = 0.0
    fail_safe_bias: bool = True
    release_bytes: tuple[int, int] = (0x00, 0xFE)  #: what an unbiased line leaves after the master, a station
    stations: tuple[Station, ...] = ()
    master: Master = field(default_factory=Master)
    events: tuple[Event, ...] = ()
    adapter: Adapter = field(default_factory=Adapter)
    sniffer: Sniffer = field(default_factory=Sniffer)
    start_utc: str = "2026-11-30T22:00:00+00:00"
    duration_s: float = 600.0
    source: str = ""

    def station_ber(self, station: Station) -> float:
        """Bit-error rate of frames to and from ``station``: its own, or the bus's per km times its position."""
        if station.bit_error_rate is not None:
            return station.bit_error_rate
        return self.noise_ber_per_km * station.position_m / 1000.0

    def with_overrides(self, *, baud: int | None = None, bus_format: str | None = None,
                       latency_ms: float | None = None) -> Scenario:
        """A copy with the bus baud rate, character format or adapter latency replaced."""
        sc = self
        if baud is not None or bus_format is not None:
            serial = SerialFormat.parse(bus_format or self.serial.short_form, baud or self.serial.baud)
            sc = replace(sc, serial=serial)
        if latency_ms is not None:
            if not 0.125 <= float(latency_ms) <= 255:
                raise UsageError(f"adapter latency {latency_ms!r} ms is outside 1 to 255 ms (the latency timer's range)")
            sc = replace(sc, adapter=replace(sc.adapter, latency_ms=float(latency_ms)))
        return sc


# -- loading ---------------------------------------------------------------------------------

def builtin_names() -> list[str]:
    """Names of the scenarios shipped with buswitness."""
    folder = resources.files("buswitness.simulate.scenarios")
    return sorted(p.name.rsplit(".", 1)[0] for p in folder.iterdir()
                  if p.name.endswith((".json", ".toml")))


def builtin_descriptions() -> dict[str, str]:
    """Built-in scenario name -> its one-line description."""
    return {name: load_scenario(name).description for name in builtin_names()}


def load_scenario(name_or_path: str | Path) -> Scenario:
    """A built-in scenario by name, or a user's JSON/TOML scenario file by path."""
    text_name = str(name_or_path)
    folder = resources.files("buswitness.simulate.scenarios")
    for suffix in (".json", ".toml"):
        item = folder / f"{text_name}{suffix}"
        if "/" not in text_name and item.is_file():
            return parse_scenario(item.read_text(encoding="utf-8"), f"built-in scenario {text_name}", suffix)
    path = Path(name_or_path)
    if not path.exists():
        raise UsageError(f"scenario {text_name!r} is neither a built-in scenario ({', '.join(builtin_names())}) "
                         f"nor an existing file")
    if path.suffix.lower() not in (".json", ".toml"):
        raise InputFileError(path, "a scenario file must be .json or .toml")
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputFileError(path, f"cannot be read ({exc})") from None
    return parse_scenario(text, str(path), path.suffix.lower())


def parse_scenario(text: str, where: str, suffix: str = ".json") -> Scenario:
    """Parse and check scenario text; ``where`` names it in error messages."""
    try:
        data = tomllib.loads(text) if suffix == ".toml" else json.loads(text)
    except (json.JSONDecodeError, tomllib.TOMLDecodeError) as exc:
        raise InputFileError(where, f"is not valid {suffix[1:].upper()} ({exc})") from None
    return _Checker(where).scenario(data)


class _Checker:
    """Reads the parsed file field by field; every complaint names the file and the field."""

    def __init__(self, where: str) -> None:
        self.where = where

    def fail(self, path: str, problem: str) -> InputFileError:
        return InputFileError(self.where, f"field '{path}': {problem}")

    def table(self, data: Any, path: str) -> dict:
        if not isinstance(data, dict):
            raise self.fail(path, "must be an object/table of settings")
        return data

    def known(self, data: dict, path: str, allowed: set[str]) -> None:
        unknown = sorted(set(data) - allowed)
        if unknown:
            raise self.fail(f"{path}.{unknown[0]}" if path else unknown[0],
                            f"is not a known setting (known here: {', '.join(sorted(allowed))})")

    def number(self, data: dict, key: str, path: str, default: float, lo: float = 0.0,
               hi: float = float("inf")) -> float:
        value = data.get(key, default)
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.fail(f"{path}.{key}", f"must be a number, not {value!r}")
        if not lo <= value <= hi:
            raise self.fail(f"{path}.{key}", f"{value!r} is outside {lo:g} to {hi:g}")
        return float(value)

    def integer(self, data: dict, key: str, path: str, default: int | None, lo: int, hi: int) -> int:
        value = data.get(key, default)
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.fail(f"{path}.{key}", f"must be a whole number, not {value!r}")
        if not lo <= value <= hi:
            raise self.fail(f"{path}.{key}", f"{value!r} is outside {lo} to {hi}")
        return value

    def serial(self, data: dict, path: str) -> SerialFormat:
        try:
            baud = data.get("baud", 19200)
            if isinstance(baud, bool) or not isinstance(baud, int):
                raise SerialFormatError(f"baud rate must be a whole number, not {baud!r}")
            return SerialFormat.parse(str(data.get("format", "8E1")), baud)
        except SerialFormatError as exc:
            raise self.fail(path, str(exc)) from None

    def scenario(self, data: Any) -> Scenario:
        data = self.table(data, "(top level)")
        self.known(data, "", {"name", "description", "bus", "stations", "master", "events", "adapter", "sniffer",
                              "start_utc", "duration_s"})
        name = data.get("name")
        if not isinstance(name, str) or not name:
            raise self.fail("name", "every scenario needs a name (text)")
        bus = self.table(data.get("bus", {}), "bus")
        self.known(bus, "bus", {"baud", "format", "noise_ber_per_km", "fail_safe_bias", "release_byte_master",
                                "release_byte_station"})
        bias = bus.get("fail_safe_bias", True)
        if not isinstance(bias, bool):
            raise self.fail("bus.fail_safe_bias", "must be true or false")
        stations_raw = data.get("stations")
        if not isinstance(stations_raw, list) or not stations_raw:
            raise self.fail("stations", "must be a non-empty list of stations")
        stations = tuple(self.station(s, f"stations[{i}]") for i, s in enumerate(stations_raw))
        master = self.master(self.table(data.get("master", {}), "master"), {s.address for s in stations})
        events_raw = data.get("events", [])
        if not isinstance(events_raw, list):
            raise self.fail("events", "must be a list")
        events = tuple(self.event(e, f"events[{i}]", {s.address for s in stations})
                       for i, e in enumerate(events_raw))
        start_utc = data.get("start_utc", "2026-11-30T22:00:00+00:00")
        try:
            datetime.fromisoformat(str(start_utc))
        except ValueError:
            raise self.fail("start_utc", f"{start_utc!r} is not an ISO 8601 time such as "
                                         f"2026-11-30T22:00:00+00:00") from None
        return Scenario(
            name=name, description=str(data.get("description", "")),
            serial=self.serial(bus, "bus"),
            noise_ber_per_km=self.number(bus, "noise_ber_per_km", "bus", 0.0, 0.0, 0.1),
            fail_safe_bias=bias,
            release_bytes=(self.integer(bus, "release_byte_master", "bus", 0x00, 0, 255),
                           self.integer(bus, "release_byte_station", "bus", 0xFE, 0, 255)),
            stations=stations, master=master, events=events,
            adapter=self.adapter(self.table(data.get("adapter", {}), "adapter")),
            sniffer=self.sniffer(self.table(data.get("sniffer", {}), "sniffer")),
            start_utc=str(start_utc),
            duration_s=self.number(data, "duration_s", "", 600.0, 0.001, 31 * 86400.0),
            source=self.where,
        )

    def station(self, data: Any, path: str) -> Station:
        data = self.table(data, path)
        self.known(data, path, {"address", "name", "position_m", "response", "exception_rate", "exception_codes",
                                "bit_error_rate", "absent", "gap_rate", "gap_chars", "device_id", "noise_on"})
        if "address" not in data:
            raise self.fail(f"{path}.address", "every station needs an address from 1 to 247")
        address = self.integer(data, "address", path, 0, 1, 247)
        name = data.get("name")
        if not isinstance(name, str) or not name:
            raise self.fail(f"{path}.name", "every station needs a name (text)")
        resp = self.table(data.get("response", {}), f"{path}.response")
        self.known(resp, f"{path}.response", {"fixed_ms", "jitter_ms", "tail_rate", "tail_mean_ms"})
        codes = data.get("exception_codes", [2])
        if not isinstance(codes, list) or not codes or any(c not in EXCEPTION_CODES for c in codes):
            raise self.fail(f"{path}.exception_codes",
                            f"must be a list of exception codes from {list(EXCEPTION_CODES)}")
        ber = data.get("bit_error_rate")
        absent = data.get("absent", False)
        if not isinstance(absent, bool):
            raise self.fail(f"{path}.absent", "must be true or false")
        noise_on = data.get("noise_on", "both")
        if noise_on not in ("both", "answers"):
            raise self.fail(f"{path}.noise_on", "must be 'both' (frames to and from the station) or 'answers'")
        device_id = data.get("device_id", "")
        if not isinstance(device_id, str) or len(device_id.encode("utf-8")) > MAX_DEVICE_ID_BYTES:
            raise self.fail(f"{path}.device_id", f"must be text of at most {MAX_DEVICE_ID_BYTES} bytes (UTF-8)")
        return Station(
            address=address, name=name,
            position_m=self.number(data, "position_m", path, 0.0, 0.0, 10000.0),
            response=ResponseTime(
                fixed_ms=self.number(resp, "fixed_ms", f"{path}.response", 5.0, 0.0, 60000.0),
                jitter_ms=self.number(resp, "jitter_ms", f"{path}.response", 1.0, 0.0, 60000.0),
                tail_rate=self.number(resp, "tail_rate", f"{path}.response", 0.0, 0.0, 1.0),
                tail_mean_ms=self.number(resp, "tail_mean_ms", f"{path}.response", 0.0, 0.0, 60000.0)),
            exception_rate=self.number(data, "exception_rate", path, 0.0, 0.0, 1.0),
            exception_codes=tuple(int(c) for c in codes),
            bit_error_rate=None if ber is None else self.number(data, "bit_error_rate", path, 0.0, 0.0, 0.5),
            absent=absent,
            gap_rate=self.number(data, "gap_rate", path, 0.0, 0.0, 1.0),
            gap_chars=self.number(data, "gap_chars", path, 3.0, 0.0, 1000.0),
            device_id=device_id, noise_on=noise_on,
        )

    def master(self, data: dict, addresses: set[int]) -> Master:
        self.known(data, "master", {"timeout_ms", "retries", "inter_poll_delay_ms", "cycle_period_ms",
                                    "broadcast_delay_ms", "polls"})
        polls_raw = data.get("polls")
        if not isinstance(polls_raw, list) or not polls_raw:
            raise self.fail("master.polls", "must be a non-empty list of requests")
        polls = tuple(self.poll(p, f"master.polls[{i}]", addresses) for i, p in enumerate(polls_raw))
        if all(p.station == 0 for p in polls):
            raise self.fail("master.polls", "needs at least one request to a station (not only broadcasts)")
        return Master(
            timeout_ms=self.number(data, "timeout_ms", "master", 200.0, 1.0, 60000.0),
            retries=self.integer(data, "retries", "master", 1, 0, 10),
            inter_poll_delay_ms=self.number(data, "inter_poll_delay_ms", "master", 5.0, 0.0, 60000.0),
            cycle_period_ms=self.number(data, "cycle_period_ms", "master", 1000.0, 0.0, 3600e3),
            broadcast_delay_ms=self.number(data, "broadcast_delay_ms", "master", 100.0, 0.0, 60000.0),
            polls=polls,
        )

    def poll(self, data: Any, path: str, addresses: set[int]) -> Poll:
        data = self.table(data, path)
        self.known(data, path, {"station", "function", "start", "quantity", "value", "every_cycles"})
        station = self.integer(data, "station", path, -1, 0, 247)
        function = self.integer(data, "function", path, 3, 1, 127)
        if function not in POLL_FUNCTIONS:
            raise self.fail(f"{path}.function", f"{function} is not one the simulated master sends "
                                                f"(one of {list(POLL_FUNCTIONS)})")
        if station == 0 and function not in WRITE_SINGLE_FUNCTIONS + WRITE_MULTIPLE_FUNCTIONS:
            raise self.fail(f"{path}.function", "a broadcast (station 0) must be a write (5, 6, 15 or 16)")
        limit = QUANTITY_LIMITS.get(function, 1)
        quantity = self.integer(data, "quantity", path, 1, 1, limit)
        value = self.integer(data, "value", path, 0, 0, 0xFFFF)
        if function == 5 and value not in (0, 0xFF00):
            raise self.fail(f"{path}.value", "function 5 writes a coil with 0 (off) or 65280 (0xFF00, on)")
        return Poll(station=station, function=function,
                    start=self.integer(data, "start", path, 0, 0, 0xFFFF), quantity=quantity, value=value,
                    every_cycles=self.integer(data, "every_cycles", path, 1, 1, 1_000_000))

    def event(self, data: Any, path: str, addresses: set[int]) -> Event:
        data = self.table(data, path)
        self.known(data, path, {"kind", "start_s", "duration_s", "station", "bit_error_rate", "repeat_every_s",
                                "detail"})
        kind = data.get("kind")
        if kind not in EVENT_KINDS:
            raise self.fail(f"{path}.kind", f"{kind!r} is not one of {', '.join(EVENT_KINDS)}")
        station = data.get("station")
        if kind == "silent" and station not in addresses:
            raise self.fail(f"{path}.station", f"a 'silent' event needs the address of a station of this "
                                               f"scenario ({sorted(addresses)})")
        repeat = data.get("repeat_every_s")
        duration = self.number(data, "duration_s", path, 1.0, 0.0, 31 * 86400.0)
        if repeat is not None:
            repeat = self.number(data, "repeat_every_s", path, 1.0, max(duration, 0.001), 31 * 86400.0)
        return Event(kind=kind, start_s=self.number(data, "start_s", path, 0.0, 0.0, 31 * 86400.0),
                     duration_s=duration, station=station,
                     bit_error_rate=self.number(data, "bit_error_rate", path,
                                                0.02 if kind == "noise_burst" else 0.0, 0.0, 0.5),
                     repeat_every_s=repeat, detail=str(data.get("detail", "")))

    def adapter(self, data: dict) -> Adapter:
        self.known(data, "adapter", {"latency_ms", "host_delay_ms", "host_delay_tail_rate", "host_delay_tail_ms",
                                     "state_latency"})
        state = data.get("state_latency", True)
        if not isinstance(state, bool):
            raise self.fail("adapter.state_latency", "must be true or false")
        return Adapter(latency_ms=self.number(data, "latency_ms", "adapter", 16.0, 0.125, 255.0),
                       state_latency=state,
                       host_delay_ms=self.number(data, "host_delay_ms", "adapter", 0.2, 0.0, 1000.0),
                       host_delay_tail_rate=self.number(data, "host_delay_tail_rate", "adapter", 0.002, 0.0, 1.0),
                       host_delay_tail_ms=self.number(data, "host_delay_tail_ms", "adapter", 4.0, 0.0, 1000.0))

    def sniffer(self, data: dict) -> Sniffer:
        self.known(data, "sniffer", {"baud", "format", "polarity_reversed"})
        serial = self.serial(data, "sniffer") if ("baud" in data or "format" in data) else None
        reversed_ = data.get("polarity_reversed", False)
        if not isinstance(reversed_, bool):
            raise self.fail("sniffer.polarity_reversed", "must be true or false")
        return Sniffer(serial=serial, polarity_reversed=reversed_)
