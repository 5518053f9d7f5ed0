"""Orbital elements <-> Cartesian state for one two-body orbit.

Angles are in radians here; the degree edge lives in :mod:`integrators.system`.
Elliptic orbits have a > 0 and e < 1; hyperbolic orbits have a < 0 and e > 1
(mean anomaly M = e sinh F - F). Conversions back to elements stay finite at
e = 0 and i = 0: an undefined node is set to 0 and an undefined pericentre is
measured from the node (or from the x axis), so the mean anomaly carries the
phase.
"""

import math

import numpy as np

from .errors import IntegratorError

# Below this eccentricity the pericentre is treated as undefined.
_E_CIRCULAR = 1e-14
# Below this sin(i) the node is treated as undefined.
_SIN_I_PLANAR = 1e-14


def eccentric_anomaly(mean_anomaly, ecc):
    """Solve Kepler's equation M = E - e sin E for E (elliptic, radians).

    Newton's method from E0 = M + 0.85 e sign(sin M) (Danby 1988, sec. 6.6)
    with a bisection safeguard; converges for 0 <= e < 1.
    """
    if not 0.0 <= ecc < 1.0:
        raise ValueError(f"eccentricity must be in [0, 1) for an ellipse, got {ecc}.")
    m = math.fmod(mean_anomaly, 2.0 * math.pi)
    if m < 0.0:
        m += 2.0 * math.pi
    lo, hi = 0.0, 2.0 * math.pi
    e_an = m + 0.85 * ecc * (1.0 if math.sin(m) >= 0.0 else -1.0)
    e_an = min(max(e_an, lo), hi)
    for _ in range(100):
        f = e_an - ecc * math.sin(e_an) - m
        if f > 0.0:
            hi = e_an
        else:
            lo = e_an
        step = f / (1.0 - ecc * math.cos(e_an))
        nxt = e_an - step
        if not lo < nxt < hi:
            nxt = 0.5 * (lo + hi)
        if abs(nxt - e_an) <= 1e-15 * max(1.0, abs(nxt)):
            e_an = nxt
            break
        e_an = nxt
    return e_an + (mean_anomaly - m)


def hyperbolic_anomaly(mean_anomaly, ecc):
    """Solve M = e sinh F - F for F (hyperbolic, e > 1)."""
    if ecc <= 1.0:
        raise ValueError(f"eccentricity must exceed 1 for a hyperbola, got {ecc}.")
    m = mean_anomaly
    f_an = math.asinh(m / ecc)
    for _ in range(200):
        g = ecc * math.sinh(f_an) - f_an - m
        step = g / (ecc * math.cosh(f_an) - 1.0)
        f_an -= step
        if abs(step) <= 1e-15 * max(1.0, abs(f_an)):
            break
    return f_an


def _rotation(inc, node, peri):
    """Columns: unit vectors P (to pericentre) and Q of the orbital plane."""
    cO, sO = math.cos(node), math.sin(node)
    cw, sw = math.cos(peri), math.sin(peri)
    ci, si = math.cos(inc), math.sin(inc)
    p = np.array([cO * cw - sO * sw * ci, sO * cw + cO * sw * ci, sw * si])
    q = np.array([-cO * sw - sO * cw * ci, -sO * sw + cO * cw * ci, cw * si])
    return p, q


def to_state(mu, a, ecc, inc, node, peri, mean_anomaly):
    """Cartesian (x, v) from elements (radians) with gravitational parameter mu."""
    if mu <= 0.0:
        raise ValueError(f"gravitational parameter must be positive, got {mu}.")
    if ecc < 0.0 or not math.isfinite(ecc):
        raise ValueError(f"eccentricity must be finite and non-negative, got {ecc}.")
    if ecc == 1.0:
        raise ValueError("eccentricity 1 (parabola) cannot be given by a and M; "
                         "give a state vector instead.")
    p_vec, q_vec = _rotation(inc, node, peri)
    if ecc < 1.0:
        if a <= 0.0:
            raise ValueError(f"semi-major axis must be positive for e < 1, got {a}.")
        e_an = eccentric_anomaly(mean_anomaly, ecc)
        ce, se = math.cos(e_an), math.sin(e_an)
        b = a * math.sqrt(1.0 - ecc * ecc)
        xp, yq = a * (ce - ecc), b * se
        n = math.sqrt(mu / a**3)
        r = a * (1.0 - ecc * ce)
        vxp, vyq = -a * n * se * a / r, b * n * ce * a / r
    else:
        if a >= 0.0:
            raise ValueError(f"semi-major axis must be negative for e > 1, got {a}.")
        f_an = hyperbolic_anomaly(mean_anomaly, ecc)
        ch, sh = math.cosh(f_an), math.sinh(f_an)
        aa = -a
        b = aa * math.sqrt(ecc * ecc - 1.0)
        xp, yq = aa * (ecc - ch), b * sh
        n = math.sqrt(mu / aa**3)
        r = aa * (ecc * ch - 1.0)
        vxp, vyq = -aa * n * sh * aa / r, b * n * ch * aa / r
    return xp * p_vec + yq * q_vec, vxp * p_vec + vyq * q_vec


def from_state(mu, x, v):
    """Elements (a, e, i, node, peri, M) in radians from a relative state.

    Never NaN for a bound or unbound non-degenerate orbit: at e = 0 the
    pericentre is put at the node, at i = 0 the node is put on the x axis.
    A parabolic orbit (e == 1 exactly) returns a = inf and M = 0.
    """
    x = np.asarray(x, dtype=np.float64)
    v = np.asarray(v, dtype=np.float64)
    r = math.sqrt(float(x @ x))
    v2 = float(v @ v)
    h = np.cross(x, v)
    hn = math.sqrt(float(h @ h))
    evec = ((v2 - mu / r) * x - float(x @ v) * v) / mu
    ecc = math.sqrt(float(evec @ evec))
    energy = 0.5 * v2 - mu / r
    a = -mu / (2.0 * energy) if energy != 0.0 else math.inf
    inc = math.atan2(math.hypot(h[0], h[1]), h[2])
    # Node vector n = z x h.
    nx, ny = -h[1], h[0]
    nn = math.hypot(nx, ny)
    if nn > _SIN_I_PLANAR * hn:
        node = math.atan2(ny, nx)
        ux, uy = nx / nn, ny / nn
    else:
        node = 0.0
        ux, uy = 1.0, 0.0
    # Reference direction in the plane: node line (or x axis), and the
    # perpendicular w = (h/|h|) x u.
    u = np.array([ux, uy, 0.0])
    hh = h / hn
    w = np.cross(hh, u)
    if ecc > _E_CIRCULAR:
        peri = math.atan2(float(evec @ w), float(evec @ u))
        pdir = evec / ecc
    else:
        peri = 0.0
        pdir = u
    qdir = np.cross(hh, pdir)
    nu = math.atan2(float(x @ qdir), float(x @ pdir))
    if ecc < 1.0:
        e_an = 2.0 * math.atan2(math.sqrt(1.0 - ecc) * math.sin(nu / 2.0),
                                math.sqrt(1.0 + ecc) * math.cos(nu / 2.0))
        mean = e_an - ecc * math.sin(e_an)
    elif ecc > 1.0:
        f_an = 2.0 * math.atanh(math.sqrt((ecc - 1.0) / (ecc + 1.0)) * math.tan(nu / 2.0))
        mean = ecc * math.sinh(f_an) - f_an
    else:
        mean = 0.0
    two_pi = 2.0 * math.pi
    node = node % two_pi
    peri = peri % two_pi
    if ecc < 1.0:
        mean = mean % two_pi
    return a, ecc, inc, node, peri, mean


def elements_array(mu, x, v):
    """Elements of many orbits: mu (n,), x and v (n, 3) -> array (n, 6), radians."""
    out = np.empty((len(mu), 6))
    for k in range(len(mu)):
        out[k] = from_state(float(mu[k]), x[k], v[k])
    return out


def check_finite(name, arr):
    """Raise IntegratorError if arr holds NaN or inf."""
    if not np.all(np.isfinite(arr)):
        raise IntegratorError(f"{name} holds NaN or infinite values.")
