"""Each stop condition triggered by a constructed case."""

import numpy as np
import pytest

from orbitledger.integrators import Leapfrog, StopConditions, StopKind, System, WisdomHolman


def two_planets(phase_b=30.0):
    return System.from_elements(["Corvid", "b", "c"], [1.0, 1e-3, 1e-3],
                                [[1.0, 0.0, 0.0, 0, 0, 0], [1.05, 0.0, 0.0, 0, 0, phase_b]])


def test_close_encounter_names_both_bodies():
    wh = WisdomHolman(two_planets(), 1.0, stops=StopConditions(hill=3.0))
    res = wh.advance(200_000)
    assert res.kind is StopKind.CLOSE_ENCOUNTER
    assert res.bodies == (1, 2)
    assert 0 < res.steps < 200_000
    xh, _ = wh.synchronized().heliocentric()
    rh = ((2e-3 / 3.0) ** (1 / 3)) * 1.025
    # Stopped near 3 mutual Hill radii (positions at the kick, one step earlier).
    assert np.linalg.norm(xh[1] - xh[2]) < 3.2 * rh


def test_no_stop_when_disabled():
    res = WisdomHolman(two_planets(), 5.0).advance(2000)
    assert res.kind is StopKind.DONE and res.steps == 2000 and res.bodies == ()


def test_ejection_by_distance():
    s = System.from_elements(["Corvid", "rogue"], [1.0, 1e-6], [[-1.0, 2.0, 0, 0, 0, 0.0]])
    res = WisdomHolman(s, 2.0, stops=StopConditions(eject_distance=20.0)).advance(100_000)
    assert res.kind is StopKind.EJECTION and res.bodies == (1,)


def test_unbound_counts_as_ejection():
    s = System.from_elements(["Corvid", "rogue"], [1.0, 1e-6], [[-1.0, 2.0, 0, 0, 0, 0.0]])
    res = WisdomHolman(s, 2.0, stops=StopConditions(unbound=True)).advance(10)
    assert res.kind is StopKind.EJECTION and res.steps == 1


def test_star_collision():
    s = System.from_elements(["Corvid", "grazer"], [1.0, 1e-6],
                             [[1.0, 0.99, 0.0, 0, 0, 350.0]])
    res = WisdomHolman(s, 0.01, stops=StopConditions(star_radius=0.02)).advance(100_000)
    assert res.kind is StopKind.STAR_COLLISION and res.bodies == (1, 0)


def test_eccentricity_limit():
    s = System.from_elements(["Corvid", "b"], [1.0, 1e-6], [[1.0, 0.5, 0, 0, 0, 0]])
    res = WisdomHolman(s, 5.0, stops=StopConditions(max_ecc=0.4)).advance(100)
    assert res.kind is StopKind.ECCENTRICITY and res.steps == 1
    res = WisdomHolman(s, 5.0, stops=StopConditions(max_ecc=0.6)).advance(1000)
    assert res.kind is StopKind.DONE


def test_leapfrog_stops_too():
    s = System.from_elements(["Corvid", "rogue"], [1.0, 1e-6], [[-1.0, 2.0, 0, 0, 0, 0.0]])
    res = Leapfrog(s, 0.5, stops=StopConditions(eject_distance=20.0)).advance(100_000)
    assert res.kind is StopKind.EJECTION


def test_bad_stop_values_are_named():
    with pytest.raises(ValueError, match="hill must be finite and >= 0, got -1"):
        StopConditions(hill=-1.0)
