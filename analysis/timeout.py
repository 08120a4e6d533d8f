"""The master's response timeout: given by the user, or inferred from how the master behaves.

After a request nobody answers, the master waits for its timeout and then moves on to its
next request. The silence from the unanswered request's end to the next request's start is
therefore the timeout plus the master's own reaction time, never less. A master also never
waited less than the slowest answer it accepted, so silences shorter than that (a master that
gave up early on a damaged answer) are left out. The low end of the rest (their 5th
percentile) is the estimate; the spread is reported as the evidence. When unanswered requests
end a poll cycle the master may wait longer than its timeout before the next cycle, so the
estimate is taken from the lowest cluster of silences that holds at least CLUSTER_MIN of them.
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
#: Width of a cluster of silences: a master's timer plus its reaction time varies by less than this
#: (common practice: masters poll from a timer tick of a few ms).
CLUSTER_RATIO = 1.15
#: Silences a cluster needs to count as the master's timeout rather than a stray pause.
CLUSTER_MIN = 3
#: The slowest answers the master accepted, as a floor for its timeout: a high quantile rather
#: than the maximum, so one mis-paired answer cannot lift the floor.
SLOWEST_ACCEPTED_Q = 0.999


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


def infer_timeout(move_on_hist: np.ndarray, accepted_hist: np.ndarray | None = None) -> TimeoutEstimate:
    """Estimate the master's timeout from the histogram of silences after unanswered requests.

    ``move_on_hist`` is one row per station (as kept by the accumulator) or a single row;
    ``accepted_hist`` the response times of answers the master took in time, whose high end
    is a floor for the timeout.
    """
    counts = np.asarray(move_on_hist).reshape(-1, FINE.count).sum(axis=0).copy()
    slowest_accepted_ms = None if accepted_hist is None else quantile(np.asarray(accepted_hist), SLOWEST_ACCEPTED_Q,
                                                                        FINE)
    early = 0
    if slowest_accepted_ms is not None:
        k = int(FINE.index(np.array([slowest_accepted_ms]))[0])
        early = int(counts[:k].sum())
        counts[:k] = 0
    n = int(counts.sum())
    if n < MIN_SAMPLES:
        return TimeoutEstimate(None, "not inferable", samples=n,
                               explanation=(f"only {n} unanswered request(s) were followed by another request; "
                                            f"at least {MIN_SAMPLES} are needed to infer the master's timeout "
                                            "(give it with --timeout)"))
    p50, p95 = (round(float(quantile(counts, q, FINE)), 1) for q in (0.5, 0.95))
    width = int(np.ceil(np.log(CLUSTER_RATIO) / np.log(FINE.ratio)))
    window = np.convolve(counts, np.ones(width, np.int64))[width - 1:]  # window[k] = counts[k:k + width].sum()
    starts = np.flatnonzero((window >= CLUSTER_MIN) & (counts > 0))
    k = int(starts[0]) if len(starts) else int(np.flatnonzero(counts)[0])
    cluster = np.zeros_like(counts)
    cluster[k:k + width] = counts[k:k + width]
    p5 = round(float(quantile(cluster, 0.05, FINE)), 1)
    nearest = min(ROUND_VALUES_MS, key=lambda v: abs(v - p5))
    round_ms = float(nearest) if abs(nearest - p5) <= ROUND_TOLERANCE * nearest and nearest <= p5 * 1.02 else None
    estimate = round_ms if round_ms is not None else p5
    text = (f"inferred: after {n} unanswered requests the master moved on after {p5:g} ms of silence or more "
            f"(median {p50:g} ms, 95th percentile {p95:g} ms); its timeout is about {estimate:g} ms")
    if early:
        text += (f" ({early} shorter silences, below the slowest answer the master accepted "
                 f"({slowest_accepted_ms:.1f} ms, 99.9th percentile), were left out: it gave up early there, e.g. on "
                 f"a damaged answer)")
    return TimeoutEstimate(estimate, "inferred", n, p5, p50, p95, round_ms, text)
