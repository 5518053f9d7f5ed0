"""The Wisdom-Holman map for a batch of ensemble members at once.

Members of one ensemble share the masses, the step, the corrector, the GR
term and the stop conditions; only their states differ. Here B members
("lanes") advance together in one compiled call, with the lane index
innermost in memory (arrays shaped (body, coordinate, lane)), so that the
compiler can apply one vector instruction to several members.

Each lane's arithmetic is the scalar kernel's own, operation for operation,
so a member's trajectory, samples and stop step are the bytes
:func:`integrators.wisdom_holman.wh_steps` gives it alone. The pieces of the
drift (:mod:`integrators.kepler`: the drift's prelude, the starting guess,
the Stumpff series and doubling, the Kepler terms, one Halley iteration, the
Lagrange finish) are defined once and composed here with per-lane masks
instead of branches: the Kepler solver iterates while any lane is
unconverged, and a converged lane's values are frozen at the bits its scalar
solver returned. A lane that needs the solver's bracketed fallback (rare:
near-parabolic or extreme drifts) is solved by the scalar solver itself.
Stop conditions are screened for all lanes with the scalar conditions'
arithmetic, and a lane that meets one is checked again by the scalar
:func:`integrators.stops.check_stops`, so the stop and its bodies are the
scalar kernel's. Samples are taken per lane by the scalar diagnosis on a
copy. The call returns at the end of the first step in which any lane
stopped; the driver (:func:`advance_together`) hands that lane back and goes
on with the others.
"""

import llvmlite.binding as _llvm
import numpy as np
from numba import njit

from .kepler import (_HALLEY_MAX, _ITERATE, _STUMPFF_MAX_QUARTERS, _STUMPFF_REDUCED,
                     drift_finish, drift_prelude, drift_start, halley_update, kepler_terms,
                     lagrange, solve_universal, stumpff_double, stumpff_series, universal_guess)
from .stops import NUMERICAL_FAILURE_CODE, body_stop, check_stops, first_broken, hill_hit
from .variational import (N_SUMS, V_SCALE, drift_tangent, gr_tangent, jacobi_tangent,
                          megno_sums, pair_tangent)
from .wisdom_holman import WisdomHolman, wh_diagnose

# A lane loop reads and writes many rows of several arrays; LLVM vectorizes
# it behind run-time checks that the arrays do not overlap, and by default
# gives up beyond a small number of checks (measured: a loop with 7 read and
# 11 written rows stayed scalar). Raising the limit only lets more loops take
# the vector path; it changes no operation, so no bits (a vector loop here
# does per lane what the scalar one does; no reduction of floating-point
# values is reordered without fast-math). It is set process-wide before this
# module's kernels are compiled.
_llvm.set_option("", "-vectorize-memory-check-threshold=1024")

# Most lanes in one kernel call, and the distance in elements between two
# rows of the flat scratch arrays: a compile-time constant, so that LLVM sees
# the rows of one array cannot overlap within a loop over the lanes and
# vectorizes it without run-time checks between them.
_PITCH = 64

# Rows of the per-lane scratch array of the drift.
_R0, _IR0, _ETA, _BETA, _DT, _ZETA, _S, _LO, _HI, _DSP, _ST = range(11)
_RR, _G0, _G1, _G2, _Y, _NQ, _C0, _C1, _C2, _C3 = range(11, 21)
N_DRIFT_ROWS = 21
# Rows of the per-lane scratch array of the step (besides the drift's).
_H, _A0, _A1, _A2, _FLAG, _Q = range(6)
N_STEP_ROWS = 6

# Members advanced together by default: measured (docs/benchmarks.md,
# "Batched members"), not guessed.
DEFAULT_LANES = 32
# Most bytes of samples held in the batch's own staging arrays at once.
_STAGING_BYTES = 4_000_000


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


@njit(cache=True, error_model="numpy", inline="always")
def _to_inertial_lanes(xj, mr, xi, nl, c):
    """:func:`integrators.nbody.to_inertial` for every lane (one pass over the lanes
    per body, all three coordinates); c: flat scratch."""
    n = xj.shape[0]
    for m in range(nl):
        c[(_A0) * _PITCH + m] = xj[0, 0, m]
        c[(_A1) * _PITCH + m] = xj[0, 1, m]
        c[(_A2) * _PITCH + m] = xj[0, 2, m]
    for i in range(n - 1, 0, -1):
        q = mr[i]
        for m in range(nl):
            x0 = xj[i, 0, m]
            x1 = xj[i, 1, m]
            x2 = xj[i, 2, m]
            c0 = c[(_A0) * _PITCH + m] - q * x0
            c1 = c[(_A1) * _PITCH + m] - q * x1
            c2 = c[(_A2) * _PITCH + m] - q * x2
            c[(_A0) * _PITCH + m] = c0
            c[(_A1) * _PITCH + m] = c1
            c[(_A2) * _PITCH + m] = c2
            xi[i, 0, m] = c0 + x0
            xi[i, 1, m] = c1 + x1
            xi[i, 2, m] = c2 + x2
    for m in range(nl):
        xi[0, 0, m] = c[(_A0) * _PITCH + m]
        xi[0, 1, m] = c[(_A1) * _PITCH + m]
        xi[0, 2, m] = c[(_A2) * _PITCH + m]


@njit(cache=True, error_model="numpy", inline="always")
def _kick_lanes(xj, vj, gm, mu, mr, h, gr_coef, xi, acc, nl, c):
    """:func:`integrators.wisdom_holman.kick` for every lane, same operations in the
    same order per lane. xi, acc: (n, 3, B) scratch (xi keeps the inertial positions
    for the stop checks); c: flat scratch (N_STEP_ROWS rows of _PITCH)."""
    n = xj.shape[0]
    _to_inertial_lanes(xj, mr, xi, nl, c)
    # accelerations: the scalar pair loop's order (i < j) for every lane
    for i in range(n):
        for m in range(nl):
            acc[i, 0, m] = 0.0
            acc[i, 1, m] = 0.0
            acc[i, 2, m] = 0.0
    for i in range(n):
        gi = gm[i]
        for j in range(i + 1, n):
            gj = gm[j]
            for m in range(nl):
                dx = xi[j, 0, m] - xi[i, 0, m]
                dy = xi[j, 1, m] - xi[i, 1, m]
                dz = xi[j, 2, m] - xi[i, 2, m]
                r2 = dx * dx + dy * dy + dz * dz
                ir3 = 1.0 / (r2 * np.sqrt(r2))
                fi = gj * ir3
                fj = gi * ir3
                acc[i, 0, m] += fi * dx
                acc[i, 1, m] += fi * dy
                acc[i, 2, m] += fi * dz
                acc[j, 0, m] -= fj * dx
                acc[j, 1, m] -= fj * dy
                acc[j, 2, m] -= fj * dz
    if gr_coef > 0.0:
        for i in range(1, n):
            q = gm[i] / gm[0]
            for m in range(nl):
                dx = xi[i, 0, m] - xi[0, 0, m]
                dy = xi[i, 1, m] - xi[0, 1, m]
                dz = xi[i, 2, m] - xi[0, 2, m]
                r2 = dx * dx + dy * dy + dz * dz
                f = gr_coef / (r2 * r2)
                acc[i, 0, m] -= f * dx
                acc[i, 1, m] -= f * dy
                acc[i, 2, m] -= f * dz
                acc[0, 0, m] += q * f * dx
                acc[0, 1, m] += q * f * dy
                acc[0, 2, m] += q * f * dz
    # the Jacobi kick
    for m in range(nl):
        c[(_A0) * _PITCH + m] = acc[0, 0, m]
        c[(_A1) * _PITCH + m] = acc[0, 1, m]
        c[(_A2) * _PITCH + m] = acc[0, 2, m]
    for i in range(1, n):
        mui = mu[i]
        q = mr[i]
        for m in range(nl):
            x0 = xj[i, 0, m]
            x1 = xj[i, 1, m]
            x2 = xj[i, 2, m]
            r2 = x0 * x0 + x1 * x1 + x2 * x2
            k = mui / (r2 * np.sqrt(r2))
            aj0 = acc[i, 0, m] - c[(_A0) * _PITCH + m]
            aj1 = acc[i, 1, m] - c[(_A1) * _PITCH + m]
            aj2 = acc[i, 2, m] - c[(_A2) * _PITCH + m]
            vj[i, 0, m] += h * (aj0 + k * x0)
            vj[i, 1, m] += h * (aj1 + k * x1)
            vj[i, 2, m] += h * (aj2 + k * x2)
            c[(_A0) * _PITCH + m] = c[(_A0) * _PITCH + m] + q * aj0
            c[(_A1) * _PITCH + m] = c[(_A1) * _PITCH + m] + q * aj1
            c[(_A2) * _PITCH + m] = c[(_A2) * _PITCH + m] + q * aj2


@njit(cache=True, error_model="numpy", inline="always")
def _kick_tangent_lanes(xj, xi, dxj, dvj, gm, mu, mr, h, gr_coef, dxi, dacc, nl, c):
    """:func:`integrators.variational.kick_tangent` for every lane, same operations in
    the same order per lane (xi: the kick's inertial positions; dxi, dacc: (n, 3, B)
    scratch)."""
    n = xj.shape[0]
    _to_inertial_lanes(dxj, mr, dxi, nl, c)
    for i in range(n):
        for m in range(nl):
            dacc[i, 0, m] = 0.0
            dacc[i, 1, m] = 0.0
            dacc[i, 2, m] = 0.0
    for i in range(n):
        gi = gm[i]
        for j in range(i + 1, n):
            gj = gm[j]
            for m in range(nl):
                t0, t1, t2 = pair_tangent(
                    xi[j, 0, m] - xi[i, 0, m], xi[j, 1, m] - xi[i, 1, m],
                    xi[j, 2, m] - xi[i, 2, m], dxi[j, 0, m] - dxi[i, 0, m],
                    dxi[j, 1, m] - dxi[i, 1, m], dxi[j, 2, m] - dxi[i, 2, m])
                dacc[i, 0, m] += gj * t0
                dacc[i, 1, m] += gj * t1
                dacc[i, 2, m] += gj * t2
                dacc[j, 0, m] -= gi * t0
                dacc[j, 1, m] -= gi * t1
                dacc[j, 2, m] -= gi * t2
    if gr_coef > 0.0:
        for i in range(1, n):
            q = gm[i] / gm[0]
            for m in range(nl):
                t0, t1, t2 = gr_tangent(
                    xi[i, 0, m] - xi[0, 0, m], xi[i, 1, m] - xi[0, 1, m],
                    xi[i, 2, m] - xi[0, 2, m], dxi[i, 0, m] - dxi[0, 0, m],
                    dxi[i, 1, m] - dxi[0, 1, m], dxi[i, 2, m] - dxi[0, 2, m], gr_coef)
                dacc[i, 0, m] -= t0
                dacc[i, 1, m] -= t1
                dacc[i, 2, m] -= t2
                dacc[0, 0, m] += q * t0
                dacc[0, 1, m] += q * t1
                dacc[0, 2, m] += q * t2
    for m in range(nl):
        c[(_A0) * _PITCH + m] = dacc[0, 0, m]
        c[(_A1) * _PITCH + m] = dacc[0, 1, m]
        c[(_A2) * _PITCH + m] = dacc[0, 2, m]
    for i in range(1, n):
        mui = mu[i]
        q = mr[i]
        for m in range(nl):
            u0, u1, u2 = jacobi_tangent(xj[i, 0, m], xj[i, 1, m], xj[i, 2, m], dxj[i, 0, m],
                                        dxj[i, 1, m], dxj[i, 2, m], mui)
            aj0 = dacc[i, 0, m] - c[(_A0) * _PITCH + m]
            aj1 = dacc[i, 1, m] - c[(_A1) * _PITCH + m]
            aj2 = dacc[i, 2, m] - c[(_A2) * _PITCH + m]
            dvj[i, 0, m] += h * (aj0 + u0)
            dvj[i, 1, m] += h * (aj1 + u1)
            dvj[i, 2, m] += h * (aj2 + u2)
            c[(_A0) * _PITCH + m] = c[(_A0) * _PITCH + m] + q * aj0
            c[(_A1) * _PITCH + m] = c[(_A1) * _PITCH + m] + q * aj1
            c[(_A2) * _PITCH + m] = c[(_A2) * _PITCH + m] + q * aj2


@njit(cache=True, error_model="numpy", inline="always")
def _megno_lanes(dxj, dvj, sums, codes, nl, c):
    """:func:`integrators.variational.megno_update` for every lane whose state is
    still sound (codes[lane] == 0: the scalar kernel returns before it otherwise).
    sums: (N_SUMS, B)."""
    n = dxj.shape[0]
    for m in range(nl):
        c[_Q * _PITCH + m] = 0.0
    for i in range(1, n):
        for d in range(3):
            for m in range(nl):
                u = V_SCALE * dvj[i, d, m]
                c[_Q * _PITCH + m] += dxj[i, d, m] * dxj[i, d, m] + u * u
    for m in range(nl):
        if codes[m] != 0:
            c[_Q * _PITCH + m] = 1.0
            continue
        sums[0, m], sums[1, m], sums[2, m], sums[3, m], sc = megno_sums(
            c[_Q * _PITCH + m], sums[0, m], sums[1, m], sums[2, m], sums[3, m])
        c[_Q * _PITCH + m] = sc
    for i in range(1, n):
        for d in range(3):
            for m in range(nl):
                dxj[i, d, m] *= c[_Q * _PITCH + m]
                dvj[i, d, m] *= c[_Q * _PITCH + m]


@njit(cache=True, error_model="numpy", inline="always")
def _screen_stops(xi, xj, vj, mu, pairs, params, rh, nl, flag):
    """flag[lane] = 1.0 where :func:`check_stops` would report a stop for that lane
    (its own per-body and per-pair tests; which stop, and its bodies, are left to it)."""
    n = xi.shape[0]
    eject = params[2]
    unbound = params[3] > 0.0
    unbound_r = params[4]
    r_star = params[5]
    e_max = params[6]
    for m in range(nl):
        flag[m] = 0.0
    for i in range(1, n):
        mui = mu[i]
        for m in range(nl):
            dx = xi[i, 0, m] - xi[0, 0, m]
            dy = xi[i, 1, m] - xi[0, 1, m]
            dz = xi[i, 2, m] - xi[0, 2, m]
            r = np.sqrt(dx * dx + dy * dy + dz * dz)
            rh[i, m] = r
            code = body_stop(r, xj[i, 0, m], xj[i, 1, m], xj[i, 2, m], vj[i, 0, m],
                             vj[i, 1, m], vj[i, 2, m], mui, eject, unbound, unbound_r, r_star,
                             e_max)
            flag[m] = 1.0 if code != 0 else flag[m]
    if params[1] > 0.0:
        for i in range(1, n):
            for j in range(i + 1, n):
                pij = pairs[i, j]
                for m in range(nl):
                    hit = hill_hit(xi[j, 0, m] - xi[i, 0, m], xi[j, 1, m] - xi[i, 1, m],
                                   xi[j, 2, m] - xi[i, 2, m], pij, rh[i, m], rh[j, m])
                    flag[m] = 1.0 if hit else flag[m]


@njit(cache=True, error_model="numpy")
def _lane_copy(src, m, dst):
    for i in range(src.shape[0]):
        for d in range(3):
            dst[i, d] = src[i, d, m]


@njit(cache=True, error_model="numpy", nogil=True)
def wh_steps_lanes(xj, vj, gm, mu, mr, dt, n_steps, pending, gr_coef, pairs, params, nl,
                   step0, every, a_inv, c_inv, out_g, out_el, rows, codes, bodies, xi, acc, rh,
                   w, c, lane_x, lane_v, lane_xi, lane_rh, diag, tangent, dx, dv, sums, dxi,
                   dacc, out_ind):
    """Take up to n_steps merged drift-kick-drift steps of nl lanes in place.

    xj, vj: (n, 3, B) Jacobi states; pending: (B,) int64 flags. Per lane m:
    step0[m] is its step number (plus sample offset) at the start, every[m] its
    cadence (0: no samples); sample r of lane m goes to out_g[m, r] (step,
    G*energy, G*Lx, G*Ly, G*Lz) and out_el[m, r], rows[m] counting on. A lane
    that meets a stop condition gets its code and bodies in codes[m],
    bodies[m] and the call ends after that step (every lane has taken it).
    With `tangent`, every lane carries its tangent vector (dx, dv) (n, 3, B) and
    MEGNO sums (N_SUMS, B) as :func:`integrators.wisdom_holman.wh_steps_tangent`
    does, and sample r of lane m gets (<Y>, mean log-growth per step) in
    out_ind[m, r] (dxi, dacc: (n, 3, B) scratch); otherwise those arrays are
    not touched. Returns the steps taken.
    """
    n = xj.shape[0]
    half = 0.5 * dt
    check = params[0] > 0.0
    h = c[_H * _PITCH:(_H + 1) * _PITCH]
    until = np.empty(nl, dtype=np.int64)
    for m in range(nl):
        until[m] = every[m] - step0[m] % every[m] if every[m] > 0 else -1
        codes[m] = 0
        bodies[m, 0] = -1
        bodies[m, 1] = -1
    for k in range(n_steps):
        for m in range(nl):
            h[m] = dt if pending[m] else half
            pending[m] = 1
        _drift_all_lanes(xj, vj, mu, h, nl, w, tangent, dx, dv)
        _kick_lanes(xj, vj, gm, mu, mr, dt, gr_coef, xi, acc, nl, c)
        if tangent:
            _kick_tangent_lanes(xj, xi, dx, dv, gm, mu, mr, dt, gr_coef, dxi, dacc, nl, c)
        stopped = False
        for m in range(nl):
            vv = vj[n - 1, 0, m]
            if not (vv - vv == 0.0):
                _lane_copy(xj, m, lane_x)
                _lane_copy(vj, m, lane_v)
                codes[m] = NUMERICAL_FAILURE_CODE
                bodies[m, 0] = first_broken(lane_x, lane_v)
                stopped = True
        if tangent:
            _megno_lanes(dx, dv, sums, codes, nl, c)
        if check:
            flag = c[_FLAG * _PITCH:(_FLAG + 1) * _PITCH]
            _screen_stops(xi, xj, vj, mu, pairs, params, rh, nl, flag)
            for m in range(nl):
                if flag[m] != 0.0 and codes[m] == 0:
                    _lane_copy(xi, m, lane_xi)
                    _lane_copy(xj, m, lane_x)
                    _lane_copy(vj, m, lane_v)
                    code, a, b = check_stops(lane_xi, lane_x, lane_v, mu, pairs, params,
                                             lane_rh)
                    codes[m] = code
                    bodies[m, 0] = a
                    bodies[m, 1] = b
                    stopped = stopped or code != 0
        for m in range(nl):
            if codes[m] != 0:
                continue
            until[m] -= 1
            if until[m] == 0:
                until[m] = every[m]
                _lane_copy(xj, m, lane_x)
                _lane_copy(vj, m, lane_v)
                r = rows[m]
                e, lx, ly, lz = wh_diagnose(lane_x, lane_v, gm, mu, mr, dt, True, gr_coef,
                                            a_inv, c_inv, diag[0], diag[1], diag[2], diag[3],
                                            diag[4], diag[5], out_el[m, r])
                out_g[m, r, 0] = step0[m] + k + 1
                out_g[m, r, 1] = e
                out_g[m, r, 2] = lx
                out_g[m, r, 3] = ly
                out_g[m, r, 4] = lz
                if tangent:
                    out_ind[m, r, 0] = sums[2, m] / sums[0, m]
                    out_ind[m, r, 1] = sums[3, m] / sums[0, m]
                rows[m] = r + 1
        if stopped:
            return k + 1
    return n_steps


def compatible(a, b):
    """True if two Wisdom-Holman integrators can share a batch: same masses, step,
    corrector, GR term, stop conditions and indicator (none or MEGNO), no test
    particles."""
    return (type(a) is WisdomHolman and type(b) is WisdomHolman
            and a.particles is None and b.particles is None
            and (a.tangent is None) == (b.tangent is None)
            and a.dt == b.dt and a.corrector == b.corrector and a.gr == b.gr
            and a.stops == b.stops and a.gm.shape == b.gm.shape
            and bool(np.all(a.gm == b.gm)))


class _Lanes:
    """Packed lane arrays of a batch of members and the kernel's scratch."""

    def __init__(self, members, lanes):
        first = members[0]
        n = len(first.gm)
        B = max(lanes, len(members))
        self.n, self.B = n, B
        self.xj = np.zeros((n, 3, B))
        self.vj = np.zeros((n, 3, B))
        self.pending = np.zeros(B, dtype=np.int64)
        self.xi = np.zeros((n, 3, B))
        self.acc = np.zeros((n, 3, B))
        self.rh = np.zeros((n, B))
        self.w = np.zeros(N_DRIFT_ROWS * _PITCH)
        self.c = np.zeros(N_STEP_ROWS * _PITCH)
        self.lane_x = np.zeros((n, 3))
        self.lane_v = np.zeros((n, 3))
        self.lane_xi = np.zeros((n, 3))
        self.lane_rh = np.zeros(n)
        self.diag = np.zeros((6, n, 3))
        self.codes = np.zeros(B, dtype=np.int64)
        self.bodies = np.zeros((B, 2), dtype=np.int64)
        self.tangent = first.tangent is not None
        # The tangent vectors, their sums and scratch; unused stand-ins without them.
        k = B if self.tangent else 1
        self.dx = np.zeros((n if self.tangent else 1, 3, k))
        self.dv = np.zeros_like(self.dx)
        self.dxi = np.zeros_like(self.dx)
        self.dacc = np.zeros_like(self.dx)
        self.sums = np.zeros((N_SUMS, k))
        self.load(members)

    def load(self, members):
        for m, integ in enumerate(members):
            self.xj[:, :, m] = integ.xj
            self.vj[:, :, m] = integ.vj
            self.pending[m] = int(integ.pending)
            if self.tangent:
                dx, dv, sums = integ.tangent
                self.dx[:, :, m] = dx
                self.dv[:, :, m] = dv
                self.sums[:, m] = sums
        self.nl = len(members)

    def store(self, m, integ):
        integ.xj = np.ascontiguousarray(self.xj[:, :, m])
        integ.vj = np.ascontiguousarray(self.vj[:, :, m])
        integ.pending = bool(self.pending[m])
        if self.tangent:
            integ.tangent = (np.ascontiguousarray(self.dx[:, :, m]),
                             np.ascontiguousarray(self.dv[:, :, m]),
                             np.ascontiguousarray(self.sums[:, m]))


def advance_together(members, n_steps, every=0, outputs=None, lanes=DEFAULT_LANES):
    """Advance Wisdom-Holman members of one ensemble by up to n_steps each, as a batch.

    Each member ends exactly as ``member.advance(n_steps)`` (or
    ``member.advance_sampled(n_steps, every, *outputs[k])``) would leave it
    alone, bit for bit: the same state, step counter, samples and stop.

    Parameters
    ----------
    members : list of WisdomHolman
        Mutually :func:`compatible` integrators (checked).
    n_steps : int
        Steps for each member; a member that meets a stop condition ends early.
    every : int
        Sample cadence in steps (with outputs).
    outputs : list of (out_g, out_el, row0) or (out_g, out_el, row0, out_ind), optional
        Per member, the arrays and first row of :meth:`Integrator.advance_sampled`
        (out_ind for members carrying MEGNO).
    lanes : int
        Members per compiled call (the batch size B); more members run in
        successive groups.

    Returns
    -------
    list of AdvanceResult, or of (AdvanceResult, next free row) with outputs.
    """
    members = list(members)
    n_steps = int(n_steps)
    if n_steps < 0:
        raise ValueError(f"n_steps must be >= 0, got {n_steps}.")
    for other in members[1:]:
        if not compatible(members[0], other):
            raise ValueError("members of one batch must be Wisdom-Holman integrators of one "
                             "system (same masses, step, corrector, GR, stops and indicator), "
                             "without particles; run the others alone.")
    if outputs is not None:
        outputs = list(outputs)
        if every < 1 or len(outputs) != len(members):
            raise ValueError("outputs need one (out_g, out_el, row0) per member and every >= 1.")
        for out in outputs:
            out_g, row0 = out[0], out[2]
            if len(out_g) < row0 + n_steps // every + 1:
                raise ValueError("sample arrays too small for the requested steps and cadence.")
    lanes = max(1, min(int(lanes), _PITCH))
    rows = [out[2] for out in outputs] if outputs is not None else [0] * len(members)
    codes = [(0, -1, -1)] * len(members)
    done = [0] * len(members)
    if n_steps:
        for g0 in range(0, len(members), lanes):
            group = list(range(g0, min(g0 + lanes, len(members))))
            _advance_group(members, group, n_steps, every if outputs is not None else 0,
                           outputs, rows, codes, done)
    results = [integ._result(done[k], *codes[k]) for k, integ in enumerate(members)]
    if outputs is None:
        return results
    return [(res, rows[k]) for k, res in enumerate(results)]


def _advance_group(members, group, n_steps, every, outputs, rows, codes, done):
    """Run the members listed in group as one batch until each has taken n_steps
    or stopped; fills rows, codes and done for them and leaves their state in them."""
    first = members[group[0]]
    n = len(first.gm)
    a_inv, c_inv = first._inv
    active = list(group)
    pack = _Lanes([members[k] for k in active], len(active))
    # Samples pass through stacked arrays of at most _STAGING_BYTES, in kernel
    # calls of at most `piece` steps (where a run is split changes no bit).
    piece = n_steps
    if every:
        per_row = 8 * (5 + 6 * (n - 1) + (2 if pack.tangent else 0))
        max_rows = max(1, _STAGING_BYTES // (pack.B * per_row))
        piece = min(n_steps, max_rows * every)
    cap = piece // every + 1 if every else 0
    out_g = np.zeros((pack.B, cap, 5))
    out_el = np.zeros((pack.B, cap, n - 1, 6))
    out_ind = np.zeros((pack.B if pack.tangent else 1, cap if pack.tangent else 1, 2))
    ev = np.full(pack.B, every, dtype=np.int64)
    lane_rows = np.zeros(pack.B, dtype=np.int64)
    while active:
        nl = len(active)
        # The members of a batch have taken the same steps.
        left = min(n_steps - done[active[0]], piece)
        step0 = np.zeros(pack.B, dtype=np.int64)
        for m, k in enumerate(active):
            step0[m] = members[k].step + members[k].sample_offset + done[k]
        lane_rows[:] = 0
        steps = wh_steps_lanes(pack.xj, pack.vj, first.gm, first.mu, first.mr, first.dt, left,
                               pack.pending, first.gr_coef, first._stop_pairs,
                               first._stop_params, nl, step0, ev, a_inv, c_inv, out_g, out_el,
                               lane_rows, pack.codes, pack.bodies, pack.xi, pack.acc, pack.rh,
                               pack.w, pack.c, pack.lane_x, pack.lane_v, pack.lane_xi,
                               pack.lane_rh, pack.diag, pack.tangent, pack.dx, pack.dv,
                               pack.sums, pack.dxi, pack.dacc, out_ind)
        stay = []
        for m, k in enumerate(active):
            done[k] += steps
            if outputs is not None and lane_rows[m]:
                og, oe = outputs[k][:2]
                r0, r = rows[k], int(lane_rows[m])
                og[r0:r0 + r] = out_g[m, :r]
                oe[r0:r0 + r] = out_el[m, :r]
                oi = outputs[k][3] if len(outputs[k]) > 3 else None
                if oi is not None:
                    oi[r0:r0 + r] = out_ind[m, :r]
                offset = members[k].sample_offset
                if offset:
                    og[r0:r0 + r, 0] -= offset  # as advance_sampled: the kernel counts from it
                rows[k] = r0 + r
            code = int(pack.codes[m])
            if code:
                codes[k] = (code, int(pack.bodies[m, 0]), int(pack.bodies[m, 1]))
            if code or done[k] == n_steps:
                pack.store(m, members[k])
            else:
                stay.append((m, k))
        if len(stay) == nl:
            continue
        # Members that stopped leave; the others are packed again (rare).
        for m, k in stay:
            pack.store(m, members[k])
        active = [k for _, k in stay]
        if active:
            pack.load([members[k] for k in active])
