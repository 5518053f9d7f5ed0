"""The kick of every lane (and its tangent), the MEGNO sums of every lane, the
stop screen, and copying one lane out: each lane's operations are the scalar
kernel's, in its order."""

import numpy as np
from numba import njit

from ..stops import body_stop, hill_hit
from ..variational import V_SCALE, gr_tangent, jacobi_tangent, megno_sums, pair_tangent
from .lanes import _A0, _A1, _A2, _PITCH, _Q


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
