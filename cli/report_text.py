"""What ``analyze`` prints: the text summary, with each finding told as the dashboard tells it.

Per finding, most severe first: the headline, when (in the site's local time with its UTC
offset), the most likely cause and what to check, in the very words of the
:class:`~buswitness.analysis.finding.Finding` the dashboard renders. Files keep UTC; only the
terminal speaks local time, the same local time ``record --until`` reads.
"""

from __future__ import annotations

import shutil
import textwrap
from datetime import datetime, timezone

from buswitness.textsafe import visible


def local_time(utc: datetime, with_date: bool = True) -> str:
    """``2026-12-01 23:00:05 UTC+01:00``: a moment in this machine's time zone (the site's), with its offset."""
    if utc.tzinfo is None:
        utc = utc.replace(tzinfo=timezone.utc)
    local = utc.astimezone()
    offset = local.strftime("%z")
    offset = f"UTC{offset[:3]}:{offset[3:]}" if offset else "UTC"
    return f"{local:%Y-%m-%d %H:%M:%S} {offset}" if with_date else f"{local:%H:%M:%S}"


def _moment(result, t_s: float | None) -> datetime | None:
    text = result.utc_at(t_s) if t_s is not None else ""
    return datetime.fromisoformat(text) if text else None


def _when(result, f) -> str:
    """The finding's time range in local time, or hours since the start when the capture has no wall clock."""
    if f.t_start_s is None:
        return ""
    start, end = _moment(result, f.t_start_s), _moment(result, f.t_end_s)
    if start is None:
        tail = "" if f.t_end_s is None else f" to {f.t_end_s / 3600:.2f} h"
        return f"{f.t_start_s / 3600:.2f} h{tail} after the capture start"
    same_day = end is not None and end.astimezone().date() == start.astimezone().date()
    stop = "the end" if end is None else local_time(end, with_date=not same_day)
    return f"{local_time(start)} to {stop}"


def _wrap(text: str, first: str, rest: str, width: int) -> list[str]:
    # Never break inside a word: hex and times stay whole (a long one runs past the margin instead).
    return textwrap.wrap(visible(text), width=max(40, width), initial_indent=first, subsequent_indent=rest,
                         break_long_words=False, break_on_hyphens=False) or [first.rstrip()]


def findings_lines(result, width: int | None = None) -> list[str]:
    """The findings block: headline, when, most likely cause and what to check, most severe first."""
    from buswitness.analysis.finding import ranked

    width = width or shutil.get_terminal_size((100, 24)).columns
    findings = ranked(list(result.findings))
    if not findings:
        return ["findings: none"]
    lines = ["findings, most severe first:"]
    cautions = []
    for n, f in enumerate(findings, 1):
        lead = f"  {n}. [{f.severity}] "
        pad = " " * len(lead)
        lines += _wrap(f.statement, lead, pad, width)
        when = _when(result, f)
        if when:
            lines += _wrap(when, pad + "when: ", pad + "      ", width)
        if f.causes:
            cause = f.causes[0]
            lines += _wrap(cause.cause, pad + "most likely cause: ", pad + "  ", width)
            lines += _wrap(cause.check, pad + "what to check: ", pad + "  ", width)
            if len(f.causes) > 1:
                more = len(f.causes) - 1
                lines.append(f"{pad}({more} other possible cause{'s' if more > 1 else ''} in the report)")
        if f.caution and f.caution not in cautions:
            cautions.append(f.caution)
    for caution in cautions:
        lines += _wrap(caution, "  caution: ", "    ", width)
    return lines


def analyze_text(result, width: int | None = None) -> str:
    """The whole text ``analyze`` prints: the text summary with the findings told in full and local times."""
    from buswitness.analysis.summary import text_summary

    text = text_summary(result, max_findings=max(1, len(result.findings)))
    head, found, rest = text.partition("\nfindings")
    _, stations, tail = rest.partition("\nstations:")
    if not found or not stations:  # a summary of another shape: print it as it is
        return text
    lines = head.split("\n")
    start = _moment(result, 0.0)
    if start is not None:
        lines.insert(1, f"started: {local_time(start)} (site local time; files keep UTC)")
    lines += findings_lines(result, width)
    return "\n".join(lines) + "\nstations:" + tail
