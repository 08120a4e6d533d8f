"""A capture with nothing to analyse: no bytes on the line at all, or bytes that never form a valid frame.

Without these a silent capture reads as a healthy one ("no findings"), which is the worst answer a
field tool can give: the technician leaves believing the bus is fine. Both findings are critical
and name the usual reasons a sniffer hears nothing useful: its A/B leads swapped, the wrong baud
rate or character format, or the adapter not connected to the bus at all.
"""

from __future__ import annotations

from buswitness.analysis.finding import WIRING_CAUTION, Cause, Finding
from buswitness.analysis.result import AnalysisResult
from buswitness.analysis.rules.common import capture_span, line_damage_events
from buswitness.analysis.rules.line import unreadable_line
from buswitness.analysis.rules.thresholds import Thresholds


def _during(result: AnalysisResult) -> str:
    d = result.bus.duration_s
    if d < 1:
        return "in the whole capture"
    return f"in {d:.0f} s" if d < 120 else f"in {d / 60:.0f} min"


def _detect_check(result: AnalysisResult) -> str:
    return ("Run `buswitness detect` on the capture to check its settings against its contents, or on the "
            "serial port to try each common baud rate and format for a few seconds; then record again with "
            f"the settings it ranks first (this capture was read at {result.header.serial}).")


def no_traffic(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Not one byte arrived in the whole capture."""
    bus = result.bus
    if bus.frames or bus.bytes or bus.busy_s > 0 or line_damage_events(bus.events) or sum(bus.events.values()):
        return []
    t0, t1 = capture_span(result)
    serial = result.header.serial
    return [Finding(
        rule="no-traffic", severity="critical", score=1.0, t_start_s=t0, t_end_s=t1,
        statement=(f"No traffic: not one byte arrived {_during(result)} at {serial}. This is not a healthy "
                   "bus: the sniffer heard nothing, so nothing in this capture says anything about the stations."),
        evidence={"bytes": 0, "frames": 0, "duration_s": round(bus.duration_s, 1), "sniffer_serial": str(serial)},
        causes=[Cause("The adapter is not on the bus: its leads are not connected to the pair the master uses, "
                      "or it is plugged into another port or segment.",
                      "Follow the sniffer's two signal wires to the bus terminals and check they land on the "
                      "master's pair; check that the serial device recorded is the adapter you wired."),
                Cause("The master was not polling while the capture ran (stopped, in local mode, or on another "
                      "port).",
                      "Check on the master that it is running and its poll list is active, then record a "
                      "minute again."),
                Cause("The sniffer's A and B leads are swapped: an adapter may deliver nothing at all from a line "
                      "it sees held in the wrong state.",
                      "Swap the sniffer's two signal wires at its adapter and record a minute again."),
                Cause("Wrong baud rate or character format, on an adapter that drops what it cannot frame.",
                      _detect_check(result))],
        caution=WIRING_CAUTION)]


def no_valid_frames(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Bytes arrived, but not one valid frame, and too few of them for ``unreadable-line`` to say so with its figures."""
    bus = result.bus
    if bus.frames or not (bus.bytes or bus.busy_s > 0 or sum(bus.events.values())):
        return []
    if unreadable_line(result, th):
        return []  # that finding says it, with the damage by kind and the share of busy time
    t0, t1 = capture_span(result)
    serial = result.header.serial
    damage = line_damage_events(bus.events)
    settings = Cause("The sniffer listens with the wrong baud rate or character format.", _detect_check(result))
    polarity = Cause("The sniffer's A and B leads are swapped: it reads every bit inverted.",
                     "Swap the sniffer's two signal wires at its adapter and record a minute again.")
    causes = [settings, polarity]
    if bus.events.get("break", 0) >= th.polarity_break_share * max(damage, 1):
        causes = [polarity, settings]  # breaks dominate the damage: an inverted line reads as a held space
    causes.append(Cause("The adapter is not on the bus pair but picks up noise (an open input, a loose lead).",
                        "Follow the sniffer's leads to the bus terminals and check they land on the master's pair."))
    return [Finding(
        rule="no-valid-frames", severity="critical", score=1.0, t_start_s=t0, t_end_s=t1,
        statement=(f"No valid frames: bytes arrived {_during(result)} at {serial}, but not one of them formed "
                   "a frame with a valid CRC. This is not a healthy bus: nothing in this capture can be judged "
                   "until the sniffer reads the line."),
        evidence={"frames": 0, "damage_events": damage, "line_busy_s": round(bus.busy_s, 3),
                  "duration_s": round(bus.duration_s, 1), "sniffer_serial": str(serial),
                  "breaks": bus.events.get("break", 0)},
        causes=causes, caution=WIRING_CAUTION)]
