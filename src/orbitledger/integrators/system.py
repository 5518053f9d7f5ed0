"""A planetary system: a central star (body 0) and the bodies around it.

Masses are stored as G*m (au^3/d^2); positions and velocities are inertial
(any frame) in au and au/d. Helpers give heliocentric, barycentric and Jacobi
coordinates and build a system from heliocentric or Jacobi orbital elements
(angles in degrees at this edge).
"""

from dataclasses import dataclass, field
import math

import numpy as np

from . import elements as _el
from .constants import G


def jacobi_from_inertial(gm, x):
    """Jacobi coordinates of inertial vectors x (n, 3); row 0 is the centre of mass.

    Row i >= 1 is x_i minus the centre of mass of bodies 0..i-1
    (Wisdom & Holman 1991, sec. 3). The same linear map applies to velocities
    and accelerations.
    """
    n = len(gm)
    out = np.empty_like(x)
    com = x[0].copy()
    eta = gm[0]
    for i in range(1, n):
        out[i] = x[i] - com
        eta_new = eta + gm[i]
        com = com + (gm[i] / eta_new) * out[i]
        eta = eta_new
    out[0] = com
    return out


def inertial_from_jacobi(gm, xj):
    """Inverse of :func:`jacobi_from_inertial`."""
    n = len(gm)
    eta = np.cumsum(gm)
    out = np.empty_like(xj)
    com = xj[0].copy()
    for i in range(n - 1, 0, -1):
        com = com - (gm[i] / eta[i]) * xj[i]
        out[i] = com + xj[i]
    out[0] = com
    return out


def jacobi_mu(gm):
    """Kepler parameters of the Jacobi orbits: mu_i = G m0 eta_i / eta_{i-1}.

    With this choice the Kepler part is sum p_i^2/2m'_i - G m0 m_i / r'_i and
    the interaction part holds only the planets' mutual terms plus the
    difference between 1/r'_i and 1/r_0i (Wisdom & Holman 1991, eq. 12).
    """
    eta = np.cumsum(gm)
    mu = np.zeros(len(gm))
    mu[1:] = gm[0] * eta[1:] / eta[:-1]
    return mu


@dataclass
class System:
    """A star (body 0) and its bodies.

    Parameters
    ----------
    names : list of str
        Body names, the star first.
    gm : ndarray, shape (n,)
        G times mass, au^3/d^2.
    x, v : ndarray, shape (n, 3)
        Inertial positions (au) and velocities (au/d).
    time : float
        Time of the state, days.
    """

    names: list
    gm: np.ndarray
    x: np.ndarray
    v: np.ndarray
    time: float = 0.0
    radii: np.ndarray = field(default=None)

    def __post_init__(self):
        self.gm = np.ascontiguousarray(self.gm, dtype=np.float64)
        self.x = np.ascontiguousarray(self.x, dtype=np.float64).reshape(-1, 3)
        self.v = np.ascontiguousarray(self.v, dtype=np.float64).reshape(-1, 3)
        n = len(self.gm)
        if len(self.names) != n or self.x.shape[0] != n or self.v.shape[0] != n:
            raise ValueError(f"names, gm, x and v must all have {n} rows.")
        if n < 2:
            raise ValueError("a system needs a star and at least one more body.")
        if len(set(self.names)) != n:
            raise ValueError(f"body names must be unique, got {self.names}.")
        if not np.all(self.gm[1:] >= 0.0) or not self.gm[0] > 0.0:
            raise ValueError("the star's mass must be positive and the others non-negative.")
        for label, arr in (("gm", self.gm), ("x", self.x), ("v", self.v)):
            _el.check_finite(label, arr)
        if self.radii is None:
            self.radii = np.zeros(n)
        self.radii = np.ascontiguousarray(self.radii, dtype=np.float64)

    @property
    def n(self):
        """Number of bodies, the star included."""
        return len(self.gm)

    @property
    def masses(self):
        """Masses in solar masses."""
        return self.gm / G

    def copy(self):
        """A deep copy."""
        return System(list(self.names), self.gm.copy(), self.x.copy(), self.v.copy(),
                      self.time, self.radii.copy())

    # -- coordinates -------------------------------------------------------
    def heliocentric(self):
        """Positions and velocities relative to the star, (n, 3) each."""
        return self.x - self.x[0], self.v - self.v[0]

    def barycentric(self):
        """Positions and velocities relative to the centre of mass."""
        mtot = self.gm.sum()
        com = (self.gm[:, None] * self.x).sum(0) / mtot
        vcom = (self.gm[:, None] * self.v).sum(0) / mtot
        return self.x - com, self.v - vcom

    def jacobi(self):
        """Jacobi positions and velocities; row 0 is the centre of mass."""
        return jacobi_from_inertial(self.gm, self.x), jacobi_from_inertial(self.gm, self.v)

    def to_barycentric_frame(self):
        """A copy moved to the barycentric frame."""
        s = self.copy()
        s.x, s.v = self.barycentric()
        return s

    # -- elements ----------------------------------------------------------
    def elements(self, frame="heliocentric", degrees=True):
        """Orbital elements of bodies 1..n-1, array (n-1, 6): a, e, i, node, peri, M.

        ``frame="heliocentric"`` uses mu = G (m0 + m_i); ``frame="jacobi"``
        uses Jacobi coordinates with mu = G m0 eta_i / eta_{i-1}.
        """
        if frame == "heliocentric":
            xh, vh = self.heliocentric()
            mu = self.gm[0] + self.gm[1:]
            out = _el.elements_array(mu, xh[1:], vh[1:])
        elif frame == "jacobi":
            xj, vj = self.jacobi()
            out = _el.elements_array(jacobi_mu(self.gm)[1:], xj[1:], vj[1:])
        else:
            raise ValueError(f"frame must be 'heliocentric' or 'jacobi', got {frame!r}.")
        if degrees:
            out[:, 2:] = np.degrees(out[:, 2:])
        return out

    @classmethod
    def from_elements(cls, names, masses, elements, frame="heliocentric", radii=None,
                      degrees=True, time=0.0):
        """Build a system from orbital elements.

        Parameters
        ----------
        names : list of str
            The star first.
        masses : sequence of float
            Masses in solar masses, the star first.
        elements : sequence of (a, e, i, node, peri, M)
            One row per body after the star; a in au, angles in degrees
            (radians if ``degrees=False``). Hyperbolic orbits have a < 0, e > 1.
        frame : {"heliocentric", "jacobi"}
        """
        gm = G * np.asarray(masses, dtype=np.float64)
        n = len(gm)
        el = np.asarray(elements, dtype=np.float64).reshape(-1, 6)
        if el.shape[0] != n - 1:
            raise ValueError(f"need {n - 1} rows of elements for {n} bodies, got {el.shape[0]}.")
        conv = math.pi / 180.0 if degrees else 1.0
        rel_x = np.zeros((n, 3))
        rel_v = np.zeros((n, 3))
        if frame == "heliocentric":
            for i in range(1, n):
                a, e, inc, node, peri, m = el[i - 1]
                rel_x[i], rel_v[i] = _el.to_state(gm[0] + gm[i], a, e, inc * conv,
                                                  node * conv, peri * conv, m * conv)
            x, v = rel_x, rel_v
        elif frame == "jacobi":
            mu = jacobi_mu(gm)
            for i in range(1, n):
                a, e, inc, node, peri, m = el[i - 1]
                rel_x[i], rel_v[i] = _el.to_state(mu[i], a, e, inc * conv,
                                                  node * conv, peri * conv, m * conv)
            x = inertial_from_jacobi(gm, rel_x)
            v = inertial_from_jacobi(gm, rel_v)
        else:
            raise ValueError(f"frame must be 'heliocentric' or 'jacobi', got {frame!r}.")
        s = cls(list(names), gm, x, v, time, radii)
        return s.to_barycentric_frame()
