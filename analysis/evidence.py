"""The evidence report: the case on one station, for its vendor, that stands up to scrutiny.

Its figures come from the same AnalysisResult as the dashboard and summary.json, so they are
identical to ``analyze``'s for the same capture. The page has no script at all, prints cleanly,
and says what the capture cannot show.
"""

from __future__ import annotations

import hashlib
import math
import os
from dataclasses import dataclass
from pathlib import Path

from buswitness.analysis.histogram import FINE, count_above
from buswitness.analysis.render import (
    environment,
    exception_name,
    exceptions_sentence,
    fmt_count,
    fmt_share,
    stylesheet,
)
from buswitness.analysis.result import AnalysisResult, StationFigures
from buswitness.analysis.summary import UNTIMED_NOTE
from buswitness.decode.timing import t35_s
from buswitness.errors import UsageError
from buswitness.fsutil import atomic_write
from markupsafe import Markup

#: Multiples of the master's timeout at which the tail is tabulated.
TAIL_FACTORS = (0.5, 0.75, 0.9, 1.0, 1.25, 1.5, 2.0)


@dataclass
class PartIdentity:
    name: str
    path: str
    size: int
    sha256: str


def file_identity(paths: list) -> list[PartIdentity]:
    """Name, size and SHA-256 of each capture part, read in chunks."""
    out = []
    for p in paths:
        digest = hashlib.sha256()
        try:
            with open(p, "rb") as f:
                for chunk in iter(lambda: f.read(1 << 20), b""):
                    digest.update(chunk)
            out.append(PartIdentity(Path(p).name, str(p), os.path.getsize(p), digest.hexdigest()))
        except OSError as exc:
            out.append(PartIdentity(Path(p).name, str(p), -1, f"unreadable ({exc.strerror})"))
    return out


def _identity(result: AnalysisResult) -> list[PartIdentity]:
    """The capture parts' identity: the digests this run already read (decoded cache), else read now."""
    known = {d.path: d for d in result.part_digests}
    if result.paths and all(str(p) in known for p in result.paths):
        return [PartIdentity(Path(p).name, str(p), known[str(p)].size, known[str(p)].sha256) for p in result.paths]
    return file_identity(result.paths)


def _histogram_svg(result: AnalysisResult, address: int, width: int = 760, height: int = 220) -> dict:
    """Bars of the response-time histogram on a log axis, with the timeout marked: SVG geometry."""
    edges, counts = result.response_histogram(address)
    if not counts:
        return {"bars": [], "ticks": [], "timeout_x": None, "width": width, "height": height}
    pad_l, pad_r, pad_t, pad_b = 50, 10, 10, 30
    lo, hi = math.log10(edges[0]), math.log10(edges[-1])
    timeout = result.timeout.timeout_ms
    if timeout:
        lo, hi = min(lo, math.log10(timeout) - 0.05), max(hi, math.log10(timeout) + 0.05)
    span = max(hi - lo, 1e-6)
    peak = max(counts)

    def x(v: float) -> float:
        return pad_l + (math.log10(v) - lo) / span * (width - pad_l - pad_r)

    bars = []
    for a, b, n in zip(edges[:-1], edges[1:], counts):
        h = (height - pad_t - pad_b) * n / peak
        over = timeout is not None and a >= timeout
        bars.append({"x": round(x(a), 2), "w": round(max(x(b) - x(a) - 0.5, 0.8), 2),
                     "y": round(height - pad_b - h, 2), "h": round(h, 2), "n": n, "over": over,
                     "a": a, "b": b})
    ticks = []
    for decade in range(math.floor(lo), math.ceil(hi) + 1):
        for m in ((1, 2, 5) if span > 1 else (1, 1.5, 2, 3, 4, 5, 6, 7, 8, 9)):
            v = m * 10 ** decade
            if lo <= math.log10(v) <= hi:
                ticks.append({"x": round(x(v), 2), "label": f"{v:g}"})
    return {"bars": bars, "ticks": ticks, "peak": peak, "width": width, "height": height, "base": height - pad_b,
            "left": pad_l, "timeout_x": None if not timeout else round(x(timeout), 2)}


def _tail(result: AnalysisResult, s: StationFigures) -> list[dict]:
    timeout = result.timeout.timeout_ms
    answered = int(result.response_counts(s.address).sum())
    if not timeout or not answered:
        return []
    rows = []
    for f in TAIL_FACTORS:
        n = count_above(result.response_counts(s.address), timeout * f, FINE)
        rows.append({"threshold_ms": timeout * f, "factor": f, "count": n, "share": n / answered})
    return rows


#: Bus-wide findings that make any report on one station empty: they lead the report on every station.
SILENCE_RULES = ("no-traffic", "no-valid-frames", "unreadable-line")


def _card(value: str, caption: str) -> dict:
    return {"value": value, "caption": caption}


def _ms_text(v: float | None) -> str:
    return "–" if v is None else f"{v:,.1f} ms"


def headline_cards(result: AnalysisResult, s: StationFigures, findings: list) -> list[dict]:
    """The four figures at the top of the report, chosen for what its leading finding is about.

    A duplicate address is told by the share of garbled answers, not by "0 timeouts"; a slow
    station by its late answers against the timeout; a silent capture by what it did not hold."""
    rule = findings[0].rule if findings else ""
    t = result.timeout.timeout_ms
    against = f" against a {t:.0f} ms timeout" if t else ""
    requests = _card(fmt_count(s.requests), f"requests to address {s.address}")
    if rule in SILENCE_RULES:
        bus = result.bus
        return [_card(fmt_count(bus.frames), "valid frames in the whole capture"),
                _card(fmt_count(bus.bytes), "bytes in valid frames"),
                _card(f"{bus.duration_s:,.0f} s", "recorded"),
                _card(str(result.header.serial), "line settings the sniffer used")]
    if rule == "duplicate-address":
        orphans = next((f.evidence.get("orphan_answers") for f in findings if f.rule == rule), None)
        return [_card(fmt_share(s.corrupt / s.requests) if s.requests else "–", "of its answers garbled"),
                _card(fmt_count(s.crc_errors), "frames from its address failing the CRC check"),
                _card("–" if orphans is None else fmt_count(orphans), "valid answers when none was awaited"),
                requests]
    if rule in ("no-answers", "never-present", "silent-period", "missed-polls"):
        return [_card(fmt_count(s.timeouts), "requests with no answer (timeouts)"),
                _card(fmt_share(s.timeouts / s.requests) if s.requests else "–", "of its requests unanswered"),
                _card(f"{s.waiting_s:,.1f} s", "the master spent waiting on it"), requests]
    if rule == "exceptions":
        top = max(s.exceptions_by_code.items(), key=lambda kv: kv[1], default=None)
        return [_card(fmt_count(s.exceptions), "exception responses"),
                _card(fmt_share(s.exceptions / s.requests) if s.requests else "–", "of its requests"),
                _card("–" if top is None else f"{top[0]:02X}",
                      "most frequent exception" + ("" if top is None else f": {exception_name(top[0])}")),
                requests]
    if rule in ("station-errors", "far-station-errors", "errors-clustered", "errors-bus-wide"):
        return [_card(fmt_share(s.corrupt / s.requests) if s.requests else "–", "of its answers damaged"),
                _card(fmt_count(s.crc_errors), "frames failing the CRC check"),
                _card(fmt_count(s.retries), "retries by the master"), requests]
    return [requests,
            _card(fmt_count(s.late), "answers after the master had given up (late)"),
            _card(fmt_count(s.timeouts), "unanswered (timeouts)"),
            _card(_ms_text(s.response_ms.get("p95")), "95th percentile response time" + against)]


def _exceptions_text(result: AnalysisResult, s: StationFigures) -> str:
    """Exception responses written out: Modbus codes with their names (MAP V1.1b3 p48-49), other protocols' status."""
    if not s.exceptions_by_code:
        return ""
    if result.protocol.startswith("modbus"):
        return exceptions_sentence(s.exceptions_by_code)
    return "; ".join(f"{fmt_count(n)} with status {code}" for code, n in sorted(s.exceptions_by_code.items()))


def evidence_data(result: AnalysisResult, address: int, identity: list[PartIdentity] | None = None) -> dict:
    """Everything the evidence template shows, as plain data."""
    s = result.station(address)
    polled = [x for x in result.stations if x.requests]
    if s is None or s.requests == 0 and not s.events and polled:
        seen = ", ".join(str(x.address) for x in polled) or "none"
        raise UsageError(f"station {address} does not appear in this capture (stations polled: {seen})")
    silence = [f for f in result.findings if f.rule in SILENCE_RULES and f.station is None]
    findings = silence + [f for f in result.findings if f.station == address]
    ports = result.header.ports
    methods = {d["port"]: d["estimate"]["method"] for d in result.delivery if d.get("estimate")}
    latency = [{"name": p.name, "latency_ms": p.latency_ms, "source": p.latency_source,
                "method": methods.get(p.id, "")} for p in ports]
    latency_ms = max((p.latency_ms for p in ports if p.latency_ms is not None), default=None)
    return {
        "untimed": UNTIMED_NOTE if result.header.timing == "none" else "", "s": s, "result": result, "timeout": result.timeout, "findings": findings,
        "caution": next((f.caution for f in findings if f.caution), ""), "silent": bool(silence),
        "cards": headline_cards(result, s, findings),
        "exceptions": _exceptions_text(result, s), "modbus": result.protocol.startswith("modbus"),
        "identity": identity if identity is not None else _identity(result),
        "header": result.header, "latency": latency, "latency_ms": latency_ms,
        "pitch_notices": [d["notice"] for d in result.delivery if d.get("notice")],
        "late": result.late_answers(address), "hist": _histogram_svg(result, address), "tail": _tail(result, s),
        "failures": result.failure_rows(address),
        "damage": result.damage, "char_ms": result.header.serial.char_time_s * 1000.0,
        "t35_ms": t35_s(result.header.serial) * 1000.0, "resolution_pct": 100 * FINE.relative_resolution,
        "span": {"start": result.utc_at(result.span_s[0]), "end": result.utc_at(result.span_s[1]),
                 "hours": result.bus.duration_s / 3600.0},
    }


def render_evidence(result: AnalysisResult, address: int, identity: list[PartIdentity] | None = None) -> str:
    env = environment()
    return env.get_template("evidence.html").render(e=evidence_data(result, address, identity),
                                                    css=Markup(stylesheet("evidence.css")))


def write_evidence(result: AnalysisResult, address: int, path: str | Path) -> Path:
    """Write the evidence report on ``address`` atomically."""
    text = render_evidence(result, address)
    with atomic_write(path) as f:
        f.write(text)
    return Path(path)
