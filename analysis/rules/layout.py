"""The bus's physical layout as the traffic and the station map show it: how many devices, how long."""

from __future__ import annotations

from buswitness.analysis.finding import WIRING_CAUTION, Cause, Finding
from buswitness.analysis.result import AnalysisResult
from buswitness.analysis.rules.common import capture_span
from buswitness.analysis.rules.thresholds import Thresholds


def device_count(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """More answering stations (plus the master and the sniffer) than one segment takes with bias."""
    answering = [s.address for s in result.stations if s.answered + s.late]
    devices = len(answering) + 2  # the master and the sniffer's adapter load the line too
    limit = th.max_devices - th.bias_device_cost
    if devices <= limit:
        return []
    t0, t1 = capture_span(result)
    return [Finding(
        rule="device-count", severity="notice", score=devices / th.max_devices, t_start_s=t0, t_end_s=t1,
        statement=(f"{len(answering)} stations answer on this line; with the master and the sniffer that is "
                   f"{devices} devices, over the {limit} one segment takes with bias resistors (32 without, MSL "
                   f"§3.4.1, §3.4.6) unless their transceivers are fractional loads or a repeater splits the line."),
        evidence={"answering_stations": answering, "devices": devices, "limit_with_bias": limit,
                  "limit": th.max_devices},
        causes=[Cause("Too many unit loads on one segment weaken the signal for every receiver.",
                      "Check the transceivers' load (1, 1/2, 1/4 or 1/8 unit load) in the devices' datasheets; "
                      "if the sum is over the limit, split the line with a repeater.")],
        caution=WIRING_CAUTION)]


def cable_length(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """A station map placing stations beyond the length the serial-line guide allows."""
    placed = [s for s in result.stations if s.position_m is not None]
    if not placed:
        return []
    far = max(placed, key=lambda s: s.position_m)
    if far.position_m <= th.max_segment_m:
        return []
    t0, t1 = capture_span(result)
    return [Finding(
        rule="cable-length", severity="notice", score=far.position_m / th.max_segment_m, station=far.address,
        station_label=far.label, t_start_s=t0, t_end_s=t1,
        statement=(f"The station map puts {far.label} {far.position_m:g} m along the cable, beyond the "
                   f"{th.max_segment_m:g} m the serial-line guide gives for AWG26 at up to 9600 bps (MSL §3.4.3); "
                   f"this line runs at {result.header.serial.baud} bps."),
        evidence={"position_m": far.position_m, "max_segment_m": th.max_segment_m,
                  "baud": result.header.serial.baud},
        causes=[Cause("A segment this long attenuates and distorts the signal, more so at higher baud rates.",
                      "Check the cable's gauge; consider a lower baud rate or a repeater.")],
        caution=WIRING_CAUTION)]
