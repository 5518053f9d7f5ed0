"""The small interface all methods share, scipy-solver-like.

A method subclass owns its internal arrays and implements ``_advance_impl``;
the base class owns the step counter, time bookkeeping, results and state
capture.
"""

from dataclasses import dataclass

import numpy as np

from .errors import IntegratorError
from .nbody import angular_momentum, energy
from .stops import KIND_BY_CODE, StopConditions, StopKind

# Format tag of state_arrays(). Bump it when the layout changes or when the
# kernels' arithmetic changes (a state can only be continued bit for bit by
# the arithmetic that wrote it). 2: g' - 1 of the drift from f g' - f' g = 1.
# 3: that identity only where |f| >= 1/2 (the direct form elsewhere); Kepler
# solver kept inside the root's bracket and stopped at its rounding noise.
# 4: Stumpff series by Estrin's scheme, one division per Halley step, 1/r0
# and one shared quotient for 1/r and 1/f in the drift.
STATE_FORMAT = 4


@dataclass(frozen=True)
class AdvanceResult:
    """What one :meth:`Integrator.advance` call did.

    Attributes
    ----------
    steps : int
        Steps taken in this call.
    kind : StopKind
        ``DONE`` if all requested steps ran, else the stop condition met.
    bodies : tuple of int
        Indices of the bodies involved in a stop (empty when done).
    step : int
        The integrator's step counter after the call.
    """

    steps: int
    kind: StopKind
    bodies: tuple
    step: int

    @property
    def stopped(self):
        """True if a stop condition ended the call early."""
        return self.kind is not StopKind.DONE


class Integrator:
    """Base class: build from a System and a step, then ``advance(n_steps)``.

    Subclasses set ``method`` and implement ``_advance_impl(n) -> (steps, code,
    a, b)``, ``_synchronized_state() -> (x, v)`` (inertial) and their own
    ``_to_internal`` set-up. Time is ``t0 + step * dt`` (no accumulated sum).
    """

    method = "base"
    # A chaos indicator carried with the map ("megno"), or None; methods that
    # carry one override this.
    indicator = None
    # Every method class joins this registry by subclassing (see
    # __init_subclass__), so the base never imports the classes built on it.
    registry = {}

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        Integrator.registry[cls.method] = cls

    def __init__(self, system, dt, stops=None):
        dt = float(dt)
        if not (np.isfinite(dt) and dt != 0.0):
            raise ValueError(f"step dt must be finite and non-zero, got {dt}.")
        self.names = list(system.names)
        self.gm = system.gm.copy()
        self.radii = system.radii.copy()
        self.dt = dt
        self.t0 = float(system.time)
        self.step = 0
        # Samples are taken where (step + sample_offset) is a multiple of the
        # cadence; a reversed integrator keeps its parent's grid this way.
        self.sample_offset = 0
        self.stops = stops or StopConditions()
        self._stop_pairs, self._stop_params = self.stops.kernel_args(self.gm)

    # -- the interface -------------------------------------------------------
    @property
    def time(self):
        """Physical time of the synchronized state, days."""
        return self.t0 + self.step * self.dt

    def advance(self, n_steps):
        """Take up to n_steps steps; stop early if a stop condition is met."""
        n_steps = self._check_steps(n_steps)
        if n_steps == 0:
            return AdvanceResult(0, StopKind.DONE, (), self.step)
        steps, code, a, b, _ = self._advance_impl(n_steps)
        return self._result(steps, code, a, b)

    def advance_sampled(self, n_steps, every, out_g, out_el, row0, out_ind=None):
        """Advance like :meth:`advance`, diagnosing a synchronized copy at every
        step whose number plus ``sample_offset`` is a multiple of `every`
        (0 for a run from its start), inside the compiled loop.

        Row r of out_g receives (step, G*energy, G*Lx, G*Ly, G*Lz) and row r
        of out_el the heliocentric elements (degrees), for r from row0.
        The arrays must have room for n_steps // every + 1 more rows.
        With a chaos indicator carried (``indicator`` not None), row r of
        out_ind (rows, 2) receives <Y> and the mean log-growth per step.
        Returns (AdvanceResult, next free row). Samples never touch the live
        state, so the trajectory is the same with or without them.
        """
        n_steps = self._check_steps(n_steps)
        if n_steps == 0:
            return AdvanceResult(0, StopKind.DONE, (), self.step), row0
        if every < 1 or len(out_g) < row0 + n_steps // every + 1:
            raise ValueError("sample arrays too small for the requested steps and cadence.")
        if out_ind is None:
            steps, code, a, b, rows = self._advance_impl(n_steps, every, out_g, out_el, row0)
        else:
            steps, code, a, b, rows = self._advance_impl(n_steps, every, out_g, out_el, row0,
                                                         out_ind)
        if self.sample_offset:
            out_g[row0:rows, 0] -= self.sample_offset  # the kernels count from the offset
        return self._result(steps, code, a, b), int(rows)

    def _advance_outputs(self, n, every, out_g, out_el, row0, frames):
        """Sampled advance for methods that sample between calls rather than inside
        their loop: ``frames(k, at)`` advances k steps from step number ``at`` and
        returns (steps, code, a, b); the synchronized state is diagnosed at every
        step whose number plus ``sample_offset`` is a multiple of `every`. Returns
        what ``_advance_impl`` does."""
        done, rows = 0, row0
        while done < n:
            to_next = every - (self.step + self.sample_offset + done) % every
            steps, code, a, b = frames(min(to_next, n - done), self.step + done)
            done += steps
            if code:
                return done, code, a, b, rows
            if (self.step + self.sample_offset + done) % every == 0:
                saved = self.step
                self.step += done
                e, lx, ly, lz = self.diagnose_into(out_el[rows])
                self.step = saved
                out_g[rows] = (saved + self.sample_offset + done, e, lx, ly, lz)
                rows += 1
        return done, 0, -1, -1, rows

    @staticmethod
    def _check_steps(n_steps):
        n_steps = int(n_steps)
        if n_steps < 0:
            raise ValueError(f"n_steps must be >= 0, got {n_steps}.")
        return n_steps

    def _result(self, steps, code, a, b):
        self.step += int(steps)
        bodies = tuple(int(k) for k in (a, b) if k >= 0)
        return AdvanceResult(int(steps), KIND_BY_CODE[code], bodies, self.step)

    def synchronized(self):
        """The physical state now, as a new barycentric :class:`System` (a copy)."""
        from .system import System

        x, v = self._synchronized_state()
        return System(list(self.names), self.gm.copy(), x, v, self.time, self.radii.copy())

    def energy(self):
        """Total energy of the synchronized state, Msun au^2 / d^2."""
        x, v = self._synchronized_state()
        return energy(x, v, self.gm, self._gr_coef())

    def angular_momentum(self):
        """Total angular momentum vector of the synchronized state, Msun au^2 / d."""
        x, v = self._synchronized_state()
        return angular_momentum(x, v, self.gm)

    def elements(self, frame="heliocentric", degrees=True):
        """Orbital elements of the synchronized state; see System.elements."""
        return self.synchronized().elements(frame=frame, degrees=degrees)

    def diagnostics(self):
        """(energy, angular-momentum vector, heliocentric elements) of the synchronized state.

        Energy in Msun au^2/d^2, angular momentum in Msun au^2/d, elements an
        array (n-1, 6): a (au), e, i, node, peri, M (degrees).
        """
        from .constants import G

        els = np.empty((len(self.gm) - 1, 6))
        e, lx, ly, lz = self.diagnose_into(els)
        return e / G, np.array([lx, ly, lz]) / G, els

    def diagnose_into(self, els):
        """G*energy and G*L components of the synchronized state; elements into els.

        One compiled pass with no allocation: cheap enough for every output.
        """
        return self._diagnose_into(els)

    def _diagnose_into(self, els):
        from .diagnostics import diagnose

        x, v = self._synchronized_state()
        return diagnose(x, v, self.gm, self._gr_coef(), els)

    def _gr_coef(self):
        return 0.0

    def reversed(self):
        """A new integrator continuing from this internal state in the other direction.

        The pending half-drift (if any) is applied first, so the new one
        starts synchronized at this time with step -dt and its step counter
        at 0. Coordinates stay the internal ones (corrector applied), so a
        forward run followed by its reverse retraces the same map. Its
        samples fall on the same times as this integrator's, at any cadence
        (its step k is this one's step - k).
        """
        arrays = {k: np.array(v) for k, v in self.state_arrays().items()}
        arrays["t0"] = np.array([self.time])
        arrays["dt"] = np.array([-self.dt])
        arrays["step"] = np.array([0], dtype=np.int64)
        arrays["sample_offset"] = np.array([-(self.step + self.sample_offset)], dtype=np.int64)
        self._on_reverse(arrays)
        back = Integrator.from_state_arrays(arrays)
        back._settle_pending(self.dt)  # each method applies its own half-drift
        return back

    @staticmethod
    def _on_reverse(arrays):
        """Adjust a method's own state arrays for :meth:`reversed` (none by default)."""

    # -- exact state capture -------------------------------------------------
    def state_arrays(self):
        """Everything needed to continue bit for bit, as plain numpy arrays.

        Returns a dict of str -> ndarray (no pickle): the method, the internal
        coordinates, the pending-drift flag, the step counter and settings.
        """
        out = {
            "format": np.array([STATE_FORMAT], dtype=np.int64),
            "method": np.frombuffer(self.method.encode("ascii"), dtype=np.uint8).copy(),
            "names": np.array(self.names, dtype=np.str_),
            "gm": self.gm.copy(),
            "radii": self.radii.copy(),
            "dt": np.array([self.dt]),
            "t0": np.array([self.t0]),
            "step": np.array([self.step], dtype=np.int64),
            "stops": np.array([self.stops.hill, self.stops.eject_distance,
                               float(self.stops.unbound), self.stops.unbound_distance,
                               self.stops.star_radius, self.stops.max_ecc]),
        }
        if self.sample_offset:
            # Only when set, so states of runs from their start keep their bytes.
            out["sample_offset"] = np.array([self.sample_offset], dtype=np.int64)
        out.update(self._internal_arrays())
        return out

    @staticmethod
    def from_state_arrays(arrays):
        """Rebuild an integrator of the right method from :meth:`state_arrays` output."""
        fmt = int(np.asarray(arrays["format"])[0])
        if fmt != STATE_FORMAT:
            raise IntegratorError(
                f"state format {fmt} is not supported (expected {STATE_FORMAT}): it was written "
                "by a version whose layout or arithmetic differs, so this version cannot continue "
                "it bit for bit; finish it with the version recorded in its provenance, or start "
                "the job again.")
        method = bytes(np.asarray(arrays["method"], dtype=np.uint8)).decode("ascii")
        classes = Integrator.registry
        if method not in classes:
            raise IntegratorError(f"unknown method {method!r} in state arrays.")
        cls = classes[method]
        obj = cls.__new__(cls)
        obj.names = [str(s) for s in np.asarray(arrays["names"])]
        obj.gm = np.array(arrays["gm"], dtype=np.float64)
        obj.radii = np.array(arrays["radii"], dtype=np.float64)
        obj.dt = float(np.asarray(arrays["dt"])[0])
        obj.t0 = float(np.asarray(arrays["t0"])[0])
        obj.step = int(np.asarray(arrays["step"])[0])
        obj.sample_offset = (int(np.asarray(arrays["sample_offset"])[0])
                             if "sample_offset" in arrays else 0)
        s = np.asarray(arrays["stops"], dtype=np.float64)
        obj.stops = StopConditions(float(s[0]), float(s[1]), bool(s[2]), float(s[3]),
                                   float(s[4]), float(s[5]))
        obj._stop_pairs, obj._stop_params = obj.stops.kernel_args(obj.gm)
        obj._restore_internal(arrays)
        return obj
