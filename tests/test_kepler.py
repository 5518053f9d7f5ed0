"""Kepler drift by universal variables, against textbook examples and invariants."""

import math

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from numba import njit

from orbitledger.integrators import propagate, stumpff
from orbitledger.integrators import elements as el
from orbitledger.integrators.kepler import drift_row, solve_universal
import kepler_reference as K


def test_vallado_example_2_4():
    # Vallado, Fundamentals of Astrodynamics and Applications, Example 2-4
    # (values as in ../shared/CHECKS.md): mu = 398600.4415 km^3/s^2, 40 min.
    r, v = propagate([1131.340, -2282.343, 6672.423], [-5.64305, 4.30333, 2.42879],
                     398600.4415, 40 * 60.0)
    np.testing.assert_allclose(r, [-4219.7527, 4363.0292, -3958.7666], atol=1e-4)
    np.testing.assert_allclose(v, [3.689866, -1.916735, -6.112511], atol=1e-6)


def test_vallado_example_2_1_eccentric_anomaly():
    # Vallado, Example 2-1: M = 235.4 deg, e = 0.4 gives E = 220.512074767522 deg.
    e_an = el.eccentric_anomaly(math.radians(235.4), 0.4)
    assert math.degrees(e_an) == pytest.approx(220.512074767522, abs=1e-11)


@pytest.mark.parametrize("x", [-50.0, -3.0, -0.05, 0.0, 1e-8, 0.07, 0.5, 2.0, 9.0, 30.0])
def test_stumpff_against_closed_forms(x):
    # Closed forms of the Stumpff functions (Danby 1988, eq. 6.9.11).
    if x > 0:
        s = math.sqrt(x)
        ref = (math.cos(s), math.sin(s) / s, (1 - math.cos(s)) / x, (s - math.sin(s)) / s**3)
    elif x < 0:
        s = math.sqrt(-x)
        ref = (math.cosh(s), math.sinh(s) / s, (math.cosh(s) - 1) / -x, (math.sinh(s) - s) / s**3)
    else:
        ref = (1.0, 1.0, 0.5, 1.0 / 6.0)
    got = stumpff(x)
    # The closed forms themselves cancel badly for small |x|; compare loosely there.
    tol = 1e-13 if abs(x) > 0.01 else 1e-7
    for g, r in zip(got, ref):
        assert g == pytest.approx(r, rel=tol, abs=1e-300)


@njit(cache=True)
def _many_drifts(x, v, mu, dt, n):
    for _ in range(n):
        drift_row(x, v, 0, mu, dt)


def _invariants(mu, x, v):
    h = np.cross(x, v)
    r = np.linalg.norm(x)
    energy = 0.5 * v @ v - mu / r
    lrl = np.cross(v, h) / mu - x / r
    return energy, h, lrl


@pytest.mark.parametrize("ecc", [0.0167, 0.6, 0.99])
def test_two_body_invariants_over_1e5_orbits(ecc):
    # Energy, angular momentum and the Laplace-Runge-Lenz vector are constant
    # on a Kepler orbit (two-body invariants, any textbook; CHECKS.md).
    mu = 2.959122082855911e-4
    x0, v0 = el.to_state(mu, 1.0, ecc, 0.3, 0.7, 1.1, 0.4)
    period = 2 * math.pi * math.sqrt(1.0 / mu)
    n_orbits, per_orbit = 100_000, 7
    x, v = x0.reshape(1, 3).copy(), v0.reshape(1, 3).copy()
    _many_drifts(x, v, mu, period / per_orbit * 1.0001, n_orbits * per_orbit)
    e0, h0, l0 = _invariants(mu, x0, v0)
    e1, h1, l1 = _invariants(mu, x[0], v[0])
    # Near pericentre v^2/2 and mu/r each exceed the energy by about
    # (1+e)/(1-e), so round-off in the state is amplified by that much.
    amplification = (1 + ecc) / (1 - ecc)
    assert abs(e1 / e0 - 1) < 1e-11 * amplification
    assert np.linalg.norm(h1 - h0) / np.linalg.norm(h0) < 1e-11
    assert np.linalg.norm(l1 - l0) < 1e-10 * amplification


@settings(max_examples=150, deadline=None)
@given(ecc=st.floats(0.0, 0.98), nu=st.floats(-math.pi, math.pi),
       frac=st.floats(-3.5, 3.5), inc=st.floats(0, math.pi))
def test_elliptic_drift_matches_independent_solution(ecc, nu, frac, inc):
    # Reference: tests/kepler_reference.py (Kepler's equation in 60-digit
    # arithmetic; Danby 1988 sec. 6.3), started from the same doubles.
    mu, a = 1.0, 1.3
    period = 2 * math.pi * math.sqrt(a**3 / mu)
    x0, v0 = K.state_from_anomaly(a, ecc, nu, mu, inc=inc, node=0.4, peri=2.0)
    x1, v1 = propagate(x0, v0, mu, frac * period)
    xr, vr = K.propagate(x0, v0, mu, frac * period)
    # Up to e = 0.98 the problem's own sensitivity to one rounding of the
    # inputs stays below ~1e-10 (tests/test_kepler_exact.py covers e -> 1).
    assert np.linalg.norm(x1 - xr) / np.linalg.norm(xr) < 1e-10
    assert np.linalg.norm(v1 - vr) / np.linalg.norm(vr) < 1e-10


@settings(max_examples=80, deadline=None)
@given(ecc=st.floats(1.01, 5.0), frac=st.floats(-0.9, 0.9), dt=st.floats(-20.0, 20.0))
def test_hyperbolic_drift_matches_independent_solution(ecc, frac, dt):
    # Reference: tests/kepler_reference.py (hyperbolic Kepler equation,
    # Danby 1988 sec. 6.4), started from the same doubles.
    mu, q = 1.0, 2.0 * (ecc - 1)
    nu = frac * math.acos(-1 / ecc)
    x0, v0 = K.state_from_anomaly(q / (ecc - 1), ecc, nu, mu, inc=0.5, node=0.2, peri=0.9)
    x1, v1 = propagate(x0, v0, mu, dt)
    xr, vr = K.propagate(x0, v0, mu, dt)
    assert np.linalg.norm(x1 - xr) / np.linalg.norm(xr) < 1e-12
    assert np.linalg.norm(v1 - vr) / np.linalg.norm(vr) < 1e-12


def test_drift_matches_scipy_dop853_for_eccentric_and_hyperbolic():
    # Reference: scipy's DOP853 on the two-body ODE at rtol 1e-13.
    from scipy.integrate import solve_ivp

    mu = 1.0

    def rhs(_, y):
        r = y[:3]
        return np.concatenate([y[3:], -mu * r / np.linalg.norm(r) ** 3])

    for a, ecc in ((1.0, 0.99), (-1.0, 1.5)):
        x0, v0 = el.to_state(mu, a, ecc, 0.2, 0.1, 0.3, -0.5)
        t = 4.0
        sol = solve_ivp(rhs, (0, t), np.concatenate([x0, v0]), method="DOP853",
                        rtol=1e-13, atol=1e-15)
        x1, v1 = propagate(x0, v0, mu, t)
        np.testing.assert_allclose(x1, sol.y[:3, -1], rtol=1e-9, atol=1e-11)
        np.testing.assert_allclose(v1, sol.y[3:, -1], rtol=1e-9, atol=1e-11)


def test_reproducibility_long_arc_equals_short_arc_modulo_period():
    # Reproducibility, not correctness: the code compared with itself (the
    # period reduction against no reduction).
    mu = 1.0
    x0, v0 = el.to_state(mu, 1.0, 0.3, 0.1, 0.2, 0.3, 0.4)
    period = 2 * math.pi
    x_long, _ = propagate(x0, v0, mu, 1000 * period + 0.3)
    x_short, _ = propagate(x0, v0, mu, 0.3)
    assert np.linalg.norm(x_long - x_short) < 1e-10


def test_universal_solver_residual_near_apocentre_high_e():
    # e = 0.999 at apocentre with a long step: the hardest case for Newton.
    mu = 1.0
    x0, v0 = el.to_state(mu, 1.0, 0.999, 0.0, 0.0, 0.0, math.pi)
    r0 = np.linalg.norm(x0)
    eta0 = float(x0 @ v0)
    beta = 2 * mu / r0 - float(v0 @ v0)
    dt = 3.0  # about half a period: the orbit passes pericentre
    s = solve_universal(r0, eta0, beta, mu, dt)[0]
    c0, c1, c2, c3 = stumpff(beta * s * s)
    t = r0 * s + eta0 * s * s * c2 + (mu - beta * r0) * s**3 * c3
    assert t == pytest.approx(dt, rel=1e-13)
