"""A finding: one thing wrong on the bus, with its evidence and likely causes.

Findings are produced by the rules in ``analysis/findings.py`` from the per-station and bus
figures, and rendered by the dashboard, the evidence report, ``summary.json`` and the text
summary of ``analyze``. This module holds only the data shape they share.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

#: Severities in rank order, most serious first.
SEVERITIES = ("critical", "warning", "notice", "info")

#: Shown with every finding whose next step is work on the wiring or in a panel.
WIRING_CAUTION = (
    "This is the likely cause read from the traffic, not a measurement of the wire. Before opening a panel "
    "or touching the cable: isolate as your site requires and follow local electrical codes and licensed "
    "practice; ground potential differences between buildings can be hazardous."
)


@dataclass
class Cause:
    """One likely cause and what to check next to confirm or rule it out."""

    cause: str
    check: str


@dataclass
class Finding:
    """A ranked statement about the bus with the numbers behind it."""

    rule: str                      # stable id of the rule that produced it, e.g. "late-answers"
    severity: str                  # one of SEVERITIES
    statement: str                 # one sentence a technician reads first
    station: int | None = None     # the station concerned, None for the bus as a whole
    station_label: str = ""        # "Pump drive B (7)"
    t_start_s: float | None = None  # time range concerned, seconds since capture start
    t_end_s: float | None = None
    evidence: dict = field(default_factory=dict)        # numbers: {"timeouts": 41, "p95_ms": 212.0, ...}
    examples: list[dict] = field(default_factory=list)  # example transactions/events (time, hex, outcome)
    causes: list[Cause] = field(default_factory=list)   # most likely first
    caution: str = ""              # WIRING_CAUTION where the next step is wiring work
    score: float = 0.0             # rank within a severity (higher first)

    def __post_init__(self) -> None:
        if self.severity not in SEVERITIES:
            raise ValueError(f"severity {self.severity!r} is not one of {SEVERITIES}")

    @property
    def rank_key(self) -> tuple[int, float]:
        return (SEVERITIES.index(self.severity), -self.score)

    def to_dict(self) -> dict:
        return asdict(self)


def ranked(findings: list[Finding]) -> list[Finding]:
    """Most serious first; within a severity, the highest score first."""
    return sorted(findings, key=lambda f: f.rank_key)
