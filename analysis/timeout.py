"""The master's response timeout: given by the user, or inferred from how the master behaves.

After a request nobody answers, the master waits for its timeout and then moves on to its
next request. The silence from the unanswered request's end to the next request's start is
therefore the timeout plus the master's own reaction time, never less. The low end of those
silences (their 5th percentile) is the estimate; the spread is reported as the evidence.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from buswitness.analysis.histogram import FINE, quantile

#: Silences after unanswered requests needed before an estimate is offered (common practice: a
#: handful of samples gives a usable lower envelope; fewer is reported as not inferable).
MIN_SAMPLES = 5
#: Timeouts masters are usually set to, in ms (common practice); the estimate is named after
#: the nearest one when it lies within ROUND_TOLERANCE of it.
ROUND_VALUES_MS = (50, 100, 150, 200, 250, 300, 400, 500, 600, 750, 800, 1000, 1500, 2000, 2500, 3000, 5000, 10000)
ROUND_TOLERANCE = 0.10


@dataclass
class TimeoutEstimate:
    """The response timeout used to judge answers, and where it came from."""

    timeout_ms: float | None        # None: neither given nor inferable
    source: str                     # "given", "inferred", "not inferable"
    samples: int = 0                # unanswered requests whose following silence was measured
    silence_p5_ms: float | None = None
    silence_p50_ms: float | None = None
    silence_p95_ms: float | None = None
    nearest_round_ms: float | None = None
    explanation: str = ""

    def to_dict(self) -> dict:
        return asdict(self)


def given_timeout(timeout_ms: float) -> TimeoutEstimate:
    return TimeoutEstimate(timeout_ms=float(timeout_ms), source="given",
                           explanation=f"{timeout_ms:g} ms, given on the command line (--timeout)")


def infer_timeout(move_on_hist: np.ndarray) -> TimeoutEstimate:
    """Estimate the master's timeout from the histogram of silences after unanswered requests.

    ``move_on_hist`` is one row per station (as kept by the accumulator) or a single row.
    """
    counts = np.asarray(move_on_hist).reshape(-1, FINE.count).sum(axis=0)
    n = int(counts.sum())
    if n < MIN_SAMPLES:
        return TimeoutEstimate(None, "not inferable", samples=n,
                               explanation=(f"only {n} unanswered request(s) were followed by another request; "
                                            f"at least {MIN_SAMPLES} are needed to infer the master's timeout "
                                            "(give it with --timeout)"))
    p5, p50, p95 = (round(float(quantile(counts, q, FINE)), 1) for q in (0.05, 0.5, 0.95))
    nearest = min(ROUND_VALUES_MS, key=lambda v: abs(v - p5))
    round_ms = float(nearest) if abs(nearest - p5) <= ROUND_TOLERANCE * nearest and nearest <= p5 * 1.02 else None
    estimate = round_ms if round_ms is not None else p5
    text = (f"inferred: after {n} unanswered requests the master moved on after {p5:g} ms of silence or more "
            f"(median {p50:g} ms, 95th percentile {p95:g} ms); its timeout is about {estimate:g} ms")
    return TimeoutEstimate(estimate, "inferred", n, p5, p50, p95, round_ms, text)
