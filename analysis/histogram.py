"""Log-spaced histograms: streaming quantiles of response times with a stated resolution.

A night holds millions of response times; keeping them all would make memory grow with the
capture. A histogram whose bin edges grow by a constant ratio keeps every quantile to a fixed
*relative* resolution whatever the count, and two histograms merge by adding their counts.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class LogBins:
    """Bin edges ``lo_ms * ratio**k``; values below ``lo_ms`` fall in bin 0, above the top in the last."""

    lo_ms: float
    hi_ms: float
    ratio: float

    @property
    def count(self) -> int:
        return math.ceil(math.log(self.hi_ms / self.lo_ms) / math.log(self.ratio)) + 1

    @property
    def relative_resolution(self) -> float:
        """Largest relative error of a value reported as its bin's geometric centre."""
        return math.sqrt(self.ratio) - 1.0

    def index(self, values_ms: np.ndarray) -> np.ndarray:
        """Bin index of each value (values must be finite).

        The arithmetic of ``floor(log(max(v, lo) / lo) / log(ratio))``, step by step in one buffer
        (every figure bins millions of values: the temporaries cost as much as the logarithm).
        """
        v = np.array(values_ms, dtype=np.float64)  # a copy (also of a scalar) to work in
        np.maximum(v, self.lo_ms, out=v)
        v /= self.lo_ms
        np.log(v, out=v)
        v /= math.log(self.ratio)
        np.floor(v, out=v)
        k = v.astype(np.int64)
        return np.clip(k, 0, self.count - 1, out=k)

    def centre(self, k: np.ndarray | int) -> np.ndarray | float:
        """Geometric centre of bin ``k``."""
        return self.lo_ms * self.ratio ** (np.asarray(k, dtype=np.float64) + 0.5)

    def lower_edge(self, k: np.ndarray | int) -> np.ndarray | float:
        return self.lo_ms * self.ratio ** np.asarray(k, dtype=np.float64)


#: Response times and gaps: 10 µs to 10 min, edges 1 % apart (quantiles within ±0.5 %).
FINE = LogBins(lo_ms=0.01, hi_ms=600_000.0, ratio=1.01)
#: Per-minute series: 0.1 ms to 100 s, edges 8 % apart (per-minute bands within ±4 %).
COARSE = LogBins(lo_ms=0.1, hi_ms=100_000.0, ratio=1.08)


def quantile(counts: np.ndarray, q: float, bins: LogBins, vmin: float | None = None,
             vmax: float | None = None) -> float | None:
    """The ``q`` quantile (0..1) of the values counted in ``counts``, or None when empty.

    Nearest-rank on the bins, reported as the bin's geometric centre and kept inside the exact
    minimum and maximum when they are given.
    """
    total = int(counts.sum())
    if total == 0:
        return None
    rank = max(1, math.ceil(q * total))
    k = int(np.searchsorted(np.cumsum(counts), rank))
    value = float(bins.centre(k))
    if vmin is not None:
        value = max(value, vmin)
    if vmax is not None:
        value = min(value, vmax)
    return value


def quantiles_rows(counts: np.ndarray, q: float, bins: LogBins) -> np.ndarray:
    """The ``q`` quantile of each row of a 2-D count array; NaN for empty rows."""
    totals = counts.sum(axis=1)
    out = np.full(counts.shape[0], np.nan)
    nz = totals > 0
    if not nz.any():
        return out
    cum = np.cumsum(counts[nz], axis=1)
    rank = np.maximum(1, np.ceil(q * totals[nz])).astype(np.int64)
    k = (cum < rank[:, None]).sum(axis=1)
    out[nz] = bins.centre(k)
    return out


def count_above(counts: np.ndarray, threshold_ms: float, bins: LogBins) -> int:
    """Values in bins lying wholly above ``threshold_ms`` (a lower bound on the true count)."""
    k = int(bins.index(np.array([threshold_ms]))[0])
    return int(counts[k + 1:].sum())
