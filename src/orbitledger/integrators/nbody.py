"""Compiled N-body pieces shared by the methods: accelerations, invariants."""

import numpy as np
from numba import njit

from .constants import C_AU_PER_DAY, G


def gr_coefficient(gm0):
    """6 (G m0)^2 / c^2 of the Nobili & Roxburgh (1986) potential -3 (G m0 / (c r))^2."""
    return 6.0 * gm0 * gm0 / (C_AU_PER_DAY * C_AU_PER_DAY)


@njit(cache=True, error_model="numpy", inline="always")
def accelerations(x, gm, gr_coef, acc):
    """Newtonian accelerations of all bodies into acc (n, 3), plus the star's GR term.

    The pair loop runs in a fixed order so results are reproducible bit for
    bit. With gr_coef > 0 each body i >= 1 feels -gr_coef x_0i / r_0i^4 from the
    Nobili & Roxburgh (1986) potential and the star the reaction, so total
    momentum is kept.
    """
    n = x.shape[0]
    for i in range(n):
        acc[i, 0] = 0.0
        acc[i, 1] = 0.0
        acc[i, 2] = 0.0
    for i in range(n):
        for j in range(i + 1, n):
            dx = x[j, 0] - x[i, 0]
            dy = x[j, 1] - x[i, 1]
            dz = x[j, 2] - x[i, 2]
            r2 = dx * dx + dy * dy + dz * dz
            ir3 = 1.0 / (r2 * np.sqrt(r2))
            fi = gm[j] * ir3
            fj = gm[i] * ir3
            acc[i, 0] += fi * dx
            acc[i, 1] += fi * dy
            acc[i, 2] += fi * dz
            acc[j, 0] -= fj * dx
            acc[j, 1] -= fj * dy
            acc[j, 2] -= fj * dz
    if gr_coef > 0.0:
        for i in range(1, n):
            dx = x[i, 0] - x[0, 0]
            dy = x[i, 1] - x[0, 1]
            dz = x[i, 2] - x[0, 2]
            r2 = dx * dx + dy * dy + dz * dz
            f = gr_coef / (r2 * r2)
            acc[i, 0] -= f * dx
            acc[i, 1] -= f * dy
            acc[i, 2] -= f * dz
            q = gm[i] / gm[0]
            acc[0, 0] += q * f * dx
            acc[0, 1] += q * f * dy
            acc[0, 2] += q * f * dz


@njit(cache=True, error_model="numpy", inline="always")
def to_inertial(xj, mr, xi):
    """Inertial positions from Jacobi positions into xi (see system.inertial_from_jacobi).

    mr[i] = gm[i] / eta[i], the mass ratios of the Jacobi chain, computed once
    (the same quotient every call, so the same bits as dividing here).
    """
    n = xj.shape[0]
    c0 = xj[0, 0]
    c1 = xj[0, 1]
    c2 = xj[0, 2]
    for i in range(n - 1, 0, -1):
        q = mr[i]
        c0 = c0 - q * xj[i, 0]
        c1 = c1 - q * xj[i, 1]
        c2 = c2 - q * xj[i, 2]
        xi[i, 0] = c0 + xj[i, 0]
        xi[i, 1] = c1 + xj[i, 1]
        xi[i, 2] = c2 + xj[i, 2]
    xi[0, 0] = c0
    xi[0, 1] = c1
    xi[0, 2] = c2


@njit(cache=True, error_model="numpy")
def _energy_g(x, v, gm, gr_coef):
    n = x.shape[0]
    kin = 0.0
    for i in range(n):
        kin += 0.5 * gm[i] * (v[i, 0] * v[i, 0] + v[i, 1] * v[i, 1] + v[i, 2] * v[i, 2])
    pot = 0.0
    for i in range(n):
        for j in range(i + 1, n):
            dx = x[j, 0] - x[i, 0]
            dy = x[j, 1] - x[i, 1]
            dz = x[j, 2] - x[i, 2]
            pot -= gm[i] * gm[j] / np.sqrt(dx * dx + dy * dy + dz * dz)
    if gr_coef > 0.0:
        for i in range(1, n):
            dx = x[i, 0] - x[0, 0]
            dy = x[i, 1] - x[0, 1]
            dz = x[i, 2] - x[0, 2]
            pot -= 0.5 * gr_coef * gm[i] / (dx * dx + dy * dy + dz * dz)
    return kin + pot


def energy(x, v, gm, gr_coef=0.0):
    """Total energy in Msun au^2 / d^2 of inertial states (use a barycentric frame)."""
    return _energy_g(x, v, gm, gr_coef) / G


def angular_momentum(x, v, gm):
    """Total angular momentum vector, Msun au^2 / d, about the frame's origin."""
    return (gm[:, None] * np.cross(x, v)).sum(0) / G
