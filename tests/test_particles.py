"""Test particles in the Wisdom-Holman map: the restricted three-body problem's Jacobi
constant and a tadpole orbit at L4 (Murray & Dermott 1999, ch. 3), removal at a close
approach, and exact state capture."""

import math

import numpy as np
import pytest

from orbitledger.integrators import G, Integrator, StopConditions, System, WisdomHolman

M_PLANET = 1e-3
YEAR = 365.25
# Bound on the measured small-libration period against linear theory: 2e-5
# found for a 0.6 deg amplitude (the same to 4e-8 from scipy's DOP853 at
# rtol 1e-12), so about 10x that.
REL_PERIOD = 2e-4


def star_and_planet():
    return System.from_elements(["Cadmus", "Cadmus b"], [1.0, M_PLANET],
                                [(1.0, 0.0, 0.0, 0.0, 0.0, 0.0)])


def circular(a, phase):
    """A heliocentric circular orbit of radius a (au) about 1 Msun, at a phase (rad)."""
    r = np.array([a * math.cos(phase), a * math.sin(phase), 0.0])
    v = math.sqrt(G / a)
    return r, np.array([-v * math.sin(phase), v * math.cos(phase), 0.0])


def jacobi_constant(wh):
    """C_J = 2 (mu1/r1 + mu2/r2) + 2 n (x vy - y vx) - v^2 in the inertial barycentric
    frame: Murray & Dermott (1999), eq. 3.19 rewritten with the rotating-frame velocity
    v_rot = v - n z x r; the primaries' orbit is circular with mean motion n."""
    sx = wh.synchronized()
    x, v = wh.particle_states()
    big_x = sx.x[0] + x
    big_v = sx.v[0] + v
    r1 = np.linalg.norm(big_x - sx.x[0], axis=1)
    r2 = np.linalg.norm(big_x - sx.x[1], axis=1)
    n = math.sqrt(G * (1.0 + M_PLANET))  # a = 1 au
    h = big_x[:, 0] * big_v[:, 1] - big_x[:, 1] * big_v[:, 0]
    return 2.0 * (sx.gm[0] / r1 + sx.gm[1] / r2) + 2.0 * n * h - (big_v ** 2).sum(1)


def test_restricted_problem_keeps_the_jacobi_constant_and_the_planet_its_orbit():
    # Over 10^4 orbits of the planet the Jacobi constant of particles outside,
    # inside and at L4 changes by the map's bounded error only: relative changes
    # under about 10x those measured (1.2e-6 outside, 5.6e-6 inside at 18 steps
    # per its orbit, 2.1e-9 at L4; the factor is common practice, no source),
    # and no larger over the second half than over the first (not a drift).
    s = star_and_planet()
    px, pv = zip(circular(1.6, 1.0), circular(0.6, 2.5), circular(1.0, math.pi / 3 + 0.02))
    dt = YEAR / 40
    with_p = WisdomHolman(s, dt, particles=(np.array(px), np.array(pv)))
    alone = WisdomHolman(s, dt)
    c0 = jacobi_constant(with_p)
    changes = []
    for _ in range(20):
        with_p.advance(20_000)
        alone.advance(20_000)
        changes.append(np.abs((jacobi_constant(with_p) - c0) / c0))
    changes = np.array(changes)
    assert np.array_equal(with_p.xj, alone.xj) and np.array_equal(with_p.vj, alone.vj)
    assert np.all(changes < [1.2e-5, 5.6e-5, 2.1e-8]), changes.max(0)
    assert np.all(changes[10:].max(0) <= 3.0 * changes[:10].max(0) + 1e-12)


def test_a_particle_near_l4_stays_on_a_tadpole_orbit():
    # Murray & Dermott (1999, sec. 3.9): for a secondary of mass ratio 1e-3
    # a particle started near L4 (60 deg ahead on the planet's orbit)
    # librates about it without reaching L3 (180 deg): a tadpole orbit.
    s = star_and_planet()
    x, v = circular(1.0, math.pi / 3 + 0.05)
    wh = WisdomHolman(s, YEAR / 40, particles=(x[None], v[None]))
    angles = []
    for _ in range(500):
        wh.advance(400)
        px, _ = wh.particle_states()
        planet = wh.synchronized().x[1] - wh.synchronized().x[0]
        d = math.degrees(math.atan2(px[0, 1], px[0, 0]) - math.atan2(planet[1], planet[0]))
        angles.append(d % 360.0)
    angles = np.array(angles)
    assert 40.0 < angles.min() < 60.0 < angles.max() < 90.0, (angles.min(), angles.max())


def test_small_librations_about_l4_have_the_linear_period():
    # Linear theory about L4 (Murray & Dermott 1999, sec. 3.8): the slow mode's
    # frequency w satisfies w^4 - w^2 + (27/4) mu (1 - mu) = 0 in units of the
    # primaries' mean motion n, so w^2 = (1 - sqrt(1 - 27 mu (1 - mu))) / 2,
    # about 27 mu / 4 (the usual 2 pi / (n sqrt(27 mu / 4))). A particle 0.6 deg
    # from L4 librates with that period up to terms in the amplitude squared.
    # It starts at rest in the frame turning with the planet (velocity n z x r):
    # a heliocentric circular speed instead excites the fast mode as much as
    # the slow one, and the zero crossings then miss the period by 2 %.
    s = star_and_planet()
    n = math.sqrt(G * (1.0 + M_PLANET))  # a = 1 au, days^-1
    x, _ = circular(1.0, math.pi / 3 + math.radians(0.6))
    v = n * np.array([-x[1], x[0], 0.0])
    dt = YEAR / 200
    wh = WisdomHolman(s, dt, particles=(x[None], v[None]))
    every = 20
    t, angles = [], []
    for k in range(6000):  # 600 yr, about 49 librations, a sample every 0.1 yr
        wh.advance(every)
        px, _ = wh.particle_states()
        sx = wh.synchronized()
        planet = sx.x[1] - sx.x[0]  # heliocentric, as the particle's position
        d = math.atan2(px[0, 1], px[0, 0]) - math.atan2(planet[1], planet[0])
        angles.append(math.remainder(d - math.pi / 3, 2 * math.pi))
        t.append((k + 1) * every * dt)
    t, a = np.array(t), np.array(angles)
    a -= a.mean()
    # Upward zero crossings, linearly interpolated.
    i = np.nonzero((a[:-1] < 0.0) & (a[1:] >= 0.0))[0]
    tc = t[i] - a[i] * (t[i + 1] - t[i]) / (a[i + 1] - a[i])
    period = (tc[-1] - tc[0]) / (len(tc) - 1)
    mu = M_PLANET / (1.0 + M_PLANET)
    assert 0.5 < math.degrees(np.abs(a).max()) < 0.7  # the amplitude is 0.6 deg
    w2 = (1.0 - math.sqrt(1.0 - 27.0 * mu * (1.0 - mu))) / 2.0
    linear = 2.0 * math.pi / (n * math.sqrt(w2))
    assert len(tc) > 40
    assert period == pytest.approx(linear, rel=REL_PERIOD), (period / linear - 1)
    # The usual approximation is 0.29 % off at this mass ratio.
    assert abs(2.0 * math.pi / (n * math.sqrt(27.0 * mu / 4.0)) / linear - 1) > 2e-3


def test_a_particle_meeting_the_planet_is_removed_and_the_run_goes_on():
    s = star_and_planet()
    px, pv = zip(circular(1.05, 2.0), circular(2.0, 0.0))
    wh = WisdomHolman(s, YEAR / 40, particles=(np.array(px), np.array(pv)),
                      stops=StopConditions(hill=1.0))
    res = wh.advance(40_000)
    assert not res.stopped and wh.step == 40_000
    ev = wh.particle_events()
    assert ev[0, 0] > 0 and ev[0, 1] == 1 and ev[0, 2] == 1  # close encounter with body 1
    assert ev[1, 0] == -1                                     # the far one goes on
    x, _ = wh.particle_states()
    assert np.isnan(x[0]).all() and np.isfinite(x[1]).all()


def test_particles_are_part_of_the_exact_state():
    s = star_and_planet()
    px, pv = zip(circular(1.05, 2.0), circular(1.7, 0.3))
    a = WisdomHolman(s, YEAR / 40, particles=(np.array(px), np.array(pv)),
                     stops=StopConditions(hill=1.0))
    a.advance(3001)
    b = Integrator.from_state_arrays(a.state_arrays())
    a.advance(5000)
    b.advance(5000)
    for key, val in a.state_arrays().items():
        assert np.array_equal(val, b.state_arrays()[key]), key


def test_with_a_corrector_the_planet_is_unchanged_and_the_constant_kept_better():
    # The corrector's stages carry the particles too (Wisdom, Holman & Touma
    # 1996 for the massive bodies); the planet's trajectory stays that of the
    # run without particles, bit for bit, and the Jacobi constant of the
    # coarsely stepped inner particle is kept far better than without.
    s = star_and_planet()
    px, pv = zip(circular(0.6, 2.5), circular(1.6, 1.0))
    changes = {}
    for corr in (0, 5):
        wh = WisdomHolman(s, YEAR / 40, corrector=corr, particles=(np.array(px), np.array(pv)))
        alone = WisdomHolman(s, YEAR / 40, corrector=corr)
        c0 = jacobi_constant(wh)
        worst = 0.0
        for _ in range(10):
            wh.advance(10_000)
            alone.advance(10_000)
            worst = max(worst, float(np.abs((jacobi_constant(wh) - c0) / c0).max()))
        assert np.array_equal(wh.xj, alone.xj) and np.array_equal(wh.vj, alone.vj)
        changes[corr] = worst
    assert changes[5] < 0.2 * changes[0], changes  # 1.3e-7 against 4.7e-6 measured


def test_particles_with_an_indicator_are_refused():
    s = star_and_planet()
    x, v = circular(1.5, 0.0)
    with pytest.raises(ValueError, match="not yet supported"):
        WisdomHolman(s, YEAR / 40, indicator="megno", particles=(x[None], v[None]))
