"""The audit's statistics (capnote.audit.stats) against published worked values and
general-purpose reference libraries."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import binomtest, norm

from capnote.audit.stats import Z95, Z998, funnel_limits, outside, quantile, quantile_from, wilson


@pytest.mark.parametrize(
    ("count", "total", "low", "high"),
    [
        # Newcombe, Stat Med 1998;17:857, Table I, method 3 (Wilson score without continuity
        # correction); the four worked examples, to the table's four decimals.
        (81, 263, 0.2553, 0.3662),
        (15, 148, 0.0624, 0.1605),
        (0, 20, 0.0000, 0.1611),
        (1, 29, 0.0061, 0.1718),
    ],
)
def test_wilson_matches_newcombes_worked_examples(
    count: int, total: int, low: float, high: float
) -> None:
    got = wilson(count, total)
    assert round(got[0], 4) == low
    assert round(got[1], 4) == high


@pytest.mark.parametrize(("count", "total"), [(0, 1), (3, 7), (50, 50), (192, 2000), (1, 10_000)])
def test_wilson_agrees_with_scipy(count: int, total: int) -> None:
    # Reference library: scipy.stats.binomtest(...).proportion_ci(method="wilson").
    ci = binomtest(count, total).proportion_ci(confidence_level=0.95, method="wilson")
    low, high = wilson(count, total)
    assert low == pytest.approx(ci.low, abs=1e-12)
    assert high == pytest.approx(ci.high, abs=1e-12)


def test_wilson_refuses_impossible_counts() -> None:
    for count, total in ((1, 0), (-1, 5), (6, 5)):
        with pytest.raises(ValueError, match="count <= total"):
            wilson(count, total)


def test_funnel_limits_are_spiegelhalters_normal_limits() -> None:
    # Spiegelhalter, Stat Med 2005;24:1185: p0 +/- z sqrt(p0 (1 - p0) / n), z for 95% and
    # 99.8% two-sided (1.96 and 3.09); z checked against scipy.stats.norm.
    assert norm.ppf(0.975) == pytest.approx(Z95, abs=1e-9)
    assert norm.ppf(0.999) == pytest.approx(Z998, abs=1e-9)
    limits = funnel_limits(0.1, 100)
    assert limits.low95 == pytest.approx(0.1 - 1.959964 * 0.03, abs=1e-6)
    assert limits.high95 == pytest.approx(0.1588, abs=1e-4)
    assert limits.high998 == pytest.approx(0.1 + 3.090232 * 0.03, abs=1e-6)
    assert limits.low998 == pytest.approx(0.0073, abs=1e-4)
    # Limits narrow as 1/sqrt(n), and never leave [0, 1].
    assert funnel_limits(0.1, 400).high95 - 0.1 == pytest.approx((limits.high95 - 0.1) / 2)
    assert funnel_limits(0.02, 5).low998 == 0.0


def test_outside_places_counts_against_the_limits() -> None:
    # 0.1 target at n = 100: 95% limits 4.1% to 15.9%, 99.8% limits 0.7% to 19.3%.
    assert outside(10, 100, 0.1) == "within"
    assert outside(17, 100, 0.1) == "above 95%"
    assert outside(20, 100, 0.1) == "above 99.8%"
    assert outside(3, 100, 0.1) == "below 95%"
    assert outside(0, 100, 0.1) == "below 99.8%"


@pytest.mark.parametrize("n", [1, 2, 3, 4, 5, 10, 101])
def test_quantiles_agree_with_numpy_from_the_neighbouring_ranks_alone(n: int) -> None:
    values = sorted(math.sin(i) * 50 + 60 for i in range(n))
    for q in (0.25, 0.5, 0.75):
        # Reference library: numpy.percentile's default (linear, Hyndman and Fan type 7).
        expected = float(np.percentile(values, 100 * q))
        assert quantile(values, q) == pytest.approx(expected)
        h = (n - 1) * q
        near = {r: values[r - 1] for r in range(1, n + 1) if abs((r - 1) - h) < 1}
        assert len(near) <= 2
        assert quantile_from(n, near, q) == pytest.approx(expected)
