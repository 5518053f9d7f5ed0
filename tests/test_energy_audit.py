"""The growth-law fit recovers alpha from synthetic series; verdicts follow."""

import numpy as np
import pytest

from orbitledger.runner.analysis.budgets import fit_growth, judge


@pytest.mark.parametrize("alpha", [0.0, 0.5, 1.0, 1.5])
def test_fit_recovers_alpha_with_noise(alpha):
    rng = np.random.default_rng(int(alpha * 10))
    t = np.linspace(1.0, 1e6, 20000)
    # A bounded oscillation times the secular law, with multiplicative noise.
    err = 1e-10 * t**alpha * (1 + 0.5 * np.abs(np.sin(0.37 * t))) * np.exp(
        0.2 * rng.standard_normal(len(t)))
    fit = fit_growth(t, err)
    assert fit.alpha == pytest.approx(alpha, abs=0.05)
    assert fit.alpha_err < 0.05


def test_random_walk_is_recovered_as_one_half():
    # Brouwer 1937: unbiased round-off makes the error a random walk, ~ t^(1/2).
    rng = np.random.default_rng(3)
    steps = rng.standard_normal((400, 100_000)) * 1e-16
    walk = np.abs(np.cumsum(steps, axis=1)).mean(axis=0)
    t = np.arange(1, walk.size + 1, dtype=float)
    fit = fit_growth(t, walk)
    assert fit.alpha == pytest.approx(0.5, abs=0.05)


def test_verdicts():
    t = np.linspace(1, 1000, 5000)
    bounded = 1e-9 * (1 + np.sin(t))
    assert judge("energy", t, bounded, 1e-8, 1e6).verdict == "within budget"
    walk = 1e-10 * np.sqrt(t)
    v = judge("energy", t, walk, 1e-8, 1e6)   # 3e-9 now, 1e-7 at the end
    assert v.verdict == "projected over budget" and v.projected > 1e-8
    drift = 1e-12 * t
    assert judge("energy", t, drift, 1.0, 1e3).verdict == "systematic drift"
    assert judge("energy", t, drift, 1e-10, 1e3).verdict == "over budget"
