"""Compiled diagnostics of a synchronized state: energy, angular momentum, elements.

These run on every output, so they are compiled too; they are not in the
step loop and may use transcendental functions.
"""

import math

import numpy as np
from numba import njit

from .nbody import _energy_g

_TWO_PI = 2.0 * math.pi
_RAD2DEG = 180.0 / math.pi


@njit(cache=True, error_model="numpy")
def angular_momentum_g(x, v, gm):
    """G times the total angular momentum about the frame's origin."""
    lx = 0.0
    ly = 0.0
    lz = 0.0
    for i in range(x.shape[0]):
        lx += gm[i] * (x[i, 1] * v[i, 2] - x[i, 2] * v[i, 1])
        ly += gm[i] * (x[i, 2] * v[i, 0] - x[i, 0] * v[i, 2])
        lz += gm[i] * (x[i, 0] * v[i, 1] - x[i, 1] * v[i, 0])
    return lx, ly, lz


@njit(cache=True, error_model="numpy")
def heliocentric_elements(x, v, gm, out):
    """Heliocentric elements (a, e, i, node, peri, M; degrees) of bodies 1.. into out (n-1, 6).

    Same conventions as :func:`integrators.elements.from_state`: no NaN at
    e = 0 or i = 0 (node on the x axis, pericentre at the node).
    """
    n = x.shape[0]
    for k in range(1, n):
        mu = gm[0] + gm[k]
        r0 = x[k, 0] - x[0, 0]
        r1 = x[k, 1] - x[0, 1]
        r2 = x[k, 2] - x[0, 2]
        u0 = v[k, 0] - v[0, 0]
        u1 = v[k, 1] - v[0, 1]
        u2 = v[k, 2] - v[0, 2]
        r = math.sqrt(r0 * r0 + r1 * r1 + r2 * r2)
        v2 = u0 * u0 + u1 * u1 + u2 * u2
        rv = r0 * u0 + r1 * u1 + r2 * u2
        h0 = r1 * u2 - r2 * u1
        h1 = r2 * u0 - r0 * u2
        h2 = r0 * u1 - r1 * u0
        hn = math.sqrt(h0 * h0 + h1 * h1 + h2 * h2)
        p = v2 - mu / r
        e0 = (p * r0 - rv * u0) / mu
        e1 = (p * r1 - rv * u1) / mu
        e2 = (p * r2 - rv * u2) / mu
        ecc = math.sqrt(e0 * e0 + e1 * e1 + e2 * e2)
        en = 0.5 * v2 - mu / r
        a = -mu / (2.0 * en) if en != 0.0 else np.inf
        inc = math.atan2(math.sqrt(h0 * h0 + h1 * h1), h2)
        nx = -h1
        ny = h0
        nn = math.sqrt(nx * nx + ny * ny)
        if nn > 1e-14 * hn:
            node = math.atan2(ny, nx)
            ux = nx / nn
            uy = ny / nn
        else:
            node = 0.0
            ux = 1.0
            uy = 0.0
        hh0 = h0 / hn
        hh1 = h1 / hn
        hh2 = h2 / hn
        # w = hh x u (u = (ux, uy, 0))
        w0 = -hh2 * uy
        w1 = hh2 * ux
        w2 = hh0 * uy - hh1 * ux
        if ecc > 1e-14:
            peri = math.atan2(e0 * w0 + e1 * w1 + e2 * w2, e0 * ux + e1 * uy)
            p0 = e0 / ecc
            p1 = e1 / ecc
            p2 = e2 / ecc
        else:
            peri = 0.0
            p0 = ux
            p1 = uy
            p2 = 0.0
        q0 = hh1 * p2 - hh2 * p1
        q1 = hh2 * p0 - hh0 * p2
        q2 = hh0 * p1 - hh1 * p0
        nu = math.atan2(r0 * q0 + r1 * q1 + r2 * q2, r0 * p0 + r1 * p1 + r2 * p2)
        if ecc < 1.0:
            ea = 2.0 * math.atan2(math.sqrt(1.0 - ecc) * math.sin(0.5 * nu),
                                  math.sqrt(1.0 + ecc) * math.cos(0.5 * nu))
            mean = (ea - ecc * math.sin(ea)) % _TWO_PI
        elif ecc > 1.0:
            fa = 2.0 * math.atanh(math.sqrt((ecc - 1.0) / (ecc + 1.0)) * math.tan(0.5 * nu))
            mean = ecc * math.sinh(fa) - fa
        else:
            mean = 0.0
        out[k - 1, 0] = a
        out[k - 1, 1] = ecc
        out[k - 1, 2] = inc * _RAD2DEG
        out[k - 1, 3] = (node % _TWO_PI) * _RAD2DEG
        out[k - 1, 4] = (peri % _TWO_PI) * _RAD2DEG
        out[k - 1, 5] = mean * _RAD2DEG


@njit(cache=True, error_model="numpy")
def diagnose(x, v, gm, gr_coef, out_elements):
    """(G*energy, G*Lx, G*Ly, G*Lz) of an inertial state; elements into out_elements."""
    e = _energy_g(x, v, gm, gr_coef)
    lx, ly, lz = angular_momentum_g(x, v, gm)
    heliocentric_elements(x, v, gm, out_elements)
    return e, lx, ly, lz
