"""Divergence of runs and the Lyapunov estimators."""

import math
import os

import numpy as np
import pytest

from orbitledger.runner.inputs import spec as S
from orbitledger.runner.analysis.divergence import classify_divergence, compare_jobs
from orbitledger.runner.analysis.lyapunov import shadow_lyapunov
from orbitledger.runner.inputs.ensemble import member_spec
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.execution.worker import Worker
from helpers import ROOT, small_spec_text


def _torus(step):
    def distance(a, b):
        d = (b - a + 0.5) % 1.0 - 0.5  # on the torus
        return float(np.hypot(*d))

    def towards(a, b, f):
        return (a + f * ((b - a + 0.5) % 1.0 - 0.5)) % 1.0

    return step, distance, towards


def test_cat_map_lyapunov_exponent_is_ln_golden_ratio_squared():
    # Arnold's cat map (x, y) -> (2x + y, x + y) mod 1 has Lyapunov exponent
    # ln((3 + sqrt 5) / 2) = 0.9624236501 exactly (the larger eigenvalue of
    # [[2,1],[1,1]]; derived).
    step, distance, towards = _torus(
        lambda p: np.array([(2 * p[0] + p[1]) % 1.0, (p[0] + p[1]) % 1.0]))
    x0 = np.array([0.1234, 0.5678])
    est = shadow_lyapunov(step, x0, x0 + [1e-9, 0.0], 20000, distance, towards)
    assert est.exponent == pytest.approx(math.log((3 + math.sqrt(5)) / 2), abs=1e-6)
    assert est.error < 1e-6


def test_henon_map_largest_exponent():
    # Henon map x' = 1 - 1.4 x^2 + y, y' = 0.3 x: largest Lyapunov exponent
    # 0.41922 (Sprott 2003, Chaos and Time-Series Analysis, Appendix A).
    # Same estimator code path as the integrations.
    def step(p):
        return np.array([1.0 - 1.4 * p[0] * p[0] + p[1], 0.3 * p[0]])

    def distance(a, b):
        return float(np.hypot(*(b - a)))

    def towards(a, b, f):
        return a + f * (b - a)

    x0 = np.array([0.1, 0.1])
    for _ in range(1000):  # onto the attractor
        x0 = step(x0)
    est = shadow_lyapunov(step, x0, x0 + [1e-9, 0.0], 400_000, distance, towards)
    assert est.exponent == pytest.approx(0.41922, rel=0.005)
    assert abs(est.exponent - 0.41922) < 4 * est.error
    assert est.error < 0.002


def test_classifier_never_calls_steep_growth_regular():
    t = np.linspace(0.1, 100, 500)
    lin = classify_divergence(t, 1e-12 * t)
    assert lin["kind"] == "regular" and lin["power"] == pytest.approx(1.0, abs=1e-9)
    assert classify_divergence(t, 1e-12 * np.exp(t / 7.0))["kind"] == "chaotic"
    # A steep power law: once called "linear (power 5.24)".
    steep = classify_divergence(t, 1e-12 * t ** 5.24)
    assert steep["kind"] == "chaotic" and steep["power"] == pytest.approx(5.24, rel=1e-9)
    assert classify_divergence(t, 1e-12 * t ** 3)["kind"] == "chaotic"
    # Round-off alone grows as t^(3/2) (Brouwer 1937): still regular.
    assert classify_divergence(t, 1e-15 * t ** 1.5)["kind"] == "regular"


def _clones(tmp_path, text, members=2, body=None):
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    spec = S.load_text(text + """
[ensemble]
members = %d
[ensemble.perturb]
body = "%s"
quantity = "a"
size = 1e-10
relative = true
""" % (members, body or ("Orrin c" if "Orrin" in text else "Ilvar x")))
    ids = [led.submit(member_spec(spec, k)) for k in range(members)]
    Worker(led).run()
    return led, ids


def test_widely_spaced_two_planets_are_regular(tmp_path):
    text = small_spec_text(length="5000 yr", output="500 steps", chunk="50000 steps")
    # Two planets only (Orrin b and c, about 20 mutual Hill radii apart).
    text = text[:text.index('[[system.bodies]]\nname = "Orrin d"')] + \
        text[text.index("[method]"):]
    led, (a, b) = _clones(tmp_path, text)
    t, d, fit = compare_jobs(led, a, b)
    assert fit["kind"] == "regular" and 0.7 < fit["power"] < 1.3
    assert not fit["saturated"]
    led.close()


OVERLAP = """
name = "overlap"
[system]
star = { name = "Sarn", mass = "1 Msun" }
[[system.bodies]]
name = "Sarn b"
mass = "0.001 Msun"
a = "1 au"
e = 0.0
[[system.bodies]]
name = "dust"
mass = "1e-12 Msun"
a = "1.14 au"
e = 0.0
mean_anomaly = "130 deg"
[method]
step = "4 d"
[span]
length = "200 yr"
output = "25 steps"
chunk = "100000 steps"
[budget]
energy = 1e-3
on_exceed = "continue"
"""


def test_particle_in_the_resonance_overlap_zone_is_chaotic(tmp_path):
    # A massless particle 0.14 in a/a from a planet of mass ratio 1e-3: inside
    # the resonance-overlap zone, half-width 1.3 mu^(2/7) = 0.18 (Wisdom 1980,
    # AJ 85, 1122). Two copies 1e-10 apart once separated by 1e9 within 35 yr
    # and were called "linear (power 5.24)".
    led, (a, b) = _clones(tmp_path, OVERLAP, body="dust")
    t, d, fit = compare_jobs(led, a, b)
    assert fit["kind"] == "chaotic"
    # A positive exponent over the short stretch before saturation (about
    # 10 yr, too short for a tight error bar), and over the whole 200 yr. How
    # tight the full-span error bar is depends on the sample (a chaotic orbit
    # spends its windows in different parts of the zone; one trajectory is a
    # sample, not a prediction), so only its sign and scale are asserted.
    assert fit["exponent_per_yr"] > fit["exponent_err_per_yr"] > 0
    assert fit["exponent_per_yr_full"] > 0 and fit["exponent_err_per_yr_full"] > 0
    assert 0 < fit["lyapunov_time_full"] < 50
    led.close()


def test_packed_clones_lyapunov_time_from_the_renormalised_shadow(tmp_path):
    text = open(os.path.join(ROOT, "jobs", "ilvar-ensemble.toml")).read()
    text = text[:text.index("[ensemble]")].replace("hill = 1.0", "hill = 0").replace(
        'length = "3000 yr"', 'length = "300 yr"').replace('output = "2000 steps"',
                                                           'output = "100 steps"')
    led, (a, b) = _clones(tmp_path, text)
    t, d, fit = compare_jobs(led, a, b)
    assert fit["kind"] == "chaotic" and fit["saturated"]
    T, err = fit["lyapunov_time"], fit["lyapunov_time_err"]
    assert 0 < err < T
    # The other clone samples the same chaotic zone: its own renormalised
    # estimate over the same stretch must agree within the combined errors.
    from orbitledger.runner.analysis.lyapunov import job_lyapunov

    steps = int(round(fit["window"] * 365.25 / 0.5))
    other = job_lyapunov(led, b, 0, span_steps=steps, every=max(1, min(100, steps // 200)))
    diff = abs(1 / T - other["exponent_per_yr"])
    assert diff < 3 * math.hypot(fit["exponent_err_per_yr"], other["exponent_err_per_yr"])
    # The divergence plot draws that slope; the sentence names the method.
    from orbitledger.runner.analysis.divergence import describe_divergence

    assert "renormalised shadow" in describe_divergence(fit)
    led.close()
