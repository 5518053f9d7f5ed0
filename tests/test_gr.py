"""General-relativistic correction: perihelion advance of Mercury."""

import math
import sys

import numpy as np
import pytest

from orbitledger.integrators import C_AU_PER_DAY, G, System, WisdomHolman

sys.path.insert(0, __file__.rsplit("/", 1)[0])
from conftest import MASS_RATIO, standish_elements  # noqa: E402

ARCSEC = math.pi / (180 * 3600)


def perihelion_rate(system, dt, years, samples=400):
    """Fitted rate of the longitude of perihelion (rad/day) from synchronized outputs."""
    wh = WisdomHolman(system, dt, gr=True)
    n = int(years * 365.25 / dt)
    per = n // samples
    t, varpi = [], []
    for _ in range(samples):
        wh.advance(per)
        el = wh.elements(degrees=False)[0]
        t.append(wh.time)
        varpi.append(el[3] + el[4])
    return np.polyfit(t, np.unwrap(varpi), 1)[0]


def test_mercury_like_orbit_matches_formula():
    # Advance per orbit 6 pi G M / (c^2 a (1 - e^2)) (Nobili & Roxburgh 1986
    # potential; CHECKS.md, derived). A strongly relativistic invented orbit.
    a, e = 0.05, 0.4
    s = System.from_elements(["Star", "p"], [1.0, 1e-12], [[a, e, 0.0, 0.0, 0.0, 0.0]])
    mu = G * (1.0 + 1e-12)
    period = 2 * math.pi * math.sqrt(a**3 / mu)
    rate = perihelion_rate(s, period / 200, years=5)
    expected = 6 * math.pi * G / (C_AU_PER_DAY**2 * a * (1 - e * e)) / period
    assert rate == pytest.approx(expected, rel=0.01)


def test_mercury_perihelion_advance_42_98_arcsec_per_century():
    # Nobili & Will 1986, Nature 320, 39: 42.98"/century; Mercury's elements
    # from Standish & Williams Table 1, mass ratio IAU 2009.
    s = System.from_elements(["Sun", "Mercury"], [1.0, 1.0 / MASS_RATIO["Mercury"]],
                             [standish_elements("Mercury")])
    rate = perihelion_rate(s, 0.5, years=200)
    per_century = rate * 36525.0 / ARCSEC
    # 0.05" is about the rounding of the published value and the difference
    # between the Sun-Mercury two-body problem and the full fit (42.981"
    # measured); a 1% tolerance would hide a regression of 0.4".
    assert per_century == pytest.approx(42.98, abs=0.05)


def test_gr_off_has_no_advance():
    s = System.from_elements(["Sun", "Mercury"], [1.0, 1.0 / MASS_RATIO["Mercury"]],
                             [standish_elements("Mercury")])
    wh = WisdomHolman(s, 0.5, gr=False)
    w0 = wh.elements()[0][4]
    wh.advance(int(100 * 365.25 / 0.5))
    assert abs(wh.elements()[0][4] - w0) * 3600 < 0.01  # arcsec
