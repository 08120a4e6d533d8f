"""What several rules need: shares, clock times, example transactions, the stations worth judging."""

from __future__ import annotations

import math

from buswitness.analysis.result import AnalysisResult, StationFigures
from buswitness.analysis.rules.thresholds import Thresholds

#: Event kinds that are damage on the line (what noise, collisions and bad settings produce).
LINE_DAMAGE_KINDS = ("crc_error", "truncated", "line_error", "break", "stray_bytes", "collision")
#: Examples attached to a finding.
EXAMPLES = 5


def share(part: float, whole: float) -> float:
    """part / whole, 0 when there is no whole."""
    return float(part) / float(whole) if whole else 0.0


def pct(x: float) -> str:
    """A share as a percentage a technician reads at a glance: 3.1%, 0.25%, 100%."""
    v = 100.0 * x
    if v >= 10 or v == 0:
        return f"{v:.0f}%"
    if v >= 1:
        return f"{v:.1f}%"
    return f"{v:.2g}%"


def ms(v: float | None) -> str:
    """A time in ms as a statement writes it: 0.7 ms, 58 ms, "-" when unknown."""
    if v is None:
        return "-"
    return f"{v:.0f} ms" if v >= 10 else f"{v:.1f} ms"


def clock(result: AnalysisResult, t_s: float) -> str:
    """Wall-clock UTC (HH:MM) of a capture time when the capture is anchored, else minutes in."""
    utc = result.utc_at(t_s)
    return utc[11:16] + " UTC" if utc else f"{t_s / 60:.0f} min in"


def span_text(result: AnalysisResult, t0: float, t1: float) -> str:
    """"22:01 UTC to 22:03 UTC" (or minutes into the capture when it has no UTC anchor)."""
    return f"{clock(result, t0)} to {clock(result, t1)}"


def polled(result: AnalysisResult, th: Thresholds) -> list[StationFigures]:
    """Stations the master polled often enough to judge."""
    return [s for s in result.stations if s.requests >= th.min_requests]


def damaged_share(s: StationFigures) -> float:
    """Share of a station's polls whose only answer was damaged."""
    return share(s.corrupt, s.requests)


def line_damage_events(events: dict) -> int:
    """Damage events of the LINE_DAMAGE_KINDS in an event-count dict."""
    return int(sum(events.get(k, 0) for k in LINE_DAMAGE_KINDS))


def adapter_latency_ms(result: AnalysisResult) -> float | None:
    """The capture's adapter latency timer (the largest over its ports), None when unknown."""
    values = [p.latency_ms for p in result.header.ports if p.latency_ms is not None]
    return max(values) if values else None


def finite(v: float | None, digits: int = 3) -> float | None:
    """A JSON-safe rounded float (None for missing or not finite)."""
    if v is None or not math.isfinite(float(v)):
        return None
    return round(float(v), digits)


def example(result: AnalysisResult, row: dict) -> dict:
    """One transaction as a finding shows it: time, UTC, outcome, response time, raw hex."""
    return {"t_s": round(float(row["t_s"]), 3), "utc": row.get("utc") or result.utc_at(row["t_s"]),
            "station": int(row["station"]), "function": int(row["function"]), "outcome": str(row["outcome"]),
            "response_ms": finite(row.get("response_ms")), "request_hex": row.get("request_hex", ""),
            "response_hex": row.get("response_hex", "")}


def failure_examples(result: AnalysisResult, address: int, t0: float | None = None, t1: float | None = None,
                     outcomes: tuple = ("timeout", "corrupt")) -> list[dict]:
    """Up to EXAMPLES kept failures of one station, optionally within [t0, t1]."""
    rows = [r for r in result.failure_rows(address) if r["outcome"] in outcomes
            and (t0 is None or r["t_s"] >= t0 - 1) and (t1 is None or r["t_s"] <= t1 + 1)]
    return [example(result, r) for r in rows[:EXAMPLES]]


def slowest_examples(result: AnalysisResult, address: int) -> list[dict]:
    """The slowest answers kept for a station, slowest first."""
    rows = result.slowest_rows(address)[:EXAMPLES]
    return [example(result, r) for r in rows]


def capture_span(result: AnalysisResult) -> tuple[float, float]:
    """The whole capture, as a finding's time range (seconds on the file's own clock)."""
    start, end = result.span_s
    return round(start, 3), round(end, 3)


def minute_span(first: int, last: int, result: AnalysisResult) -> tuple[float, float]:
    """Seconds (on the file's clock) covered by rows first..last of the per-minute series, clipped to the capture."""
    a, b = result.minute_start_s(first), result.minute_start_s(last + 1)
    end = min(b, max(result.span_s[1], b - 59.0))
    return a, round(end, 3)
