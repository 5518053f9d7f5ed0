"""The tangent map of the Wisdom-Holman map, and the MEGNO chaos indicator.

A tangent vector (dx, dv) in the map's Jacobi coordinates is carried by the
linearisation of every piece of the map, exactly as the state is carried by
the map (the symplectic tangent map; Mikkola & Innanen 1999):

- the Kepler drift by the derivative of the universal-variable solution
  (derived below from Danby 1988, sec. 6.9, with the Stumpff identity
  dG_k/dbeta = (k G_(k+2) - s G_(k+1)) / 2);
- the interaction kick by the Jacobian of the accelerations (point masses and
  the star's relativistic term), carried through the same Jacobi transform.

After every step the vector's growth is accumulated into the mean exponential
growth factor of nearby orbits of a map (Cincotta, Giordano & Simo 2003, the
discrete form of Cincotta & Simo 2000)::

    Y(N) = (2/N) sum_{k=1..N} k ln(|d_k| / |d_(k-1)|),   <Y>(N) = (1/N) sum_{m=1..N} Y(m)

and the vector is scaled back to unit length, so the sum of the logarithms
over N steps of length dt is the finite-time largest Lyapunov exponent times
N |dt|. <Y> tends to 2 on a quasi-periodic orbit, to 0 on a stable
isochronous periodic one and grows like lambda t / 2 on a chaotic one.

The length |d| mixes positions (au) and velocities: velocities are scaled by
the natural time unit 1/k (k the Gaussian constant, 58.1 d), so both parts
weigh alike for orbits of about 1 au; the limits above do not depend on it.

The state's own arithmetic is not touched: the drift here is composed of
:func:`integrators.kepler.drift_state`'s own pieces (the start, the solver,
the Lagrange coefficients; tested bit for bit), so a run with the indicator
follows the same trajectory as one without. Logarithms are taken with +, -, *, / and frexp only
(:func:`ln_ieee`), so the indicator is the same on every IEEE-754 machine.
"""

import math

import numpy as np
from numba import njit

from .constants import GAUSS_K
from .kepler import apply_lagrange, drift_start, lagrange, solve_universal, stumpff
from .nbody import to_inertial

# Velocity weight in the tangent vector's length: the natural time unit, days.
V_SCALE = 1.0 / GAUSS_K
# Slots of the accumulator array: steps counted, sum of k ln r_k, sum of Y(m), sum of ln r_k.
N_SUMS = 4
_LN2 = 0.6931471805599453
_SQRT_HALF = 0.7071067811865476


@njit(cache=True, error_model="numpy", inline="always")
def ln_ieee(x):
    """Natural logarithm of x > 0 with +, -, *, / and frexp only (error about 1 ulp).

    x = m 2^e with m in [sqrt(1/2), sqrt(2)); ln m = 2 atanh(u), u = (m-1)/(m+1),
    |u| <= 0.172, summed to u^23 (the next term is below 1e-18 relative).
    """
    m, e = math.frexp(x)  # m in [0.5, 1)
    if m < _SQRT_HALF:
        m = 2.0 * m
        e -= 1
    u = (m - 1.0) / (m + 1.0)
    u2 = u * u
    p = 1.0 / 23.0
    p = 1.0 / 21.0 + u2 * p
    p = 1.0 / 19.0 + u2 * p
    p = 1.0 / 17.0 + u2 * p
    p = 1.0 / 15.0 + u2 * p
    p = 1.0 / 13.0 + u2 * p
    p = 1.0 / 11.0 + u2 * p
    p = 1.0 / 9.0 + u2 * p
    p = 1.0 / 7.0 + u2 * p
    p = 1.0 / 5.0 + u2 * p
    p = 1.0 / 3.0 + u2 * p
    return e * _LN2 + 2.0 * u * (1.0 + u2 * p)


@njit(cache=True, error_model="numpy", inline="always")
def stumpff45(x, c2, c3):
    """Stumpff c4 and c5 of x, given c2 and c3 (a series near 0, the identities
    c_k = (1/(k-2)! - c_(k-2)) / x elsewhere; the tangent needs them to about 1e-14)."""
    if -1.0 <= x <= 1.0:
        # Horner from the term (-x)^9 / 22! down: c4 = sum_{k=0..9} (-x)^k / (2k+4)!.
        c4 = 1.0 / 1124000727777607680000.0
        c4 = 1.0 / 2432902008176640000.0 - x * c4
        c4 = 1.0 / 6402373705728000.0 - x * c4
        c4 = 1.0 / 20922789888000.0 - x * c4
        c4 = 1.0 / 87178291200.0 - x * c4
        c4 = 1.0 / 479001600.0 - x * c4
        c4 = 1.0 / 3628800.0 - x * c4
        c4 = 1.0 / 40320.0 - x * c4
        c4 = 1.0 / 720.0 - x * c4
        c4 = 1.0 / 24.0 - x * c4
        # c5 = sum_{k=0..8} (-x)^k / (2k+5)!.
        c5 = 1.0 / 51090942171709440000.0
        c5 = 1.0 / 121645100408832000.0 - x * c5
        c5 = 1.0 / 355687428096000.0 - x * c5
        c5 = 1.0 / 1307674368000.0 - x * c5
        c5 = 1.0 / 6227020800.0 - x * c5
        c5 = 1.0 / 39916800.0 - x * c5
        c5 = 1.0 / 362880.0 - x * c5
        c5 = 1.0 / 5040.0 - x * c5
        c5 = 1.0 / 120.0 - x * c5
        return c4, c5
    return (0.5 - c2) / x, (1.0 / 6.0 - c3) / x


@njit(cache=True, error_model="numpy", inline="always")
def drift_tangent(x0, x1, x2, v0, v1, v2, d0, d1, d2, e0, e1, e2, mu, r0, ir0, eta0, beta,
                  whole, period, s, r, g0, g1, g2, f, g, fd, gdm1, c2, c3):
    """The drift's derivative applied to the tangent vector (d, e) = (dx, dv), from
    the state (x, v) before the drift and the drift's own values: the start
    (:func:`integrators.kepler.drift_start`), the solver's root s with r and G0..G2
    there, the Lagrange coefficients, and the Stumpff values c2, c3 of beta s^2
    (the batched kernel computes them for all its lanes at once). Returns the
    six new tangent components. Shared by the scalar tangent drift and the
    batched one (integrators.batch). (At most 30 arguments: beyond that Python
    passes them as a tuple, which numba cannot inline.)"""
    # Variations of the invariants of the start.
    dr0 = (x0 * d0 + x1 * d1 + x2 * d2) * ir0
    deta = d0 * v0 + d1 * v1 + d2 * v2 + x0 * e0 + x1 * e1 + x2 * e2
    dbeta = -2.0 * mu * dr0 * ir0 * ir0 - 2.0 * (v0 * e0 + v1 * e1 + v2 * e2)
    # G-functions at the root, and dG_k/dbeta = (k G_(k+2) - s G_(k+1)) / 2.
    xs = beta * s * s
    c4, c5 = stumpff45(xs, c2, c3)
    s2 = s * s
    G3 = s2 * s * c3
    G4 = s2 * s2 * c4
    G5 = s2 * s2 * s * c5
    bG0 = -0.5 * s * g1
    bG1 = 0.5 * (G3 - s * g2)
    bG2 = 0.5 * (2.0 * G4 - s * G3)
    bG3 = 0.5 * (3.0 * G5 - s * G4)
    # The reduced time dt' = dt - whole periods depends on beta through the period.
    dh = 0.0
    if whole != 0.0:
        dh = 1.5 * whole * period * dbeta / beta
    # Kepler's equation r0 G1 + eta0 G2 + mu G3 = dt' at fixed dt: its s-derivative is r.
    ds = (dh - g1 * dr0 - g2 * deta - (r0 * bG1 + eta0 * bG2 + mu * bG3) * dbeta) / r
    dG0 = -beta * g1 * ds + bG0 * dbeta
    dG1 = g0 * ds + bG1 * dbeta
    dG2 = g1 * ds + bG2 * dbeta
    dG3 = g2 * ds + bG3 * dbeta
    drr = g0 * dr0 + r0 * dG0 + g1 * deta + eta0 * dG1 + mu * dG2
    df = -mu * (dG2 - g2 * dr0 * ir0) * ir0
    dg = dh - mu * dG3
    ir = 1.0 / r
    dfd = -mu * (dG1 - g1 * (drr * ir + dr0 * ir0)) * ir * ir0
    dgd = -mu * (dG2 - g2 * drr * ir) * ir
    gd = 1.0 + gdm1
    p0 = df * x0 + f * d0 + dg * v0 + g * e0
    p1 = df * x1 + f * d1 + dg * v1 + g * e1
    p2 = df * x2 + f * d2 + dg * v2 + g * e2
    q0 = dfd * x0 + fd * d0 + dgd * v0 + gd * e0
    q1 = dfd * x1 + fd * d1 + dgd * v1 + gd * e1
    q2 = dfd * x2 + fd * d2 + dgd * v2 + gd * e2
    return p0, p1, p2, q0, q1, q2


@njit(cache=True, error_model="numpy", inline="always")
def drift_state_tangent(x0, x1, x2, v0, v1, v2, d0, d1, d2, e0, e1, e2, mu, dt):
    """:func:`integrators.kepler.drift_state` of (x, v) by dt, and its derivative
    applied to the tangent vector (d, e) = (dx, dv). Returns the twelve new components."""
    # --- the state: drift_state's own pieces, in its order --------------------
    r0, ir0, eta0, beta, dt, whole, period = drift_start(x0, x1, x2, v0, v1, v2, mu, dt)
    s, r, g0, g1, g2, _, _ = solve_universal(r0, eta0, beta, mu, dt)
    fm1, g, f, fd, gdm1 = lagrange(mu, r0, ir0, eta0, r, g1, g2)
    n0, n1, n2, m0, m1, m2 = apply_lagrange(x0, x1, x2, v0, v1, v2, fm1, g, fd, gdm1)
    _, _, c2, c3 = stumpff(beta * s * s)
    p0, p1, p2, q0, q1, q2 = drift_tangent(x0, x1, x2, v0, v1, v2, d0, d1, d2, e0, e1, e2, mu,
                                           r0, ir0, eta0, beta, whole, period, s, r, g0, g1,
                                           g2, f, g, fd, gdm1, c2, c3)
    return n0, n1, n2, m0, m1, m2, p0, p1, p2, q0, q1, q2


@njit(cache=True, error_model="numpy", inline="always")
def drift_all_tangent(xj, vj, dxj, dvj, mu, h):
    """drift_all (wisdom_holman) of the state, and of the tangent vector with it."""
    n = xj.shape[0]
    xj[0, 0] += vj[0, 0] * h
    xj[0, 1] += vj[0, 1] * h
    xj[0, 2] += vj[0, 2] * h
    for i in range(1, n):
        (xj[i, 0], xj[i, 1], xj[i, 2], vj[i, 0], vj[i, 1], vj[i, 2],
         dxj[i, 0], dxj[i, 1], dxj[i, 2], dvj[i, 0], dvj[i, 1], dvj[i, 2]) = drift_state_tangent(
            xj[i, 0], xj[i, 1], xj[i, 2], vj[i, 0], vj[i, 1], vj[i, 2],
            dxj[i, 0], dxj[i, 1], dxj[i, 2], dvj[i, 0], dvj[i, 1], dvj[i, 2], mu[i], h)


@njit(cache=True, error_model="numpy", inline="always")
def pair_tangent(a0, a1, a2, b0, b1, b2):
    """(dd - 3 d (d . dd) / r^2) / r^3 for the separation d = (a) and its variation
    dd = (b): the variation of d / r^3, which times gm_j is that of body i's pull."""
    r2 = a0 * a0 + a1 * a1 + a2 * a2
    ir3 = 1.0 / (r2 * np.sqrt(r2))
    k3 = 3.0 * (a0 * b0 + a1 * b1 + a2 * b2) / r2
    return (b0 - k3 * a0) * ir3, (b1 - k3 * a1) * ir3, (b2 - k3 * a2) * ir3


@njit(cache=True, error_model="numpy", inline="always")
def gr_tangent(a0, a1, a2, b0, b1, b2, gr_coef):
    """c (dd - 4 d (d . dd) / r^2) / r^4: the variation of the relativistic term
    c d / r^4 (d = x_i - x_0 = (a), dd = (b))."""
    r2 = a0 * a0 + a1 * a1 + a2 * a2
    f = gr_coef / (r2 * r2)
    k4 = 4.0 * (a0 * b0 + a1 * b1 + a2 * b2) / r2
    return f * (b0 - k4 * a0), f * (b1 - k4 * a1), f * (b2 - k4 * a2)


@njit(cache=True, error_model="numpy", inline="always")
def jacobi_tangent(x0, x1, x2, b0, b1, b2, mui):
    """mu (dx - 3 x (x . dx) / r^2) / r^3: the variation of the Jacobi kick's
    Keplerian term mu x / r^3 (x = (x), dx = (b))."""
    r2 = x0 * x0 + x1 * x1 + x2 * x2
    ir3 = 1.0 / (r2 * np.sqrt(r2))
    k3 = 3.0 * (x0 * b0 + x1 * b1 + x2 * b2) / r2
    return mui * (b0 - k3 * x0) * ir3, mui * (b1 - k3 * x1) * ir3, mui * (b2 - k3 * x2) * ir3


@njit(cache=True, error_model="numpy", inline="always")
def kick_tangent(xj, xi, dxj, dvj, gm, mu, mr, h, gr_coef, dxi, dacc):
    """The kick's derivative applied to the tangent: dv += h J dx.

    xi must hold the inertial positions of xj (the kick just computed them);
    the kick leaves positions unchanged, so this may follow it. dxi and dacc
    are scratch arrays (n, 3).
    """
    n = xj.shape[0]
    # Inertial tangent positions: to_inertial is linear.
    to_inertial(dxj, mr, dxi)
    for i in range(n):
        dacc[i, 0] = 0.0
        dacc[i, 1] = 0.0
        dacc[i, 2] = 0.0
    # d/dx of gm_j d / r^3 (d = x_j - x_i) is gm_j (dd / r^3 - 3 d (d . dd) / r^5).
    for i in range(n):
        for j in range(i + 1, n):
            a0 = xi[j, 0] - xi[i, 0]
            a1 = xi[j, 1] - xi[i, 1]
            a2 = xi[j, 2] - xi[i, 2]
            b0 = dxi[j, 0] - dxi[i, 0]
            b1 = dxi[j, 1] - dxi[i, 1]
            b2 = dxi[j, 2] - dxi[i, 2]
            t0, t1, t2 = pair_tangent(a0, a1, a2, b0, b1, b2)
            dacc[i, 0] += gm[j] * t0
            dacc[i, 1] += gm[j] * t1
            dacc[i, 2] += gm[j] * t2
            dacc[j, 0] -= gm[i] * t0
            dacc[j, 1] -= gm[i] * t1
            dacc[j, 2] -= gm[i] * t2
    if gr_coef > 0.0:
        # d/dx of -c d / r^4 (d = x_i - x_0) is -c (dd / r^4 - 4 d (d . dd) / r^6).
        for i in range(1, n):
            a0 = xi[i, 0] - xi[0, 0]
            a1 = xi[i, 1] - xi[0, 1]
            a2 = xi[i, 2] - xi[0, 2]
            b0 = dxi[i, 0] - dxi[0, 0]
            b1 = dxi[i, 1] - dxi[0, 1]
            b2 = dxi[i, 2] - dxi[0, 2]
            t0, t1, t2 = gr_tangent(a0, a1, a2, b0, b1, b2, gr_coef)
            dacc[i, 0] -= t0
            dacc[i, 1] -= t1
            dacc[i, 2] -= t2
            q = gm[i] / gm[0]
            dacc[0, 0] += q * t0
            dacc[0, 1] += q * t1
            dacc[0, 2] += q * t2
    # The kick's Jacobi transform, and d/dx of mu x / r^3.
    a0 = dacc[0, 0]
    a1 = dacc[0, 1]
    a2 = dacc[0, 2]
    for i in range(1, n):
        x0 = xj[i, 0]
        x1 = xj[i, 1]
        x2 = xj[i, 2]
        b0 = dxj[i, 0]
        b1 = dxj[i, 1]
        b2 = dxj[i, 2]
        u0, u1, u2 = jacobi_tangent(x0, x1, x2, b0, b1, b2, mu[i])
        aj0 = dacc[i, 0] - a0
        aj1 = dacc[i, 1] - a1
        aj2 = dacc[i, 2] - a2
        dvj[i, 0] += h * (aj0 + u0)
        dvj[i, 1] += h * (aj1 + u1)
        dvj[i, 2] += h * (aj2 + u2)
        q = mr[i]
        a0 = a0 + q * aj0
        a1 = a1 + q * aj1
        a2 = a2 + q * aj2


@njit(cache=True, error_model="numpy", inline="always")
def megno_sums(q, n, s1, s2, s3):
    """The MEGNO sums (steps, sum k ln r_k, sum Y(m), sum ln r_k) after one more
    step whose tangent vector has squared length q, and the factor 1/sqrt(q)
    that scales it back to length 1."""
    lnr = 0.5 * ln_ieee(q)
    k = n + 1.0
    s1 = s1 + k * lnr
    s2 = s2 + 2.0 * s1 / k
    return k, s1, s2, s3 + lnr, 1.0 / np.sqrt(q)


@njit(cache=True, error_model="numpy", inline="always")
def megno_update(dxj, dvj, sums):
    """Add one step's growth of the tangent vector to the sums, then scale it to length 1.

    sums: [steps N, sum k ln r_k, sum Y(m), sum ln r_k]. The vector had length
    1 before the step, so r_N is its length now.
    """
    n = dxj.shape[0]
    q = 0.0
    for i in range(1, n):
        for c in range(3):
            w = V_SCALE * dvj[i, c]
            q += dxj[i, c] * dxj[i, c] + w * w
    sums[0], sums[1], sums[2], sums[3], s = megno_sums(q, sums[0], sums[1], sums[2], sums[3])
    for i in range(1, n):
        for c in range(3):
            dxj[i, c] *= s
            dvj[i, c] *= s


def megno_of(sums):
    """<Y> from the sums (nan before the first step)."""
    return sums[2] / sums[0] if sums[0] > 0 else float("nan")


def lyapunov_of(sums, dt):
    """Finite-time largest Lyapunov exponent, per day, from the sums."""
    return sums[3] / (sums[0] * abs(dt)) if sums[0] > 0 else float("nan")


def initial_tangent(n, seed):
    """A unit tangent vector (dx, dv), each (n, 3), from PCG64(seed); row 0 (the
    centre of mass, which no other row feels) is zero."""
    rng = np.random.Generator(np.random.PCG64(seed))
    d = rng.standard_normal((2, n, 3))
    d[:, 0, :] = 0.0
    d[1] /= V_SCALE
    q = float((d[0] ** 2).sum() + ((V_SCALE * d[1]) ** 2).sum())
    return d[0] / np.sqrt(q), d[1] / np.sqrt(q)
