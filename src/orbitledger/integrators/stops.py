"""Stop conditions checked inside the kernels.

Checked after every kick on the positions the kick used (for the
drift-kick-drift map these are the mid-step positions), so a stop costs no
extra synchronisation. Kinds are small integers inside the kernels and
:class:`StopKind` values outside.
"""

from dataclasses import dataclass
from enum import Enum
import math

import numpy as np
from numba import njit


class StopKind(str, Enum):
    """Why an :meth:`advance` call ended."""

    DONE = "done"
    CLOSE_ENCOUNTER = "close_encounter"
    EJECTION = "ejection"
    STAR_COLLISION = "star_collision"
    ECCENTRICITY = "eccentricity"
    # Not a physical outcome: the state stopped being finite numbers (e.g. two
    # bodies at the same place). Always checked, whatever the stop settings.
    NUMERICAL_FAILURE = "numerical_failure"
    # Two bodies closer than the sum of their radii (Gauss-Radau runs that check contact).
    COLLISION = "collision"


# Kernel codes, index into KIND_BY_CODE.
KIND_BY_CODE = (StopKind.DONE, StopKind.CLOSE_ENCOUNTER, StopKind.EJECTION,
                StopKind.STAR_COLLISION, StopKind.ECCENTRICITY, StopKind.NUMERICAL_FAILURE,
                StopKind.COLLISION)
COLLISION_CODE = 6
NUMERICAL_FAILURE_CODE = 5


@njit(cache=True, error_model="numpy", inline="always")
def is_broken(v):
    """True if the state has stopped being finite, from one velocity component.

    Every kick sums accelerations over all bodies, so a NaN or infinity in
    any body's position reaches every velocity within one step: one
    comparison per step watches the whole state.
    """
    return not (v - v == 0.0)


@njit(cache=True, error_model="numpy")
def first_broken(x, v):
    """Index of the first body whose position or velocity is not finite, or -1."""
    for i in range(x.shape[0]):
        for d in range(3):
            if not (x[i, d] - x[i, d] == 0.0) or not (v[i, d] - v[i, d] == 0.0):
                return i
    return -1


@dataclass(frozen=True)
class StopConditions:
    """Limits that end an integration early. A value of 0 (or False) disables it.

    Parameters
    ----------
    hill : float
        Close encounter when two bodies (star excluded) come closer than this
        many mutual Hill radii, R_H = ((m_i + m_j) / (3 m0))^(1/3) (r_i + r_j) / 2
        with r the current distances from the star.
    eject_distance : float
        Ejection when a body is farther than this from the star, au.
    unbound : bool
        Also count a body as ejected when its Jacobi two-body energy is positive
        and it is beyond ``unbound_distance`` from the star.
    unbound_distance : float
        See ``unbound``, au.
    star_radius : float
        Collision with the star when a body comes closer than this, au.
    max_ecc : float
        Stop when a body's Jacobi osculating eccentricity exceeds this.
    """

    hill: float = 0.0
    eject_distance: float = 0.0
    unbound: bool = False
    unbound_distance: float = 0.0
    star_radius: float = 0.0
    max_ecc: float = 0.0

    def __post_init__(self):
        for name in ("hill", "eject_distance", "unbound_distance", "star_radius", "max_ecc"):
            val = getattr(self, name)
            if not (math.isfinite(val) and val >= 0.0):
                raise ValueError(f"stop condition {name} must be finite and >= 0, got {val}.")

    @property
    def active(self):
        """True if any condition is enabled."""
        return bool(self.hill or self.eject_distance or self.unbound or self.star_radius
                    or self.max_ecc)

    def kernel_args(self, gm):
        """Arrays and scalars the kernels take: (hill_pairs, params)."""
        n = len(gm)
        pairs = np.zeros((n, n))
        if self.hill > 0.0:
            for i in range(1, n):
                for j in range(i + 1, n):
                    f = self.hill * ((gm[i] + gm[j]) / (3.0 * gm[0])) ** (1.0 / 3.0) * 0.5
                    pairs[i, j] = pairs[j, i] = f
        params = np.array([1.0 if self.active else 0.0, self.hill, self.eject_distance,
                           1.0 if self.unbound else 0.0, self.unbound_distance,
                           self.star_radius, self.max_ecc])
        return pairs, params


@njit(cache=True, error_model="numpy", inline="always")
def body_stop(r, x0, x1, x2, v0, v1, v2, mui, eject, unbound, unbound_r, r_star, e_max):
    """The stop code (0: none) of one body at distance r from the star with Jacobi
    state (x, v): collision with the star (3), ejection (2), eccentricity (4).

    Shared by :func:`check_stops` and the batched kernel's screen, so both
    compare the same numbers."""
    if r_star > 0.0 and r < r_star:
        return 3
    if eject > 0.0 and r > eject:
        return 2
    if unbound or e_max > 0.0:
        rj = np.sqrt(x0 * x0 + x1 * x1 + x2 * x2)
        vsq = v0 * v0 + v1 * v1 + v2 * v2
        if unbound and r > unbound_r and 0.5 * vsq - mui / rj > 0.0:
            return 2
        if e_max > 0.0:
            rv = x0 * v0 + x1 * v1 + x2 * v2
            p = vsq - mui / rj
            e0 = (p * x0 - rv * v0) / mui
            e1 = (p * x1 - rv * v1) / mui
            e2 = (p * x2 - rv * v2) / mui
            if e0 * e0 + e1 * e1 + e2 * e2 > e_max * e_max:
                return 4
    return 0


@njit(cache=True, error_model="numpy", inline="always")
def hill_hit(dx, dy, dz, factor, ri, rj):
    """True if a pair at separation (dx, dy, dz), with distances ri, rj from the star,
    is closer than its Hill limit factor * (ri + rj)."""
    lim = factor * (ri + rj)
    return dx * dx + dy * dy + dz * dz < lim * lim


@njit(cache=True, error_model="numpy")
def check_stops(xi, xj, vj, mu, pairs, params, rh):
    """Return (code, body_a, body_b) for the first condition met, or (0, -1, -1).

    xi: inertial positions (n, 3); xj, vj: Jacobi state; mu: Jacobi Kepler mu;
    rh: scratch array (n,) for the distances from the star.
    """
    n = xi.shape[0]
    eject = params[2]
    unbound = params[3] > 0.0
    unbound_r = params[4]
    r_star = params[5]
    e_max = params[6]
    for i in range(1, n):
        dx = xi[i, 0] - xi[0, 0]
        dy = xi[i, 1] - xi[0, 1]
        dz = xi[i, 2] - xi[0, 2]
        r = np.sqrt(dx * dx + dy * dy + dz * dz)
        rh[i] = r
        code = body_stop(r, xj[i, 0], xj[i, 1], xj[i, 2], vj[i, 0], vj[i, 1], vj[i, 2], mu[i],
                         eject, unbound, unbound_r, r_star, e_max)
        if code != 0:
            return code, i, 0 if code == 3 else -1
    if params[1] > 0.0:
        for i in range(1, n):
            for j in range(i + 1, n):
                if hill_hit(xi[j, 0] - xi[i, 0], xi[j, 1] - xi[i, 1], xi[j, 2] - xi[i, 2],
                            pairs[i, j], rh[i], rh[j]):
                    return 1, i, j
    return 0, -1, -1
