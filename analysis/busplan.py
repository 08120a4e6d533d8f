"""The bus description: the bus as built, in the same TOML file as the station map.

A station map (``[stations.N]`` with name, position_m, notes) stays valid as it is. A file with a
``[bus]`` table is a *bus description*: it adds the cable, the master, repeaters, each device's
unit load, terminator, bias, stub and A/B wiring, where the shield is grounded and whether the
signal common runs with the pair. ``buswitness plan check`` judges it (``analysis/planrules.py``);
``analyze --stations`` reads the same file as a station map. See docs/plan.md for every field.

Conventions: positions are metres along the trunk cable, usually from the master's end; the two
signal conductors are called D0 and D1 as in MSL §3.3.2 (D0 = A, D1 = B), because device labels
"A" and "B" are not used the same way by every maker (common practice).
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass, field
from fractions import Fraction
from pathlib import Path

from buswitness.analysis.stationmap import StationInfo, StationMap
from buswitness.errors import InputFileError
from buswitness.tomlcompat import tomllib

#: Default value of a device's built-in terminator when the description does not give one, ohm
#: (common practice: 120 ohm for typical twisted pair).
DEFAULT_TERMINATOR_OHM = 120.0
#: Default characteristic impedance of the trunk cable, ohm (common practice: 120 ohm twisted pair).
DEFAULT_IMPEDANCE_OHM = 120.0
CONDUCTORS = ("D0", "D1")

_TOP = {"bus", "cable", "master", "sniffer", "stations", "repeaters", "terminators", "bias", "shield"}
_BUS = {"name", "baud", "format", "length_m", "signal_common", "common_earthed_at_m", "ring", "notes"}
_CABLE = {"name", "impedance_ohm", "capacitance_pf_per_m", "gauge_awg", "notes"}
_DEVICE = {"name", "position_m", "notes", "unit_load", "terminator", "terminator_ohm", "bias", "bias_ohm",
           "stub_m", "label_a", "wire_on_a", "common"}
_REPEATER = {"name", "position_m", "notes", "unit_load", "stub_m", "terminator_near", "terminator_far",
             "terminator_ohm", "bias_near", "bias_far", "bias_ohm"}
_TERMINATOR = {"position_m", "ohm", "stub_m", "notes"}
_BIAS = {"position_m", "ohm", "stub_m", "notes"}
_SHIELD = {"grounded_at_m", "notes"}


@dataclass(frozen=True)
class Device:
    """A master or a station: where it sits and what its transceiver brings to the line."""

    key: str                 # "master", "sniffer" or "station 7": how results and the drawing name it
    name: str
    position_m: float
    address: int | None = None
    unit_load: float = 1.0
    terminator: bool = False
    terminator_ohm: float = DEFAULT_TERMINATOR_OHM
    bias: bool = False
    bias_ohm: float | None = None
    stub_m: float = 0.0
    label_a: str = "D0"      # what the device's own documentation says its terminal "A" is
    wire_on_a: str = "D0"    # the trunk conductor actually landed on that terminal
    notes: str = ""
    line: int = 0
    common: bool | None = None  # the signal common is landed at this device (None: as the bus says)

    @property
    def label(self) -> str:
        if self.key == "sniffer":
            return f"{self.name} (listening adapter)" if self.name else "listening adapter"
        if self.address is None:
            return f"{self.name} (master)" if self.name else "master"
        return f"{self.name} ({self.address})" if self.name else f"station {self.address}"


@dataclass(frozen=True)
class Repeater:
    """A repeater on the trunk: it ends the segment on its master side ("near") and starts the next ("far")."""

    key: str
    name: str
    position_m: float
    unit_load: float = 1.0   # on each side
    stub_m: float = 0.0
    terminator_near: bool = False
    terminator_far: bool = False
    terminator_ohm: float = DEFAULT_TERMINATOR_OHM
    bias_near: bool = False
    bias_far: bool = False
    bias_ohm: float | None = None
    notes: str = ""
    line: int = 0

    @property
    def label(self) -> str:
        if not self.name or "repeater" in self.name.lower():
            return self.name or "repeater"
        return f"{self.name} (repeater)"


@dataclass(frozen=True)
class Part:
    """A terminator or bias network fitted on its own (on a terminal block), not inside a device."""

    key: str
    kind: str                # "terminator" or "bias"
    position_m: float
    ohm: float | None = None
    stub_m: float = 0.0
    notes: str = ""
    line: int = 0


@dataclass(frozen=True)
class Cable:
    name: str = ""
    impedance_ohm: float = DEFAULT_IMPEDANCE_OHM
    capacitance_pf_per_m: float | None = None
    gauge_awg: int | None = None
    notes: str = ""


@dataclass(frozen=True)
class Segment:
    """One stretch of trunk between the trunk's ends and the repeaters."""

    index: int               # 1, 2, ... from the master's end
    start_m: float
    end_m: float
    start_is_repeater: bool = False
    end_is_repeater: bool = False

    @property
    def length_m(self) -> float:
        return self.end_m - self.start_m

    @property
    def name(self) -> str:
        return f"segment {self.index} ({self.start_m:g}-{self.end_m:g} m)"

    def holds(self, position_m: float) -> bool:
        """Positions belong to the segment they fall in; one at a repeater belongs to the near side."""
        lo_ok = position_m >= self.start_m if not self.start_is_repeater else position_m > self.start_m
        return lo_ok and position_m <= self.end_m


@dataclass
class BusPlan:
    """The bus as built."""

    path: str
    name: str = ""
    baud: int | None = None
    char_format: str = ""
    length_m: float | None = None
    signal_common: bool | None = None
    common_earthed_at_m: list[float] | None = None
    ring: bool = False
    notes: str = ""
    cable: Cable = field(default_factory=Cable)
    master: Device | None = None
    sniffer: Device | None = None
    stations: list[Device] = field(default_factory=list)
    repeaters: list[Repeater] = field(default_factory=list)
    parts: list[Part] = field(default_factory=list)
    shield_grounds_m: list[float] | None = None

    @property
    def devices(self) -> list[Device]:
        """The master, then the stations and the listening adapter in position order."""
        others = self.stations + ([self.sniffer] if self.sniffer else [])
        return ([self.master] if self.master else []) + sorted(others, key=lambda d: d.position_m)

    def trunk_span(self) -> tuple[float, float]:
        """Where the trunk starts (0 m, the master's end, unless something sits before it) and ends
        (the farthest thing on it, or the stated length)."""
        pos = [d.position_m for d in self.devices] + [r.position_m for r in self.repeaters] + \
              [p.position_m for p in self.parts]
        start = min([0.0, *pos])
        end = max(pos, default=0.0)
        if self.length_m is not None:
            end = max(end, start + self.length_m)
        return start, end

    def segments(self) -> list[Segment]:
        start, end = self.trunk_span()
        cuts = sorted(r.position_m for r in self.repeaters)
        edges = [start, *cuts, end]
        return [Segment(i + 1, a, b, start_is_repeater=i > 0, end_is_repeater=i < len(cuts))
                for i, (a, b) in enumerate(zip(edges, edges[1:]))]

    def segment_of(self, position_m: float) -> Segment:
        segs = self.segments()
        for s in segs:
            if s.holds(position_m):
                return s
        return segs[0] if position_m < segs[0].start_m else segs[-1]

    def station_map(self) -> StationMap:
        """The description read as a station map (what ``analyze --stations`` uses)."""
        smap = StationMap({d.address: StationInfo(d.address, d.name, d.position_m, d.notes)
                           for d in self.stations if d.address is not None}, self.path)
        smap.plan = self
        return smap


def is_bus_description(data: dict) -> bool:
    """A file with a [bus] table (or any of the description's other tables) is a bus description."""
    return any(k in data for k in _TOP - {"stations"})


class _Lines:
    """Line numbers of table headers and keys in a TOML text (tomllib keeps none)."""

    def __init__(self, text: str) -> None:
        self.headers: dict[str, list[int]] = {}
        self.keys: dict[tuple[str, int, str], int] = {}
        table, nth = "", 0
        for n, raw in enumerate(text.splitlines(), start=1):
            line = raw.split("#", 1)[0].strip()
            m = re.match(r"^(\[\[?)\s*([^\]]+?)\s*\]\]?$", line)
            if m:
                table = re.sub(r"\s*\.\s*", ".", m.group(2)).replace('"', "")
                self.headers.setdefault(table, []).append(n)
                nth = len(self.headers[table]) - 1
                continue
            k = re.match(r"^([A-Za-z0-9_\-]+)\s*=", line)
            if k:
                self.keys.setdefault((table, nth, k.group(1)), n)

    def of(self, table: str, nth: int = 0, key: str | None = None) -> int:
        if key is not None and (table, nth, key) in self.keys:
            return self.keys[(table, nth, key)]
        lines = self.headers.get(table, [])
        return lines[nth] if nth < len(lines) else 0


class _Reader:
    """Typed access to one table's values, every mistake naming the line and the fix."""

    def __init__(self, path: Path, lines: _Lines, table: str, nth: int, entry: object, allowed: set[str],
                 shown: str | None = None) -> None:
        self.path, self.lines, self.table, self.nth = path, lines, table, nth
        self.shown = shown or f"[{table}]"
        self.line = lines.of(table, nth)
        if not isinstance(entry, dict):
            self.fail(None, "must be a table of keys and values", f"write {self.shown} on its own line, then key = value lines")
        self.entry: dict = entry  # type: ignore[assignment]
        unknown = sorted(set(self.entry) - allowed)
        if unknown:
            self.fail(unknown[0], f"unknown key {unknown[0]!r}", "allowed: " + ", ".join(sorted(allowed)))

    def fail(self, key: str | None, problem: str, fix: str) -> None:
        n = self.lines.of(self.table, self.nth, key) or self.line
        where = f"line {n}: {self.shown}" if n else self.shown
        if key:
            where += f" {key}"
        raise InputFileError(self.path, f"{where}: {problem}", fix)

    def number(self, key: str, default: float | None = None, *, minimum: float = 0.0, required: bool = False,
               unit: str = "metres", example: str = "120") -> float | None:
        if key not in self.entry:
            if required:
                self.fail(None, f"has no {key}", f"add {key} = {example} ({unit})")
            return default
        v = self.entry[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            self.fail(key, f"{v!r} is not a number", f"write a number of {unit}, e.g. {key} = {example}")
        if v < minimum:
            self.fail(key, f"{v!r} is below {minimum:g}", f"write a number of {unit} of at least {minimum:g}")
        return float(v)

    def flag(self, key: str, default: bool | None = False) -> bool | None:
        if key not in self.entry:
            return default
        v = self.entry[key]
        if not isinstance(v, bool):
            self.fail(key, f"{v!r} is not true or false", f"write {key} = true or {key} = false (no quotes)")
        return v

    def text(self, key: str, default: str = "") -> str:
        v = self.entry.get(key, default)
        if not isinstance(v, str):
            self.fail(key, f"{v!r} is not text", f'put the text in quotes, e.g. {key} = "..."')
        return v.strip()

    def conductor(self, key: str) -> str:
        v = self.text(key, "D0").upper()
        if v not in CONDUCTORS:
            self.fail(key, f"{v!r} is not D0 or D1",
                      f'write {key} = "D0" or "D1" (MSL §3.3.2: D0 is the line called A, D1 the line called B)')
        return v

    def unit_load(self, key: str = "unit_load") -> float:
        if key not in self.entry:
            return 1.0
        v = self.entry[key]
        value: float | None = None
        if isinstance(v, (int, float)) and not isinstance(v, bool):
            value = float(v)
        elif isinstance(v, str):
            try:
                value = float(Fraction(v.strip()))
            except (ValueError, ZeroDivisionError):
                value = None
        if value is None or not (0 < value <= 32) or not math.isfinite(value):
            self.fail(key, f"{v!r} is not a unit load",
                      'write the transceiver\'s rating from its datasheet: 1, 0.5, or a fraction such as "1/8"')
        return float(value)  # type: ignore[arg-type]


def load_plan(path: str | os.PathLike) -> BusPlan:
    """Read and validate a bus description; a mistake names the file, the line and the fix."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputFileError(p, "no such bus description file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputFileError(p, f"the bus description cannot be read ({exc})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputFileError(p, f"is not valid TOML: {exc}", "see docs/plan.md for the layout") from None
    return parse_plan(data, text, p)


def parse_plan(data: dict, text: str, path: str | os.PathLike) -> BusPlan:
    """Validate an already parsed description (``text`` is used only for line numbers)."""
    p = Path(path)
    lines = _Lines(text)
    unknown = sorted(set(data) - _TOP)
    if unknown:
        n = lines.of(unknown[0]) or lines.keys.get(("", 0, unknown[0]), 0)
        raise InputFileError(p, f"line {n}: unknown table or key {unknown[0]!r}",
                             "allowed: " + ", ".join(f"[{t}]" for t in sorted(_TOP)))
    if "bus" not in data:
        raise InputFileError(p, "has no [bus] table", 'a bus description starts with [bus] name = "...", baud = 19200')
    bus = _Reader(p, lines, "bus", 0, data["bus"], _BUS)
    plan = BusPlan(str(p), name=bus.text("name"), notes=bus.text("notes"),
                   length_m=bus.number("length_m", None, minimum=0.0, example="420"),
                   signal_common=bus.flag("signal_common", None), ring=bool(bus.flag("ring", False)))
    if "baud" in bus.entry:
        baud = bus.entry["baud"]
        if isinstance(baud, bool) or not isinstance(baud, int) or not 50 <= baud <= 10_000_000:
            bus.fail("baud", f"{baud!r} is not a baud rate", "write the bus's rate as a whole number, e.g. baud = 19200")
        plan.baud = int(baud)
    plan.char_format = bus.text("format")
    if "common_earthed_at_m" in bus.entry:
        plan.common_earthed_at_m = _positions(bus, "common_earthed_at_m", "the signal common is bonded to earth")
    if "cable" in data:
        c = _Reader(p, lines, "cable", 0, data["cable"], _CABLE)
        gauge = c.number("gauge_awg", None, minimum=10, unit="AWG", example="24")
        if gauge is not None and gauge > 30:
            c.fail("gauge_awg", f"{gauge:g} is not a cable gauge for a bus trunk", "write the AWG size, e.g. 24")
        plan.cable = Cable(c.text("name"),
                           c.number("impedance_ohm", DEFAULT_IMPEDANCE_OHM, minimum=1, unit="ohm", example="120")
                           or DEFAULT_IMPEDANCE_OHM,
                           c.number("capacitance_pf_per_m", None, minimum=1, unit="pF per metre", example="42"),
                           None if gauge is None else int(gauge), c.text("notes"))
    if "master" in data:
        plan.master = _device(_Reader(p, lines, "master", 0, data["master"], _DEVICE), "master", None)
    if "sniffer" in data:
        plan.sniffer = _device(_Reader(p, lines, "sniffer", 0, data["sniffer"], _DEVICE), "sniffer", None)
    stations = data.get("stations", {})
    if not isinstance(stations, dict):
        raise InputFileError(p, f"line {lines.of('stations')}: stations must be [stations.N] tables",
                             'write e.g. [stations.7] name = "Pump drive B", position_m = 310')
    for key, entry in stations.items():
        table = f"stations.{key}"
        if not re.fullmatch(r"\d{1,3}", str(key)) or not 1 <= int(key) <= 247:
            n = lines.of(table)
            raise InputFileError(p, f"line {n}: [{table}]: {key!r} is not a station address",
                                 "a Modbus station address is 1 to 247 (MSL §2.2)")
        plan.stations.append(_device(_Reader(p, lines, table, 0, entry, _DEVICE), f"station {int(key)}", int(key)))
    for i, entry in enumerate(_array(p, lines, data, "repeaters")):
        r = _Reader(p, lines, "repeaters", i, entry, _REPEATER, f"[[repeaters]] #{i + 1}")
        plan.repeaters.append(Repeater(
            f"repeater {i + 1}", r.text("name") or f"repeater {i + 1}",
            r.number("position_m", required=True, example="500") or 0.0, r.unit_load(),
            r.number("stub_m", 0.0) or 0.0, bool(r.flag("terminator_near")), bool(r.flag("terminator_far")),
            r.number("terminator_ohm", DEFAULT_TERMINATOR_OHM, minimum=1, unit="ohm") or DEFAULT_TERMINATOR_OHM,
            bool(r.flag("bias_near")), bool(r.flag("bias_far")),
            r.number("bias_ohm", None, minimum=1, unit="ohm", example="560"), r.text("notes"), r.line))
    for kind, allowed in (("terminators", _TERMINATOR), ("bias", _BIAS)):
        for i, entry in enumerate(_array(p, lines, data, kind)):
            r = _Reader(p, lines, kind, i, entry, allowed, f"[[{kind}]] #{i + 1}")
            single = "terminator" if kind == "terminators" else "bias"
            ohm = r.number("ohm", DEFAULT_TERMINATOR_OHM if single == "terminator" else None, minimum=1, unit="ohm")
            plan.parts.append(Part(f"{single} {i + 1}", single, r.number("position_m", required=True, example="0")
                                   or 0.0, ohm, r.number("stub_m", 0.0) or 0.0, r.text("notes"), r.line))
    if "shield" in data:
        s = _Reader(p, lines, "shield", 0, data["shield"], _SHIELD)
        plan.shield_grounds_m = _positions(s, "grounded_at_m", "the shield is bonded to earth")
    _check_layout(plan, p, lines)
    return plan


def _array(p: Path, lines: _Lines, data: dict, name: str) -> list:
    v = data.get(name, [])
    if not isinstance(v, list):
        raise InputFileError(p, f"line {lines.of(name)}: [{name}] must be written [[{name}]] (one per item)",
                             f"write each item as its own [[{name}]] table")
    return v


def _positions(r: _Reader, key: str, what: str) -> list[float]:
    g = r.entry.get(key, [])
    if not isinstance(g, list) or any(isinstance(v, bool) or not isinstance(v, (int, float)) or v < 0 for v in g):
        r.fail(key, f"{g!r} is not a list of positions", f"write the positions in metres where {what}, e.g. {key} = [0]")
    return [float(v) for v in g]


def _device(r: _Reader, key: str, address: int | None) -> Device:
    return Device(
        key, r.text("name"), r.number("position_m", required=True, example="310") or 0.0, address,
        r.unit_load(), bool(r.flag("terminator")),
        r.number("terminator_ohm", DEFAULT_TERMINATOR_OHM, minimum=1, unit="ohm") or DEFAULT_TERMINATOR_OHM,
        bool(r.flag("bias")), r.number("bias_ohm", None, minimum=1, unit="ohm", example="560"),
        r.number("stub_m", 0.0) or 0.0, r.conductor("label_a"), r.conductor("wire_on_a"), r.text("notes"), r.line,
        r.flag("common", None))


def _check_layout(plan: BusPlan, p: Path, lines: _Lines) -> None:
    """What cannot be judged at all: things beyond the stated trunk length, repeaters on one spot."""
    if plan.length_m is not None:
        start, _ = plan.trunk_span()
        for d in plan.devices:
            if d.position_m > start + plan.length_m:
                raise InputFileError(p, f"line {d.line}: {d.label} sits at {d.position_m:g} m, beyond the trunk's "
                                        f"length_m = {plan.length_m:g} in [bus]",
                                     "correct the position or the trunk length")
    seen: dict[float, Repeater] = {}
    for r in plan.repeaters:
        if r.position_m in seen:
            raise InputFileError(p, f"line {r.line}: two repeaters at {r.position_m:g} m",
                                 "give each repeater its own position along the trunk")
        seen[r.position_m] = r


__all__ = ["BusPlan", "Cable", "Device", "Part", "Repeater", "Segment", "is_bus_description", "load_plan",
           "parse_plan"]
