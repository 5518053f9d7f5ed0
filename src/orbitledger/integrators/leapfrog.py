"""Plain leapfrog (drift-kick-drift in inertial coordinates), for tests.

Second order, symplectic, with the same merged-drift and synchronized-copy
scheme as the Wisdom-Holman map, but the full N-body force in the kick.
"""

import numpy as np
from numba import njit

from .base import Integrator
from .nbody import accelerations
from .stops import NUMERICAL_FAILURE_CODE, check_stops, first_broken, is_broken


@njit(cache=True, error_model="numpy")
def _drift(x, v, h):
    n = x.shape[0]
    for i in range(n):
        x[i, 0] += v[i, 0] * h
        x[i, 1] += v[i, 1] * h
        x[i, 2] += v[i, 2] * h


@njit(cache=True, error_model="numpy", nogil=True)
def leapfrog_steps(x, v, gm, dt, n_steps, pending, pairs, params, mu, acc, xj, vj, rh):
    """Take n_steps merged leapfrog steps; same return as wh_steps."""
    half = 0.5 * dt
    n = x.shape[0]
    check = params[0] > 0.0
    for k in range(n_steps):
        _drift(x, v, dt if pending else half)
        pending = True
        accelerations(x, gm, 0.0, acc)
        for i in range(n):
            v[i, 0] += dt * acc[i, 0]
            v[i, 1] += dt * acc[i, 1]
            v[i, 2] += dt * acc[i, 2]
        if is_broken(v[n - 1, 0]):
            return k + 1, pending, NUMERICAL_FAILURE_CODE, first_broken(x, v), -1
        if check:
            # Stop checks want Jacobi two-body states for eccentricity/unbound.
            for i in range(n):
                for d in range(3):
                    xj[i, d] = x[i, d] - x[0, d]
                    vj[i, d] = v[i, d] - v[0, d]
            code, a, b = check_stops(x, xj, vj, mu, pairs, params, rh)
            if code != 0:
                return k + 1, pending, code, a, b
    return n_steps, pending, 0, -1, -1


class Leapfrog(Integrator):
    """Kick-in-the-middle leapfrog; see module docstring. Stop checks use heliocentric states."""

    method = "leapfrog"

    def __init__(self, system, dt, stops=None):
        super().__init__(system, dt, stops)
        self.x = system.x.copy()
        self.v = system.v.copy()
        self.pending = False
        self._derive()

    def _derive(self):
        n = len(self.gm)
        self._acc = np.zeros((n, 3))
        self._hx = np.zeros((n, 3))
        self._hv = np.zeros((n, 3))
        self._rh = np.zeros(n)
        self._mu = self.gm[0] + self.gm
        self._mu[0] = 0.0

    def _advance_impl(self, n, every=0, out_g=None, out_el=None, row0=0):
        if not every:
            steps, self.pending, code, a, b = leapfrog_steps(
                self.x, self.v, self.gm, self.dt, n, self.pending, self._stop_pairs,
                self._stop_params, self._mu, self._acc, self._hx, self._hv, self._rh)
            return steps, code, a, b, row0
        # Sampled: advance output by output (leapfrog is for tests; speed is secondary).
        return self._advance_outputs(n, every, out_g, out_el, row0,
                                     lambda k, _at: self._advance_impl(k)[:4])

    def _synchronized_state(self):
        x = self.x.copy()
        if self.pending:
            _drift(x, self.v, 0.5 * self.dt)
        return x, self.v.copy()

    def _settle_pending(self, dt_forward):
        if self.pending:
            _drift(self.x, self.v, 0.5 * dt_forward)
            self.pending = False

    def _internal_arrays(self):
        return {"x": self.x.copy(), "v": self.v.copy(),
                "pending": np.array([int(self.pending)], dtype=np.int64)}

    def _restore_internal(self, arrays):
        self.x = np.array(arrays["x"], dtype=np.float64)
        self.v = np.array(arrays["v"], dtype=np.float64)
        self.pending = bool(int(np.asarray(arrays["pending"])[0]))
        self._derive()
