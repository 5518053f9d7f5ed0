"""The Wisdom-Holman map in Jacobi coordinates (Wisdom & Holman 1991).

Drift-kick-drift: each planet's Jacobi orbit drifts on its Kepler ellipse
(universal variables, :mod:`integrators.kepler`), then all velocities get the
interaction kick. The two half-drifts of consecutive steps are merged into one
full drift: the internal state after ``advance`` owes one half-drift (the
*pending* flag), and outputs are taken on a synchronized copy, so the
trajectory does not depend on how often outputs are taken or where a run is
split. Optional symplectic correctors (Wisdom, Holman & Touma 1996) are applied
to the initial conditions and, inverted, to every output copy. An optional
general-relativistic term of the star (Nobili & Roxburgh 1986) joins the kick.
"""

import numpy as np
from numba import literally, njit

from . import correctors
from .base import Integrator
from .diagnostics import diagnose
from .kepler import drift_row
from .nbody import accelerations, gr_coefficient, to_inertial
from .stops import NUMERICAL_FAILURE_CODE, check_stops, first_broken, is_broken
from .system import jacobi_from_inertial, jacobi_mu
from .particles import (check_particles, drift_particles, hill_factors, kick_particles,
                        particle_elements)
from .variational import (N_SUMS, drift_all_tangent, initial_tangent, kick_tangent,
                          lyapunov_of, megno_of, megno_update)


@njit(cache=True, error_model="numpy", inline="always")
def drift_all(xj, vj, mu, h):
    """Kepler drift of every Jacobi orbit by h; the centre of mass moves uniformly."""
    n = xj.shape[0]
    xj[0, 0] += vj[0, 0] * h
    xj[0, 1] += vj[0, 1] * h
    xj[0, 2] += vj[0, 2] * h
    for i in range(1, n):
        drift_row(xj, vj, i, mu[i], h)


@njit(cache=True, error_model="numpy", inline="always")
def kick(xj, vj, gm, mu, mr, h, gr_coef, xi, acc):
    """Interaction kick of the Jacobi velocities by h.

    The Jacobi acceleration is the Jacobi transform of the inertial
    accelerations (the map is linear, Wisdom & Holman 1991 sec. 3) plus
    +mu_i x'_i / r'_i^3, which removes the Kepler part already in the drift.
    xi and acc are scratch arrays (n, 3).
    """
    n = xj.shape[0]
    to_inertial(xj, mr, xi)
    accelerations(xi, gm, gr_coef, acc)
    a0 = acc[0, 0]
    a1 = acc[0, 1]
    a2 = acc[0, 2]
    for i in range(1, n):
        x0 = xj[i, 0]
        x1 = xj[i, 1]
        x2 = xj[i, 2]
        r2 = x0 * x0 + x1 * x1 + x2 * x2
        k = mu[i] / (r2 * np.sqrt(r2))
        aj0 = acc[i, 0] - a0
        aj1 = acc[i, 1] - a1
        aj2 = acc[i, 2] - a2
        vj[i, 0] += h * (aj0 + k * x0)
        vj[i, 1] += h * (aj1 + k * x1)
        vj[i, 2] += h * (aj2 + k * x2)
        q = mr[i]
        a0 = a0 + q * aj0
        a1 = a1 + q * aj1
        a2 = a2 + q * aj2


@njit(cache=True, error_model="numpy")
def wh_diagnose(xj, vj, gm, mu, mr, dt, pending, gr_coef, a_arr, c_arr, cx, cv, xi, acc,
                xo, vo, els):
    """Synchronize into scratch copies and diagnose in one compiled call.

    Returns (G*energy, G*Lx, G*Ly, G*Lz); elements go into els (n-1, 6).
    """
    cx[:, :] = xj
    cv[:, :] = vj
    if pending:
        drift_all(cx, cv, mu, 0.5 * dt)
    apply_stages(cx, cv, gm, mu, mr, dt, gr_coef, a_arr, c_arr, xi, acc)
    to_inertial(cx, mr, xo)
    to_inertial(cv, mr, vo)
    return diagnose(xo, vo, gm, gr_coef, els)


# What a step carries besides the massive bodies (a compile-time constant of
# the one step loop below, so each kind compiles to its own loop).
PLAIN, TANGENT, PARTICLES = 0, 1, 2


@njit(cache=True, error_model="numpy", nogil=True)
def wh_loop(kind, xj, vj, gm, mu, mr, dt, n_steps, pending, gr_coef, pairs, params, xi, acc,
            rh, step0, every, a_inv, c_inv, scratch, out_g, out_el, row0, tan, part):
    """Take n_steps merged drift-kick-drift steps in place: the map's one step loop.

    With every > 0, after each step whose absolute number (step0 + k + 1) is
    a multiple of every, a synchronized copy is diagnosed into row `rows` of
    out_g (step, G*energy, G*Lx, G*Ly, G*Lz) and out_el (elements): outputs
    never touch the live state. Returns (steps taken, pending flag, stop
    code, body a, body b, next free row).

    `kind` (a literal: numba compiles one loop per kind, the others' code
    removed) says what the step carries besides the massive bodies, whose
    arithmetic is the same in every kind:

    - PLAIN: nothing (`tan` and `part` are unused stand-ins);
    - TANGENT: the tangent vector tan = (dxj, dvj, sums, dxi, dacc, out_ind)
      with the map, the MEGNO sums after each step
      (:mod:`integrators.variational`), and per sample row (<Y>, mean
      log-growth per step) in out_ind;
    - PARTICLES: test particles part = (px, pv, alive, events, mu_all, hill_f,
      own_step0) (:mod:`integrators.particles`); particles meeting a stop
      condition are removed and recorded in `events` with the integrator's
      own step number (own_step0 + k + 1, not shifted by a sample offset);
      only the massive bodies' stops end the call.
    """
    kind = literally(kind)
    half = 0.5 * dt
    check = params[0] > 0.0
    rows = row0
    # Steps until the next sample (a countdown: no integer division per step).
    until = every - step0 % every if every > 0 else -1
    for k in range(n_steps):
        h = dt if pending else half
        if kind == TANGENT:
            drift_all_tangent(xj, vj, tan[0], tan[1], mu, h)
        else:
            drift_all(xj, vj, mu, h)
        if kind == PARTICLES:
            drift_particles(part[0], part[1], part[2], part[4], h)
        pending = True
        kick(xj, vj, gm, mu, mr, dt, gr_coef, xi, acc)
        if kind == TANGENT:
            kick_tangent(xj, xi, tan[0], tan[1], gm, mu, mr, dt, gr_coef, tan[3], tan[4])
        if kind == PARTICLES:
            kick_particles(part[0], part[1], part[2], xi, xj[0], gm, part[4], dt)
        if is_broken(vj[vj.shape[0] - 1, 0]):
            return k + 1, pending, NUMERICAL_FAILURE_CODE, first_broken(xj, vj), -1, rows
        if kind == TANGENT:
            megno_update(tan[0], tan[1], tan[2])
        if kind == PARTICLES:
            # Always: a particle whose state is no longer finite is removed even
            # with every stop condition off.
            check_particles(part[0], part[2], part[3], xi, xj[0], part[5], params,
                            part[6] + k + 1)
        if check:
            code, a, b = check_stops(xi, xj, vj, mu, pairs, params, rh)
            if code != 0:
                return k + 1, pending, code, a, b, rows
        until -= 1
        if until == 0:
            until = every
            e, lx, ly, lz = wh_diagnose(xj, vj, gm, mu, mr, dt, pending, gr_coef, a_inv, c_inv,
                                        scratch[0], scratch[1], scratch[2], scratch[3],
                                        scratch[4], scratch[5], out_el[rows])
            out_g[rows, 0] = step0 + k + 1
            out_g[rows, 1] = e
            out_g[rows, 2] = lx
            out_g[rows, 3] = ly
            out_g[rows, 4] = lz
            if kind == TANGENT:
                sums = tan[2]
                tan[5][rows, 0] = sums[2] / sums[0]
                tan[5][rows, 1] = sums[3] / sums[0]
            rows += 1
    return n_steps, pending, 0, -1, -1, rows


@njit(cache=True, error_model="numpy", nogil=True)
def wh_steps(xj, vj, gm, mu, mr, dt, n_steps, pending, gr_coef, pairs, params, xi, acc, rh,
             step0, every, a_inv, c_inv, scratch, out_g, out_el, row0):
    """:func:`wh_loop` of the massive bodies alone (same arguments and return)."""
    z = np.empty((0, 3))
    zi = np.empty((0, 3), dtype=np.int64)
    return wh_loop(PLAIN, xj, vj, gm, mu, mr, dt, n_steps, pending, gr_coef, pairs, params, xi,
                   acc, rh, step0, every, a_inv, c_inv, scratch, out_g, out_el, row0,
                   (z, z, np.empty(0), z, z, np.empty((0, 2))),
                   (z, z, np.empty(0, dtype=np.int64), zi, 0.0, np.empty(0), 0))


@njit(cache=True, error_model="numpy", nogil=True)
def wh_steps_tangent(xj, vj, gm, mu, mr, dt, n_steps, pending, gr_coef, pairs, params, xi,
                     acc, rh, step0, every, a_inv, c_inv, scratch, out_g, out_el, row0,
                     dxj, dvj, sums, dxi, dacc, out_ind):
    """:func:`wh_loop` carrying the tangent vector (dxj, dvj) and the MEGNO sums."""
    z = np.empty((0, 3))
    zi = np.empty((0, 3), dtype=np.int64)
    return wh_loop(TANGENT, xj, vj, gm, mu, mr, dt, n_steps, pending, gr_coef, pairs, params,
                   xi, acc, rh, step0, every, a_inv, c_inv, scratch, out_g, out_el, row0,
                   (dxj, dvj, sums, dxi, dacc, out_ind),
                   (z, z, np.empty(0, dtype=np.int64), zi, 0.0, np.empty(0), 0))


@njit(cache=True, error_model="numpy", nogil=True)
def wh_steps_particles(xj, vj, gm, mu, mr, dt, n_steps, pending, gr_coef, pairs, params, xi,
                       acc, rh, step0, every, a_inv, c_inv, scratch, out_g, out_el, row0,
                       px, pv, alive, events, mu_all, hill_f, own_step0):
    """:func:`wh_loop` with test particles."""
    z = np.empty((0, 3))
    return wh_loop(PARTICLES, xj, vj, gm, mu, mr, dt, n_steps, pending, gr_coef, pairs, params,
                   xi, acc, rh, step0, every, a_inv, c_inv, scratch, out_g, out_el, row0,
                   (z, z, np.empty(0), z, z, np.empty((0, 2))),
                   (px, pv, alive, events, mu_all, hill_f, own_step0))


@njit(cache=True, error_model="numpy")
def apply_stages(xj, vj, gm, mu, mr, dt, gr_coef, a_arr, c_arr, xi, acc):
    """Apply X(a, c) = drift(a dt) kick(c dt) drift(-a dt) for each stage in order."""
    for s in range(a_arr.shape[0]):
        drift_all(xj, vj, mu, a_arr[s] * dt)
        kick(xj, vj, gm, mu, mr, c_arr[s] * dt, gr_coef, xi, acc)
        drift_all(xj, vj, mu, -a_arr[s] * dt)


@njit(cache=True, error_model="numpy")
def apply_stages_particles(xj, vj, gm, mu, mr, dt, gr_coef, a_arr, c_arr, xi, acc, px, pv,
                           alive, mu_all):
    """:func:`apply_stages` with test particles carried through the same stages (the
    massive bodies' operations are apply_stages' own, in its order)."""
    for s in range(a_arr.shape[0]):
        h = a_arr[s] * dt
        drift_all(xj, vj, mu, h)
        drift_particles(px, pv, alive, mu_all, h)
        kick(xj, vj, gm, mu, mr, c_arr[s] * dt, gr_coef, xi, acc)
        kick_particles(px, pv, alive, xi, xj[0], gm, mu_all, c_arr[s] * dt)
        drift_all(xj, vj, mu, -h)
        drift_particles(px, pv, alive, mu_all, -h)


@njit(cache=True, error_model="numpy")
def synchronize(xj, vj, gm, mu, mr, dt, pending, gr_coef, a_arr, c_arr, xi, acc, xo, vo):
    """Physical inertial state of the (unchanged) internal state into xo, vo.

    Works on copies: the pending half-drift and the inverse corrector are
    applied to xo/vo only.
    """
    cx = xj.copy()
    cv = vj.copy()
    if pending:
        drift_all(cx, cv, mu, 0.5 * dt)
    apply_stages(cx, cv, gm, mu, mr, dt, gr_coef, a_arr, c_arr, xi, acc)
    to_inertial(cx, mr, xo)
    to_inertial(cv, mr, vo)


def _stage_arrays(order, sign):
    st = correctors.stages(order, sign)
    return (np.array([a for a, _ in st], dtype=np.float64),
            np.array([c for _, c in st], dtype=np.float64))


class WisdomHolman(Integrator):
    """Wisdom-Holman map with merged drifts, optional corrector and GR.

    Parameters
    ----------
    system : System
        Initial physical state (any inertial frame).
    dt : float
        Step, days; negative integrates backward.
    corrector : int
        Order of the symplectic corrector: 0 (none) or any odd order from 3 to 31.
    gr : bool
        Add the star's general-relativistic potential (Nobili & Roxburgh 1986).
    stops : StopConditions, optional
    indicator : {None, "megno"}
        Carry a tangent vector with the map and accumulate MEGNO and the
        largest Lyapunov exponent (:mod:`integrators.variational`). The
        trajectory is the same bit for bit with or without it.
    tangent_seed : int
        Seed of the initial tangent vector's direction.
    particles : (x, v), optional
        Test particles: heliocentric positions (k, 3) in au and velocities
        (k, 3) in au/d, in the frame of `system` (see
        :mod:`integrators.particles`); carried through the corrector's stages
        too. Not yet with an indicator.
    """

    method = "wisdom_holman"
    INDICATORS = (None, "megno")

    def __init__(self, system, dt, corrector=0, gr=False, stops=None, indicator=None,
                 tangent_seed=0, particles=None):
        super().__init__(system, dt, stops)
        if particles is not None and indicator is not None:
            raise ValueError("test particles are not yet supported with a chaos indicator; "
                             "leave the indicator off.")
        if corrector not in correctors.ORDERS:
            raise ValueError(f"corrector must be one of {correctors.ORDERS}, got {corrector}.")
        if indicator not in self.INDICATORS:
            raise ValueError(f"indicator must be one of {self.INDICATORS}, got {indicator!r}.")
        self.corrector = int(corrector)
        self.gr = bool(gr)
        self.tangent = None
        if indicator == "megno":
            dx, dv = initial_tangent(len(self.gm), int(tangent_seed))
            self.tangent = (dx, dv, np.zeros(N_SUMS))
        self._derive()
        self.xj = jacobi_from_inertial(self.gm, system.x)
        self.vj = jacobi_from_inertial(self.gm, system.v)
        self.pending = False
        self.particles = None
        if particles is not None:
            px = np.array(particles[0], dtype=np.float64).reshape(-1, 3)
            pv = np.array(particles[1], dtype=np.float64).reshape(-1, 3)
            if px.shape != pv.shape:
                raise ValueError("particle positions and velocities must have the same shape.")
            # Relative to the massive bodies' centre of mass (Jacobi row 0).
            px = (np.asarray(system.x)[0] + px) - self.xj[0]
            pv = (np.asarray(system.v)[0] + pv) - self.vj[0]
            alive = np.ones(len(px), dtype=np.int64)
            events = np.full((len(px), 3), -1, dtype=np.int64)
            self.particles = (px, pv, alive, events)
        if self.corrector:
            a, c = _stage_arrays(self.corrector, +1.0)
            if self.particles is not None:
                px, pv, alive, _ = self.particles
                apply_stages_particles(self.xj, self.vj, self.gm, self.mu, self.mr, self.dt,
                                       self.gr_coef, a, c, self._xi, self._acc, px, pv, alive,
                                       self.eta[-1])
            else:
                apply_stages(self.xj, self.vj, self.gm, self.mu, self.mr, self.dt,
                             self.gr_coef, a, c, self._xi, self._acc)

    def _derive(self):
        # Quantities fixed by gm and settings; recomputed (deterministically) on restore.
        self.mu = jacobi_mu(self.gm)
        self.eta = np.cumsum(self.gm)
        self.mr = self.gm / self.eta  # elementwise IEEE quotients, as the kernels divided
        self.gr_coef = gr_coefficient(self.gm[0]) if self.gr else 0.0
        n = len(self.gm)
        self._xi = np.zeros((n, 3))
        self._acc = np.zeros((n, 3))
        self._rh = np.zeros(n)
        self._inv = _stage_arrays(self.corrector, -1.0)
        self._diag_scratch = np.empty((6, n, 3))
        self._no_out = (np.empty((0, 5)), np.empty((0, n - 1, 6)))
        self._no_ind = np.empty((0, 2))
        self._tan_scratch = np.zeros((2, n, 3))

    def _gr_coef(self):
        return self.gr_coef

    @property
    def indicator(self):
        """"megno" when a tangent vector is carried, else None."""
        return None if self.tangent is None else "megno"

    def megno(self):
        """MEGNO <Y> over the steps taken with the tangent vector (nan before any)."""
        return megno_of(self.tangent[2]) if self.tangent is not None else float("nan")

    def lyapunov(self):
        """Finite-time largest Lyapunov exponent, per day (nan before any step)."""
        return lyapunov_of(self.tangent[2], self.dt) if self.tangent is not None else float("nan")

    def _advance_impl(self, n, every=0, out_g=None, out_el=None, row0=0, out_ind=None):
        if out_g is None:
            out_g, out_el = self._no_out
        a_inv, c_inv = self._inv
        args = (self.xj, self.vj, self.gm, self.mu, self.mr, self.dt, n, self.pending,
                self.gr_coef, self._stop_pairs, self._stop_params, self._xi, self._acc, self._rh,
                self.step + self.sample_offset, every, a_inv, c_inv, self._diag_scratch, out_g,
                out_el, row0)
        if self.particles is not None:
            px, pv, alive, events = self.particles
            steps, self.pending, code, a, b, rows = wh_steps_particles(
                *args, px, pv, alive, events, self.eta[-1],
                hill_factors(self.gm, self.stops.hill), self.step)
        elif self.tangent is not None:
            dx, dv, sums = self.tangent
            steps, self.pending, code, a, b, rows = wh_steps_tangent(
                *args, dx, dv, sums, self._tan_scratch[0], self._tan_scratch[1],
                self._no_ind if out_ind is None else out_ind)
        else:
            steps, self.pending, code, a, b, rows = wh_steps(*args)
        return steps, code, a, b, rows

    def _synchronized_state(self):
        n = len(self.gm)
        xo = np.empty((n, 3))
        vo = np.empty((n, 3))
        a, c = self._inv
        synchronize(self.xj, self.vj, self.gm, self.mu, self.mr, self.dt, self.pending,
                    self.gr_coef, a, c, np.empty((n, 3)), np.empty((n, 3)), xo, vo)
        return xo, vo

    def _diagnose_into(self, els):
        a, c = self._inv
        return wh_diagnose(self.xj, self.vj, self.gm, self.mu, self.mr, self.dt, self.pending,
                           self.gr_coef, a, c, *self._diag_scratch, els)

    def particle_states(self):
        """Heliocentric positions and velocities (k, 3) of the test particles at the
        synchronized time; removed particles are rows of NaN."""
        if self.particles is None:
            return np.empty((0, 3)), np.empty((0, 3))
        px, pv, alive, _ = self.particles
        cx, cv, qx, qv = self.xj.copy(), self.vj.copy(), px.copy(), pv.copy()
        if self.pending:
            drift_all(cx, cv, self.mu, 0.5 * self.dt)
            drift_particles(qx, qv, alive, self.eta[-1], 0.5 * self.dt)
        n = len(self.gm)
        if self.corrector:
            a, c = self._inv
            apply_stages_particles(cx, cv, self.gm, self.mu, self.mr, self.dt, self.gr_coef, a,
                                   c, np.empty((n, 3)), np.empty((n, 3)), qx, qv, alive,
                                   self.eta[-1])
        xo, vo = np.empty((n, 3)), np.empty((n, 3))
        to_inertial(cx, self.mr, xo)
        to_inertial(cv, self.mr, vo)
        x = cx[0] + qx - xo[0]
        v = cv[0] + qv - vo[0]
        x[alive == 0] = np.nan
        v[alive == 0] = np.nan
        return x, v

    @property
    def particle_count(self):
        """Number of test particles carried (removed ones included)."""
        return 0 if self.particles is None else len(self.particles[2])

    def particles_left(self):
        """Number of test particles still integrated."""
        return 0 if self.particles is None else int(self.particles[2].sum())

    def particle_elements_into(self, out):
        """Heliocentric elements (a, e, i, node, peri, M; au, degrees; about the star,
        mu = G m0) of the particles at the synchronized time into out (k, 6); rows of
        removed particles are NaN. Works on copies: the run is unchanged."""
        x, v = self.particle_states()
        return particle_elements(x, v, float(self.gm[0]), out)

    def particle_events(self):
        """(step, kind code, body) per particle: the step counter at its removal (its
        time is t0 + step dt; 0: removed before this integrator's start, see
        :meth:`_on_reverse`), -1 while it is still integrated."""
        if self.particles is None:
            return np.empty((0, 3), dtype=np.int64)
        return self.particles[3].copy()

    @staticmethod
    def _on_reverse(arrays):
        # A reversed run starts with the particles removed so far still removed;
        # their removals happened before its start: step 0 (no step of a run
        # removes at 0, its checks come after a step).
        if "particles_events" in arrays:
            ev = np.array(arrays["particles_events"])
            ev[ev[:, 0] >= 0, 0] = 0
            arrays["particles_events"] = ev

    def _settle_pending(self, dt_forward):
        if self.pending and self.particles is not None:
            px, pv, alive, _ = self.particles
            drift_particles(px, pv, alive, self.eta[-1], 0.5 * dt_forward)
        if self.pending:
            if self.tangent is not None:
                drift_all_tangent(self.xj, self.vj, self.tangent[0], self.tangent[1], self.mu,
                                  0.5 * dt_forward)
            else:
                drift_all(self.xj, self.vj, self.mu, 0.5 * dt_forward)
            self.pending = False

    def _internal_arrays(self):
        out = {"xj": self.xj.copy(), "vj": self.vj.copy(),
               "pending": np.array([int(self.pending)], dtype=np.int64),
               "settings": np.array([self.corrector, int(self.gr)], dtype=np.int64)}
        if self.particles is not None:
            out["particles_x"] = self.particles[0].copy()
            out["particles_v"] = self.particles[1].copy()
            out["particles_alive"] = self.particles[2].copy()
            out["particles_events"] = self.particles[3].copy()
        if self.tangent is not None:
            # Only when carried, so states without it keep their bytes.
            out["tangent_x"] = self.tangent[0].copy()
            out["tangent_v"] = self.tangent[1].copy()
            out["megno_sums"] = self.tangent[2].copy()
        return out

    def _restore_internal(self, arrays):
        self.xj = np.array(arrays["xj"], dtype=np.float64)
        self.vj = np.array(arrays["vj"], dtype=np.float64)
        self.pending = bool(int(np.asarray(arrays["pending"])[0]))
        settings = np.asarray(arrays["settings"])
        self.corrector = int(settings[0])
        self.gr = bool(settings[1])
        self.particles = None
        if "particles_x" in arrays:
            self.particles = tuple(np.array(arrays[k], dtype=dt) for k, dt in (
                ("particles_x", np.float64), ("particles_v", np.float64),
                ("particles_alive", np.int64), ("particles_events", np.int64)))
        self.tangent = None
        if "tangent_x" in arrays:
            self.tangent = (np.array(arrays["tangent_x"], dtype=np.float64),
                            np.array(arrays["tangent_v"], dtype=np.float64),
                            np.array(arrays["megno_sums"], dtype=np.float64))
        self._derive()
