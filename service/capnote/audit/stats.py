"""Confidence intervals and funnel limits for proportions, as clinical audit reports use.

Pure functions, no I/O. Sources:
- Wilson score interval: E. B. Wilson, J Am Stat Assoc 1927;22:209; method 3 of
  R. G. Newcombe, Stat Med 1998;17:857.
- Funnel plots for proportions: D. J. Spiegelhalter, Stat Med 2005;24:1185, with limits at
  p0 +/- z * sqrt(p0 (1 - p0) / n) for z of the 95% and 99.8% two-sided levels.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from statistics import NormalDist

# Two-sided quantiles: 95% (1.96) and 99.8% (3.09), the usual funnel "2 and 3 sigma".
Z95 = NormalDist().inv_cdf(0.975)
Z998 = NormalDist().inv_cdf(0.999)
# Counts under this are marked in reports (small numbers: unstable and re-identifying).
SMALL_COUNT = 5


@dataclass(frozen=True, slots=True)
class Rate:
    """A count over its denominator with its 95% Wilson interval (None when n is 0)."""

    count: int
    total: int
    low: float | None
    high: float | None

    @property
    def value(self) -> float | None:
        return self.count / self.total if self.total else None

    @property
    def small(self) -> bool:
        """The count or the denominator is under SMALL_COUNT: marked, never hidden."""
        return self.count < SMALL_COUNT or self.total < SMALL_COUNT


def wilson(count: int, total: int, z: float = Z95) -> tuple[float, float]:
    """The Wilson score interval for count successes out of total (total > 0)."""
    if total <= 0 or not 0 <= count <= total:
        raise ValueError(f"need 0 <= count <= total and total > 0, got {count}/{total}")
    p = count / total
    z2 = z * z
    centre = (p + z2 / (2 * total)) / (1 + z2 / total)
    half = z / (1 + z2 / total) * math.sqrt(p * (1 - p) / total + z2 / (4 * total * total))
    # Clamp rounding only: the interval always lies in [0, 1].
    return max(0.0, centre - half), min(1.0, centre + half)


def rate(count: int, total: int) -> Rate:
    """count/total with its 95% Wilson interval."""
    if total == 0:
        return Rate(count, 0, None, None)
    low, high = wilson(count, total)
    return Rate(count, total, low, high)


@dataclass(frozen=True, slots=True)
class FunnelLimits:
    """Control limits around a target proportion for one denominator."""

    n: int
    low95: float
    high95: float
    low998: float
    high998: float


def funnel_limits(target: float, n: int) -> FunnelLimits:
    """Normal-approximation funnel limits around target for a denominator n (Spiegelhalter
    2005, section 3.1), clamped to [0, 1]."""
    if n <= 0 or not 0 <= target <= 1:
        raise ValueError(f"need n > 0 and 0 <= target <= 1, got n={n}, target={target}")
    spread = math.sqrt(target * (1 - target) / n)

    def clamp(x: float) -> float:
        return min(1.0, max(0.0, x))

    return FunnelLimits(
        n,
        clamp(target - Z95 * spread),
        clamp(target + Z95 * spread),
        clamp(target - Z998 * spread),
        clamp(target + Z998 * spread),
    )


def outside(count: int, n: int, target: float) -> str:
    """Where count/n falls against the funnel: "above 99.8%", "above 95%", "within",
    "below 95%" or "below 99.8%"."""
    limits = funnel_limits(target, n)
    p = count / n
    if p > limits.high998:
        return "above 99.8%"
    if p > limits.high95:
        return "above 95%"
    if p < limits.low998:
        return "below 99.8%"
    if p < limits.low95:
        return "below 95%"
    return "within"


def quantile(sorted_values: list[float], q: float) -> float:
    """The q-quantile by linear interpolation between order statistics (Hyndman and Fan
    1996 type 7, the default of R and NumPy)."""
    if not sorted_values:
        raise ValueError("no values")
    h = (len(sorted_values) - 1) * q
    lo = math.floor(h)
    hi = min(lo + 1, len(sorted_values) - 1)
    return sorted_values[lo] + (h - lo) * (sorted_values[hi] - sorted_values[lo])


def quantile_from(n: int, ranked: dict[int, float], q: float) -> float:
    """The type-7 q-quantile of n sorted values when only some are at hand, by 1-based rank
    (the rows next to position (n - 1) q, as capnote.store.audit_sql fetches them)."""
    h = (n - 1) * q
    lo = math.floor(h)
    below = ranked[lo + 1]
    above = ranked.get(lo + 2, below)
    return below + (h - lo) * (above - below)
