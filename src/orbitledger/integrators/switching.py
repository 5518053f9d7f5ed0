"""Through close encounters: the Wisdom-Holman map, switched to Gauss-Radau while two
bodies are close, with collisions and ejections as events rather than ends.

The run is the map (any corrector, GR) until its kernel meets a close
encounter (``stops.hill``). The step that met it is undone (the map is run
again from the state before the call, one step fewer: deterministic), and
from that step's start the physical state goes on with Gauss-Radau 15 in
frames of the same step, so the step grid, samples and checkpoints are
unchanged. After every frame, when every pair of bodies is farther apart
than ``back_at`` mutual Hill radii, the run returns to a map built afresh
from the physical state (its corrector applied anew).

Events instead of ends, in either method:

- a collision (two bodies closer than the sum of their radii, checked after
  every Gauss-Radau substep; bodies have radii in the spec) merges them
  into one at their centre of mass with their summed mass and momentum;
  the energy lost is recorded;
- an ejection (``stops.escape_distance``) removes the body, with its
  energy and angular momentum;
- a collision with the star merges the body into the star.

The system then goes on with fewer bodies. Energy and angular momentum are
reported with what the events removed added back, so the job's energy error
is measured against the energy after each event. Every switch and event is
a row of ``events`` (step, kind, two bodies by their original index, energy
change); the worker records them in the ledger with the checkpoint that
contains them.

State: the current method's whole state (prefixed), the original index of
each current body, the events, the removed energy and angular momentum: a
resumed run repeats the uninterrupted one bit for bit.
"""

import numpy as np

from .base import Integrator
from .gauss_radau import DEFAULT_TOLERANCE, GaussRadau
from .stops import StopConditions, StopKind
from .system import System
from .wisdom_holman import WisdomHolman

# Event kinds (column 1 of ``events``).
TO_RADAU, TO_MAP, MERGER, EJECTION, STAR_MERGER = 1, 2, 3, 4, 5
EVENT_NAMES = {TO_RADAU: "switch_to_gauss_radau", TO_MAP: "switch_to_map", MERGER: "merger",
               EJECTION: "ejection", STAR_MERGER: "star_merger"}
MAP, RADAU = 0, 1


class Switching(Integrator):
    """The map with Gauss-Radau through close encounters (see module docstring)."""

    method = "switching"

    def __init__(self, system, dt, corrector=0, gr=False, stops=None, back_at=5.0,
                 tolerance=DEFAULT_TOLERANCE):
        stops = stops or StopConditions()
        if not stops.hill > 0.0:
            raise ValueError("switching needs stops.hill > 0: the close encounter that "
                             "starts Gauss-Radau.")
        if not back_at >= stops.hill:
            raise ValueError(f"back_at ({back_at}) must be at least stops.hill ({stops.hill}).")
        super().__init__(system, dt, stops)
        self.corrector = int(corrector)
        self.gr = bool(gr)
        self.back_at = float(back_at)
        self.tolerance = float(tolerance)
        self.alive = np.arange(len(self.gm), dtype=np.int64)
        self.events = np.zeros((0, 5))
        self.removed = np.zeros(4)  # energy, Lx, Ly, Lz taken away by events
        self.mode = MAP
        self._at = 0
        self.inner = self._map(system)

    # -- the two methods ------------------------------------------------------
    def _map(self, system):
        return WisdomHolman(system, self.dt, corrector=self.corrector, gr=self.gr,
                            stops=self.stops)

    def _radau(self, system):
        st = self.stops
        # Encounters are what Gauss-Radau is for: no Hill stop inside it.
        inner_stops = StopConditions(0.0, st.eject_distance, st.unbound, st.unbound_distance,
                                     st.star_radius, 0.0)
        return GaussRadau(system, self.dt, stops=inner_stops, gr=self.gr,
                          tolerance=self.tolerance, contact=True)

    def _separated(self, system):
        """Every pair of bodies (star excluded) beyond back_at mutual Hill radii."""
        x = system.x
        gm = system.gm
        r = np.linalg.norm(x - x[0], axis=1)
        for i in range(1, len(gm)):
            for j in range(i + 1, len(gm)):
                rh = ((gm[i] + gm[j]) / (3.0 * gm[0])) ** (1.0 / 3.0) * 0.5 * (r[i] + r[j])
                if float(np.linalg.norm(x[i] - x[j])) < self.back_at * rh:
                    return False
        return True

    def _event(self, kind, a=-1, b=-1, d_energy=0.0):
        row = np.array([[float(self._at), float(kind), float(a), float(b), float(d_energy)]])
        self.events = np.vstack([self.events, row])

    # -- advancing ------------------------------------------------------------
    def reversed(self):
        from .errors import IntegratorError

        raise IntegratorError("a run that switches methods through encounters cannot be run "
                              "backward (its switches and events depend on the direction).")

    def _advance_impl(self, n, every=0, out_g=None, out_el=None, row0=0):
        if not every:
            return self._frames(n, self.step) + (row0,)
        return self._advance_outputs(n, every, out_g, out_el, row0, self._frames)

    def _frames(self, n, step0):
        """Advance n steps from step step0 through switches and events; returns (steps,
        code, a, b), a non-zero code only for what still ends the run (a numerical
        failure, an eccentricity stop)."""
        done = 0
        while done < n:
            self._at = step0 + done
            if self.mode == MAP:
                before = {k: np.array(v) for k, v in self.inner.state_arrays().items()}
                res = self.inner.advance(n - done)
                if res.kind is StopKind.DONE:
                    done += res.steps
                    continue
                if res.kind in (StopKind.NUMERICAL_FAILURE, StopKind.ECCENTRICITY):
                    return (done + res.steps, _code(res.kind)) + self._orig(res.bodies)
                # Undo the step that met it: the same arithmetic, one step fewer.
                self.inner = Integrator.from_state_arrays(before)
                self.inner.advance(res.steps - 1)
                done += res.steps - 1
                self._at = step0 + done
                sysm = self.inner.synchronized()
                if res.kind is StopKind.CLOSE_ENCOUNTER:
                    self._event(TO_RADAU, *self._orig(res.bodies))
                    self.inner = self._radau(sysm)
                    self.mode = RADAU
                else:
                    self.inner = self._map(self._remove(res.kind, res.bodies, sysm))
                continue
            res = self.inner.advance(1)
            if res.kind is StopKind.NUMERICAL_FAILURE:
                return (done, _code(res.kind)) + self._orig(res.bodies)
            sysm = self.inner.synchronized()
            if res.kind is not StopKind.DONE:
                # A collision, an ejection or a star contact: the event, then the rest
                # of the frame (if any) with the bodies left, event after event.
                rest = 0.0 if res.steps else self.dt - self.inner.into_frame
                sysm = self._remove(res.kind, res.bodies, sysm)
                while rest != 0.0:
                    part = GaussRadau(sysm, rest, stops=self.inner.stops, gr=self.gr,
                                      tolerance=self.tolerance, contact=True)
                    r2 = part.advance(1)
                    if r2.kind is StopKind.NUMERICAL_FAILURE:
                        return (done, _code(r2.kind)) + self._orig(r2.bodies)
                    if r2.kind is StopKind.DONE:
                        sysm = part.synchronized()
                        break
                    rest = 0.0 if r2.steps else rest - part.into_frame
                    sysm = self._remove(r2.kind, r2.bodies, part.synchronized())
                self.inner = self._radau(sysm)
            done += 1
            self._at = step0 + done
            if len(sysm.gm) > 1 and self._separated(sysm):
                self._event(TO_MAP)
                self.inner = self._map(sysm)
                self.mode = MAP
        return done, 0, -1, -1

    def _orig(self, bodies):
        idx = [int(self.alive[k]) for k in bodies] + [-1, -1]
        return idx[0], idx[1]

    def _remove(self, kind, bodies, sysm):
        """Apply an event to the synchronized system sysm; returns the system after it."""
        x, v, gm = sysm.x.copy(), sysm.v.copy(), sysm.gm.copy()
        radii = sysm.radii.copy()
        names = list(sysm.names)
        e_before = _energy(x, v, gm, self.gr)
        l_before = _angmom(x, v, gm)
        if kind is StopKind.EJECTION:
            k = bodies[0]
            keep = [i for i in range(len(gm)) if i != k]
            code, a, b = EJECTION, int(self.alive[k]), -1
        else:
            # A merger: with the star (STAR_COLLISION) or of two bodies (COLLISION).
            i, k = (0, bodies[0]) if kind is StopKind.STAR_COLLISION else sorted(bodies)
            m = gm[i] + gm[k]
            x[i] = (gm[i] * x[i] + gm[k] * x[k]) / m
            v[i] = (gm[i] * v[i] + gm[k] * v[k]) / m
            gm[i] = m
            if i > 0:
                # Equal densities: the radius of the summed volume.
                radii[i] = (radii[i] ** 3 + radii[k] ** 3) ** (1.0 / 3.0)
            keep = [q for q in range(len(gm)) if q != k]
            code = STAR_MERGER if i == 0 else MERGER
            a, b = int(self.alive[i]), int(self.alive[k])
        x, v, gm, radii = x[keep], v[keep], gm[keep], radii[keep]
        e_after = _energy(x, v, gm, self.gr)
        l_after = _angmom(x, v, gm)
        self.removed[0] += e_before - e_after
        self.removed[1:] += l_before - l_after
        self._event(code, a, b, (e_after - e_before) / abs(e_before))
        self.alive = self.alive[keep]
        return System([names[q] for q in keep], gm, x, v, sysm.time, radii)

    # -- what the base class needs --------------------------------------------
    def _synchronized_state(self):
        """Positions and velocities of the original bodies (removed ones: NaN)."""
        x, v = self.inner._synchronized_state()
        n = len(self.gm)
        xo = np.full((n, 3), np.nan)
        vo = np.full((n, 3), np.nan)
        xo[self.alive] = x
        vo[self.alive] = v
        return xo, vo

    def energy(self):
        """Energy of the bodies left plus what events took away (Msun au^2/d^2)."""
        return self.inner.energy() + self.removed[0] / _G()

    def angular_momentum(self):
        return self.inner.angular_momentum() + self.removed[1:] / _G()

    def _diagnose_into(self, els):
        tmp = np.empty((len(self.alive) - 1, 6))
        e, lx, ly, lz = self.inner.diagnose_into(tmp)
        els[:] = np.nan
        els[self.alive[1:] - 1] = tmp
        return (e + self.removed[0], lx + self.removed[1], ly + self.removed[2],
                lz + self.removed[3])

    def _gr_coef(self):
        return self.inner._gr_coef()

    def _settle_pending(self, dt_forward):
        self.inner._settle_pending(dt_forward)

    def _internal_arrays(self):
        out = {"switch_mode": np.array([self.mode], dtype=np.int64),
               "switch_alive": self.alive.copy(), "switch_events": self.events.copy(),
               "switch_removed": self.removed.copy(),
               "switch_settings": np.array([self.corrector, int(self.gr), self.back_at,
                                            self.tolerance])}
        for k, val in self.inner.state_arrays().items():
            out["inner_" + k] = np.array(val)
        return out

    def _restore_internal(self, arrays):
        self.mode = int(np.asarray(arrays["switch_mode"])[0])
        self.alive = np.array(arrays["switch_alive"], dtype=np.int64)
        self.events = np.array(arrays["switch_events"], dtype=np.float64).reshape(-1, 5)
        self.removed = np.array(arrays["switch_removed"], dtype=np.float64)
        s = np.asarray(arrays["switch_settings"], dtype=np.float64)
        self.corrector, self.gr = int(s[0]), bool(s[1])
        self.back_at, self.tolerance = float(s[2]), float(s[3])
        inner = {k[len("inner_"):]: v for k, v in arrays.items() if k.startswith("inner_")}
        self.inner = Integrator.from_state_arrays(inner)
        self._at = self.step


def _G():
    from .constants import G

    return G


def _energy(x, v, gm, gr):
    """G x total energy of inertial states (GR term included as the map's)."""
    from .nbody import _energy_g, gr_coefficient

    return _energy_g(x, v, gm, gr_coefficient(gm[0]) if gr else 0.0)


def _angmom(x, v, gm):
    return (gm[:, None] * np.cross(x, v)).sum(0)


def _code(kind):
    from .stops import KIND_BY_CODE

    return KIND_BY_CODE.index(kind)
