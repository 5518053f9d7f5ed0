"""Test particles in the Wisdom-Holman map: massless bodies that feel the massive ones.

A particle's coordinates are taken relative to the centre of mass of all the
massive bodies (the end of their Jacobi chain) and drift on a Kepler orbit
about the whole massive mass; the kick adds the attraction of every massive
body and removes that Kepler part, as for a planet (Wisdom & Holman 1991).
Particles do not act on the massive bodies or on each other, so the massive
bodies' trajectory is the same bit for bit with or without them, and the
cost of a step grows linearly with their number.

A particle that meets a stop condition (closer to a planet than the Hill
factor times that planet's Hill radius, farther from the star than the
ejection distance, closer than the star's radius) is removed: it stops
moving and its event (step, kind code, body) is recorded; the run goes on.
"""

import numpy as np
from numba import njit

from .diagnostics import heliocentric_elements
from .kepler import drift_state

# Columns of the events array: step of removal (-1 while alive), kind code
# (stops.KIND_BY_CODE), the body it met (-1: none).
EVENT_STEP, EVENT_KIND, EVENT_BODY = 0, 1, 2


@njit(cache=True, error_model="numpy", inline="always")
def drift_particles(px, pv, alive, mu_all, h):
    """Kepler drift of every live particle about the massive bodies' whole mass."""
    for k in range(px.shape[0]):
        if alive[k]:
            (px[k, 0], px[k, 1], px[k, 2], pv[k, 0], pv[k, 1], pv[k, 2]) = drift_state(
                px[k, 0], px[k, 1], px[k, 2], pv[k, 0], pv[k, 1], pv[k, 2], mu_all, h)


@njit(cache=True, error_model="numpy", inline="always")
def kick_particles(px, pv, alive, xi, cm, gm, mu_all, h):
    """Kick live particles by h: the massive bodies' pull (xi, inertial) minus the
    Kepler part already in the drift. cm: the massive centre of mass (Jacobi row 0)."""
    n = xi.shape[0]
    for k in range(px.shape[0]):
        if not alive[k]:
            continue
        q0 = px[k, 0]
        q1 = px[k, 1]
        q2 = px[k, 2]
        x0 = cm[0] + q0
        x1 = cm[1] + q1
        x2 = cm[2] + q2
        a0 = 0.0
        a1 = 0.0
        a2 = 0.0
        for j in range(n):
            d0 = xi[j, 0] - x0
            d1 = xi[j, 1] - x1
            d2 = xi[j, 2] - x2
            r2 = d0 * d0 + d1 * d1 + d2 * d2
            f = gm[j] / (r2 * np.sqrt(r2))
            a0 += f * d0
            a1 += f * d1
            a2 += f * d2
        r2 = q0 * q0 + q1 * q1 + q2 * q2
        k3 = mu_all / (r2 * np.sqrt(r2))
        pv[k, 0] += h * (a0 + k3 * q0)
        pv[k, 1] += h * (a1 + k3 * q1)
        pv[k, 2] += h * (a2 + k3 * q2)


@njit(cache=True, error_model="numpy", inline="always")
def check_particles(px, alive, events, xi, cm, hill_f, params, step):
    """Remove the live particles that meet a stop condition; returns how many did.

    params are the kernels' stop parameters (stops.StopConditions.kernel_args):
    [active, hill factor, ejection distance, unbound flag, unbound distance,
    star radius, max e]. A particle meets a planet j when closer than
    hill_f[j] r_j, r_j the planet's distance from the star and hill_f[j] =
    hill (m_j / (3 m_0))^(1/3) (see :func:`hill_factors`).
    """
    n = xi.shape[0]
    hill = params[1]
    eject = params[2]
    r_star = params[5]
    removed = 0
    for k in range(px.shape[0]):
        if not alive[k]:
            continue
        x0 = cm[0] + px[k, 0]
        x1 = cm[1] + px[k, 1]
        x2 = cm[2] + px[k, 2]
        d0 = x0 - xi[0, 0]
        d1 = x1 - xi[0, 1]
        d2 = x2 - xi[0, 2]
        r = np.sqrt(d0 * d0 + d1 * d1 + d2 * d2)
        code = 0
        body = -1
        if not (r - r == 0.0):
            # The particle's state stopped being finite numbers (e.g. it passed
            # through a body): removed as a numerical failure; the run goes on.
            code = 5
        elif r_star > 0.0 and r < r_star:
            code = 3
            body = 0
        elif eject > 0.0 and r > eject:
            code = 2
        elif hill > 0.0:
            for j in range(1, n):
                e0 = xi[j, 0] - xi[0, 0]
                e1 = xi[j, 1] - xi[0, 1]
                e2 = xi[j, 2] - xi[0, 2]
                lim = hill_f[j] * np.sqrt(e0 * e0 + e1 * e1 + e2 * e2)
                f0 = xi[j, 0] - x0
                f1 = xi[j, 1] - x1
                f2 = xi[j, 2] - x2
                if f0 * f0 + f1 * f1 + f2 * f2 < lim * lim:
                    code = 1
                    body = j
                    break
        if code != 0:
            alive[k] = 0
            events[k, EVENT_STEP] = step
            events[k, EVENT_KIND] = code
            events[k, EVENT_BODY] = body
            removed += 1
    return removed


def particle_elements(x, v, gm0, out):
    """Heliocentric elements (a, e, i, node, peri, M; au and degrees) of massless
    particles about a star of gravitational parameter gm0 into out (k, 6); rows of
    NaN states give NaN. x, v: heliocentric states (k, 3)."""
    k = x.shape[0]
    xs = np.zeros((k + 1, 3))
    vs = np.zeros((k + 1, 3))
    xs[1:] = x
    vs[1:] = v
    gm = np.zeros(k + 1)
    gm[0] = gm0
    heliocentric_elements(xs, vs, gm, out)
    out[~(np.isfinite(x).all(axis=1) & np.isfinite(v).all(axis=1))] = np.nan
    return out


def hill_factors(gm, hill):
    """hill * (m_j / (3 m_0))^(1/3) per body (0 for the star), computed once outside
    the kernels (no cube root in the loop)."""
    out = np.zeros(len(gm))
    if hill > 0.0:
        out[1:] = hill * (np.asarray(gm[1:]) / (3.0 * gm[0])) ** (1.0 / 3.0)
    return out
