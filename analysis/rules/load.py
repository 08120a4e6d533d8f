"""Bus load: how busy the line is, how often each station is polled, and the room left in the cycle."""

from __future__ import annotations

import math
from statistics import median

from buswitness.analysis.finding import Cause, Finding
from buswitness.analysis.result import AnalysisResult
from buswitness.analysis.rules.common import capture_span, ms, pct, share
from buswitness.analysis.rules.thresholds import Thresholds


def poll_slot_ms(result: AnalysisResult) -> float | None:
    """Bus time one poll takes: its bytes on the wire, the typical answer time and the typical pause."""
    bus = result.bus
    if not bus.requests:
        return None
    wire = 1e3 * bus.busy_s / bus.requests
    answers = [s.response_ms["p50"] for s in result.stations if s.answered and s.response_ms.get("p50") is not None]
    pause = bus.gap_ms.get("p50") or 0.0
    return wire + (median(answers) if answers else 0.0) + pause


def bus_load(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Utilisation, poll cycle and how many more stations the cycle could take at the current rate."""
    bus = result.bus
    cycles = [s.poll_cycle_ms["p50"] for s in result.stations if s.requests and s.poll_cycle_ms.get("p50")]
    slot = poll_slot_ms(result)
    if not cycles or slot is None or bus.utilisation is None or bus.duration_s <= 0:
        return []
    cycle = median(cycles)
    per_cycle = bus.requests * cycle / (1e3 * bus.duration_s)
    spare = max(0, math.floor((cycle - per_cycle * slot) / slot))
    waiting = sum(s.waiting_s for s in result.stations)
    room = (f"the cycle has room for about {spare} more station{'s' if spare != 1 else ''} at this rate"
            if spare else f"the master polls back to back, so every added station lengthens the cycle by about "
                          f"{ms(slot)}")
    lost = f"; waiting on unanswered polls took {pct(share(waiting, bus.duration_s))} of the time" if waiting else ""
    t0, t1 = capture_span(result)
    return [Finding(
        rule="bus-load", severity="notice" if bus.utilisation >= th.load_notice_utilisation else "info",
        score=bus.utilisation, t_start_s=t0, t_end_s=t1,
        statement=(f"The line is busy {pct(bus.utilisation)} of the time and each station is polled every "
                   f"{ms(cycle)} (median); at about {ms(slot)} per poll {room}{lost}."),
        evidence={"utilisation": bus.utilisation, "poll_cycle_ms": round(cycle, 2), "polls_per_cycle":
                  round(per_cycle, 2), "poll_slot_ms": round(slot, 2), "spare_stations": spare,
                  "waiting_on_timeouts_s": round(waiting, 3), "requests": bus.requests,
                  "functions": {str(f): n for f, n in sorted(bus.functions.items())}},
        causes=[Cause("Load follows from the poll list and the master's cycle setting.",
                      "To poll more stations or faster: fewer registers per request, a higher baud rate, or fix "
                      "the timeouts that hold the cycle up.")])]
