"""Wisdom-Holman map: error laws, correctors, agreement with a reference solver."""

import math
import sys

import numpy as np
import pytest

from orbitledger.integrators import Leapfrog, WisdomHolman, correctors
from orbitledger.integrators.wisdom_holman import _stage_arrays, apply_stages

sys.path.insert(0, __file__.rsplit("/", 1)[0])
from conftest import solar_subset  # noqa: E402
from corrector_derivation import coefficients  # noqa: E402


def max_energy_error(integ, n_steps, samples=200):
    e0 = integ.energy()
    per = max(1, n_steps // samples)
    worst = 0.0
    for _ in range(n_steps // per):
        integ.advance(per)
        worst = max(worst, abs(integ.energy() / e0 - 1.0))
    return worst


def slope(e_big, e_small):
    """Observed order from errors at dt and dt/2."""
    return math.log2(e_big / e_small)


def test_every_odd_order_matches_the_derivation_written_in_the_tests():
    # Construction of ../shared/CHECKS.md (Wisdom, Holman & Touma 1996),
    # derived again in rational arithmetic by tests/corrector_derivation.py.
    assert correctors.ORDERS == (0,) + tuple(range(3, correctors.MAX_ORDER + 1, 2))
    for order in correctors.ORDERS[1:]:
        exact = [float(c) for c in coefficients(order, digits=50)]
        assert list(correctors.coefficients(order)) == exact, order
    # Published third-order value -1/(48 alpha) (WHT 1996; CHECKS.md, from memory),
    # and the derived values of CHECKS.md for orders 5 and 17.
    c3 = correctors.coefficients(3)[0]
    assert c3 == pytest.approx(-0.049801192055599735, rel=1e-15)
    assert c3 == pytest.approx(-1 / (48 * correctors.ALPHA), rel=1e-15)
    assert correctors.coefficients(5) == pytest.approx((-0.083001986759332892,
                                                        0.016600397351866578), rel=1e-15)
    assert correctors.coefficients(17)[-1] == pytest.approx(8.6694830946747160e-6, rel=1e-14)


def test_energy_error_scales_as_dt_squared_and_mass_ratio():
    # Wisdom & Holman 1991: uncorrected error ~ eps dt^2 (CHECKS.md, from memory).
    s = solar_subset(["Jupiter", "Saturn"])
    s_light = solar_subset(["Jupiter", "Saturn"], mass_scale=0.01)
    years = 200 * 365.25
    e = {}
    for dt in (200.0, 100.0):
        e[dt] = max_energy_error(WisdomHolman(s, dt), int(years / dt))
    assert 1.9 < slope(e[200.0], e[100.0]) < 2.1
    light = max_energy_error(WisdomHolman(s_light, 100.0), int(years / 100.0))
    assert light / e[100.0] == pytest.approx(0.01, rel=0.1)


def test_energy_error_is_bounded_without_drift():
    s = solar_subset(["Jupiter", "Saturn"])
    wh = WisdomHolman(s, 100.0)
    e0 = wh.energy()
    errs = []
    for _ in range(2000):  # 2000 x 50 steps = 27 kyr
        wh.advance(50)
        errs.append(wh.energy() / e0 - 1.0)
    errs = np.abs(errs)
    first, last = errs[:1000].max(), errs[1000:].max()
    # Bounded oscillation: the second half is no worse than the first.
    assert last < 1.2 * first


@pytest.mark.parametrize("order,expected", [(3, 4.0), (5, 6.0), (7, 8.0)])
def test_corrector_orders_have_expected_slope(order, expected):
    # Error ~ eps dt^(n+1) + eps^2 dt^2 (WHT 1996; Laskar & Robutel 2001):
    # with eps ~ 1e-5 the first term dominates at these steps.
    s = solar_subset(["Jupiter", "Saturn"], mass_scale=0.01)
    years = 200 * 365.25
    e200 = max_energy_error(WisdomHolman(s, 200.0, corrector=order), int(years / 200))
    e100 = max_energy_error(WisdomHolman(s, 100.0, corrector=order), int(years / 100))
    assert abs(slope(e200, e100) - expected) < 0.6


def test_each_corrector_order_reduces_the_error():
    s = solar_subset(["Jupiter", "Saturn"], mass_scale=0.01)
    n = int(200 * 365.25 / 200)
    errs = [max_energy_error(WisdomHolman(s, 200.0, corrector=o), n) for o in correctors.ORDERS]
    # Error ~ eps dt^(n+1) + eps^2 dt^2 (WHT 1996; Laskar & Robutel 2001): each
    # order helps until the eps^2 dt^2 floor (about 1e-12 here, reached near
    # order 19); beyond it the error stays at the floor.
    upto17 = errs[:correctors.ORDERS.index(17) + 1]
    assert all(a > b for a, b in zip(upto17, upto17[1:])), errs
    floor = min(errs)
    assert floor < 1.5e-12 and all(e < 1.5 * floor for e in errs[correctors.ORDERS.index(17):])


def test_wrong_sign_corrector_makes_it_worse():
    # Negative test (CHECKS.md, derived): applying C^-1 on entry and C on
    # output leaves the eps dt^2 error and about doubles it.
    s = solar_subset(["Jupiter", "Saturn"])
    n = int(200 * 365.25 / 100)
    plain = max_energy_error(WisdomHolman(s, 100.0), n)
    right = max_energy_error(WisdomHolman(s, 100.0, corrector=3), n)
    wrong = WisdomHolman(s, 100.0, corrector=0)
    a, c = _stage_arrays(3, -1.0)
    apply_stages(wrong.xj, wrong.vj, wrong.gm, wrong.mu, wrong.mr, wrong.dt, 0.0, a, c,
                 wrong._xi, wrong._acc)
    wrong.corrector = 3
    wrong._inv = _stage_arrays(3, +1.0)
    bad = max_energy_error(wrong, n)
    assert right < plain / 10
    assert 1.5 * plain < bad < 3.0 * plain


def _newton_accelerations(x, gm):
    """Pairwise Newtonian accelerations, written here without `integrators/`:
    a_i = sum_j G m_j (x_j - x_i) / |x_j - x_i|^3 (Newton's law of gravitation)."""
    d = x[None, :, :] - x[:, None, :]
    r3 = np.linalg.norm(d, axis=2) ** 3
    np.fill_diagonal(r3, np.inf)
    return (gm[None, :, None] * d / r3[:, :, None]).sum(axis=1)


def _dop853_reference(system, t_end):
    from scipy.integrate import solve_ivp

    n = system.n
    gm = np.asarray(system.gm, dtype=float)

    def rhs(_, y):
        return np.concatenate([y[3 * n:], _newton_accelerations(y[: 3 * n].reshape(n, 3),
                                                                gm).ravel()])

    y0 = np.concatenate([system.x.ravel(), system.v.ravel()])
    sol = solve_ivp(rhs, (0, t_end), y0, method="DOP853", rtol=1e-13, atol=1e-16)
    return sol.y[: 3 * n, -1].reshape(n, 3)


def test_agrees_with_dop853_with_observed_order_two():
    # Reference: scipy DOP853 at rtol 1e-13 over 1000 yr, Sun-Jupiter-Saturn.
    s = solar_subset(["Jupiter", "Saturn"])
    t_end = 1000 * 365.25
    ref = _dop853_reference(s, t_end)
    ref_h = ref - ref[0]
    errs = []
    for dt in (50.0, 25.0, 12.5):
        wh = WisdomHolman(s, dt)
        wh.advance(int(round(t_end / dt)))
        x = wh.synchronized().x
        errs.append(np.abs((x - x[0]) - ref_h).max())
    assert 1.9 < slope(errs[0], errs[1]) < 2.1
    assert 1.9 < slope(errs[1], errs[2]) < 2.1
    # Truncation error eps (n dt)^2 (n t) a with eps ~ 1e-3 and n dt ~ 0.07 at
    # dt = 12.5 d, n t ~ 500 rad over 1000 yr: ~ 1e-3 au scale; observed 7e-5.
    assert errs[2] < 1e-3


def test_leapfrog_is_second_order_and_worse_than_wisdom_holman():
    s = solar_subset(["Jupiter", "Saturn"])
    n = int(100 * 365.25 / 10)
    lf10 = max_energy_error(Leapfrog(s, 10.0), n)
    lf5 = max_energy_error(Leapfrog(s, 5.0), 2 * n)
    wh10 = max_energy_error(WisdomHolman(s, 10.0), n)
    assert 1.8 < slope(lf10, lf5) < 2.2
    assert wh10 < lf10 / 100


def test_angular_momentum_is_conserved():
    s = solar_subset(["Jupiter", "Saturn"])
    wh = WisdomHolman(s, 50.0, corrector=5)
    l0 = wh.angular_momentum()
    wh.advance(20000)
    l1 = wh.angular_momentum()
    assert np.linalg.norm(l1 - l0) / np.linalg.norm(l0) < 1e-12


def test_zero_steps_returns_initial_state_through_corrector():
    s = solar_subset(["Jupiter", "Saturn"])
    wh = WisdomHolman(s, 50.0, corrector=17)
    out = wh.synchronized()
    np.testing.assert_allclose(out.x, s.x, rtol=0, atol=1e-13)
    np.testing.assert_allclose(out.v, s.v, rtol=0, atol=1e-15)


def test_bad_settings_are_named():
    s = solar_subset(["Jupiter"])
    with pytest.raises(ValueError, match="corrector must be one of"):
        WisdomHolman(s, 10.0, corrector=4)
    with pytest.raises(ValueError, match="step dt must be finite and non-zero"):
        WisdomHolman(s, 0.0)
    with pytest.raises(ValueError, match="n_steps must be >= 0"):
        WisdomHolman(s, 1.0).advance(-1)
