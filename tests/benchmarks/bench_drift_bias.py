"""Round-off in the Kepler drift alone: how a two-body orbit's angular momentum drifts.

A single Jacobi orbit (mu = G(1 Msun + 1 Mjup-like)) is drifted 2 x 10^6
times by a fixed step; in exact arithmetic its angular momentum never
changes. Four clones that differ in the last bits of the mean anomaly; the
RMS of |L - L0|/|L0| over them is fitted by c t^alpha (alpha = 1/2 for
unbiased round-off, Brouwer 1937; alpha = 1 for a bias that repeats every
step). Invented orbits, with whole and non-integer numbers of steps per
period; the last two are the inner giants of jobs/veyra-giants.toml at a
0.5108 yr step.

Run:  .venv/bin/python tests/benchmarks/bench_drift_bias.py
"""

import os
import sys

import numpy as np
from numba import njit

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(os.path.dirname(HERE)))

from orbitledger.integrators.constants import G  # noqa: E402
from orbitledger.integrators.elements import to_state  # noqa: E402
from orbitledger.integrators.kepler import drift_row  # noqa: E402
from orbitledger.runner.analysis.budgets import fit_growth  # noqa: E402

DRIFTS = 2_000_000
SAMPLES = 100


@njit(cache=True)
def _drifts(x, v, mu, dt, n):
    for _ in range(n):
        drift_row(x, v, 0, mu, dt)


def measure(a, ecc, per_period, clones=4):
    mu = G * (1.0 + 1e-3)
    period = 2.0 * np.pi * np.sqrt(a ** 3 / mu)
    dt = period / per_period
    curves = []
    for k in range(clones):
        x, v = to_state(mu, a, ecc, 0.02, 0.3, 0.5, 0.1 + 1e-9 * k)
        x = np.array(x, dtype=float).reshape(1, 3)
        v = np.array(v, dtype=float).reshape(1, 3)
        l0 = np.cross(x[0], v[0])
        errs = []
        for _ in range(SAMPLES):
            _drifts(x, v, mu, dt, DRIFTS // SAMPLES)
            errs.append(np.linalg.norm(np.cross(x[0], v[0]) - l0) / np.linalg.norm(l0))
        curves.append(errs)
    t = dt * (DRIFTS // SAMPLES) * np.arange(1, SAMPLES + 1)
    rms = np.sqrt(np.mean(np.array(curves) ** 2, axis=0))
    fit = fit_growth(t, rms)
    return rms[-1], fit.alpha, fit.alpha_err


def main():
    print(f"| a (au) | e | steps per period | RMS dL/L after {DRIFTS:.0e} drifts | alpha |")
    print("|---|---|---|---|---|")
    for a, ecc, per in [(5.2, 0.05, 24), (5.2, 0.05, 24.37), (5.2, 0.05, 240.3),
                        (19.0, 0.3, 170), (1.0, 0.0167, 91.3), (4.8, 0.052, 20.8924),
                        (8.9, 0.061, 52.4527)]:
        last, alpha, err = measure(a, ecc, per)
        print(f"| {a} | {ecc} | {per} | {last:.2e} | {alpha:.2f} ± {err:.2f} |")


if __name__ == "__main__":
    main()
