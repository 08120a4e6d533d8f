"""The station map: a small TOML file naming each address, its place on the cable and notes.

```toml
[stations.7]
name = "Pump drive B"
position_m = 310
notes = "replaced 2025"
```

Every table and chart then says "Pump drive B (7)" instead of "7". A file with a ``[bus]`` table
is a bus description (analysis/busplan.py, docs/plan.md) and is read as a station map too.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass, field
from pathlib import Path

from buswitness.errors import InputFileError
from buswitness.fsutil import read_text_input
from buswitness.tomlcompat import tomllib


@dataclass(frozen=True)
class StationInfo:
    """What the user told us about one address."""

    address: int
    name: str = ""
    position_m: float | None = None
    notes: str = ""


@dataclass
class StationMap:
    """Address to StationInfo; addresses not in the file get a bare label."""

    stations: dict[int, StationInfo] = field(default_factory=dict)
    path: str = ""
    plan: object | None = None  #: the BusPlan when the file is a bus description (analysis/busplan.py)

    def label(self, address: int) -> str:
        info = self.stations.get(address)
        if info and info.name:
            return f"{info.name} ({address})"
        return f"station {address}"

    def name(self, address: int) -> str:
        info = self.stations.get(address)
        return info.name if info else ""

    def get(self, address: int) -> StationInfo | None:
        return self.stations.get(address)


_KEYS = {"name", "position_m", "notes"}


def load_station_map(path: str | os.PathLike) -> StationMap:
    """Read a station map; a mistake names the file and, where it can, the line."""
    p = Path(path)
    if not p.exists() and not p.is_symlink():
        raise InputFileError(p, "no such station map file")
    text = read_text_input(p, "station map")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputFileError(p, f"is not valid TOML: {exc}", "see docs/reading-the-report.md for the layout") from None
    from buswitness.analysis.busplan import is_bus_description, parse_plan
    if is_bus_description(data):
        return parse_plan(data, text, p).station_map()
    stations = data.get("stations")
    if not isinstance(stations, dict):
        raise InputFileError(p, "has no [stations.N] tables", 'write e.g. [stations.7] name = "Pump drive B"')
    out: dict[int, StationInfo] = {}
    for key, entry in stations.items():
        where = f"[stations.{key}] (line {_line_of(text, key)})"
        if not re.fullmatch(r"\d{1,3}", str(key)) or not 0 <= int(key) <= 247:
            raise InputFileError(p, f"{where}: {key!r} is not a station address (1 to 247)")
        if not isinstance(entry, dict):
            raise InputFileError(p, f"{where}: expected a table with name, position_m, notes")
        unknown = set(entry) - _KEYS
        if unknown:
            raise InputFileError(p, f"{where}: unknown key(s) {', '.join(sorted(unknown))}",
                                 "allowed: name, position_m, notes")
        name, notes, pos = entry.get("name", ""), entry.get("notes", ""), entry.get("position_m")
        if not isinstance(name, str) or not isinstance(notes, str):
            raise InputFileError(p, f"{where}: name and notes must be text in quotes")
        if pos is not None and (isinstance(pos, bool) or not isinstance(pos, (int, float))):
            raise InputFileError(p, f"{where}: position_m must be a number of metres")
        out[int(key)] = StationInfo(int(key), name.strip(), None if pos is None else float(pos), notes.strip())
    return StationMap(out, str(p))


def _line_of(text: str, key: str) -> int:
    for n, line in enumerate(text.splitlines(), start=1):
        if re.match(rf"\s*\[\s*stations\.\"?{re.escape(str(key))}\"?\s*\]", line):
            return n
    return 0
