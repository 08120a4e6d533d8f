"""The bus description joined with a capture: the traffic's trouble placed along the cable.

Four patterns are read from the per-station figures (``AnalysisResult``) against each station's
position in the description, and each is joined with the installation check's results
(``analysis/planrules.py``) that would explain it:

- errors growing with the distance toward one end of a segment: that end's terminator, the
  segment's length, the terminators' value;
- one station apart from its neighbours: its stub, its A/B wiring, a terminator on its drop;
- the whole bus at once: bias at several points, too many unit loads, no signal common, the
  shield's grounding, terminator values;
- silence after the master's requests: every station (A/B reversed at the master) or every
  station beyond a repeater (a dead segment).

A finding that the description and the traffic agree on carries both: the plan rule with its
numbers and source, and the traffic evidence. It ranks above the traffic-only findings it
explains (``SUPERSEDES``), since it names what to change.
"""

from __future__ import annotations

from dataclasses import dataclass
from statistics import median

from buswitness.analysis.busplan import BusPlan, Device
from buswitness.analysis.finding import Cause, Finding
from buswitness.analysis.planrules import PLAN_CAUTION, PlanResult, check_plan
from buswitness.analysis.result import AnalysisResult, StationFigures
from buswitness.analysis.rules import duplicate, line
from buswitness.analysis.rules.common import capture_span, damaged_share, failure_examples, pct, share
from buswitness.analysis.rules.thresholds import Thresholds

#: Joined findings rank above any finding of the traffic alone within their severity: the score
#: is this base plus the traffic's own share (a finding both sources agree on names what to change).
JOINED_SCORE_BASE = 10.0

#: Plan rules that explain each pattern, most specific first.
TREND_RULES = ("termination", "segment-length", "terminator-value")
APART_RULES = ("stub-length", "ab-wiring", "termination", "topology")
WHOLE_RULES = ("bias", "unit-loads", "signal-common", "shield", "terminator-value", "segment-length", "topology")

#: Traffic-only findings a joined finding of the key rule makes redundant (see analysis/findings.py).
SUPERSEDES: dict[str, frozenset[str]] = {
    "plan-termination": frozenset({"far-station-errors", "station-errors", "cable-length"}),
    "plan-segment-length": frozenset({"far-station-errors", "cable-length"}),
    "plan-terminator-value": frozenset({"far-station-errors", "errors-bus-wide"}),
    "plan-stub-length": frozenset({"station-errors"}),
    "plan-topology": frozenset({"station-errors", "errors-bus-wide"}),
    "plan-bias": frozenset({"errors-bus-wide", "idle-stray-bytes"}),
    "plan-unit-loads": frozenset({"errors-bus-wide", "device-count"}),
    "plan-signal-common": frozenset({"errors-bus-wide"}),
    "plan-shield": frozenset({"errors-bus-wide"}),
    "plan-ab-wiring": frozenset({"no-answers", "never-present"}),
    "plan-repeater": frozenset({"no-answers", "never-present"}),
}


@dataclass
class Placed:
    """One described station with its figures from the capture."""

    device: Device
    figures: StationFigures

    @property
    def position_m(self) -> float:
        return self.device.position_m

    @property
    def damaged(self) -> float:
        return damaged_share(self.figures)

    @property
    def marks(self) -> int:
        """Line-error and idle-line marks the decoder tied to this station."""
        ev = self.figures.events
        return int(ev.get("line_error", 0) + ev.get("break", 0) + ev.get("stray_bytes", 0))


def health(figures: StationFigures | None) -> float | None:
    """Share of a station's polls that failed (timeout, late or damaged): the drawing's shading."""
    if figures is None or not figures.requests:
        return None
    return share(figures.timeouts + figures.late + figures.corrupt, figures.requests)


def placed_stations(plan: BusPlan, result: AnalysisResult, th: Thresholds,
                    skip: frozenset[int] = frozenset()) -> list[Placed]:
    """Described stations polled often enough to judge, in position order, without those in ``skip``."""
    out = []
    for d in plan.stations:
        s = result.station(d.address) if d.address is not None else None
        if s is not None and s.requests >= th.min_requests and d.address not in skip:
            out.append(Placed(d, s))
    return sorted(out, key=lambda p: p.position_m)


def _failing(results: list[PlanResult], rules: tuple[str, ...], *, device: str | None = None,
             segment: int | None = None, position_m: float | None = None, tol_m: float = 1.0) -> PlanResult | None:
    """The first failed (else warned) plan result of the given rules matching the place asked for."""
    for status in ("fail", "warn"):
        for rule in rules:
            for r in results:
                if r.rule != rule or r.status != status:
                    continue
                if device is not None and device not in r.devices:
                    continue
                if segment is not None and r.segment not in (None, segment):
                    continue
                if position_m is not None and (r.position_m is None or abs(r.position_m - position_m) > tol_m):
                    continue
                return r
    return None


def _plan_evidence(r: PlanResult) -> dict:
    return {"plan_rule": r.rule, "plan_status": r.status, "plan_says": r.statement, "plan_source": r.source}


def _finding(rule: PlanResult, result: AnalysisResult, statement: str, traffic: dict, share_: float,
             station: Placed | None, traffic_rule: str, examples: list | None = None) -> Finding:
    t0, t1 = capture_span(result)
    causes = [Cause(rule.statement, rule.fix or "Compare the description with the bus as built.")]
    return Finding(
        rule=f"plan-{rule.rule}", severity="warning" if rule.status == "fail" else "notice",
        score=JOINED_SCORE_BASE + share_, statement=statement,
        station=None if station is None else station.device.address,
        station_label="" if station is None else station.figures.label, t_start_s=t0, t_end_s=t1,
        evidence={**_plan_evidence(rule), "traffic_pattern": traffic_rule, **traffic},
        examples=examples or [], causes=causes, caution=PLAN_CAUTION)


def distance_trend(plan: BusPlan, results: list[PlanResult], result: AnalysisResult, th: Thresholds,
                   placed: list[Placed]) -> list[Finding]:
    """Damage growing toward one end of a segment."""
    out = []
    for seg in plan.segments():
        on = [p for p in placed if plan.segment_of(p.position_m).index == seg.index
              and p.figures.late < th.late_min_count]
        if len(on) < 3:
            continue
        k = max(1, len(on) // 3)
        for direction in ("far", "near"):
            ordered = on if direction == "far" else on[::-1]
            near, far = ordered[:k], ordered[-k:]
            near_share = sum(p.damaged for p in near) / k
            far_share = sum(p.damaged for p in far) / k
            worst = max(far, key=lambda p: p.damaged)
            if (worst.figures.corrupt < th.min_events or far_share < th.error_notice_share
                    or far_share < th.far_ratio * max(near_share, th.near_floor_share)):
                continue
            end_m = seg.end_m if direction == "far" else seg.start_m
            end_name = ("the far end" if direction == "far" and not seg.end_is_repeater else
                        "the master's end" if direction == "near" and seg.index == 1 else f"the end at {end_m:g} m")
            plan_rule = (_failing(results, ("termination",), segment=seg.index, position_m=end_m)
                         or _failing(results, TREND_RULES, segment=seg.index))
            traffic = {"toward_end_m": end_m, "far_damaged_share": round(far_share, 5),
                       "near_damaged_share": round(near_share, 5),
                       "by_position": [{"station": p.figures.address, "position_m": p.position_m,
                                        "requests": p.figures.requests, "damaged": p.figures.corrupt,
                                        "timeouts": p.figures.timeouts, "collisions": p.figures.collisions,
                                        "line_marks": p.marks, "damaged_share": round(p.damaged, 5)} for p in on]}
            seen = (f"errors grow with distance toward {end_name} of {seg.name}: {worst.figures.label} at "
                    f"{worst.position_m:g} m has {pct(worst.damaged)} of its answers damaged against "
                    f"{pct(near_share)} at the other end")
            if plan_rule is None:
                continue
            out.append(_finding(plan_rule, result, f"The traffic and the description agree: {seen}, and "
                                f"{_lower(plan_rule.statement)} (plan rule {plan_rule.rule}, {plan_rule.source}).",
                                traffic, far_share, worst, "distance-trend",
                                failure_examples(result, worst.figures.address, outcomes=("corrupt",))))
            break
    return out


def station_apart(plan: BusPlan, results: list[PlanResult], result: AnalysisResult, th: Thresholds,
                  placed: list[Placed], explained: frozenset[int] = frozenset()) -> list[Finding]:
    """One station far worse than its neighbours, or silent while they answer, with a flaw at its drop.

    Stations in ``explained`` are the far end of a trend with distance already joined: their
    damage is the trend's, not their drop's.
    """
    on = [p for p in placed if p.figures.late < th.late_min_count]
    out = []
    for i, p in enumerate(on):
        others = [o.damaged for o in on if o is not p]
        if not others:
            continue
        rest = median(others)
        silent = p.figures.answered == 0 and p.figures.timeouts >= th.min_events and any(
            o.figures.answered for o in on if o is not p)
        apart = (p.figures.corrupt >= th.min_events and p.damaged >= th.error_notice_share
                 and p.damaged >= th.concentrated_ratio * max(rest, th.near_floor_share))
        if not (silent or apart) or p.figures.address in explained:
            continue
        plan_rule = _failing(results, APART_RULES, device=p.device.key)
        if plan_rule is None:
            continue
        neighbours = [o for o in (on[i - 1] if i else None, on[i + 1] if i + 1 < len(on) else None) if o]
        near_text = ", ".join(f"{o.figures.label} at {o.position_m:g} m {pct(o.damaged)}" for o in neighbours)
        if silent:
            seen = (f"{p.figures.label} at {p.position_m:g} m never answered ({p.figures.timeouts} of "
                    f"{p.figures.requests} polls timed out) while its neighbours answer")
        else:
            seen = (f"{p.figures.label} at {p.position_m:g} m has {pct(p.damaged)} of its answers damaged "
                    f"({p.figures.corrupt} of {p.figures.requests}, {p.marks} line marks) against a median of "
                    f"{pct(rest)} on the others" + (f" ({near_text})" if near_text else ""))
        traffic = {"damaged": p.figures.corrupt, "requests": p.figures.requests, "timeouts": p.figures.timeouts,
                   "damaged_share": round(p.damaged, 5), "others_median_share": round(rest, 5),
                   "line_marks": p.marks, "collisions": p.figures.collisions,
                   "neighbours": {o.figures.label: round(o.damaged, 5) for o in neighbours}}
        out.append(_finding(plan_rule, result, f"The traffic and the description agree: {seen}, and "
                            f"{_lower(plan_rule.statement)} (plan rule {plan_rule.rule}, {plan_rule.source}).",
                            traffic, 1.0 if silent else p.damaged, p, "station-apart",
                            failure_examples(result, p.figures.address, outcomes=("corrupt", "timeout"))))
    return out


def whole_bus(plan: BusPlan, results: list[PlanResult], result: AnalysisResult, th: Thresholds,
              placed: list[Placed]) -> list[Finding]:
    """Damage on most stations alike (not a trend with distance) with a flaw that touches the whole segment."""
    on = [p for p in placed if p.figures.late < th.late_min_count]
    if len(on) < 3:
        return []
    hit = [p for p in on if p.damaged >= th.error_notice_share]
    total = sum(p.figures.corrupt for p in on)
    if total < th.min_events or len(hit) < th.bus_wide_station_share * len(on):
        return []
    k = max(1, len(on) // 3)
    near = sum(p.damaged for p in on[:k]) / k
    far = sum(p.damaged for p in on[-k:]) / k
    if max(near, far) >= th.far_ratio * max(min(near, far), th.near_floor_share):
        return []  # a trend with distance, not the whole bus alike
    plan_rule = _failing(results, WHOLE_RULES)
    if plan_rule is None:
        return []
    typical = median(p.damaged for p in on)
    ev = result.bus.events
    stray = int(ev.get("stray_bytes", 0))
    marks = int(ev.get("line_error", 0) + ev.get("break", 0))
    seen = (f"answers are damaged on {len(hit)} of {len(on)} stations alike, from {on[0].position_m:g} m to "
            f"{on[-1].position_m:g} m (typically {pct(typical)}; {marks} line-error marks and {stray} stray bytes "
            f"on the idle line)")
    traffic = {"stations_hit": [p.figures.address for p in hit], "median_damaged_share": round(typical, 5),
               "near_damaged_share": round(near, 5), "far_damaged_share": round(far, 5),
               "line_error_marks": marks, "idle_stray_bytes": stray,
               "collisions": sum(p.figures.collisions for p in on)}
    return [_finding(plan_rule, result, f"The traffic and the description agree: {seen}, and "
                     f"{_lower(plan_rule.statement)} (plan rule {plan_rule.rule}, {plan_rule.source}).",
                     traffic, typical, None, "whole-bus")]


def silence(plan: BusPlan, results: list[PlanResult], result: AnalysisResult, th: Thresholds,
            placed: list[Placed]) -> list[Finding]:
    """No answers after the master's requests: from every station, or from every one beyond a repeater."""
    on = placed
    if not on:
        return []
    dead = [p for p in on if p.figures.answered == 0 and p.figures.late == 0 and p.figures.corrupt == 0]
    if len(dead) == len(on):
        r = _failing(results, ("ab-wiring",), device="master")
        what = ("no station answers any of the master's requests "
                f"({sum(p.figures.requests for p in on)} requests to {len(on)} stations)")
        if r is None:
            r = PlanResult("ab-wiring", "warn", "master",
                           "the description shows the master's pair as labelled, yet when no station answers at "
                           "all, A and B reversed at the master is the first suspect",
                           {}, "With the master's port isolated, swap its two signal conductors and watch for "
                               "answers.", position_m=plan.master.position_m if plan.master else None,
                           devices=["master"] if plan.master else [])
        return [_finding(r, result, f"The traffic and the description agree: {what}; {_lower(r.statement)} "
                         f"(plan rule {r.rule}, {r.source}).",
                         {"silent_stations": [p.figures.address for p in dead]}, 1.0, None, "silence-after-requests")]
    out = []
    for rep in sorted(plan.repeaters, key=lambda r: r.position_m):
        beyond = [p for p in on if p.position_m > rep.position_m]
        before = [p for p in on if p.position_m <= rep.position_m]
        if beyond and before and all(p in dead for p in beyond) and any(p not in dead for p in before):
            r = _failing(results, ("repeater", "termination", "unit-loads"), device=rep.key) or PlanResult(
                "repeater", "warn", rep.label,
                f"every station beyond {rep.label} at {rep.position_m:g} m is silent while those before it answer: "
                "the segment beyond the repeater is dead (its power, its direction control, or its far side's "
                "wiring)", {}, "Check the repeater's power and indicator lights, then the pair on its far side.",
                position_m=rep.position_m, devices=[rep.key])
            out.append(_finding(r, result, f"The traffic and the description agree: {len(beyond)} station(s) "
                                f"beyond {rep.label} never answer while {len(before) - len([p for p in before if p in dead])} "
                                f"before it do; {_lower(r.statement)} (plan rule {r.rule}, {r.source}).",
                                {"silent_beyond": [p.figures.address for p in beyond], "repeater_m": rep.position_m},
                                1.0, None, "silence-beyond-repeater"))
            break
    return out


def _lower(text: str) -> str:
    """A plan statement continuing a sentence: "The ..." becomes "the ..."; names keep their capitals."""
    text = text.rstrip(".")
    first = text.split(" ", 1)[0]
    return text[:1].lower() + text[1:] if first in ("The", "A", "No", "Every") else text


def joined_findings(plan: BusPlan, results: list[PlanResult] | None, result: AnalysisResult,
                    th: Thresholds | None = None) -> list[Finding]:
    """Findings where the description and the capture's traffic agree."""
    th = th or Thresholds()
    if not result.bus.frames or line.unreadable_line(result, th):
        return []  # no valid frame, or the sniffer cannot read the line: nothing placed along it can be trusted
    results = check_plan(plan) if results is None else results
    # two devices on one address garble its answers wherever it sits: its damage says nothing of the wire
    skip = frozenset(f.station for f in duplicate.duplicate_address(result, th) if f.station is not None)
    placed = placed_stations(plan, result, th, skip)
    found = silence(plan, results, result, th, placed)
    trend = distance_trend(plan, results, result, th, placed)
    found += trend
    found += station_apart(plan, results, result, th, placed,
                           frozenset(f.station for f in trend if f.station is not None))
    found += whole_bus(plan, results, result, th, placed)
    return found


def plan_findings(result: AnalysisResult, th: Thresholds) -> list[Finding]:
    """The joined findings when the station map is a bus description, else none (for analysis/findings.py)."""
    plan = getattr(result.station_map, "plan", None)
    if not isinstance(plan, BusPlan):
        return []
    return joined_findings(plan, None, result, th)


__all__ = ["SUPERSEDES", "health", "joined_findings", "placed_stations", "plan_findings"]
