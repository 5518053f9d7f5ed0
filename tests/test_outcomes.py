"""Ensemble statistics against scipy and a textbook Kaplan-Meier example."""

import numpy as np
import pytest
from scipy import stats

from orbitledger.runner.analysis.outcomes import kaplan_meier, summarise, wilson


@pytest.mark.parametrize("k,n", [(0, 16), (3, 16), (8, 16), (16, 16), (1, 1000), (57, 200)])
def test_wilson_matches_scipy_and_the_closed_form(k, n):
    lo, hi = wilson(k, n)
    ref = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    assert (lo, hi) == (ref.low, ref.high)
    # Wilson 1927 closed form, z = 1.959964 (two-sided 95 %).
    z = stats.norm.ppf(0.975)
    p = k / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z / (1 + z * z / n) * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    assert lo == pytest.approx(max(0.0, centre - half), abs=1e-12)
    assert hi == pytest.approx(min(1.0, centre + half), abs=1e-12)


def test_kaplan_meier_textbook_example():
    # Remission times (weeks) of the 6-MP group of Freireich et al. 1963
    # (Blood 21, 699), the standard worked example of Kaplan-Meier with
    # censoring, e.g. Kleinbaum & Klein, "Survival Analysis: A Self-Learning
    # Text", ch. 2 (data and table from memory). "+" = censored. The
    # product-limit values below were re-derived by hand:
    # S(6) = 18/21, S(7) = S(6) 16/17, S(10) = S(7) 14/15, S(13) = S(10) 11/12,
    # S(16) = S(13) 10/11, S(22) = S(16) 6/7, S(23) = S(22) 5/6.
    data = "6 6 6 6+ 7 9+ 10 10+ 11+ 13 16 17+ 19+ 20+ 22 23 25+ 32+ 32+ 34+ 35+".split()
    t = [float(x.rstrip("+")) for x in data]
    ev = [not x.endswith("+") for x in data]
    km_t, km_s, lo, hi = kaplan_meier(t, ev)
    np.testing.assert_allclose(km_t, [6, 7, 10, 13, 16, 22, 23])
    expected = np.cumprod([18 / 21, 16 / 17, 14 / 15, 11 / 12, 10 / 11, 6 / 7, 5 / 6])
    np.testing.assert_allclose(km_s, expected, rtol=1e-12)
    # The published table, three decimals (from memory).
    np.testing.assert_allclose(km_s, [0.857, 0.807, 0.753, 0.690, 0.627, 0.538, 0.448], atol=6e-4)
    assert np.all(lo <= km_s + 1e-12) and np.all(km_s <= hi + 1e-12)


def _row(status, outcome=None, t_days=None, steps=100, dt=365.25):
    return {"status": status, "outcome": outcome, "outcome_time": t_days, "steps_done": steps,
            "dt": dt}


def test_summary_treats_unfinished_members_as_censored():
    rows = [_row("stopped", "close_encounter", 10 * 365.25, 10),
            _row("stopped", "ejection", 40 * 365.25, 40),
            _row("done", "survived", None, 100),
            _row("running", None, None, 55),
            _row("stopped", "over_budget", 70 * 365.25, 70)]
    s = summarise(rows)
    assert s.n == 5 and s.unstable == 2 and s.fraction == 0.4
    assert s.counts["close_encounter"] == 1 and s.counts["survived"] == 1
    assert s.counts["over_budget"] == 1
    np.testing.assert_allclose(s.km_t, [10, 40])
    # At t=10: 5 at risk -> 4/5; at t=40: 4 at risk (55, 70, 100 censored later) -> 4/5*3/4.
    np.testing.assert_allclose(s.km_s, [0.8, 0.6])
    assert s.median is None
    assert s.ci == wilson(2, 5)


def test_band_is_undefined_where_survival_reaches_zero():
    # Every member unstable: S falls to 0 at the last time. Greenwood's
    # variance (Kaplan & Meier 1958; Greenwood 1926) is 0/0 there, so the
    # band is undefined (NaN), never a filled-in 1.0.
    km_t, km_s, lo, hi = kaplan_meier([1.0, 2.0, 3.0, 5.0], [True, True, True, True])
    np.testing.assert_allclose(km_s, [0.75, 0.5, 0.25, 0.0])
    assert np.isnan(lo[-1]) and np.isnan(hi[-1])
    assert np.all(np.isfinite(hi[:-1])) and np.all(np.isfinite(lo[:-1]))
