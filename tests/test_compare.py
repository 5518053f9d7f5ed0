"""Divergence of runs and the Lyapunov estimators."""

import math
import os

import numpy as np
import pytest

from runner import spec as S
from runner.compare import classify_divergence, compare_jobs, shadow_lyapunov
from runner.ensemble import member_spec
from runner.ledger import Ledger
from runner.worker import Worker
from helpers import ROOT, small_spec_text


def test_cat_map_lyapunov_exponent_is_ln_golden_ratio_squared():
    # Arnold's cat map (x, y) -> (2x + y, x + y) mod 1 has Lyapunov exponent
    # ln((3 + sqrt 5) / 2) = 0.9624236501 exactly (eigenvalue of [[2,1],[1,1]];
    # ../shared/CHECKS.md, derived).
    def step(p):
        return np.array([(2 * p[0] + p[1]) % 1.0, (p[0] + p[1]) % 1.0])

    def distance(a, b):
        d = (b - a + 0.5) % 1.0 - 0.5  # on the torus
        return float(np.hypot(*d))

    def towards(a, b, f):
        return (a + f * ((b - a + 0.5) % 1.0 - 0.5)) % 1.0

    lam, err = shadow_lyapunov(step, [0.1234, 0.5678], 1e-9, 20000, distance, towards)
    assert lam == pytest.approx(math.log((3 + math.sqrt(5)) / 2), abs=1e-6)
    assert err < 1e-6


def test_classifier_on_synthetic_growth():
    t = np.linspace(0.1, 100, 500)
    lin = classify_divergence(t, 1e-12 * t)
    assert lin["kind"] == "linear" and lin["power"] == pytest.approx(1.0, abs=1e-9)
    ex = classify_divergence(t, 1e-12 * np.exp(t / 7.0))
    assert ex["kind"] == "exponential"
    assert ex["lyapunov_time"] == pytest.approx(7.0, rel=1e-6)


def _clones(tmp_path, text, members=2):
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    spec = S.load_text(text + """
[ensemble]
members = %d
[ensemble.perturb]
body = "%s"
quantity = "a"
size = 1e-10
relative = true
""" % (members, "Orrin c" if "Orrin" in text else "Ilvar x"))
    ids = [led.submit(member_spec(spec, k)) for k in range(members)]
    Worker(led).run()
    return led, ids


def test_regular_two_planet_clones_diverge_linearly(tmp_path):
    text = small_spec_text(length="5000 yr", output="500 steps", chunk="50000 steps")
    # Two planets only: drop Orrin d.
    text = text[:text.index('[[system.bodies]]\nname = "Orrin d"')] + \
        text[text.index("[method]"):]
    led, (a, b) = _clones(tmp_path, text)
    t, d, fit = compare_jobs(led, a, b)
    assert fit["kind"] == "linear" and 0.7 < fit["power"] < 1.3
    led.close()


def test_chaotic_clones_diverge_exponentially(tmp_path):
    text = open(os.path.join(ROOT, "jobs", "ilvar-ensemble.toml")).read()
    text = text[:text.index("[ensemble]")].replace("hill = 1.0", "hill = 0").replace(
        'length = "3000 yr"', 'length = "150 yr"').replace('output = "2000 steps"',
                                                           'output = "100 steps"')
    led, (a, b) = _clones(tmp_path, text)
    t, d, fit = compare_jobs(led, a, b)
    assert fit["kind"] == "exponential"
    assert 0 < fit["lyapunov_time"] < 50 and fit["lyapunov_time_err"] < fit["lyapunov_time"]
    led.close()
