"""Stations that do not answer: none at all on the bus, one never, one for a period."""

from __future__ import annotations

from buswitness.analysis.finding import WIRING_CAUTION, Cause, Finding
from buswitness.analysis.result import AnalysisResult, StationFigures
from buswitness.analysis.rules.common import (
    capture_span,
    clock,
    failure_examples,
    pct,
    polled,
    share,
    span_text,
)
from buswitness.analysis.rules.thresholds import Thresholds


def _alive(s: StationFigures) -> int:
    """Polls the station evidently answered: in time, late, or damaged on the way."""
    return s.answered + s.late + s.corrupt


def unpolled_responders(result: AnalysisResult) -> list[int]:
    """Addresses valid answers came from that the master never polls (a device set to another address)."""
    counts = result.unpolled_answers()
    return [a for a in range(1, 248) if counts[a, 0] and not counts[a, 1]]


def no_answers(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """The master keeps polling and no station ever answers."""
    stations = [s for s in result.stations if s.requests]
    requests = sum(s.requests for s in stations)
    if requests < th.min_requests or sum(s.answered + s.late for s in stations):
        return []
    damaged = sum(s.corrupt for s in stations)
    if share(damaged, requests) >= 0.5:
        return []  # they answer, but unreadably: the line rules say why
    serial = result.header.serial
    t0, t1 = capture_span(result)
    addresses = [s.address for s in stations]
    examples = []
    for s in stations[:3]:
        examples.extend(failure_examples(result, s.address)[:2])
    return [Finding(
        rule="no-answers", severity="critical", score=1.0, t_start_s=t0, t_end_s=t1,
        statement=(f"No station answered any of the master's {requests} requests to {len(addresses)} "
                   f"address{'es' if len(addresses) != 1 else ''} ({', '.join(map(str, addresses[:8]))}"
                   f"{' ...' if len(addresses) > 8 else ''}): the requests are on the line, nothing comes back."),
        evidence={"requests": requests, "stations_polled": len(addresses), "answers": 0,
                  "damaged_answers": damaged, "master_serial": str(serial),
                  "timeout": result.timeout.explanation},
        examples=examples,
        causes=[Cause("The A and B signal wires are swapped between the master and the bus (vendors label them "
                      "inconsistently; common practice).",
                      "With the master stopped, compare its A/B (or D+/D-) terminals with the bus pair and swap "
                      "them if in doubt; a swapped pair harms nothing but gives no answers."),
                Cause(f"The master's baud rate or parity differs from the stations' (the requests read cleanly "
                      f"at {serial}, so that is what the master sends).",
                      "Read the serial settings in each station's menu or configuration tool and compare."),
                Cause("The stations are unpowered, or sit on another segment (a repeater or gateway that does "
                      "not pass the traffic).",
                      "Check the stations' power and status lights and any repeater between them and the master."),
                Cause("The master polls addresses that no device on this bus has.",
                      "Compare the master's poll list with the addresses set on the devices.")],
        caution=WIRING_CAUTION)]


def never_present(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """A polled station that never answered while others did."""
    if not any(s.answered + s.late for s in result.stations):
        return []
    strangers = unpolled_responders(result)
    out = []
    t0, t1 = capture_span(result)
    for s in polled(result, th):
        if _alive(s):
            continue
        wait = share(s.waiting_s, result.bus.duration_s)
        address_cause = Cause(
            "No device has this address: the master's poll list or the device's address setting is wrong"
            + (f" (valid answers came from address{'es' if len(strangers) > 1 else ''} "
               f"{', '.join(map(str, strangers))}, which the master never polls)" if strangers else "") + ".",
            "Read the address on the device's display, switches or configuration tool and compare it with "
            "the master's poll list.")
        wired_cause = Cause("The device is not connected to the bus or not powered.",
                            "Check its power and the two signal wires at its terminal.")
        ab_cause = Cause("A and B are reversed at this station's terminal (common practice: vendors label them "
                         "inconsistently).", "Compare the station's A/B labels with the bus pair at its drop.")
        serial_cause = Cause(f"The device's baud rate or parity differs from the bus ({result.header.serial}).",
                             "Read the serial settings in the device's menu.")
        causes = [address_cause, wired_cause, ab_cause, serial_cause] if strangers else \
                 [wired_cause, address_cause, ab_cause, serial_cause]
        out.append(Finding(
            rule="never-present", severity="critical", score=0.9 + 0.1 * min(1.0, wait),
            station=s.address, station_label=s.label, t_start_s=t0, t_end_s=t1,
            statement=(f"{s.label} never answered: {s.requests} requests over the whole capture, no answer at "
                       f"all, not even a damaged one; the master spent {s.waiting_s:.0f} s ({pct(wait)} of the "
                       f"capture) waiting for it."),
            evidence={"requests": s.requests, "answers": 0, "timeouts": s.timeouts, "retries": s.retries,
                      "waiting_s": s.waiting_s, "waiting_share": round(wait, 4),
                      "answering_addresses_not_polled": strangers},
            examples=failure_examples(result, s.address), causes=causes, caution=WIRING_CAUTION))
    return out


def _silences(series: dict, th: Thresholds) -> list[tuple[float, float, int, bool]]:
    """(start s, end s, unanswered polls, answered again) of each silent stretch in per-minute counts
    (seconds from the series' first minute)."""
    req = series["requests"]
    alive = [a + b + c + d for a, b, c, d in zip(series["ok"], series["exception"], series["late"],
                                                 series["corrupt"])]
    n = len(req)
    frac = [share(alive[m], req[m]) if req[m] else None for m in range(n)]
    dark = [f is not None and f <= th.silent_dark_share for f in frac]
    out = []
    m = 0
    while m < n:
        if not dark[m]:
            m += 1
            continue
        first = m
        while m + 1 < n and (dark[m + 1] or (req[m + 1] == 0 and m + 2 < n and dark[m + 2])):
            m += 1
        last = m
        start, end = 60.0 * first, 60.0 * (last + 1)
        lo, hi = first, last
        before = frac[first - 1] if first > 0 else None
        after = frac[last + 1] if last + 1 < n else None
        if before is not None and before < th.silent_edge_share:
            start, lo = 60.0 * (first - 1) + 60.0 * before, first - 1
        if after is not None and after < th.silent_edge_share:
            end, hi = 60.0 * (last + 1) + 60.0 * (1.0 - after), last + 1
        missed = sum(req[k] - alive[k] for k in range(lo, hi + 1))
        out.append((start, end, missed, any(alive[hi + 1:]) or (after is not None and after > th.silent_dark_share)))
        m += 1
    return out


def silent_period(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """A station that answered, then stopped for a stretch of at least a minute (from the per-minute series).

    One finding per station: the longest stretch gives the time range, every stretch is in the evidence.
    """
    out = []
    duration = result.bus.duration_s
    offset, span_end = result.series_start_s, result.span_s[1]
    for s in polled(result, th):
        if not _alive(s):
            continue
        stretches = [(offset + start, min(offset + end, span_end), missed, back)
                     for start, end, missed, back in _silences(result.station_series(s.address), th)]
        if not stretches:
            continue
        start, end, missed, back = max(stretches, key=lambda x: x[1] - x[0])
        length = end - start
        text = (f"{s.label} stopped answering from {span_text(result, start, end)} (about {length / 60:.1f} min, "
                f"{missed} polls unanswered), then answered again" if back else
                f"{s.label} stopped answering at {clock(result, start)} and had not answered again by the end "
                f"of the capture (about {length / 60:.1f} min, {missed} polls unanswered)")
        more = len(stretches) - 1
        text += f"; {more} more silent stretch{'es' if more > 1 else ''} in the evidence." if more else "."
        out.append(Finding(
            rule="silent-period", severity="critical" if length >= th.silent_critical_s else "warning",
            score=share(length, duration), station=s.address, station_label=s.label,
            t_start_s=round(start, 1), t_end_s=round(end, 1), statement=text,
            evidence={"silent_s": round(length, 1), "unanswered_polls": missed, "came_back": back,
                      "stretches": [{"t_start_s": round(a, 1), "t_end_s": round(b, 1), "unanswered_polls": n}
                                    for a, b, n, _ in stretches],
                      "resolution": "start and end estimated from per-minute counts (within a poll cycle "
                                    "or two when the station is polled evenly)"},
            examples=failure_examples(result, s.address, start, end),
            causes=[Cause("The device lost power or restarted.",
                          "Read its uptime counter or event log, and the panel supply's, for that time."),
                    Cause("A loose connection at its drop (intermittent contact at the terminal or connector).",
                          "Check the terminal screws, connector and cable strain at the station."),
                    Cause("The device was busy with a local task (configuration, firmware update, a local "
                          "operator session) and stopped serving the bus.",
                          "Check the site log for work on the device at that time.")],
            caution=WIRING_CAUTION))
    return out
