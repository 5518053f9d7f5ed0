"""The batched step loop: merged drift-kick-drift steps of every lane, stops,
breaks and samples per lane."""

import numpy as np
from numba import njit

from ..stops import NUMERICAL_FAILURE_CODE, check_stops, first_broken
from ..wisdom_holman import wh_diagnose
from .drift import _drift_all_lanes
from .kick import (_kick_lanes, _kick_tangent_lanes, _lane_copy, _megno_lanes,
                   _screen_stops)
from .lanes import _FLAG, _H, _PITCH


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
