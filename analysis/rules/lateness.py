"""Slow stations and the master's timeout: late answers, their collisions, headroom, missed polls."""

from __future__ import annotations

import math

from buswitness.analysis.finding import WIRING_CAUTION, Cause, Finding
from buswitness.analysis.histogram import FINE, quantile
from buswitness.analysis.result import AnalysisResult, StationFigures
from buswitness.analysis.rules.common import (
    EXAMPLES,
    capture_span,
    clock,
    example,
    failure_examples,
    finite,
    minute_span,
    ms,
    pct,
    polled,
    share,
    slowest_examples,
)
from buswitness.analysis.rules.thresholds import Thresholds


def answer_quantile_ms(result: AnalysisResult, s: StationFigures, q: float) -> float | None:
    """The q quantile of a station's measured answer times (late ones included), within its min and max."""
    r = s.response_ms
    return quantile(result.response_counts(s.address), q, FINE, r.get("min"), r.get("max"))


def suggested_timeout_ms(result: AnalysisResult, s: StationFigures, th: Thresholds) -> float | None:
    """A timeout covering the measured answers: their p99.9 with margin, rounded up to a usual step.

    Polls that were never answered are not in the distribution, so this is a floor; on fewer
    than a thousand answers the p99.9 is the slowest answer itself.
    """
    q = answer_quantile_ms(result, s, th.suggest_quantile)
    if q is None:
        return None
    base = q * th.timeout_margin
    for step in th.timeout_steps_ms:
        if step >= base:
            return float(step)
    return float(math.ceil(base / 1000.0) * 1000)


def _over(s: StationFigures) -> int:
    return max(s.late, s.answers_over_timeout or 0)


def _failure_minutes(result: AnalysisResult, address: int, columns: tuple) -> tuple[int, int] | None:
    series = result.station_series(address)
    hits = [m for m, vals in enumerate(zip(*(series[c] for c in columns))) if sum(vals)]
    return (hits[0], hits[-1]) if hits else None


#: Share of the capture a failure-free stretch must cover for the failures to "keep to a period".
QUIET_SHARE = 0.05


def _period_text(result: AnalysisResult, minutes: tuple[int, int] | None) -> tuple[str, float, float]:
    """' all after 02:00' / ' all between ...' when failures keep to part of the capture; and the span.

    Only a whole failure-free minute before or after counts: a capture ending a few
    milliseconds into a new minute does not make the failures "end early".
    """
    t0, t1 = capture_span(result)
    if minutes is None:
        return "", t0, t1
    a, b = minute_span(minutes[0], minutes[1], result)
    # A quiet stretch must be a real part of the capture (a minute, and 5 % of a long one) before
    # the failures are said to keep to a period (common practice: a few quiet minutes in a night
    # say nothing).
    quiet = max(60.0, QUIET_SHARE * (t1 - t0))
    later, earlier = a - t0 >= quiet, t1 - b >= quiet
    if later and not earlier:
        return f", all after {clock(result, a)}", a, t1
    if later or earlier:
        return f", all between {clock(result, a)} and {clock(result, b)}", a, b
    return "", t0, t1


def _timeout_text(result: AnalysisResult) -> str:
    t = result.timeout
    return f"a {ms(t.timeout_ms)} master timeout ({t.source})"


def late_answers(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """A station whose answers come after the master's timeout: slow device, or a timeout too short for it."""
    out = []
    for s in polled(result, th):
        over = _over(s)
        if over < th.late_min_count:
            continue
        lost = s.timeouts + s.late
        lost_share = share(lost, s.requests)
        severity = ("critical" if lost_share >= th.late_critical_share else
                    "warning" if lost_share >= th.late_warning_share else "notice")
        r = s.response_ms
        period, t0, t1 = _period_text(result, _failure_minutes(result, s.address, ("timeout", "late")))
        suggestion = suggested_timeout_ms(result, s, th)
        timeout_ms = result.timeout.timeout_ms
        against = f" against {_timeout_text(result)}" if timeout_ms is not None else ""
        lost_text = f"missed {pct(lost_share)} of polls ({s.timeouts} timeouts, {s.late} late answers)"
        statement = (f"{s.label} {lost_text}{period}; its answers take {ms(r['p50'])} typically, p99 "
                     f"{ms(r['p99'])}, up to {ms(r['max'])}{against}: the device is slow, not the wire.")
        rows = result.late_answers(s.address)[:EXAMPLES]
        examples = [example(result, row) for row in rows] or slowest_examples(result, s.address)
        causes = [Cause(f"The device takes longer to answer than the master waits: {over} answers "
                        f"({pct(share(over, s.requests))} of polls) came after "
                        f"{ms(timeout_ms) if timeout_ms is not None else 'the master had moved on'}.",
                        "Look up the device's stated response time for this request; ask for fewer registers per "
                        "request; check whether other clients or a busy task load the device at these times.")]
        if suggestion is not None:
            causes.append(Cause(
                "The master's timeout is too short for this device: a valid answer with a good CRC can only come "
                "late from the device itself.",
                f"Set the master's timeout for this station to about {suggestion:g} ms (the 99.9th percentile "
                f"of its answers, {ms(answer_quantile_ms(result, s, th.suggest_quantile))}, with "
                f"{round(100 * (th.timeout_margin - 1)):d}% margin; the slowest was {ms(r['max'])}); polls still "
                f"unanswered after that are true misses."))
        out.append(Finding(
            rule="late-answers", severity=severity, score=lost_share, station=s.address, station_label=s.label,
            t_start_s=t0, t_end_s=t1, statement=statement,
            evidence={"requests": s.requests, "timeouts": s.timeouts, "late": s.late,
                      "answers_over_timeout": s.answers_over_timeout, "missed_share": round(lost_share, 5),
                      "response_ms": dict(r), "timeout_ms": timeout_ms, "timeout_source": result.timeout.source,
                      "p999_ms": finite(answer_quantile_ms(result, s, th.suggest_quantile)),
                      "suggested_timeout_ms": suggestion, "waiting_s": s.waiting_s},
            examples=examples, causes=causes))
    return out


def collision_budget(s: StationFigures) -> int:
    """Polls a slow station's too-late answers can have damaged: one per late answer or timeout."""
    return s.late + s.timeouts


def late_collisions(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Late answers that overlap the next poll, damaging frames that are not the wire's fault."""
    out = []
    for s in polled(result, th):
        if s.late < th.late_min_count:
            continue
        orphans = s.events.get("orphan_response", 0) + s.events.get("unexpected_responder", 0)
        damaged_own = s.corrupt
        damaged_other = sum(o.corrupt for o in result.stations if o.address != s.address)
        # each answer too late to count (late, or so late it reads as a timeout) overlaps at most one poll
        explained = min(damaged_own + damaged_other, collision_budget(s))
        if explained + orphans < th.min_events:
            continue
        t0, t1 = capture_span(result)
        out.append(Finding(
            rule="late-collisions", severity="notice", score=share(explained + orphans, result.bus.requests),
            station=s.address, station_label=s.label, t_start_s=t0, t_end_s=t1,
            statement=(f"{s.late} of {s.label}'s answers came after the master had moved on and share the line "
                       f"with the next poll: up to {explained} damaged answers and {orphans} answers nobody was "
                       f"waiting for are their consequence, not line noise."),
            evidence={"late": s.late, "timeouts": s.timeouts, "orphan_answers": orphans,
                      "damaged_answers_this_station": damaged_own, "damaged_answers_other_stations": damaged_other,
                      "damaged_answers_explained": explained},
            examples=[example(result, row) for row in result.late_answers(s.address)[:EXAMPLES]],
            causes=[Cause("The master sends its next request while this slow device is still answering.",
                          "Lengthen the master's timeout for this station (see the late-answers finding); the "
                          "damaged frames should then disappear with the late answers.")]))
    return out


def timeout_headroom(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """A station that answers in time, but with its slow answers close to the timeout."""
    timeout_ms = result.timeout.timeout_ms
    if timeout_ms is None:
        return []
    out = []
    for s in polled(result, th):
        p99 = s.response_ms.get("p99")
        if _over(s) >= th.late_min_count or p99 is None or p99 < th.headroom_share * timeout_ms:
            continue
        suggestion = suggested_timeout_ms(result, s, th)
        out.append(Finding(
            rule="timeout-headroom", severity="notice", score=share(p99, timeout_ms), station=s.address,
            station_label=s.label, t_start_s=capture_span(result)[0], t_end_s=capture_span(result)[1],
            statement=(f"{s.label} answers in time, but its slowest answers (p99 {ms(p99)}, max "
                       f"{ms(s.response_ms.get('max'))}) use {pct(share(p99, timeout_ms))} of {_timeout_text(result)}: "
                       f"little headroom before polls are missed."),
            evidence={"response_ms": dict(s.response_ms), "timeout_ms": timeout_ms,
                      "suggested_timeout_ms": suggestion},
            examples=slowest_examples(result, s.address),
            causes=[Cause("The master's timeout is set close to this device's answer time.",
                          f"Raise it to about {suggestion:g} ms for this station, or find out why the device "
                          f"answers slowly at times.")]))
    return out


def missed_polls(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """Polls a station leaves unanswered now and then, while it answers the rest in good time."""
    out = []
    for s in polled(result, th):
        missed = share(s.timeouts, s.requests)
        if (_over(s) >= th.late_min_count or s.timeouts < th.late_min_count or not s.answered
                or missed < th.error_notice_share):
            continue
        period, t0, t1 = _period_text(result, _failure_minutes(result, s.address, ("timeout",)))
        r = s.response_ms
        out.append(Finding(
            rule="missed-polls", severity="warning" if missed >= th.late_warning_share else "notice",
            score=missed, station=s.address, station_label=s.label, t_start_s=t0, t_end_s=t1,
            statement=(f"{s.label} left {s.timeouts} polls ({pct(missed)}) without any answer{period}, though it "
                       f"answers the rest in {ms(r['p50'])} typically (max {ms(r['max'])}): not slowness, the "
                       f"request or the answer is lost."),
            evidence={"requests": s.requests, "timeouts": s.timeouts, "missed_share": round(missed, 5),
                      "response_ms": dict(r), "retries": s.retries,
                      "p999_ms": finite(answer_quantile_ms(result, s, th.suggest_quantile))},
            examples=failure_examples(result, s.address, t0, t1, ("timeout",)),
            causes=[Cause("The request does not reach the device intact at its drop (a weak or reflected signal "
                          "there), so it stays silent as the protocol requires (MSL §2.4.2).",
                          "Compare with the errors findings for this station; check its drop cable and terminal."),
                    Cause("The device is busy now and then and drops requests.",
                          "Ask the vendor whether the device ignores requests during internal tasks.")],
            caution=WIRING_CAUTION))
    return out
