"""Gauss-Radau integrator of order 15 with adaptive substeps (Everhart 1985).

A non-symplectic, high-accuracy method for short runs, reference checks of a
map's stretch and close encounters. Over a substep of length h the
acceleration of every body is written as a polynomial in tau = t / h,

    a(tau) = a0 + b1 tau + b2 tau^2 + ... + b7 tau^7,

fitted at the Gauss-Radau nodes (0 and the seven roots h1..h7 of the Radau
polynomial on [0, 1]); positions and velocities follow by integrating it
twice, and the b's are found by predictor-corrector iteration (Everhart
1985): the nodes' positions from the current b's, accelerations there,
divided differences g1..g7 (Newton form), b = C g.

Frames and substeps. The step counter, samples and checkpoints of every
method count fixed steps of ``dt`` (``method.step``); here each such *frame*
is covered by adaptive substeps, the last one trimmed to end exactly on the
frame's end (a remainder between one and two substeps is split in two equal
halves, so no sliver is left). Time stays ``t0 + step dt``.

Step control (derived here). b7 is the last term kept; for a smooth orbit the
coefficients fall like (h / T)^k, T the shortest time scale, so the relative
size of the last one, eps_b = max|b7| / max|a| over all bodies and axes,
scales as h^7 and the first term left out is smaller still by about h / T.
A substep is accepted when eps_b <= tolerance * REJECT; the next one is
h (tolerance / eps_b)^(1/7) times SAFETY, grown at most GROW-fold and shrunk
at most to SHRINK of it. A rejected substep is retried at that size. The
seventh root is taken by Newton iterations on + - * / and frexp/ldexp only
(as the MEGNO logarithm), so the substeps, and the trajectory, are the same
bit for bit on every IEEE machine.

Exact resumption. The state is the inertial positions and velocities, the
b's of the last substep (the predictor of the next), the last substep and
the next one: a run resumed from a checkpoint repeats the uninterrupted run
bit for bit.
"""

import math

import numpy as np
from numba import njit

from .base import Integrator
from .nbody import accelerations, gr_coefficient
from .stops import COLLISION_CODE, NUMERICAL_FAILURE_CODE, check_stops, first_broken, is_broken

# The seven interior Gauss-Radau nodes on [0, 1]: the roots other than x = -1 of
# P7(x) + P8(x) (Legendre polynomials), mapped by tau = (x + 1) / 2 (Everhart
# 1985, Table 1; checked against the polynomial with mpmath in the tests).
NODES = np.array([0.0,
                  0.0562625605369221464656521910318,
                  0.180240691736892364987579942780,
                  0.352624717113169637373907769648,
                  0.547153626330555383001448554766,
                  0.734210177215410531523210605558,
                  0.885320946839095768090359771030,
                  0.977520613561287501891174488626])

SAFETY = 1.0
GROW = 4.0
SHRINK = 0.1
REJECT = 8.0
MAX_ITERATIONS = 12
DEFAULT_TOLERANCE = 1e-8
# No substep is made shorter than this fraction of the shortest pair time scale
# sqrt(r^3 / G(m_i + m_j)): below it the last coefficient is rounding noise, not error.
FLOOR = 1e-6


def _tables():
    """Divided-difference factors r[i, j] = 1/(h_i - h_j), and the matrices taking the
    Newton coefficients g to the monomial ones b (C) and back (D), from the nodes by
    recurrences in float64 (the same bits on every IEEE machine)."""
    h = NODES
    r = np.zeros((8, 8))
    for i in range(1, 8):
        for j in range(i):
            r[i, j] = 1.0 / (h[i] - h[j])
    # P_j(t) = prod_{m < j} (t - h_m) = sum_k c[j, k] t^k  (j, k = 1..7)
    c = np.zeros((8, 8))
    c[1, 1] = 1.0
    for j in range(2, 8):
        for k in range(1, j + 1):
            c[j, k] = (c[j - 1, k - 1] if k > 1 else 0.0) - h[j - 1] * c[j - 1, k]
    # t^k = sum_j d[k, j] P_j(t), from t P_j = P_{j+1} + h_j P_j
    d = np.zeros((8, 8))
    d[1, 1] = 1.0
    for k in range(2, 8):
        for j in range(1, k + 1):
            d[k, j] = (d[k - 1, j - 1] if j > 1 else 0.0) + h[j] * d[k - 1, j]
    return r, c, d


_R, _C, _D = _tables()
# Binomial coefficients for the predictor (a polynomial re-expanded about the end).
_BINOM = np.array([[math.comb(j, k) for k in range(8)] for j in range(8)], dtype=np.float64)


@njit(cache=True, error_model="numpy")
def root7(x):
    """x^(1/7) for x > 0 by Newton's method on + - * / and frexp (deterministic)."""
    _, e = math.frexp(x)
    # x = m 2^e with m in [0.5, 1): start at 2^(e // 7), within a factor 2^(8/7) of the root.
    y = math.ldexp(1.0, e // 7)
    for _ in range(40):
        y6 = y * y * y
        y6 = y6 * y6
        y_new = (6.0 * y + x / y6) / 7.0
        if y_new == y:
            break
        y = y_new
    return y


@njit(cache=True, error_model="numpy", inline="always")
def _positions(x0, v0, a0, b, h, s, out):
    """Positions at tau = s of a substep h into out."""
    n = x0.shape[0]
    hs = h * s
    hs2 = hs * hs
    for i in range(n):
        for d in range(3):
            q = (b[6, i, d] * s / 72.0 + b[5, i, d] / 56.0) * s
            q = (q + b[4, i, d] / 42.0) * s
            q = (q + b[3, i, d] / 30.0) * s
            q = (q + b[2, i, d] / 20.0) * s
            q = (q + b[1, i, d] / 12.0) * s
            q = (q + b[0, i, d] / 6.0) * s
            out[i, d] = x0[i, d] + v0[i, d] * hs + hs2 * (a0[i, d] * 0.5 + q)


@njit(cache=True, error_model="numpy", inline="always")
def _end_state(x0, v0, a0, b, h, xo, vo, cx, cv, cxo, cvo):
    """End state of a substep into xo, vo, the increments added with compensated
    (Kahan) summation: cx, cv carry the rounding errors of earlier additions and the
    updated ones go to cxo, cvo, so the positions and velocities do not drift by
    round-off over many substeps."""
    n = x0.shape[0]
    h2 = h * h
    for i in range(n):
        for d in range(3):
            px = (b[6, i, d] / 72.0 + b[5, i, d] / 56.0 + b[4, i, d] / 42.0
                  + b[3, i, d] / 30.0 + b[2, i, d] / 20.0 + b[1, i, d] / 12.0
                  + b[0, i, d] / 6.0)
            pv = (b[6, i, d] / 8.0 + b[5, i, d] / 7.0 + b[4, i, d] / 6.0 + b[3, i, d] / 5.0
                  + b[2, i, d] / 4.0 + b[1, i, d] / 3.0 + b[0, i, d] / 2.0)
            y = (v0[i, d] * h + h2 * (a0[i, d] * 0.5 + px)) - cx[i, d]
            t = x0[i, d] + y
            cxo[i, d] = (t - x0[i, d]) - y
            xo[i, d] = t
            y = h * (a0[i, d] + pv) - cv[i, d]
            t = v0[i, d] + y
            cvo[i, d] = (t - v0[i, d]) - y
            vo[i, d] = t


@njit(cache=True, error_model="numpy")
def radau_substep(x, v, gm, gr_coef, h, b, g, a0, an, xn, xo, vo, r, c, dmat, cx, cv, cxo,
                  cvo):
    """One Gauss-Radau substep of length h from (x, v); b holds the predicted
    coefficients on entry and the converged ones on return (g is scratch).

    Writes the end state into xo, vo and returns (eps_b, converged): eps_b =
    max|b7| / max|a0|, the relative size of the last coefficient.
    """
    n = x.shape[0]
    accelerations(x, gm, gr_coef, a0)
    # g from the predicted b (monomial to Newton form).
    for j in range(7):
        for i in range(n):
            for d in range(3):
                s = 0.0
                for k in range(j, 7):
                    s += dmat[k + 1, j + 1] * b[k, i, d]
                g[j, i, d] = s
    amax = 0.0
    for i in range(n):
        for d in range(3):
            amax = max(amax, abs(a0[i, d]))
    converged = False
    for _ in range(MAX_ITERATIONS):
        b7_old_max = 0.0
        for i in range(n):
            for d in range(3):
                b7_old_max = max(b7_old_max, abs(b[6, i, d]))
        change = 0.0
        for node in range(1, 8):
            _positions(x, v, a0, b, h, NODES[node], xn)
            accelerations(xn, gm, gr_coef, an)
            for i in range(n):
                for d in range(3):
                    q = (an[i, d] - a0[i, d]) * r[node, 0]
                    for m in range(1, node):
                        q = (q - g[m - 1, i, d]) * r[node, m]
                    g[node - 1, i, d] = q
            for k in range(node):
                for i in range(n):
                    for d in range(3):
                        s = 0.0
                        for j in range(k, 7):
                            s += c[j + 1, k + 1] * g[j, i, d]
                        if k == 6:
                            change = max(change, abs(s - b[6, i, d]))
                        b[k, i, d] = s
        if amax == 0.0 or change <= 1e-16 * amax or change == 0.0:
            converged = True
            break
        if not (change == change):
            break
    _end_state(x, v, a0, b, h, xo, vo, cx, cv, cxo, cvo)
    b7 = 0.0
    for i in range(n):
        for d in range(3):
            b7 = max(b7, abs(b[6, i, d]))
    eps_b = b7 / amax if amax > 0.0 else 0.0
    return eps_b, converged


@njit(cache=True, error_model="numpy")
def _pair_time(x, gm):
    """Shortest sqrt(r_ij^3 / (G m_i + G m_j)) over pairs of bodies with mass."""
    n = x.shape[0]
    best = np.inf
    for i in range(n):
        for j in range(i + 1, n):
            m = gm[i] + gm[j]
            if m > 0.0:
                d0 = x[j, 0] - x[i, 0]
                d1 = x[j, 1] - x[i, 1]
                d2 = x[j, 2] - x[i, 2]
                r2 = d0 * d0 + d1 * d1 + d2 * d2
                best = min(best, r2 * np.sqrt(r2) / m)
    return np.sqrt(best)


@njit(cache=True, error_model="numpy", nogil=True)
def radau_frames(x, v, gm, gr_coef, dt, n_frames, tol, ctl, b, g, a0, an, xn, xo, vo, bp,
                 r, c, dmat, binom, pairs, params, mu, hx, hv, rh, cx, cv, cxo, cvo, contact):
    """Advance n_frames frames of length dt; returns (frames done, code, body a, body b).

    ctl = [next substep, last substep, substeps taken, substeps rejected, time into
    the frame] (state; the last is 0 except after a stop inside a frame). contact
    (n, n): the sum of two bodies' radii, checked after every substep (all zero: off).
    """
    n = x.shape[0]
    check = params[0] > 0.0
    touch = False
    for i in range(n):
        for j in range(n):
            if contact[i, j] > 0.0:
                touch = True
    for f in range(n_frames):
        tau = ctl[4]
        ctl[4] = 0.0
        while True:
            remaining = dt - tau
            h = ctl[0]
            last = False
            if abs(h) >= abs(remaining):
                h = remaining
                last = True
            elif 2.0 * abs(h) > abs(remaining):
                h = 0.5 * remaining
            # Predictor: the last substep's polynomial re-expanded about its end,
            # scaled to this substep (q = h / h_last).
            q = h / ctl[1]
            for k in range(7):
                qk = q
                for _ in range(k):
                    qk *= q
                for i in range(n):
                    for d in range(3):
                        s = 0.0
                        for j in range(k, 7):
                            s += binom[j + 1, k + 1] * b[j, i, d]
                        bp[k, i, d] = qk * s
            eps_b, ok = radau_substep(x, v, gm, gr_coef, h, bp, g, a0, an, xn, xo, vo, r, c,
                                      dmat, cx, cv, cxo, cvo)
            # The size the error allows (unbounded), and the factor applied.
            ufac = SAFETY * root7(tol / eps_b) if eps_b > 0.0 else 1e300
            fac = min(max(ufac, SHRINK), GROW)
            finite = eps_b == eps_b and vo[n - 1, 0] - vo[n - 1, 0] == 0.0
            if (not ok) or (not finite) or eps_b > REJECT * tol:
                ctl[3] += 1.0
                if abs(h) < 1e-14 * abs(dt) or ctl[3] > 1e12:
                    return f, NUMERICAL_FAILURE_CODE, first_broken(xo, vo), -1
                ctl[0] = h * (fac if ok and finite else 0.5 if finite else SHRINK)
                continue
            for k in range(7):
                for i in range(n):
                    for d in range(3):
                        b[k, i, d] = bp[k, i, d]
            for i in range(n):
                for d in range(3):
                    x[i, d] = xo[i, d]
                    v[i, d] = vo[i, d]
                    cx[i, d] = cxo[i, d]
                    cv[i, d] = cvo[i, d]
            ctl[1] = h
            ctl[2] += 1.0
            if last:
                # Trimmed to the frame's end: keep the size asked for unless the
                # error of this (shorter) substep allows less.
                ctl[0] = min(abs(ctl[0]), abs(h) * ufac) * (1.0 if dt > 0 else -1.0)
            else:
                ctl[0] = h * fac
            if fac < 1.0:
                floor = FLOOR * _pair_time(x, gm)
                if abs(ctl[0]) < floor:
                    ctl[0] = floor * (1.0 if dt > 0 else -1.0)
            if is_broken(v[n - 1, 0]):
                return f + 1, NUMERICAL_FAILURE_CODE, first_broken(x, v), -1
            if check or touch:
                code, ba, bb = 0, -1, -1
                if check:
                    for i in range(n):
                        for d in range(3):
                            hx[i, d] = x[i, d] - x[0, d]
                            hv[i, d] = v[i, d] - v[0, d]
                    code, ba, bb = check_stops(x, hx, hv, mu, pairs, params, rh)
                if code == 0 and touch:
                    for i in range(1, n):
                        for j in range(i + 1, n):
                            lim = contact[i, j]
                            d0 = x[j, 0] - x[i, 0]
                            d1 = x[j, 1] - x[i, 1]
                            d2 = x[j, 2] - x[i, 2]
                            if code == 0 and d0 * d0 + d1 * d1 + d2 * d2 < lim * lim:
                                code, ba, bb = COLLISION_CODE, i, j
                if code != 0:
                    # The frame is completed only when its end was reached; otherwise
                    # the time into it is kept (a caller may finish it).
                    if not last:
                        ctl[4] = tau + h
                    return f + (1 if last else 0), code, ba, bb
            if last:
                break
            tau += h
    return n_frames, 0, -1, -1


class GaussRadau(Integrator):
    """Gauss-Radau 15 with adaptive substeps inside frames of ``dt`` (see module docstring).

    Parameters
    ----------
    system : System
        Initial state (inertial, barycentric frame recommended).
    dt : float
        Frame length in days (negative: backward); samples and checkpoints
        fall on whole frames.
    stops : StopConditions, optional
        Checked after every substep (heliocentric two-body states for e and
        unbound).
    gr : bool
        Add the star's general-relativistic term (Nobili & Roxburgh 1986), as
        the map does.
    tolerance : float
        Bound on |b7| / |a| per substep (default 1e-9).
    """

    method = "gauss_radau"

    def __init__(self, system, dt, stops=None, gr=False, tolerance=DEFAULT_TOLERANCE,
                 contact=False):
        super().__init__(system, dt, stops)
        if not (tolerance > 0.0 and math.isfinite(tolerance)):
            raise ValueError(f"tolerance must be a positive number, got {tolerance}.")
        self.x = np.array(system.x, dtype=np.float64)
        self.v = np.array(system.v, dtype=np.float64)
        self.gr = bool(gr)
        self.contact = bool(contact)
        self.tolerance = float(tolerance)
        n = len(self.gm)
        self.b = np.zeros((7, n, 3))
        h0 = min(abs(self.dt), _shortest_period(self.x, self.v, self.gm) / 50.0)
        h0 = math.copysign(h0, self.dt)
        self.ctl = np.array([h0, h0, 0.0, 0.0, 0.0])
        self.comp = np.zeros((2, n, 3))  # compensated-summation terms of x and v
        self._derive()

    def _derive(self):
        n = len(self.gm)
        self._scratch = [np.zeros((7, n, 3)) for _ in range(2)] + [np.zeros((n, 3))
                                                                  for _ in range(7)]
        self._hx = np.zeros((n, 3))
        self._hv = np.zeros((n, 3))
        self._rh = np.zeros(n)
        self._mu = self.gm[0] + self.gm
        self._mu[0] = 0.0
        self._contact = np.zeros((n, n))
        if self.contact:
            self._contact = self.radii[:, None] + self.radii[None, :]
            self._contact[0, :] = 0.0
            self._contact[:, 0] = 0.0

    def _gr_coef(self):
        return gr_coefficient(self.gm[0]) if self.gr else 0.0

    @property
    def substeps(self):
        """(substeps accepted, substeps rejected) so far."""
        return int(self.ctl[2]), int(self.ctl[3])

    @property
    def into_frame(self):
        """Time already integrated into the current frame (days; 0 on a frame's start)."""
        return float(self.ctl[4])

    def _advance_impl(self, n, every=0, out_g=None, out_el=None, row0=0):
        if not every:
            g, bp, a0, an, xn, xo, vo, cxo, cvo = self._scratch
            steps, code, a, b = radau_frames(
                self.x, self.v, self.gm, self._gr_coef(), self.dt, n, self.tolerance,
                self.ctl, self.b, g, a0, an, xn, xo, vo, bp, _R, _C, _D, _BINOM,
                self._stop_pairs, self._stop_params, self._mu, self._hx, self._hv, self._rh,
                self.comp[0], self.comp[1], cxo, cvo, self._contact)
            return steps, code, a, b, row0
        return self._advance_outputs(n, every, out_g, out_el, row0,
                                     lambda k, _at: self._advance_impl(k)[:4])

    def _synchronized_state(self):
        return self.x.copy(), self.v.copy()

    def _settle_pending(self, dt_forward):
        # Nothing pending; a reversed run starts its substeps afresh from the
        # same size (the predictor's polynomial is of the other direction).
        self.b[:] = 0.0
        self.comp[:] = 0.0
        self.ctl[0] = -self.ctl[0]
        self.ctl[1] = -self.ctl[1]

    def _internal_arrays(self):
        return {"x": self.x.copy(), "v": self.v.copy(), "radau_b": self.b.copy(),
                "radau_control": self.ctl.copy(), "radau_compensation": self.comp.copy(),
                "settings": np.array([int(self.gr), int(self.contact)], dtype=np.int64),
                "radau_tolerance": np.array([self.tolerance])}

    def _restore_internal(self, arrays):
        self.x = np.array(arrays["x"], dtype=np.float64)
        self.v = np.array(arrays["v"], dtype=np.float64)
        self.b = np.array(arrays["radau_b"], dtype=np.float64)
        self.ctl = np.array(arrays["radau_control"], dtype=np.float64)
        self.comp = np.array(arrays["radau_compensation"], dtype=np.float64)
        settings = np.asarray(arrays["settings"])
        self.gr = bool(int(settings[0]))
        self.contact = bool(int(settings[1]))
        self.tolerance = float(np.asarray(arrays["radau_tolerance"])[0])
        self._derive()


def _shortest_period(x, v, gm):
    """Shortest heliocentric two-body period among bound orbits (days), or inf."""
    best = math.inf
    for k in range(1, len(gm)):
        mu = gm[0] + gm[k]
        dx = x[k] - x[0]
        dv = v[k] - v[0]
        r = math.sqrt(float(dx @ dx))
        en = 0.5 * float(dv @ dv) - mu / r
        if en < 0:
            a = -mu / (2 * en)
            best = min(best, 2 * math.pi * math.sqrt(a ** 3 / mu))
    if best == math.inf:
        return math.inf
    return best
