"""Damage on the line: unreadable to the sniffer, bus-wide, rising along the cable, at one drop,
in bursts, or as stray bytes at idle; and a line nobody holds idle between frames."""

from __future__ import annotations

from itertools import pairwise
from statistics import median

import numpy as np
from buswitness.analysis.figures import EVENT_KINDS
from buswitness.analysis.finding import WIRING_CAUTION, Cause, Finding
from buswitness.analysis.result import AnalysisResult, StationFigures
from buswitness.analysis.rules.common import (
    LINE_DAMAGE_KINDS,
    capture_span,
    clock,
    damaged_share,
    failure_examples,
    line_damage_events,
    minute_span,
    pct,
    polled,
    share,
)
from buswitness.analysis.rules.lateness import collision_budget
from buswitness.analysis.rules.thresholds import Thresholds


def _judged(result: AnalysisResult, th: Thresholds) -> list[StationFigures]:
    """Stations whose damage says something about the wire: polled enough, not answering late.

    A late answer that runs into the next poll damages frames whatever the wire is like, so
    stations with late answers are left out of the comparisons.
    """
    return [s for s in polled(result, th) if s.late < th.late_min_count]


def valid_time_share(result: AnalysisResult) -> float | None:
    """Share of the line's busy time that valid frames fill (None when the line never carried bytes)."""
    busy = result.bus.busy_s
    if busy <= 0:
        return None
    return min(1.0, result.bus.bytes * result.header.serial.char_time_s / busy)


def unreadable_line(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Bytes arrive but hardly any form valid frames: the sniffer's settings or polarity, or the whole line."""
    valid = valid_time_share(result)
    damage = line_damage_events(result.bus.events)
    if valid is None or damage < th.min_events or 1.0 - valid < th.unreadable_damage_share:
        return []
    serial = result.header.serial
    breaks = result.bus.events.get("break", 0)
    polarity = Cause("The sniffer's own A and B wires are swapped: the bus may be healthy, the sniffer reads "
                     "every bit inverted.",
                     "Swap the sniffer's two signal wires at its adapter and record a minute again.")
    settings = Cause(f"The sniffer listens with the wrong settings ({serial}); the bus runs at another baud "
                     f"rate, parity or stop bits.",
                     "Take the bus settings from the master's configuration and record again with them "
                     "(try 19200 8E1, the Modbus default, MSL §3.2 p20, then 9600 8E1), or run `buswitness detect` on "
                     "the capture or the port to rank the common settings by the frames they read.")
    noise = Cause("The whole line is so disturbed that no frame survives.",
                  "If the master's own diagnostics also show no valid answers, look for the noise source and "
                  "the cable's condition.")
    polarity_first = share(breaks, damage) >= th.polarity_break_share
    t0, t1 = capture_span(result)
    return [Finding(
        rule="unreadable-line", severity="critical", score=1.0, t_start_s=t0, t_end_s=t1,
        statement=(f"The sniffer cannot read this line: {pct(1.0 - valid)} of the line's busy time is bytes "
                   f"that form no valid frame ({damage} damage events, {result.bus.frames} valid "
                   f"frame{'s' if result.bus.frames != 1 else ''}) at "
                   f"{serial}; nothing else in this capture can be trusted until that is fixed."),
        evidence={"valid_time_share": round(valid, 4), "damage_events": damage, "valid_frames": result.bus.frames,
                  "breaks": breaks, "sniffer_serial": str(serial),
                  "by_kind": {k: result.bus.events.get(k, 0) for k in LINE_DAMAGE_KINDS if result.bus.events.get(k)}},
        causes=[polarity, settings, noise] if polarity_first else [settings, polarity, noise],
        caution=WIRING_CAUTION)]


def sniffer_format(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Frames with good CRCs but parity or framing errors throughout: the sniffer's character format is wrong.

    Reads ``line_error`` events only: a marked byte a driver left behind its frame is an
    ``idle_line_byte`` (a line nobody holds idle), not a sign of the wrong format.
    """
    ev, frames = result.bus.events, result.bus.frames
    errors = ev.get("line_error", 0)
    damaged = ev.get("crc_error", 0) + ev.get("truncated", 0)
    if (frames < th.min_requests or errors < th.min_events or share(errors, frames) < th.format_line_errors_per_frame
            or share(damaged, frames) > th.format_max_damaged_share):
        return []
    serial = result.header.serial
    t0, t1 = capture_span(result)
    return [Finding(
        rule="sniffer-format", severity="warning", score=share(errors, frames), t_start_s=t0, t_end_s=t1,
        statement=(f"{errors} parity or framing errors on {frames} frames whose CRCs are valid: the sniffer's "
                   f"character format ({serial.short_form}) differs from the bus's, so the bytes come through but "
                   f"byte times, and every timing figure built on them, are off."),
        evidence={"line_errors": errors, "frames": frames, "damaged_frames": damaged,
                  "sniffer_serial": str(serial), "line_errors_per_frame": round(share(errors, frames), 4)},
        causes=[Cause(f"The sniffer listens at {serial.short_form}; the bus uses another parity or number of stop "
                      "bits.",
                      "Take the format from the master's configuration and record again; Modbus RTU's default is "
                      "8E1, and no parity needs two stop bits (MSL §2.5.1 p12).")])]


def _late_budget(result: AnalysisResult, th: Thresholds) -> int:
    """Damaged answers the slow stations' late answers can account for (see lateness.collision_budget)."""
    return sum(collision_budget(s) for s in polled(result, th) if s.late >= th.late_min_count)


def errors_bus_wide(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Damaged answers on most stations: noise along the whole line, or the sniffer's own connection."""
    stations = _judged(result, th)
    if len(stations) < 2:
        return []
    unexplained = sum(s.corrupt for s in stations) - _late_budget(result, th)
    if unexplained < th.min_events:
        return []
    hit = [s for s in stations if damaged_share(s) >= th.error_notice_share]
    if len(hit) < th.bus_wide_station_share * len(stations):
        return []
    typical = median(damaged_share(s) for s in stations)
    events = line_damage_events(result.bus.events)
    t0, t1 = capture_span(result)
    return [Finding(
        rule="errors-bus-wide", severity="warning" if typical >= th.error_warning_share else "notice",
        score=typical, t_start_s=t0, t_end_s=t1,
        statement=(f"Answers are damaged on {len(hit)} of {len(stations)} stations alike (typically "
                   f"{pct(typical)} of answers, {events} damage events in all), not at one drop: noise along the "
                   f"whole line or the sniffer's own connection is the likely cause."),
        evidence={"stations_with_errors": [s.address for s in hit], "median_damaged_share": round(typical, 5),
                  "damaged_share": {str(s.address): round(damaged_share(s), 5) for s in stations},
                  "events": {k: result.bus.events.get(k, 0) for k in LINE_DAMAGE_KINDS if result.bus.events.get(k)}},
        examples=[e for s in hit[:3] for e in failure_examples(result, s.address, outcomes=("corrupt",))[:2]],
        causes=[Cause("Noise coupled into the cable along its run: signal cable beside power cables, or a "
                      "shield that is not connected to ground at one point (common practice).",
                      "Follow the cable route; separate it from power cables; check how the shield is grounded."),
                Cause("The sniffer's own tap is poor (a long loose lead, a clip on a stub) or its settings are "
                      "marginal, so only the sniffer sees damage.",
                      "Ask the master's diagnostics for its CRC error count; if it sees none, move the sniffer's "
                      "tap to a station's terminal."),
                Cause("Termination or bias missing for the whole line (MSL §3.4.5, §3.4.6).",
                      "Check one terminator at each end of the trunk and one bias point.")],
        caution=WIRING_CAUTION)]


def far_station_errors(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Damage rising with the distance along the cable: reflections from missing or misplaced termination."""
    placed = sorted((s for s in _judged(result, th) if s.position_m is not None), key=lambda s: s.position_m)
    if len(placed) < 2:
        return []
    k = max(1, len(placed) // 3)
    near, far = placed[:k], placed[-k:]
    if far[0].position_m <= near[-1].position_m:
        return []
    near_share = sum(damaged_share(s) for s in near) / len(near)
    far_share = sum(damaged_share(s) for s in far) / len(far)
    worst = max(far, key=damaged_share)
    if (worst.corrupt < th.min_events or far_share < th.error_notice_share
            or far_share < th.far_ratio * max(near_share, th.near_floor_share)):
        return []
    length = placed[-1].position_m
    causes = [Cause("Termination missing or in the wrong place: reflections from an unterminated end hurt the "
                    "far drops most (MSL §3.4.5: one terminator at each end of the trunk, none on stubs).",
                    "With the bus powered down, check for a terminator at the last device and at the master "
                    "end and none in between; two 120 ohm terminators read about 60 ohm across A-B.")]
    if length > th.max_segment_m:
        causes.append(Cause(f"The cable is {length:g} m long, beyond the {th.max_segment_m:g} m the serial-line "
                            f"guide gives for AWG26 at up to 9600 bps (MSL §3.4.3).",
                            "Check the cable's gauge and type; consider a repeater to split the segment."))
    causes += [Cause(f"A long stub to the far station(s) (MSL §3.4.3: stubs up to {th.max_stub_m:g} m).",
                     "Check how the far devices are connected: on the trunk, or by a drop cable."),
               Cause("Cable of the wrong type (not twisted pair, impedance far from 120 ohm).",
                     "Check the cable's marking against its datasheet.")]
    near_text = (f"at the nearest station ({near[0].position_m:g} m)" if len(near) == 1 else
                 f"at the near stations ({near[0].position_m:g}-{near[-1].position_m:g} m)")
    t0, t1 = capture_span(result)
    return [Finding(
        rule="far-station-errors", severity="warning" if far_share >= th.error_warning_share else "notice",
        score=far_share, station=worst.address, station_label=worst.label, t_start_s=t0, t_end_s=t1,
        statement=(f"Damage rises along the cable: {worst.label} at {worst.position_m:g} m has "
                   f"{pct(damaged_share(worst))} of its answers damaged against {pct(near_share)} {near_text}: "
                   f"reflections from missing or misplaced termination are the likely cause."),
        evidence={"far_damaged_share": round(far_share, 5), "near_damaged_share": round(near_share, 5),
                  "by_position": [{"station": s.address, "position_m": s.position_m, "requests": s.requests,
                                   "damaged": s.corrupt, "crc_errors": s.crc_errors,
                                   "damaged_share": round(damaged_share(s), 5)} for s in placed]},
        examples=failure_examples(result, worst.address, outcomes=("corrupt",)),
        causes=causes, caution=WIRING_CAUTION)]


def station_errors(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Damage concentrated on one station while the others are clean: trouble at its drop."""
    stations = _judged(result, th)
    out = []
    for s in stations:
        others = [damaged_share(o) for o in stations if o.address != s.address]
        if not others or s.corrupt < th.min_events:
            continue
        own, rest = damaged_share(s), median(others)
        if own < th.error_notice_share or own < th.concentrated_ratio * max(rest, th.near_floor_share):
            continue
        t0, t1 = capture_span(result)
        where = "" if s.position_m is None else f" at {s.position_m:g} m"
        out.append(Finding(
            rule="station-errors", severity="warning" if own >= th.error_warning_share else "notice", score=own,
            station=s.address, station_label=s.label, t_start_s=t0, t_end_s=t1,
            statement=(f"{s.label}{where} has {pct(own)} of its answers damaged ({s.corrupt} of {s.requests}, "
                       f"{s.crc_errors} CRC failures) while the other stations have {pct(rest)}: the trouble is at "
                       f"its drop, not on the whole line."),
            evidence={"damaged": s.corrupt, "requests": s.requests, "crc_errors": s.crc_errors,
                      "damaged_share": round(own, 5), "others_median_share": round(rest, 5),
                      "events": dict(s.events)},
            examples=failure_examples(result, s.address, outcomes=("corrupt",)),
            causes=[Cause("A poor connection or a long stub at this station's drop (MSL §3.4.3: stubs up to "
                          f"{th.max_stub_m:g} m).", "Check the terminal, connector and drop cable at the station."),
                    Cause("The device's own transceiver is weak or failing.",
                          "Swap in a spare transceiver or device and compare."),
                    Cause("Reflections that are worst at this point of the cable (a termination problem).",
                          "Give the stations' positions in the station map: the far-station check then tells.")],
            caution=WIRING_CAUTION))
    return out


def _minute_damage(result: AnalysisResult) -> tuple[list[int], list[int]]:
    """Damage events on the whole line per minute, and frames per minute."""
    series = result.bus_series()
    n = len(series["frames"])
    counts = [0] * n
    for kind in LINE_DAMAGE_KINDS:
        for m, v in enumerate(series.get("event_" + kind, [])):
            counts[m] += int(v)
    return counts, series["frames"]


def _minute_damaged_answers(result: AnalysisResult, th: Thresholds) -> list[int]:
    """Damaged answers per minute of the stations without a chronic fault of their own.

    A station that garbles a third of its answers all night (two devices on one address)
    buries a short burst in the line's event counts; leaving it out lets the burst show.
    """
    counts = [0] * result.minutes()
    for s in polled(result, th):
        if damaged_share(s) >= th.duplicate_damaged_share:
            continue
        for m, v in enumerate(result.station_series(s.address)["corrupt"]):
            counts[m] += int(v)
    return counts


def _bursts(counts: list[int], active: list[int], th: Thresholds) -> tuple[list[int], int, int, int] | None:
    """(burst minutes, events in them, all events, baseline) when some minutes stand far above the rest."""
    total = sum(counts[m] for m in active)
    if total < th.cluster_min_events or len(active) < 2:
        return None
    ordered = sorted(counts[m] for m in active)
    baseline = ordered[len(ordered) // 4]
    level = max(th.cluster_min_events, th.cluster_factor * (baseline + 1))
    bursts = [m for m in active if counts[m] >= level]
    if not bursts or len(bursts) > th.cluster_max_minute_share * len(active):
        return None
    return bursts, sum(counts[m] for m in bursts), total, baseline


def _burst_finding(result: AnalysisResult, th: Thresholds, dominant: bool) -> list[Finding]:
    """Minutes with far more damage than the rest: holding most of it (``dominant``), or over a steady rate.

    Judged on the line's damage events per minute, else on the damaged answers of the stations
    without a chronic fault of their own.
    """
    counts, frames = _minute_damage(result)
    active = [m for m in range(len(counts)) if frames[m] or counts[m]]
    what = "damage events"
    found = _bursts(counts, active, th)
    if found is None:
        counts = _minute_damaged_answers(result, th)
        counts += [0] * (len(frames) - len(counts))
        what = "damaged answers"
        found = _bursts(counts, active, th)
    if found is None:
        return []
    bursts, in_bursts, total, baseline = found
    if (in_bursts >= th.cluster_share * total) != dominant:
        return []
    clusters: list[list[int]] = []
    for m in bursts:
        if clusters and m == clusters[-1][-1] + 1:
            clusters[-1].append(m)
        else:
            clusters.append([m])
    spans = [minute_span(c[0], c[-1], result) for c in clusters]
    starts = [c[0] for c in clusters]
    steps = [b - a for a, b in pairwise(starts)]
    recurring = len(steps) >= 1 and max(steps) - min(steps) <= 1
    times = ", ".join(clock(result, a) for a, _ in spans[:6]) + (" ..." if len(spans) > 6 else "")
    every = f", recurring about every {sum(steps) / len(steps):.0f} min" if recurring else ""
    examples = []
    for s in result.stations:
        examples += [e for e in failure_examples(result, s.address, outcomes=("corrupt", "timeout"))
                     if any(a <= e["t_s"] <= b for a, b in spans)][:2]
    if dominant:
        rule, severity = "errors-clustered", "warning"
        statement = (f"Line errors come in bursts: {in_bursts} of {total} {what} fall in {len(bursts)} minute(s) "
                     f"(at {times}){every}; the line is clean in between: an external noise source switching on "
                     f"is the likely cause.")
    else:
        rule, severity = "error-bursts", "notice"
        statement = (f"On top of a steady error rate ({baseline} {what} in a quiet minute), {len(bursts)} minute(s) "
                     f"stand out with {in_bursts} (at {times}){every}: an external noise source switching on "
                     f"then is the likely cause of those.")
    return [Finding(
        rule=rule, severity=severity, score=share(in_bursts, total), t_start_s=spans[0][0], t_end_s=spans[-1][1],
        statement=statement,
        evidence={"counted": what, "total": total, "in_bursts": in_bursts, "baseline_per_minute": baseline,
                  "bursts": [{"t_start_s": a, "t_end_s": b, "events": sum(counts[m] for m in c)}
                             for (a, b), c in zip(spans, clusters)],
                  "period_min": round(sum(steps) / len(steps), 1) if recurring else None},
        examples=examples[:6],
        causes=[Cause("A motor, drive, contactor or welder starting at those times couples noise into the bus "
                      "cable.", "Compare the burst times with the plant's log of starts and switching."),
                Cause("The signal cable runs beside power cables over part of its route (common practice).",
                      "Follow the route near the equipment that starts; separate the cables, cross at right "
                      "angles."),
                Cause("The shield is not grounded, or grounded at several points so ground currents flow in it "
                      "(common practice: ground the shield at one point).",
                      "Check the shield's ground connections along the run.")],
        caution=WIRING_CAUTION)]


def errors_clustered(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Damage that keeps to a few minutes, the line clean between them: an external noise source."""
    return _burst_finding(result, th, dominant=True)


def error_bursts(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """A few minutes far above a steady error rate: a noise source on top of whatever causes the rest."""
    return _burst_finding(result, th, dominant=False)


def idle_stray_bytes(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Stray bytes between intact frames: an idle line that floats (missing or weak fail-safe bias)."""
    ev = result.bus.events
    stray = ev.get("stray_bytes", 0)
    damaged = ev.get("crc_error", 0) + ev.get("truncated", 0)
    frames = result.bus.frames
    if (stray < th.min_events or share(stray, frames) < th.bias_stray_share
            or stray < th.bias_stray_over_damage * damaged):
        return []
    s_share = share(stray, frames)
    t0, t1 = capture_span(result)
    return [Finding(
        rule="idle-stray-bytes", severity="warning" if s_share >= th.error_warning_share else "notice",
        score=s_share, t_start_s=t0, t_end_s=t1,
        statement=(f"{stray} stray bytes appeared between frames ({pct(s_share)} of {frames} frames) while the "
                   f"frames themselves are intact ({damaged} damaged): the idle line floats, so missing or weak "
                   f"fail-safe bias is the likely cause."),
        evidence={"stray_bytes_events": stray, "frames": frames, "damaged_frames": damaged,
                  "line_errors": ev.get("line_error", 0), "breaks": ev.get("break", 0)},
        causes=[Cause("No fail-safe bias on the line, or too weak: the idle bus sits inside the receivers' "
                      "+/-200 mV undefined band and they read noise as bytes (MSL §3.4.6; NSC AN-847).",
                      "With the bus idle and powered, measure A-B: it should be well over 200 mV. MSL §3.4.6 "
                      "asks for a pull-up on D1 and a pull-down on D0 of 450-650 ohm at one point only."),
                Cause("Bias at several points, or more terminators than two loading it.",
                      "Find every bias and terminator switch along the line; keep one bias point and two "
                      "terminators at the trunk's ends."),
                Cause("A station's driver switches on or off with a glitch just before or after its frames.",
                      "If the stray bytes sit right before one station's answers, look at that device.")],
        caution=WIRING_CAUTION)]


IDLE_KIND = "idle_line_byte"


def idle_bytes_by_talker(result: AnalysisResult) -> dict[str, int]:
    """Idle-line bytes per talker: ``master`` (bytes after its requests carry no station) and each station."""
    col = EVENT_KINDS.index(IDLE_KIND)
    counts = result.acc.events[:, col]
    out = {"master": int(counts[0])} if counts[0] else {}
    for row in np.flatnonzero(counts[1:]).tolist():
        out[str(row)] = int(counts[row + 1])
    return out


def line_not_held_idle(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """A byte left behind most frames as each driver lets go: nothing holds the idle line (bias, termination)."""
    idle = result.bus.events.get(IDLE_KIND, 0)
    frames = result.bus.frames
    per_frame = share(idle, frames)
    if frames < th.min_requests or idle < th.min_events or per_frame < th.idle_bytes_per_frame:
        return []
    talkers = idle_bytes_by_talker(result)
    labels = {str(s.address): s.label for s in result.stations}
    named = ", ".join(f"{'the master' if k == 'master' else labels.get(k, f'station {k}')} {n}"
                      for k, n in sorted(talkers.items(), key=lambda kv: -kv[1])[:6])
    t0, t1 = capture_span(result)
    return [Finding(
        rule="line-not-held-idle", severity="warning", score=min(1.0, per_frame), t_start_s=t0, t_end_s=t1,
        statement=(f"Line not held idle: {idle} single bytes appeared right behind frames ({per_frame:.2f} per "
                   f"frame, {frames} frames; after {named}) as each driver let go of the line: missing or weak "
                   f"fail-safe bias / termination. The frames themselves are intact; these bytes are counted "
                   f"apart and are not damage, and they do not mean the sniffer's format is wrong."),
        evidence={"idle_line_bytes": idle, "frames": frames, "per_frame": round(per_frame, 4),
                  "by_talker": talkers, "line_errors": result.bus.events.get("line_error", 0),
                  "damaged_frames": result.bus.events.get("crc_error", 0) + result.bus.events.get("truncated", 0)},
        causes=[Cause("No fail-safe bias on the line, or too weak: when a driver switches off, nothing holds the "
                      "bus outside the receivers' +/-200 mV undefined band and they read the float as a byte, "
                      "often with a framing error (MSL §3.4.6; NSC AN-847).",
                      "With the bus idle and powered, measure A-B: it should be well over 200 mV. MSL §3.4.6 asks "
                      "for a pull-up on D1 and a pull-down on D0 of 450-650 ohm at one point of the line only."),
                Cause("Termination without bias, or more terminators than the two at the trunk's ends: the "
                      "terminators pull the idle line to 0 V difference (MSL §3.4.5, §3.4.6; NSC AN-847).",
                      "Find every terminator and bias switch along the line; keep two terminators at the trunk's "
                      "ends and one bias point."),
                Cause("One device's driver switches off with a glitch (when the bytes follow only that talker).",
                      "Compare the counts per talker in the evidence: bytes after one talker only point at that "
                      "device.")],
        caution=WIRING_CAUTION)]
