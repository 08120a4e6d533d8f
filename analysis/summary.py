"""summary.json: the figures of one analysis as a versioned, documented JSON document.

The schema is described in ``docs/summary-schema.md``.

Schema version changelog:
    1  first version.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from buswitness.analysis.histogram import FINE
from buswitness.analysis.result import EXCEPTION_NAMES, AnalysisResult
from buswitness.fsutil import atomic_write
from buswitness.textsafe import visible

SCHEMA_VERSION = 1

#: Said wherever times are shown for an input without timestamps (raw bytes).
UNTIMED_NOTE = ("this input has no timestamps (raw bytes): only the order of the bytes is real, so response "
                "times, silences, utilisation and the timeout are not measurements")


def _clean(value):
    """JSON has no NaN or infinity: they become null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    return value


def capture_metadata(result: AnalysisResult) -> dict:
    h = result.header
    damage = result.damage
    return {
        "files": result.paths, "capture_id": h.capture_id, "source": h.source, "start_utc": h.start_utc,
        "host": h.host, "recorded_with": h.tool_version, "serial": {"baud": h.serial.baud, "format": h.serial.short_form},
        "ports": [{"id": p.id, "name": p.name, "latency_ms": p.latency_ms, "latency_source": p.latency_source}
                  for p in h.ports],
        "delivery": result.delivery,
        "timing": h.timing, "notes": h.notes,
        "damage": None if damage is None else {
            "clean": damage.clean, "records": damage.records, "truncated_tail": damage.truncated_tail,
            "bad_blocks": damage.bad_blocks, "bad_block_records": damage.bad_block_records,
            "bytes_skipped": damage.bytes_skipped, "missing_parts": list(damage.missing_parts),
            "warnings": list(damage.warnings)},
    }


def summary_dict(result: AnalysisResult) -> dict:
    """The whole summary as plain JSON-ready data."""
    stations = []
    for s in result.stations:
        d = s.to_dict()
        d["exceptions_by_code"] = [{"code": c, "meaning": EXCEPTION_NAMES.get(c, "non-standard code"), "count": n}
                                   for c, n in sorted(s.exceptions_by_code.items())]
        d["functions"] = {f"{f}": n for f, n in sorted(s.functions.items())}
        stations.append(d)
    bus = result.bus.to_dict()
    bus["functions"] = {f"{f}": n for f, n in sorted(result.bus.functions.items())}
    return _clean({
        "schema_version": SCHEMA_VERSION,
        "tool_version": result.tool_version,
        "analysed_utc": result.analysed_utc,
        "capture": capture_metadata(result),
        "method": {
            "response_time": "from the end of the request's last stop bit to the start of the response's first "
                             "start bit, estimated from host read times; each value carries the interval the "
                             "timestamp model allows",
            "quantile_resolution": round(FINE.relative_resolution, 4),
            "quantile_rule": "nearest rank over a log-spaced histogram of interval midpoints; min and max are the "
                             "smallest and largest midpoints, as uncertain as the intervals they come from",
        },
        "timeout": result.timeout.to_dict(),
        "protocol": result.protocol,
        "stations": stations,
        "bus": bus,
        "findings": [f.to_dict() for f in result.findings],
        # the protocol's own figures (Profibus DP: drop-outs, re-parameterisations, token rotation per master)
        **({"protocol_figures": result.protocol_figures} if result.protocol_figures else {}),
    })


def write_summary(result: AnalysisResult, path: str | Path) -> Path:
    """Write summary.json atomically."""
    with atomic_write(path) as f:
        json.dump(summary_dict(result), f, indent=2, allow_nan=False)
        f.write("\n")
    return Path(path)


def _ms(v: float | None) -> str:
    return "-" if v is None else f"{v:.1f} ms"


#: Share of frames with crossed timing bounds from which the text summary mentions them.
CROSSED_SHARE = 0.01


def _delivery_lines(result: AnalysisResult) -> list[str]:
    """The adapter latency where the file did not state it, and a character pitch off the stated format."""
    lines = []
    for d in result.delivery:
        est = d.get("estimate")
        if est is not None:
            lines.append(f"adapter latency: {d['latency_ms']:g} ms ({d['latency_source']}: {est['method']})")
        if d.get("notice"):
            lines.append(f"character pitch: {d['notice']}")
    crossed = sum(d.get("timing_contradictions", 0) for d in result.delivery)
    if crossed and crossed >= CROSSED_SHARE * max(result.bus.frames, 1):
        lines.append(f"timing: the timestamp model contradicted itself on {crossed} frames (a host delay over "
                     f"the assumed one, or characters not back to back); their intervals were widened")
    return lines


def text_summary(result: AnalysisResult, max_findings: int = 5) -> str:
    """The short text ``analyze`` prints: the capture, top findings, a line per station."""
    bus = result.bus
    lines = [(f"capture: {bus.duration_s / 3600:.2f} h, {bus.frames} frames, {bus.requests} requests, "
              f"line busy {0 if bus.utilisation is None else 100 * bus.utilisation:.1f}%"),
             f"master timeout: {result.timeout.explanation}"]
    lines.extend(_delivery_lines(result))
    if result.header.timing == "none":
        lines.append(UNTIMED_NOTE)
    if result.damage is not None and not result.damage.clean:
        damage = result.damage
        parts = damage.warnings[:3] or ["see the report"]
        if damage.lines_skipped:
            parts = parts + [f"{damage.lines_skipped} malformed line{'s' if damage.lines_skipped != 1 else ''} "
                             f"skipped in all"]
        lines.append("capture damage: " + "; ".join(parts))
    if result.findings:
        lines.append("findings:")
        for f in result.findings[:max_findings]:
            lines.append(f"  [{f.severity}] {f.statement}")
        if len(result.findings) > max_findings:
            lines.append(f"  ... and {len(result.findings) - max_findings} more in the report")
    else:
        lines.append("findings: none")
    lines.append("stations:")
    for s in result.stations:
        r = s.response_ms
        lines.append(f"  {s.label}: {s.requests} requests, {s.answered} answered, {s.timeouts} timeouts, "
                     f"{s.late} late, {s.exceptions} exceptions, {s.crc_errors} CRC errors"
                     + (f", {s.ambiguous} ambiguous (echo or retry)" if s.ambiguous else "")
                     + f"; response (interval midpoints) p50 {_ms(r['p50'])}, p95 {_ms(r['p95'])}, "
                     f"max {_ms(r['max'])}")
    return "\n".join(visible(line) for line in lines)  # names, notes and paths come from outside
