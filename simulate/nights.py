"""A fictional fleet for demos, tests and benchmarks: the same bus recorded night after night.

Built on the built-in ``clean`` scenario (three healthy stations, fictional names). A bus can be
given a fault: from night ``worse_from`` its station ``station`` answers slowly, with a long
tail past the master's timeout (a failing drive, a loose terminal), until night ``fixed_on``,
when it answers as before (the fix held). Nights are counted from 1; night n starts at 22:00 UTC
on ``first_night`` plus n - 1 days.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from dataclasses import dataclass
from pathlib import Path

from buswitness.simulate.run import simulate
from buswitness.simulate.scenario import ResponseTime, load_scenario

#: The degraded turnaround: well above the healthy 14 ms, with a tail past the 200 ms timeout.
DEGRADED = ResponseTime(fixed_ms=45.0, jitter_ms=15.0, tail_rate=0.06, tail_mean_ms=250.0)


@dataclass(frozen=True)
class Fault:
    station: int = 3
    worse_from: int = 4
    fixed_on: int | None = 6


def night_capture(folder: str | Path, bus: str, night: int, duration_s: float, fault: Fault | None = None,
                  first_night: dt.date = dt.date(2026, 11, 30), seed: int = 1) -> Path:
    """Simulate one night of one bus into ``folder/BUS-nightNN.bwcap`` and return its path."""
    sc = load_scenario("clean")
    start = dt.datetime.combine(first_night + dt.timedelta(days=night - 1), dt.time(22, 0), dt.timezone.utc)
    faulty = fault is not None and night >= fault.worse_from and (fault.fixed_on is None or night < fault.fixed_on)
    stations = tuple(dataclasses.replace(s, response=DEGRADED) if faulty and s.address == fault.station else s
                     for s in sc.stations)
    sc = dataclasses.replace(sc, name=f"{bus}-night{night}", start_utc=start.isoformat(), stations=stations)
    path = Path(folder) / f"{bus}-night{night:02d}.bwcap"
    # seeds differ per bus and night so no two captures have the same content
    simulate(sc, duration_s=duration_s, seed=seed + 1000 * night + sum(map(ord, bus))).write(path)
    return path


def fleet_nights(folder: str | Path, buses: dict[str, Fault | None], nights: int, duration_s: float,
                 first_night: dt.date = dt.date(2026, 11, 30)) -> dict[str, list[Path]]:
    """Every bus recorded every night: bus name -> capture paths, night 1 first."""
    Path(folder).mkdir(parents=True, exist_ok=True)
    return {bus: [night_capture(folder, bus, n, duration_s, fault, first_night) for n in range(1, nights + 1)]
            for bus, fault in buses.items()}
