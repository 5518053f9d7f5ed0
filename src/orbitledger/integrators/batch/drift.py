"""The Kepler drift of every lane: the drift's pieces (integrators.kepler) composed
with per-lane masks, the solver iterating while any lane is unconverged, and the
tangent drift (integrators.variational) with it."""

import numpy as np
from numba import njit

from ..kepler import (_HALLEY_MAX, _ITERATE, _STUMPFF_MAX_QUARTERS, _STUMPFF_REDUCED,
                      drift_finish, drift_prelude, drift_start, halley_update, kepler_terms,
                      lagrange, solve_universal, stumpff_double, stumpff_series, universal_guess)
from ..variational import drift_tangent
from .lanes import (_BETA, _C0, _C1, _C2, _C3, _DSP, _DT, _ETA, _G0, _G1, _G2, _HI, _IR0, _LO,
                    _NQ, _PITCH, _R0, _RR, _S, _ST, _Y, _ZETA)


@njit(cache=True, error_model="numpy", inline="always")
def _is_large(y):
    """True where the scalar Stumpff function would quarter its argument."""
    return y > _STUMPFF_REDUCED or y < -_STUMPFF_REDUCED


@njit(cache=True, error_model="numpy", inline="always")
def _halley_lane(w, m, mu, c0, c1, c2, c3):
    """One Halley iteration of lane m from its Stumpff values; a lane no longer
    iterating keeps its values. Returns 1 if the lane iterates on, else 0."""
    s = w[_S * _PITCH + m]
    beta = w[_BETA * _PITCH + m]
    r0 = w[_R0 * _PITCH + m]
    eta0 = w[_ETA * _PITCH + m]
    t, r, rp, g0, g1, g2, t_scale = kepler_terms(s, c0, c1, c2, c3, r0, eta0, w[_ZETA * _PITCH + m], mu)
    code, s, r, g0, g1, g2, lo, hi, ds = halley_update(
        s, w[_DT * _PITCH + m], t, r, rp, g0, g1, g2, t_scale, w[_LO * _PITCH + m], w[_HI * _PITCH + m], w[_DSP * _PITCH + m],
        beta, r0, eta0, mu)
    live = w[_ST * _PITCH + m] == 0.0
    w[_ST * _PITCH + m] = float(code) if live else w[_ST * _PITCH + m]
    w[_S * _PITCH + m] = s if live else w[_S * _PITCH + m]
    w[_RR * _PITCH + m] = r if live else w[_RR * _PITCH + m]
    w[_G0 * _PITCH + m] = g0 if live else w[_G0 * _PITCH + m]
    w[_G1 * _PITCH + m] = g1 if live else w[_G1 * _PITCH + m]
    w[_G2 * _PITCH + m] = g2 if live else w[_G2 * _PITCH + m]
    w[_LO * _PITCH + m] = lo if live else w[_LO * _PITCH + m]
    w[_HI * _PITCH + m] = hi if live else w[_HI * _PITCH + m]
    w[_DSP * _PITCH + m] = ds if live else w[_DSP * _PITCH + m]
    # The next argument of the Stumpff functions, taken here for the next round.
    y = beta * w[_S * _PITCH + m] * w[_S * _PITCH + m]
    w[_Y * _PITCH + m] = y
    go = live and code == _ITERATE
    return (1 if go else 0) + (2 if go and _is_large(y) else 0)


@njit(cache=True, error_model="numpy", inline="always")
def _stumpff_rows(w, nl, live_only):
    """:func:`integrators.kepler.stumpff` of row _Y of every lane (with live_only,
    of the lanes still iterating, row _ST == 0) into rows _C0.._C3: the argument
    quartered while any lane needs it (a lane stops where its scalar loop
    would), the series, then each lane's own number of doublings. Row _Y is
    left quartered."""
    for m in range(nl):
        w[_NQ * _PITCH + m] = 0.0
    rounds = 0
    for _q in range(_STUMPFF_MAX_QUARTERS):
        need = 0
        for m in range(nl):
            y = w[_Y * _PITCH + m]
            more = (w[_ST * _PITCH + m] == 0.0 or not live_only) and _is_large(y)
            w[_Y * _PITCH + m] = y * 0.25 if more else y
            w[_NQ * _PITCH + m] += 1.0 if more else 0.0
            need += 1 if more else 0
        if need == 0:
            break
        rounds += 1
    for m in range(nl):
        y = w[_Y * _PITCH + m]
        c0, c1, c2, c3 = stumpff_series(y)
        bad = _is_large(y)
        w[_C0 * _PITCH + m] = np.nan if bad else c0
        w[_C1 * _PITCH + m] = np.nan if bad else c1
        w[_C2 * _PITCH + m] = np.nan if bad else c2
        w[_C3 * _PITCH + m] = np.nan if bad else c3
    for q in range(rounds):
        for m in range(nl):
            c0, c1, c2, c3 = stumpff_double(w[_C0 * _PITCH + m], w[_C1 * _PITCH + m],
                                            w[_C2 * _PITCH + m], w[_C3 * _PITCH + m])
            go = q < w[_NQ * _PITCH + m]
            w[_C0 * _PITCH + m] = c0 if go else w[_C0 * _PITCH + m]
            w[_C1 * _PITCH + m] = c1 if go else w[_C1 * _PITCH + m]
            w[_C2 * _PITCH + m] = c2 if go else w[_C2 * _PITCH + m]
            w[_C3 * _PITCH + m] = c3 if go else w[_C3 * _PITCH + m]


@njit(cache=True, error_model="numpy", inline="always")
def _drift_lanes(x, v, i, mu, h, nl, w, tangent, dx, dv):
    """Kepler drift of Jacobi row i of every lane by h[lane], in place; with
    `tangent`, the tangent vectors (dx, dv) (n, 3, B) are carried with it
    (:func:`integrators.variational.drift_all_tangent` per lane).

    x, v: (n, 3, B); h: (B,); w: flat scratch, row r of lane m at r * _PITCH + m. Each round is one
    pass over the lanes while no lane needs its Stumpff argument quartered
    (the usual case: a drift is a small part of an orbit), else three.
    """
    large = 0
    for m in range(nl):
        r0, ir0, eta0, beta, dt = drift_prelude(x[i, 0, m], x[i, 1, m], x[i, 2, m],
                                                v[i, 0, m], v[i, 1, m], v[i, 2, m], mu, h[m])
        zeta0, s, lo, hi = universal_guess(r0, eta0, beta, mu, dt)
        w[_R0 * _PITCH + m] = r0
        w[_IR0 * _PITCH + m] = ir0
        w[_ETA * _PITCH + m] = eta0
        w[_BETA * _PITCH + m] = beta
        w[_DT * _PITCH + m] = dt
        w[_ZETA * _PITCH + m] = zeta0
        w[_S * _PITCH + m] = s
        w[_LO * _PITCH + m] = lo
        w[_HI * _PITCH + m] = hi
        w[_DSP * _PITCH + m] = np.inf
        w[_ST * _PITCH + m] = 0.0
        y = beta * s * s
        w[_Y * _PITCH + m] = y
        large += 1 if _is_large(y) else 0
    for _ in range(_HALLEY_MAX):
        # w[_Y] holds beta s^2 of every lane still iterating.
        left = 0
        if large == 0:
            for m in range(nl):
                c0, c1, c2, c3 = stumpff_series(w[_Y * _PITCH + m])
                flags = _halley_lane(w, m, mu, c0, c1, c2, c3)
                left += flags & 1
                large += flags >> 1
        else:
            _stumpff_rows(w, nl, True)
            large = 0
            for m in range(nl):
                flags = _halley_lane(w, m, mu, w[_C0 * _PITCH + m], w[_C1 * _PITCH + m], w[_C2 * _PITCH + m], w[_C3 * _PITCH + m])
                left += flags & 1
                large += flags >> 1
        if left == 0:
            break
    solved = 0
    for m in range(nl):
        solved += 1 if w[_ST * _PITCH + m] == 1.0 else 0
    if solved < nl:
        for m in range(nl):
            if w[_ST * _PITCH + m] != 1.0:
                # Unconverged after every Halley iteration, or sent to the
                # fallback: the scalar solver (its own iterations, then its
                # bracket) gives this lane exactly what it gives the member alone.
                s, r, g0, g1, g2, _, _ = solve_universal(w[_R0 * _PITCH + m], w[_ETA * _PITCH + m], w[_BETA * _PITCH + m],
                                                         mu, w[_DT * _PITCH + m])
                w[_S * _PITCH + m] = s
                w[_RR * _PITCH + m] = r
                w[_G0 * _PITCH + m] = g0
                w[_G1 * _PITCH + m] = g1
                w[_G2 * _PITCH + m] = g2
    if tangent:
        # From the state before the drift and the solver's root: the scalar
        # tangent drift's arithmetic. The Stumpff functions at the root for
        # every lane at once (quartered while any lane needs it, as in the
        # solver's rounds), then the tangent in one pass over the lanes (the
        # start is taken again for the number of whole periods it removed:
        # the same operations, so the same bits).
        for m in range(nl):
            s = w[_S * _PITCH + m]
            w[_Y * _PITCH + m] = w[_BETA * _PITCH + m] * s * s
        _stumpff_rows(w, nl, False)
        for m in range(nl):
            x0, x1, x2 = x[i, 0, m], x[i, 1, m], x[i, 2, m]
            v0, v1, v2 = v[i, 0, m], v[i, 1, m], v[i, 2, m]
            r0, ir0, eta0, beta, _, whole, period = drift_start(x0, x1, x2, v0, v1, v2, mu, h[m])
            s = w[_S * _PITCH + m]
            r = w[_RR * _PITCH + m]
            g1 = w[_G1 * _PITCH + m]
            g2 = w[_G2 * _PITCH + m]
            _, g, f, fd, gdm1 = lagrange(mu, r0, ir0, eta0, r, g1, g2)
            p0, p1, p2, q0, q1, q2 = drift_tangent(
                x0, x1, x2, v0, v1, v2, dx[i, 0, m], dx[i, 1, m], dx[i, 2, m], dv[i, 0, m],
                dv[i, 1, m], dv[i, 2, m], mu, r0, ir0, eta0, beta, whole, period, s, r,
                w[_G0 * _PITCH + m], g1, g2, f, g, fd, gdm1, w[_C2 * _PITCH + m],
                w[_C3 * _PITCH + m])
            dx[i, 0, m] = p0
            dx[i, 1, m] = p1
            dx[i, 2, m] = p2
            dv[i, 0, m] = q0
            dv[i, 1, m] = q1
            dv[i, 2, m] = q2
    for m in range(nl):
        a0, a1, a2, b0, b1, b2 = drift_finish(
            x[i, 0, m], x[i, 1, m], x[i, 2, m], v[i, 0, m], v[i, 1, m], v[i, 2, m], mu,
            w[_R0 * _PITCH + m], w[_IR0 * _PITCH + m], w[_ETA * _PITCH + m], w[_RR * _PITCH + m], w[_G1 * _PITCH + m], w[_G2 * _PITCH + m])
        x[i, 0, m] = a0
        x[i, 1, m] = a1
        x[i, 2, m] = a2
        v[i, 0, m] = b0
        v[i, 1, m] = b1
        v[i, 2, m] = b2


@njit(cache=True, error_model="numpy", inline="always")
def _drift_all_lanes(xj, vj, mu, h, nl, w, tangent, dx, dv):
    """:func:`integrators.wisdom_holman.drift_all` for every lane (and with `tangent`,
    :func:`integrators.variational.drift_all_tangent`)."""
    for m in range(nl):
        xj[0, 0, m] += vj[0, 0, m] * h[m]
        xj[0, 1, m] += vj[0, 1, m] * h[m]
        xj[0, 2, m] += vj[0, 2, m] * h[m]
    for i in range(1, xj.shape[0]):
        _drift_lanes(xj, vj, i, mu[i], h, nl, w, tangent, dx, dv)
