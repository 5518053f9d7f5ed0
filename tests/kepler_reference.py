"""An independent two-body propagator for tests, at 60 significant digits (mpmath).

Written without any of `integrators/`: classical anomalies instead of
universal variables, multiple precision instead of doubles.

- Ellipse: Kepler's equation in the difference form
  dE - (e cos E0) sin dE + (e sin E0)(1 - cos dE) = n dt, with the f and g
  functions in dE (Danby 1988, Fundamentals of Celestial Mechanics, 2nd ed.,
  eqs. 6.3.12-6.3.21; Vallado 2013, Algorithm 8 for the same functions).
- Hyperbola: the same with sinh/cosh and dH (Danby 1988, sec. 6.4; Battin
  1999, An Introduction to the Mathematics and Methods of Astrodynamics,
  sec. 4.5).
- Parabola (exactly zero energy): Barker's equation
  t - T = (1/2) sqrt(p^3/mu) (D + D^3/3), D = tan(nu/2) (Battin 1999, eq. 4.8;
  Vallado 2013, Algorithm 5), position and velocity in the perifocal frame.

Each equation is solved by Newton's method at 60 digits; the starting state
is taken exactly as the doubles given.
"""

import mpmath as mp

mp.mp.dps = 60


def _vec(a):
    return [mp.mpf(float(c)) for c in a]


def _dot(a, b):
    return a[0] * b[0] + a[1] * b[1] + a[2] * b[2]


def _cross(a, b):
    return [a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0]]


def _solve(f, df, x0, step):
    """The root of an increasing function f: bracketed from x0 in steps of `step`
    (doubling), then Newton's method kept inside the bracket (bisection otherwise)."""
    lo = hi = mp.mpf(x0)
    w = mp.mpf(step)
    while f(lo) > 0:
        lo -= w
        w *= 2
    w = mp.mpf(step)
    while f(hi) < 0:
        hi += w
        w *= 2
    x = (lo + hi) / 2
    tol = mp.mpf(10) ** (-58)
    for _ in range(2000):
        fx = f(x)
        if fx == 0:
            return x
        if fx > 0:
            hi = x
        else:
            lo = x
        xn = x - fx / df(x)
        if not lo < xn < hi:
            xn = (lo + hi) / 2
        if abs(xn - x) <= tol * max(1, abs(x)) or hi - lo <= tol * max(1, abs(x)):
            return xn
        x = xn
    raise RuntimeError("reference Kepler solver did not converge")


def propagate(x, v, mu, dt):
    """(x, v) after dt on the two-body orbit, as lists of floats (60-digit arithmetic)."""
    x0, v0 = _vec(x), _vec(v)
    mu, dt = mp.mpf(float(mu)), mp.mpf(float(dt))
    r0 = mp.sqrt(_dot(x0, x0))
    sigma0 = _dot(x0, v0)
    energy = _dot(v0, v0) / 2 - mu / r0
    if energy < 0:
        a = -mu / (2 * energy)
        n = mp.sqrt(mu / a ** 3)
        ecos, esin = 1 - r0 / a, sigma0 / mp.sqrt(mu * a)
        m = n * dt
        # Solve from the mean-motion guess; whole turns are kept (no reduction).
        # F(dE) - (dE - m) is bounded by 3 in size, so m +- 4 brackets the root
        # (F is increasing: F' = r / a > 0).
        de = _solve(lambda d: d - ecos * mp.sin(d) + esin * (1 - mp.cos(d)) - m,
                    lambda d: 1 - ecos * mp.cos(d) + esin * mp.sin(d), m, 4)
        r = a * (1 - ecos * mp.cos(de) + esin * mp.sin(de))
        f = 1 - a / r0 * (1 - mp.cos(de))
        g = dt - (de - mp.sin(de)) / n
        fd = -mp.sqrt(mu * a) * mp.sin(de) / (r * r0)
        gd = 1 - a / r * (1 - mp.cos(de))
    elif energy > 0:
        a = mu / (2 * energy)
        n = mp.sqrt(mu / a ** 3)
        ecosh, esinh = 1 + r0 / a, sigma0 / mp.sqrt(mu * a)
        m = n * dt
        # Increasing in dH (its derivative is r / a > 0); bracketed from 0.
        dh = _solve(lambda d: -d + ecosh * mp.sinh(d) + esinh * (mp.cosh(d) - 1) - m,
                    lambda d: -1 + ecosh * mp.cosh(d) + esinh * mp.sinh(d), 0, 0.5)
        r = a * (ecosh * mp.cosh(dh) + esinh * mp.sinh(dh) - 1)
        f = 1 - a / r0 * (mp.cosh(dh) - 1)
        g = dt - (mp.sinh(dh) - dh) / n
        fd = -mp.sqrt(mu * a) * mp.sinh(dh) / (r * r0)
        gd = 1 - a / r * (mp.cosh(dh) - 1)
    else:
        return _parabola(x0, v0, mu, dt)
    xn = [f * x0[k] + g * v0[k] for k in range(3)]
    vn = [fd * x0[k] + gd * v0[k] for k in range(3)]
    return [float(c) for c in xn], [float(c) for c in vn]


def _parabola(x0, v0, mu, dt):
    h = _cross(x0, v0)
    hh = _dot(h, h)
    p = hh / mu
    q = p / 2
    r0 = mp.sqrt(_dot(x0, x0))
    # Eccentricity vector (unit length on a parabola) and the perifocal frame.
    evec = [(_dot(v0, v0) - mu / r0) * x0[k] / mu - _dot(x0, v0) * v0[k] / mu for k in range(3)]
    pe = [c / mp.sqrt(_dot(evec, evec)) for c in evec]
    hq = [c / mp.sqrt(hh) for c in h]
    qe = _cross(hq, pe)
    nu0 = mp.atan2(_dot(x0, qe), _dot(x0, pe))
    d0 = mp.tan(nu0 / 2)
    k = mp.sqrt(p ** 3 / mu) / 2
    t0 = k * (d0 + d0 ** 3 / 3)
    d = _solve(lambda d: k * (d + d ** 3 / 3) - (t0 + dt), lambda d: k * (1 + d * d), d0, 1)
    r = q * (1 + d * d)
    cos_nu, sin_nu = (1 - d * d) / (1 + d * d), 2 * d / (1 + d * d)
    s = mp.sqrt(mu / p)
    xn = [r * (cos_nu * pe[i] + sin_nu * qe[i]) for i in range(3)]
    vn = [s * (-sin_nu * pe[i] + (1 + cos_nu) * qe[i]) for i in range(3)]
    return [float(c) for c in xn], [float(c) for c in vn]


def state_from_anomaly(a, e, nu, mu, inc=0.0, node=0.0, peri=0.0):
    """Cartesian state (floats) on a conic with |a| (a < 0 for e > 1 not needed: pass |a|),
    eccentricity e and true anomaly nu (radians), from the conic's polar equation
    r = p / (1 + e cos nu) and v = sqrt(mu/p) (-sin nu, e + cos nu) in the perifocal
    frame (Murray & Dermott 1999, eqs. 2.20 and 2.31-2.36), rotated by node, inc, peri.
    For e = 1, ``a`` is the pericentre distance q.
    """
    a, e, nu, mu = mp.mpf(a), mp.mpf(e), mp.mpf(nu), mp.mpf(mu)
    p = 2 * a if e == 1 else abs(a * (1 - e * e))
    r = p / (1 + e * mp.cos(nu))
    s = mp.sqrt(mu / p)
    xp = [r * mp.cos(nu), r * mp.sin(nu), mp.mpf(0)]
    vp = [-s * mp.sin(nu), s * (e + mp.cos(nu)), mp.mpf(0)]

    def rot(u):
        co, so = mp.cos(peri), mp.sin(peri)
        u = [co * u[0] - so * u[1], so * u[0] + co * u[1], u[2]]
        ci, si = mp.cos(inc), mp.sin(inc)
        u = [u[0], ci * u[1] - si * u[2], si * u[1] + ci * u[2]]
        cn, sn = mp.cos(node), mp.sin(node)
        return [cn * u[0] - sn * u[1], sn * u[0] + cn * u[1], u[2]]

    return [float(c) for c in rot(xp)], [float(c) for c in rot(vp)]
