"""Samples of a running integration: time, energy and angular-momentum errors, elements."""

import numpy as np

from integrators.nbody import angular_momentum, energy


def sample_now(integ, energy0, angmom0):
    """One sample of the integrator's synchronized state, as a block of one row."""
    s = integ.synchronized()
    e = energy(s.x, s.v, s.gm, integ._gr_coef())
    lv = angular_momentum(s.x, s.v, s.gm)
    l0 = np.asarray(angmom0, dtype=np.float64)
    return {
        "time": np.array([integ.time]),
        "step": np.array([integ.step], dtype=np.int64),
        "energy_error": np.array([(e - energy0) / abs(energy0)]),
        "angmom_error": np.array([np.linalg.norm(lv - l0) / np.linalg.norm(l0)]),
        "elements": s.elements()[None, :, :],
    }


class SampleBuffer:
    """Samples gathered during one chunk, written to the store at commit."""

    def __init__(self):
        self.rows = []

    def add(self, block):
        self.rows.append(block)

    def __len__(self):
        return len(self.rows)

    def block(self, n_bodies):
        """All rows as one block (dict of arrays), empty arrays if none."""
        if not self.rows:
            return {"time": np.zeros(0), "step": np.zeros(0, dtype=np.int64),
                    "energy_error": np.zeros(0), "angmom_error": np.zeros(0),
                    "elements": np.zeros((0, n_bodies - 1, 6))}
        return {k: np.concatenate([r[k] for r in self.rows]) for k in self.rows[0]}
