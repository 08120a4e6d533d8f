"""Timing violations (MSL §2.5.1.1): answers starting under t3.5, silences over t1.5 inside frames,
and what this capture's timestamps can show of either."""

from __future__ import annotations

from statistics import median

from buswitness.analysis.finding import Cause, Finding
from buswitness.analysis.result import AnalysisResult
from buswitness.analysis.rules.common import (
    adapter_latency_ms,
    capture_span,
    ms,
    pct,
    polled,
    share,
    slowest_examples,
)
from buswitness.analysis.rules.thresholds import Thresholds
from buswitness.decode.timing import t15_s, t35_s


def _t_ms(result: AnalysisResult) -> tuple[float, float]:
    serial = result.header.serial
    return t15_s(serial) * 1e3, t35_s(serial) * 1e3


def _latency_text(result: AnalysisResult) -> str:
    latency = adapter_latency_ms(result)
    return f"{latency:g} ms" if latency is not None else "unknown"


def _coarse(result: AnalysisResult, th: Thresholds) -> float | None:
    """The median timing half-width when it is too wide to see t1.5 (None when timing is fine enough)."""
    widths = [s.timing_halfwidth_ms for s in polled(result, th) if s.timing_halfwidth_ms is not None]
    t15, _ = _t_ms(result)
    if not widths or median(widths) < t15:
        return None
    return median(widths)


def turnaround_short(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Answers that certainly began less than t3.5 after the request ended."""
    _, t35 = _t_ms(result)
    out = []
    for s in polled(result, th):
        n = s.events.get("turnaround_short", 0)
        answers = s.answered + s.late
        if n < th.min_events or share(n, answers) < th.turnaround_min_share:
            continue
        t0, t1 = capture_span(result)
        out.append(Finding(
            rule="turnaround-short", severity="warning", score=share(n, answers), station=s.address,
            station_label=s.label, t_start_s=t0, t_end_s=t1,
            statement=(f"{s.label} began {n} answers ({pct(share(n, answers))}) less than t3.5 = {t35:.3f} ms "
                       f"after the request ended (typically {ms(s.response_ms.get('p50'))}); the protocol asks for "
                       f"at least 3.5 character times of silence between frames (MSL §2.5.1.1)."),
            evidence={"turnaround_short": n, "answers": answers, "t35_ms": round(t35, 3),
                      "response_ms": dict(s.response_ms), "serial": str(result.header.serial)},
            examples=slowest_examples(result, s.address)[-3:],
            causes=[Cause("The device's answer delay is set to zero or too short for this baud rate.",
                          "Look for a 'response delay' or 'turnaround' setting on the device and set it to at "
                          f"least {t35:.1f} ms."),
                    Cause("The device's firmware does not keep t3.5 at this baud rate; the master or other "
                          "receivers may then take its answer for part of the request.",
                          "Ask the vendor; a lower baud rate makes t3.5 longer and may hide the problem.")]))
    return out


def possible_short_turnaround(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Answers so fast they may break t3.5, where the timestamps are too coarse to tell."""
    _, t35 = _t_ms(result)
    out = []
    for s in polled(result, th):
        p50, width = s.response_ms.get("p50"), s.timing_halfwidth_ms
        answers = s.answered + s.late
        certain = s.events.get("turnaround_short", 0)
        if (p50 is None or width is None or width < t35 or p50 >= th.turnaround_suspect_factor * t35
                or (certain >= th.min_events and share(certain, answers) >= th.turnaround_min_share)):
            continue
        t0, t1 = capture_span(result)
        out.append(Finding(
            rule="possible-short-turnaround", severity="notice", score=share(t35, max(p50, 1e-3)),
            station=s.address, station_label=s.label, t_start_s=t0, t_end_s=t1,
            statement=(f"{s.label} answers very fast ({ms(p50)} typically, t3.5 is {t35:.3f} ms) and may start "
                       f"its answers before t3.5; not observable at this adapter latency ({_latency_text(result)}: "
                       f"each time is known to +/-{width:.1f} ms)."),
            evidence={"p50_ms": p50, "t35_ms": round(t35, 3), "timing_halfwidth_ms": width,
                      "adapter_latency_ms": adapter_latency_ms(result), "certain_short": certain},
            causes=[Cause("The device's answer delay is set to zero or very short.",
                          "Read its 'response delay' setting; record again with the adapter's latency timer at 1 ms "
                          "(record --low-latency) to see the turnaround itself.")]))
    return out


def gap_in_frame(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """A station whose frames have silences over t1.5 inside, more than the others'."""
    t15, _ = _t_ms(result)
    stations = polled(result, th)
    out = []
    for s in stations:
        n = s.events.get("gap_in_frame", 0)
        own = share(n, s.requests)
        others = [share(o.events.get("gap_in_frame", 0), o.requests) for o in stations if o.address != s.address]
        rest = median(others) if others else 0.0
        if n < th.min_events or own < th.gap_min_share or own < th.gap_over_others * max(rest, th.near_floor_share):
            continue
        t0, t1 = capture_span(result)
        out.append(Finding(
            rule="gap-in-frame", severity="warning", score=own, station=s.address, station_label=s.label,
            t_start_s=t0, t_end_s=t1,
            statement=(f"{s.label} pauses inside its frames: {n} frames ({pct(own)} of its polls) hold a silence "
                       f"over t1.5 = {t15:.3f} ms, which receivers should treat as a broken frame (MSL §2.5.1.1); "
                       f"the other stations show {pct(rest)}."),
            evidence={"gap_in_frame": n, "requests": s.requests, "share": round(own, 5),
                      "others_median_share": round(rest, 5), "t15_ms": round(t15, 3)},
            causes=[Cause("The device sends its answer in pieces (slow firmware or a UART fed byte by byte).",
                          "Ask the vendor; some devices have a setting for a continuous transmit buffer."),
                    Cause("A converter or gateway in front of the device re-times the bytes.",
                          "Check what sits between the device and the bus.")]))
    return out


def timing_not_observable(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Say plainly which timing violations the timestamps are too coarse to show."""
    width = _coarse(result, th)
    if width is None:
        return []
    t15, t35 = _t_ms(result)
    hidden = [f"silences just over t1.5 = {t15:.3f} ms inside frames"]
    if width >= t35:
        hidden.append(f"answers starting just under t3.5 = {t35:.3f} ms after the request")
    t0, t1 = capture_span(result)
    return [Finding(
        rule="timing-not-observable", severity="info", score=0.0, t_start_s=t0, t_end_s=t1,
        statement=(f"Not observable at this adapter latency ({_latency_text(result)}: times are known to "
                   f"+/-{width:.1f} ms): {' and '.join(hidden)}; only violations larger than that uncertainty "
                   f"show, and response times are measured within it."),
        evidence={"adapter_latency_ms": adapter_latency_ms(result), "timing_halfwidth_ms": width,
                  "t15_ms": round(t15, 3), "t35_ms": round(t35, 3), "t35_observable": width < t35},
        causes=[Cause("The adapter delivers bytes in packets on a latency timer.",
                      "Record with the latency timer at 1 ms (record --low-latency) to check t1.5 and t3.5.")])]


def character_pitch(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """The records show characters further apart (or closer) than the stated format: a notice naming the
    measured character time, and whether the timing model used it (decode/delivery.py)."""
    out = []
    for d in result.delivery:
        notice, pitch = d.get("notice"), d.get("pitch")
        if not notice or not pitch:
            continue
        t0, t1 = capture_span(result)
        used = d.get("measured_format") is not None
        out.append(Finding(
            rule="character-pitch", severity="notice", score=abs(pitch["char_ms"] / d["stated_char_ms"] - 1.0),
            t_start_s=t0, t_end_s=t1, statement=notice[0].upper() + notice[1:] + ".",
            evidence={"port": d["port"], "measured_char_ms": pitch["char_ms"], "spread_ms": pitch["spread_ms"],
                      "samples": pitch["samples"], "stated_char_ms": d["stated_char_ms"],
                      "stated_format": result.header.serial.short_form, "used_format": d.get("measured_format"),
                      "method": pitch["method"]},
            causes=[Cause("The bus runs another character format than the capture states (two stop bits, or parity, "
                          "where the file says 8N1: 11 bits instead of 10, MSL §2.5.1).",
                          "Read the format from the master's configuration and give it with --format."
                          if used else
                          "Check the baud rate (detect) and the devices' settings for pauses between characters.")]))
    return out
