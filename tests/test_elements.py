"""Orbital elements <-> state and coordinate transforms.

Round trips (to_state then from_state) are self-consistency checks; the
check against an independent conic is test_to_state_matches_independent_conic.
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from orbitledger.integrators import G, System
from orbitledger.integrators import elements as el
from orbitledger.integrators.system import inertial_from_jacobi, jacobi_from_inertial


def _angle_diff(a, b):
    return abs((a - b + math.pi) % (2 * math.pi) - math.pi)


@settings(max_examples=200, deadline=None)
@given(a=st.floats(0.1, 100.0), ecc=st.floats(0.001, 0.98), inc=st.floats(0.01, 3.13),
       node=st.floats(0, 6.28), peri=st.floats(0, 6.28), mean=st.floats(0, 6.28))
def test_elliptic_round_trip(a, ecc, inc, node, peri, mean):
    mu = 2.9591220828e-4
    x, v = el.to_state(mu, a, ecc, inc, node, peri, mean)
    a2, e2, i2, n2, p2, m2 = el.from_state(mu, x, v)
    assert a2 == pytest.approx(a, rel=1e-10)
    assert e2 == pytest.approx(ecc, abs=1e-10)
    assert i2 == pytest.approx(inc, abs=1e-10)
    # Angles on a nearly circular orbit are ill-conditioned; compare the state.
    x2, v2 = el.to_state(mu, a2, e2, i2, n2, p2, m2)
    np.testing.assert_allclose(x2, x, rtol=0, atol=1e-9 * a)
    np.testing.assert_allclose(v2, v, rtol=0, atol=1e-9 * np.linalg.norm(v))


@settings(max_examples=100, deadline=None)
@given(a=st.floats(-50.0, -0.1), ecc=st.floats(1.05, 10.0), inc=st.floats(0.01, 3.13),
       mean=st.floats(-5, 5))
def test_hyperbolic_round_trip(a, ecc, inc, mean):
    mu = 1.0
    x, v = el.to_state(mu, a, ecc, inc, 1.0, 2.0, mean)
    a2, e2, i2, n2, p2, m2 = el.from_state(mu, x, v)
    assert a2 == pytest.approx(a, rel=1e-9)
    assert e2 == pytest.approx(ecc, rel=1e-10)
    assert m2 == pytest.approx(mean, abs=1e-8 * max(1, abs(mean)))


@pytest.mark.parametrize("ecc,inc", [(0.0, 0.0), (0.0, 0.3), (0.2, 0.0), (0.0, math.pi)])
def test_degenerate_orbits_have_no_nan_and_round_trip(ecc, inc):
    mu = 1.0
    x, v = el.to_state(mu, 2.0, ecc, inc, 0.5, 0.7, 1.9)
    out = el.from_state(mu, x, v)
    assert all(math.isfinite(q) for q in out)
    x2, v2 = el.to_state(mu, *out)
    np.testing.assert_allclose(x2, x, atol=1e-12)
    np.testing.assert_allclose(v2, v, atol=1e-12)


def test_jacobi_round_trip_and_centre_of_mass():
    rng = np.random.default_rng(1)
    gm = np.abs(rng.normal(size=5)) * 1e-3
    gm[0] = G
    x = rng.normal(size=(5, 3))
    xj = jacobi_from_inertial(gm, x)
    np.testing.assert_allclose(xj[0], (gm[:, None] * x).sum(0) / gm.sum(), rtol=1e-14)
    np.testing.assert_allclose(xj[1], x[1] - x[0], rtol=1e-14)
    np.testing.assert_allclose(inertial_from_jacobi(gm, xj), x, rtol=1e-13, atol=1e-15)


def test_system_from_elements_is_barycentric_and_recovers_elements():
    names = ["Tessaly", "b", "c"]
    s = System.from_elements(names, [0.9, 1e-3, 3e-4],
                             [[1.0, 0.05, 1.0, 10, 20, 30], [2.5, 0.1, 2.0, 40, 50, 60]])
    xb, vb = s.barycentric()
    np.testing.assert_allclose(xb, s.x, atol=1e-15)
    els = s.elements()
    np.testing.assert_allclose(els[:, 0], [1.0, 2.5], rtol=1e-12)
    np.testing.assert_allclose(els[:, 1], [0.05, 0.1], rtol=1e-10)
    np.testing.assert_allclose(els[:, 3:], [[10, 20, 30], [40, 50, 60]], atol=1e-8)
    # Jacobi elements round-trip through the Jacobi frame.
    sj = System.from_elements(names, [0.9, 1e-3, 3e-4],
                              [[1.0, 0.05, 1.0, 10, 20, 30], [2.5, 0.1, 2.0, 40, 50, 60]],
                              frame="jacobi")
    np.testing.assert_allclose(sj.elements(frame="jacobi")[:, :2], [[1.0, 0.05], [2.5, 0.1]],
                               rtol=1e-10)


def test_bad_elements_are_named():
    with pytest.raises(ValueError, match="semi-major axis must be positive"):
        el.to_state(1.0, -1.0, 0.5, 0, 0, 0, 0)
    with pytest.raises(ValueError, match="eccentricity 1"):
        el.to_state(1.0, 1.0, 1.0, 0, 0, 0, 0)
    with pytest.raises(ValueError, match="unique"):
        System(["a", "a"], [1.0, 0.0], np.zeros((2, 3)), np.zeros((2, 3)))


def test_compiled_elements_match_reference_conversion():
    from orbitledger.integrators.diagnostics import heliocentric_elements

    s = System.from_elements(["Tessaly", "b", "c", "d"], [0.9, 1e-3, 3e-4, 1e-5],
                             [[1.0, 0.05, 1.0, 10, 20, 30], [2.5, 0.0, 0.0, 40, 50, 60],
                              [4.0, 0.3, 120.0, 200, 300, 350]])
    out = np.empty((3, 6))
    heliocentric_elements(s.x, s.v, s.gm, out)
    np.testing.assert_allclose(out, s.elements(), rtol=1e-12, atol=1e-9)


@pytest.mark.parametrize("a,ecc,inc,node,peri,mean", [
    (1.0, 0.0167, 0.1, 0.3, 1.7, 0.4), (5.2, 0.048, 0.023, 1.75, 4.78, 0.34),
    (0.39, 0.2056, 0.122, 0.843, 0.508, 3.05), (2.0, 0.9, 2.5, 5.0, 0.2, 6.0),
    (3.0, 0.3, math.pi - 1e-3, 0.0, 0.0, math.pi)])
def test_to_state_matches_independent_conic(a, ecc, inc, node, peri, mean):
    # Reference written without integrators/: Kepler's equation E - e sin E = M
    # solved at 60 digits, tan(nu/2) = sqrt((1+e)/(1-e)) tan(E/2) (Murray &
    # Dermott 1999, eqs. 2.52 and 2.46), then the conic's polar equation
    # rotated by node, inclination and argument of pericentre
    # (tests/kepler_reference.state_from_anomaly).
    import mpmath as mp

    import kepler_reference as K

    mu = 2.9591220828e-4
    E = mp.findroot(lambda E: E - ecc * mp.sin(E) - mean, mean)
    nu = float(2 * mp.atan(mp.sqrt((1 + ecc) / (1 - ecc)) * mp.tan(E / 2)))
    xr, vr = K.state_from_anomaly(a, ecc, nu, mu, inc=inc, node=node, peri=peri)
    x, v = el.to_state(mu, a, ecc, inc, node, peri, mean)
    np.testing.assert_allclose(x, xr, rtol=0, atol=1e-14 * a)
    np.testing.assert_allclose(v, vr, rtol=0, atol=1e-14 * np.linalg.norm(vr))
