"""Samples of a running integration: time, energy and angular-momentum errors, elements."""

import numpy as np

from orbitledger.integrators.base import AdvanceResult
from orbitledger.integrators.constants import G, YEAR_D


class SampleBuffer:
    """Samples gathered during one chunk, in preallocated arrays, written at commit.

    Parameters
    ----------
    n_bodies : int
        Bodies including the star.
    energy0, angmom0 : float, array (3,)
        The job's initial energy (Msun au^2/d^2) and angular momentum.
    capacity : int
        Rows to preallocate (grows if needed).
    indicator : bool
        The integrator carries a chaos indicator: rows also get MEGNO <Y>
        ("megno") and the finite-time Lyapunov exponent ("lyapunov", 1/d).
    particles : int
        Test particles carried: rows also get their heliocentric elements
        ("particle_elements", NaN once removed) and how many are still
        integrated ("particles_left"). They are computed between kernel
        calls that end on the sample steps (how a run is split never
        changes it).
    """

    def __init__(self, n_bodies, energy0, angmom0, capacity=16, indicator=False, particles=0):
        self.nb = n_bodies - 1
        self.indicator = bool(indicator)
        self.np = int(particles)
        self.e0g = energy0 * G
        self.l0g = np.asarray(angmom0, dtype=np.float64) * G
        self.l0n = float(np.linalg.norm(self.l0g))
        self.n = 0
        self._alloc(max(1, int(capacity)))

    def _alloc(self, cap):
        old = getattr(self, "arrays", None)
        self.arrays = {"time": np.empty(cap), "step": np.empty(cap, dtype=np.int64),
                       "energy_error": np.empty(cap), "angmom_error": np.empty(cap),
                       "elements": np.empty((cap, self.nb, 6))}
        if self.indicator:
            self.arrays["megno"] = np.empty(cap)
            self.arrays["lyapunov"] = np.empty(cap)
        if self.np:
            self.arrays["particle_elements"] = np.empty((cap, self.np, 6))
            self.arrays["particles_left"] = np.empty(cap, dtype=np.int64)
        if old is not None:
            for k in old:
                self.arrays[k][: self.n] = old[k][: self.n]

    def __len__(self):
        return self.n

    def clear(self):
        """Forget the rows (keep the memory)."""
        self.n = 0

    def add(self, integ):
        """Append one sample of the integrator's synchronized state."""
        k = self.n
        if k == len(self.arrays["time"]):
            self._alloc(2 * k)
        a = self.arrays
        e, lx, ly, lz = integ.diagnose_into(a["elements"][k])
        a["time"][k] = integ.t0 + integ.step * integ.dt
        a["step"][k] = integ.step
        a["energy_error"][k] = (e - self.e0g) / abs(self.e0g)
        l0 = self.l0g
        a["angmom_error"][k] = ((lx - l0[0]) ** 2 + (ly - l0[1]) ** 2
                                + (lz - l0[2]) ** 2) ** 0.5 / self.l0n
        if self.indicator:
            a["megno"][k] = integ.megno()
            a["lyapunov"][k] = integ.lyapunov()
        if self.np:
            self._add_particles(integ, k)
        self.n = k + 1

    def _add_particles(self, integ, k):
        integ.particle_elements_into(self.arrays["particle_elements"][k])
        self.arrays["particles_left"][k] = integ.particles_left()

    def advance(self, integ, n_steps, every):
        """Advance integ by up to n_steps, sampling at multiples of every inside the kernel."""
        start = self._reserve(n_steps, every)
        if self.np:
            res, rows = self._advance_particles(integ, n_steps, every)
        else:
            res, rows = integ.advance_sampled(n_steps, every, self._g, self.arrays["elements"],
                                              start, self._ind)
        self._absorb(integ, start, rows)
        return res

    def _reserve(self, n_steps, every):
        """Room for the samples of n_steps more steps; returns the first free row."""
        need = self.n + n_steps // every + 1
        if need > len(self.arrays["time"]):
            self._alloc(max(need, 2 * len(self.arrays["time"])))
        if not hasattr(self, "_g") or len(self._g) < len(self.arrays["time"]):
            self._g = np.empty((len(self.arrays["time"]), 5))
            self._ind = np.empty((len(self.arrays["time"]), 2)) if self.indicator else None
        return self.n

    def _absorb(self, integ, start, rows):
        """Turn the kernel's rows start..rows (step, G*energy, G*L) into samples."""
        if rows > start:
            g = self._g[start:rows]
            a = self.arrays
            a["step"][start:rows] = g[:, 0].astype(np.int64)
            a["time"][start:rows] = integ.t0 + a["step"][start:rows] * integ.dt
            a["energy_error"][start:rows] = (g[:, 1] - self.e0g) / abs(self.e0g)
            d = g[:, 2:5] - self.l0g
            a["angmom_error"][start:rows] = np.sqrt((d * d).sum(axis=1)) / self.l0n
            if self.indicator:
                a["megno"][start:rows] = self._ind[start:rows, 0]
                a["lyapunov"][start:rows] = self._ind[start:rows, 1] / abs(integ.dt)
            self.n = rows

    def _advance_particles(self, integ, n_steps, every):
        """advance_sampled in calls that end on sample steps, the particles' elements
        taken after each (one row at most per call)."""
        rows = self.n
        left = n_steps
        done = 0
        while True:
            until = every - (integ.step + integ.sample_offset) % every
            res, new = integ.advance_sampled(min(left, until), every, self._g,
                                             self.arrays["elements"], rows, self._ind)
            if new > rows:
                self._add_particles(integ, rows)
                rows = new
            done += res.steps
            left -= res.steps
            if res.stopped or left <= 0:
                break
        if done != res.steps:
            res = AdvanceResult(done, res.kind, res.bodies, integ.step)
        return res, rows

    def block(self):
        """The rows so far as a dict of arrays (views; time in years computed here)."""
        out = {k: v[: self.n] for k, v in self.arrays.items()}
        out["time_yr"] = out["time"] / YEAR_D
        return out


def advance_members(buffers, integs, n_steps, every, lanes):
    """:meth:`SampleBuffer.advance` of several ensemble members at once, by the batched
    kernel (:func:`integrators.batch.advance_together`): each member's samples and
    state are the bytes its own ``advance`` would give. Returns the AdvanceResults."""
    from orbitledger.integrators.batch import advance_together

    starts = [buf._reserve(n_steps, every) for buf in buffers]
    outputs = [(buf._g, buf.arrays["elements"], s, buf._ind) for buf, s in zip(buffers, starts)]
    got = advance_together(integs, n_steps, every, outputs, lanes=lanes)
    for buf, integ, s, (_, rows) in zip(buffers, integs, starts, got):
        buf._absorb(integ, s, rows)
    return [res for res, _ in got]


def sample_now(integ, energy0, angmom0):
    """One sample of the integrator's synchronized state, as a block of one row."""
    buf = SampleBuffer(len(integ.gm), energy0, angmom0, capacity=1,
                       indicator=integ.indicator is not None,
                       particles=getattr(integ, "particle_count", 0))
    buf.add(integ)
    return {k: v.copy() for k, v in buf.block().items()}
