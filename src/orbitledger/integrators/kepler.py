"""Kepler drift by universal variables.

The drift advances a two-body relative orbit ``(x, v)`` with gravitational
parameter ``mu`` by a time ``dt``. It works for elliptic, parabolic and
hyperbolic orbits. The Stumpff functions are evaluated with +, -, *, / only
(a short series after argument reduction by quartering, then the doubling
formulas; Danby 1988, *Fundamentals of Celestial Mechanics*, sec. 6.9), so the
hot path needs no transcendental function and its results are correctly
rounded operation by operation on every IEEE-754 machine.

The universal Kepler equation (Danby 1988, eq. 6.9.24; Vallado 2013, sec. 2.3)
in the variable ``s`` with ``G_k(s) = s^k c_k(beta s^2)``::

    dt = r0 s + eta0 G2(s) + zeta0 G3(s),   beta = 2 mu / r0 - v0^2,
    eta0 = x0 . v0,  zeta0 = mu - beta r0,
    r(s) = r0 G0 + eta0 G1 + mu G2.

It is solved by Halley's method from a second-order guess; if that fails to
converge it falls back to a bracketed Newton-bisection on the monotonic
function (its derivative is r > 0), which cannot fail.
"""

import numpy as np
from numba import njit

from .constants import TWO_PI

# Arguments of the Stumpff series are quartered until |x| is at most this.
_STUMPFF_REDUCED = 0.1
# Most quarterings of a Stumpff argument (4^64 ~ 3e38): no loop runs unbounded.
_STUMPFF_MAX_QUARTERS = 64
# |f| (Lagrange coefficient) above which g' comes from f g' - f' g = 1; below
# it the identity's division by f would amplify rounding, and g' = 1 - mu G2 / r.
_F_IDENTITY = 0.5
# A residual of Kepler's equation below this many times the sum of its terms'
# magnitudes is rounding noise (4 units of 2^-52).
_T_NOISE = 4.0 * 2.0 ** -52
# Halley iterations tried before the bracketed fallback.
_HALLEY_MAX = 12
# Relative change in s that counts as converged (bracketed fallback).
_S_TOL = 4e-16
# Relative Halley correction after which the next correction would be below
# 1e-20: the G-functions are then shifted instead of evaluated again.
_S_SHIFT = 1e-7


# Below this, s^2 beta is certainly under (2 pi)^2: the guess is inside one period.
_NEAR_PERIOD = 0.99 * TWO_PI * TWO_PI

# Series coefficients c2 = sum (-x)^k / (2k+2)!, c3 = sum (-x)^k / (2k+3)!, k = 0..7
# (each the double nearest the exact quotient; truncation below 1e-20 for |x| <= 0.1).
_A0 = 1.0 / 2.0
_A1 = -1.0 / 24.0
_A2 = 1.0 / 720.0
_A3 = -1.0 / 40320.0
_A4 = 1.0 / 3628800.0
_A5 = -1.0 / 479001600.0
_A6 = 1.0 / 87178291200.0
_A7 = -1.0 / 20922789888000.0
_B0 = 1.0 / 6.0
_B1 = -1.0 / 120.0
_B2 = 1.0 / 5040.0
_B3 = -1.0 / 362880.0
_B4 = 1.0 / 39916800.0
_B5 = -1.0 / 6227020800.0
_B6 = 1.0 / 1307674368000.0
_B7 = -1.0 / 355687428096000.0
_R6 = 1.0 / 6.0


@njit(cache=True, error_model="numpy", inline="always")
def stumpff(x):
    """Stumpff functions c0..c3 of x, with +, -, *, / only.

    The argument is quartered n times until |x| <= 0.1, c2 and c3 are summed
    as nested series (truncation below 1e-20 there), and the doubling formulas
    c0(4x) = 2 c0^2 - 1, c1(4x) = c0 c1, c2(4x) = c1^2 / 2,
    c3(4x) = (c2 + c0 c3) / 4 (Danby 1988, eq. 6.9.29) undo the reduction.
    """
    n = 0
    # Bounded: a non-finite or absurd argument (|x| > 0.1 * 4^_STUMPFF_MAX_QUARTERS)
    # leaves the loop with |x| still large, and the results are not finite.
    while (x > _STUMPFF_REDUCED or x < -_STUMPFF_REDUCED) and n < _STUMPFF_MAX_QUARTERS:
        x = x * 0.25
        n += 1
    if x > _STUMPFF_REDUCED or x < -_STUMPFF_REDUCED:
        return np.nan, np.nan, np.nan, np.nan
    c0, c1, c2, c3 = stumpff_series(x)
    for _ in range(n):
        c0, c1, c2, c3 = stumpff_double(c0, c1, c2, c3)
    return c0, c1, c2, c3


# The pieces below are the arithmetic of the drift, defined once: the scalar
# solver composes them with branches and early returns, the batched one
# (integrators.batch) with per-lane masks, so both give the same bits.

@njit(cache=True, error_model="numpy", inline="always")
def stumpff_series(x):
    """c0..c3 of a reduced argument |x| <= 0.1 by their series."""
    # Estrin's scheme: the same series in three levels of dependent operations
    # instead of Horner's fourteen (the series is most of a Kepler iteration).
    x2 = x * x
    x4 = x2 * x2
    c2 = (((_A0 + _A1 * x) + x2 * (_A2 + _A3 * x))
          + x4 * ((_A4 + _A5 * x) + x2 * (_A6 + _A7 * x)))
    c3 = (((_B0 + _B1 * x) + x2 * (_B2 + _B3 * x))
          + x4 * ((_B4 + _B5 * x) + x2 * (_B6 + _B7 * x)))
    c1 = 1.0 - x * c3
    c0 = 1.0 - x * c2
    return c0, c1, c2, c3


@njit(cache=True, error_model="numpy", inline="always")
def stumpff_double(c0, c1, c2, c3):
    """c0..c3 of 4x from those of x (Danby 1988, eq. 6.9.29)."""
    return 2.0 * c0 * c0 - 1.0, c0 * c1, c1 * c1 * 0.5, (c2 + c0 * c3) * 0.25


@njit(cache=True, error_model="numpy", inline="always")
def kepler_terms(s, c0, c1, c2, c3, r0, eta0, zeta0, mu):
    """t(s), r(s), r'(s), G0, G1, G2 and t's rounding scale from the Stumpff values."""
    g1 = s * c1
    g2 = s * s * c2
    g3 = s * s * s * c3
    a = r0 * s
    b = eta0 * g2
    c = zeta0 * g3
    t = a + b + c
    r = r0 * c0 + eta0 * g1 + mu * g2
    rp = eta0 * c0 + zeta0 * g1
    return t, r, rp, c0, g1, g2, abs(a) + abs(b) + abs(c)


@njit(cache=True, error_model="numpy", inline="always")
def _kepler_eq(s, beta, r0, eta0, zeta0, mu):
    """t(s), r(s) = t'(s), r'(s), G0, G1, G2 of the universal Kepler equation, and the
    sum of the magnitudes of t's terms (the scale of its rounding)."""
    c0, c1, c2, c3 = stumpff(beta * s * s)
    return kepler_terms(s, c0, c1, c2, c3, r0, eta0, zeta0, mu)


# Outcomes of one Halley iteration.
_ITERATE = 0
_SOLVED = 1
_FALLBACK = 2


@njit(cache=True, error_model="numpy", inline="always")
def universal_guess(r0, eta0, beta, mu, dt):
    """zeta0, the starting s and the bracket [lo, hi] of the universal Kepler equation."""
    zeta0 = mu - beta * r0
    # Third-order series inversion of t(s) = r0 s + eta0 s^2/2 + zeta0 s^3/6.
    ir0 = 1.0 / r0
    s = dt * ir0 * (1.0 + dt * ir0 * ir0 * (-0.5 * eta0 + dt * ir0 * ir0
                                             * (0.5 * eta0 * eta0 * ir0 - zeta0 * _R6)))
    if beta > 0.0 and s * s * beta > _NEAR_PERIOD:
        # dt is reduced below one period, so s lies within one period of s.
        # (Tested first on s^2 beta, a conservative bound: the square root and
        # division of s_max stay off the path of s in the usual case.)
        s_max = TWO_PI / np.sqrt(beta)
        if s > s_max:
            s = s_max
        elif s < -s_max:
            s = -s_max
    # t(s) increases with s (t' = r > 0) and t(0) = 0; on a bound orbit
    # t(+-s_max) = +-one period, beyond the reduced |dt|. So the root lies in
    # [lo, hi], which every residual narrows; an iterate that leaves it (a step
    # taken where r is far from its value near the root) goes to the fallback
    # instead of crawling to a false convergence.
    if dt >= 0.0:
        lo = 0.0
        hi = TWO_PI / np.sqrt(beta) if beta > 0.0 else np.inf
    else:
        lo = -TWO_PI / np.sqrt(beta) if beta > 0.0 else -np.inf
        hi = 0.0
    if not (lo <= s <= hi):
        # The cubic guess can take the wrong sign for a long hyperbolic drift;
        # dt / r0 has the right one.
        s = min(max(dt * ir0, lo), hi)
    return zeta0, s, lo, hi


@njit(cache=True, error_model="numpy", inline="always")
def halley_update(s, dt, t, r, rp, g0, g1, g2, t_scale, lo, hi, ds_prev, beta, r0, eta0, mu):
    """One Halley iteration from t(s), r(s), r'(s) and the G-functions at s.

    Returns (outcome, s, r, G0, G1, G2, lo, hi, ds): _SOLVED with the root's
    values, _ITERATE with the next s (the G-values then unused) or _FALLBACK.
    """
    f = t - dt
    if not (abs(f) < np.inf):
        return _FALLBACK, s, r, g0, g1, g2, lo, hi, ds_prev  # overflow or NaN
    if f == 0.0 or abs(f) <= _T_NOISE * t_scale:
        # The residual is rounding noise: s is as good as this equation can
        # give (a timing error of a few ulps of t), and a step computed from
        # noise would only move it away (by noise / r: far, where r is
        # small, as at the pericentre of an eccentric orbit).
        return _SOLVED, s, r, g0, g1, g2, lo, hi, ds_prev
    if f > 0.0:
        hi = s
    else:
        lo = s
    # Halley's step -f / (r - f rp / (2 r)) with one division on the path.
    ds = -f * r / (r * r - 0.5 * f * rp)
    s_new = s + ds
    if not (lo <= s_new <= hi) or not (r > 0.0):
        return _FALLBACK, s, r, g0, g1, g2, lo, hi, ds  # also a NaN
    if abs(ds) <= _S_SHIFT * abs(s_new) and abs(ds) <= 1e-3 * abs(ds_prev):
        # Halley converges cubically: once a correction is this small and
        # at least 1000x smaller than the one before (the cubic regime is
        # visible), the error of s_new is below 1e-20 relative. Shift the G-functions
        # from s to s_new by Taylor's formula (dG_k/ds = G_(k-1),
        # dG_0/ds = -beta G_1); the neglected term is O(ds^3).
        h = ds
        hh = 0.5 * h * h
        n0 = g0 - beta * (g1 * h + g0 * hh)
        n1 = g1 + g0 * h - beta * g1 * hh
        n2 = g2 + g1 * h + g0 * hh
        r = r0 * n0 + eta0 * n1 + mu * n2
        return _SOLVED, s_new, r, n0, n1, n2, lo, hi, ds
    return _ITERATE, s_new, r, g0, g1, g2, lo, hi, ds


@njit(cache=True, error_model="numpy", inline="always")
def solve_universal(r0, eta0, beta, mu, dt):
    """Solve the universal Kepler equation for s.

    Returns (s, r, G0, G1, G2, iterations, bracketed), r and the G-functions
    taken at the returned s.
    """
    zeta0, s, lo, hi = universal_guess(r0, eta0, beta, mu, dt)
    ds_prev = np.inf
    for it in range(_HALLEY_MAX):
        t, r, rp, g0, g1, g2, t_scale = _kepler_eq(s, beta, r0, eta0, zeta0, mu)
        code, s, r, g0, g1, g2, lo, hi, ds_prev = halley_update(
            s, dt, t, r, rp, g0, g1, g2, t_scale, lo, hi, ds_prev, beta, r0, eta0, mu)
        if code == _SOLVED:
            return s, r, g0, g1, g2, it + 1, False
        if code == _FALLBACK:
            break
    # Guarded fallback: t(s) is strictly increasing in s, so bracket and bisect.
    sign = 1.0 if dt >= 0.0 else -1.0
    lo = 0.0
    hi = sign * abs(dt) / r0
    if hi == 0.0:
        return 0.0, r0, 1.0, 0.0, 0.0, _HALLEY_MAX, True
    for _ in range(2000):
        t, r, rp, g0, g1, g2, _ = _kepler_eq(hi, beta, r0, eta0, zeta0, mu)
        if (t - dt) * sign >= 0.0:
            break
        lo = hi
        hi = 2.0 * hi
    s = 0.5 * (lo + hi)
    for _ in range(400):
        t, r, rp, g0, g1, g2, _ = _kepler_eq(s, beta, r0, eta0, zeta0, mu)
        f = t - dt
        if f * sign > 0.0:
            hi = s
        else:
            lo = s
        s_n = s - f / r
        if not ((s_n - lo) * (s_n - hi) < 0.0):
            s_n = 0.5 * (lo + hi)
        if s_n == s or abs(s_n - s) <= _S_TOL * abs(s_n):
            break
        s = s_n
    return s, r, g0, g1, g2, _HALLEY_MAX, True


@njit(cache=True, error_model="numpy", inline="always")
def drift_start(x0, x1, x2, v0, v1, v2, mu, dt):
    """r0, 1/r0, x.v, beta = 2 mu / r0 - v^2, dt less any whole periods, the
    number of whole periods removed and the period (both 0 if none)."""
    r0 = np.sqrt(x0 * x0 + x1 * x1 + x2 * x2)
    ir0 = 1.0 / r0
    vsq = v0 * v0 + v1 * v1 + v2 * v2
    eta0 = x0 * v0 + x1 * v1 + x2 * v2
    beta = 2.0 * mu * ir0 - vsq
    whole = 0.0
    period = 0.0
    if beta > 0.0 and dt * dt * beta * beta * beta > TWO_PI * TWO_PI * mu * mu:
        # Longer than a period: whole periods change nothing, so remove them.
        period = TWO_PI * mu / (beta * np.sqrt(beta))
        whole = np.trunc(dt / period)
        dt = dt - whole * period
    return r0, ir0, eta0, beta, dt, whole, period


@njit(cache=True, error_model="numpy", inline="always")
def drift_prelude(x0, x1, x2, v0, v1, v2, mu, dt):
    """r0, 1/r0, x.v, beta and dt less any whole periods (see :func:`drift_start`)."""
    r0, ir0, eta0, beta, dt, _, _ = drift_start(x0, x1, x2, v0, v1, v2, mu, dt)
    return r0, ir0, eta0, beta, dt


@njit(cache=True, error_model="numpy", inline="always")
def lagrange(mu, r0, ir0, eta0, r, g1, g2):
    """The Lagrange coefficients f - 1, g, f, f' and g' - 1 from the solution (r, G1, G2)."""
    # f - 1 and g written to avoid the cancellation in 1 - f and dt - mu G3.
    fm1 = -mu * g2 * ir0
    g = r0 * g1 + eta0 * g2
    # g' - 1 from the Lagrange coefficients' identity f g' - f' g = 1 (the
    # drift conserves angular momentum) instead of -mu G2 / r. Rounding in the
    # G-functions has a small bias; taken independently it makes f g' - f' g
    # differ from 1 by the same sign every step (3e-19 per drift measured), and
    # angular momentum then drifts linearly. Closing the identity leaves only
    # unbiased rounding (tests/benchmarks/bench_drift_bias.py). The identity
    # divides by f, which vanishes where a drift sweeps about 90 or 270
    # degrees of true anomaly: there (|f| < _F_IDENTITY, only in drifts of a
    # sizeable part of an orbit) the direct form -mu G2 / r is used, well
    # conditioned for every f.
    # One division gives both 1/r and 1/f: w = 1 / (r f).
    f = 1.0 + fm1
    if f >= _F_IDENTITY or f <= -_F_IDENTITY:
        w = 1.0 / (r * f)
        fd = -mu * g1 * ir0 * (f * w)
        gdm1 = (fd * g - fm1) * (r * w)
    else:
        ir = 1.0 / r
        fd = -mu * g1 * ir0 * ir
        gdm1 = -mu * g2 * ir
    return fm1, g, f, fd, gdm1


@njit(cache=True, error_model="numpy", inline="always")
def apply_lagrange(x0, x1, x2, v0, v1, v2, fm1, g, fd, gdm1):
    """The drifted state x f + v g, x f' + v g' (written with f - 1 and g' - 1)."""
    return (x0 + (fm1 * x0 + g * v0), x1 + (fm1 * x1 + g * v1), x2 + (fm1 * x2 + g * v2),
            v0 + (fd * x0 + gdm1 * v0), v1 + (fd * x1 + gdm1 * v1), v2 + (fd * x2 + gdm1 * v2))


@njit(cache=True, error_model="numpy", inline="always")
def drift_finish(x0, x1, x2, v0, v1, v2, mu, r0, ir0, eta0, r, g1, g2):
    """The drifted state from the solution (r, G1, G2) by the Lagrange coefficients."""
    fm1, g, _, fd, gdm1 = lagrange(mu, r0, ir0, eta0, r, g1, g2)
    return apply_lagrange(x0, x1, x2, v0, v1, v2, fm1, g, fd, gdm1)


@njit(cache=True, error_model="numpy", inline="always")
def drift_state(x0, x1, x2, v0, v1, v2, mu, dt):
    """One relative two-body state (x, v) advanced by dt; returns the six new components.

    Inlined into its callers at numba's level, so a drift costs no call and no
    reference counting of arrays (a call per drift cost about a fifth of a step).
    """
    r0, ir0, eta0, beta, dt = drift_prelude(x0, x1, x2, v0, v1, v2, mu, dt)
    s, r, g0, g1, g2, _, _ = solve_universal(r0, eta0, beta, mu, dt)
    return drift_finish(x0, x1, x2, v0, v1, v2, mu, r0, ir0, eta0, r, g1, g2)


@njit(cache=True, error_model="numpy", inline="always")
def drift_row(x, v, i, mu, dt):
    """Advance row i of the (n, 3) arrays x, v along its two-body orbit by dt, in place.

    Parameters
    ----------
    x, v : ndarray, shape (n, 3)
        Relative positions and velocities (any consistent units).
    i : int
        Row to advance.
    mu : float
        Gravitational parameter G (m1 + m2) in the same units.
    dt : float
        Time step, positive or negative.
    """
    a0, a1, a2, b0, b1, b2 = drift_state(x[i, 0], x[i, 1], x[i, 2],
                                         v[i, 0], v[i, 1], v[i, 2], mu, dt)
    x[i, 0] = a0
    x[i, 1] = a1
    x[i, 2] = a2
    v[i, 0] = b0
    v[i, 1] = b1
    v[i, 2] = b2


def propagate(x, v, mu, dt):
    """Return the two-body state (x, v) advanced by dt (copies; any units)."""
    xx = np.array(x, dtype=np.float64).reshape(1, 3)
    vv = np.array(v, dtype=np.float64).reshape(1, 3)
    drift_row(xx, vv, 0, float(mu), float(dt))
    return xx[0], vv[0]
