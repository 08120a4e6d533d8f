"""Findings: run every rule over an analysis result, drop what a stronger finding explains, rank.

Each rule (``analysis/rules/``) is a function ``rule(result, thresholds) -> list[Finding]``
that reads only the figures in the ``AnalysisResult``; ``evaluate`` runs them all. Where one
finding explains another (a sniffer that cannot read the line makes every other finding
meaningless; two devices on one address explain that address's CRC failures) the weaker one
is dropped, as listed in ``SUPERSEDES``. Rules and thresholds are described in docs/findings.md.
"""

from __future__ import annotations

from collections.abc import Callable

from buswitness.analysis.finding import Finding, ranked
from buswitness.analysis.planjoin import SUPERSEDES as JOINED_SUPERSEDES
from buswitness.analysis.planjoin import plan_findings
from buswitness.analysis.result import AnalysisResult
from buswitness.analysis.rules import (
    absence,
    duplicate,
    exception_codes,
    lateness,
    layout,
    line,
    load,
    silence,
    timing,
)
from buswitness.analysis.rules.thresholds import Thresholds

Rule = Callable[[AnalysisResult, Thresholds], list[Finding]]

#: Every rule, by the id its findings carry.
RULES: dict[str, Rule] = {
    "no-traffic": silence.no_traffic,
    "no-valid-frames": silence.no_valid_frames,
    "unreadable-line": line.unreadable_line,
    "sniffer-format": line.sniffer_format,
    "no-answers": absence.no_answers,
    "never-present": absence.never_present,
    "silent-period": absence.silent_period,
    "duplicate-address": duplicate.duplicate_address,
    "late-answers": lateness.late_answers,
    "late-collisions": lateness.late_collisions,
    "timeout-headroom": lateness.timeout_headroom,
    "missed-polls": lateness.missed_polls,
    "errors-clustered": line.errors_clustered,
    "error-bursts": line.error_bursts,
    "far-station-errors": line.far_station_errors,
    "station-errors": line.station_errors,
    "errors-bus-wide": line.errors_bus_wide,
    "idle-stray-bytes": line.idle_stray_bytes,
    "line-not-held-idle": line.line_not_held_idle,
    "turnaround-short": timing.turnaround_short,
    "possible-short-turnaround": timing.possible_short_turnaround,
    "gap-in-frame": timing.gap_in_frame,
    "timing-not-observable": timing.timing_not_observable,
    "character-pitch": timing.character_pitch,
    "exceptions": exception_codes.exceptions,
    "device-count": layout.device_count,
    "cable-length": layout.cable_length,
    "bus-load": load.bus_load,
}

#: A finding of the key rule makes findings of these rules redundant: on the same station, or on
#: any station when either of the two concerns the bus as a whole.
SUPERSEDES: dict[str, frozenset[str]] = {
    "no-traffic": frozenset(RULES) - {"no-traffic"},
    "no-valid-frames": frozenset(RULES) - {"no-valid-frames"},
    "unreadable-line": frozenset(RULES) - {"unreadable-line", "no-traffic", "no-valid-frames"},
    "no-answers": frozenset({"never-present", "silent-period", "missed-polls", "timeout-headroom"}),
    "duplicate-address": frozenset({"station-errors", "far-station-errors", "errors-bus-wide", "missed-polls",
                                    "late-collisions", "gap-in-frame", "idle-stray-bytes"}),
    "sniffer-format": frozenset({"turnaround-short", "possible-short-turnaround", "gap-in-frame",
                                 "timing-not-observable", "idle-stray-bytes", "errors-bus-wide",
                                 "character-pitch"}),
    "silent-period": frozenset({"missed-polls"}),
    "errors-clustered": frozenset({"errors-bus-wide", "idle-stray-bytes", "sniffer-format"}),
    "far-station-errors": frozenset({"station-errors", "errors-bus-wide", "cable-length"}),
    "line-not-held-idle": frozenset({"idle-stray-bytes"}),
}


def _explains(strong: Finding, weak: Finding) -> bool:
    # joined findings of a bus description and the traffic: analysis/planjoin.py
    if weak.rule not in SUPERSEDES.get(strong.rule, JOINED_SUPERSEDES.get(strong.rule, ())):
        return False
    return strong.station is None or weak.station is None or strong.station == weak.station


def evaluate(result: AnalysisResult, thresholds: Thresholds | None = None) -> list[Finding]:
    """Every rule's findings, without those a stronger finding explains, one per rule and station, ranked."""
    th = thresholds or Thresholds()
    found = [f for rule in RULES.values() for f in rule(result, th)]
    found += plan_findings(result, th)
    kept = [f for f in found if not any(_explains(g, f) for g in found if g is not f)]
    best: dict[tuple, Finding] = {}
    for f in ranked(kept):
        best.setdefault((f.rule, f.station), f)
    return ranked(list(best.values()))


__all__ = ["RULES", "SUPERSEDES", "Rule", "Thresholds", "evaluate"]
