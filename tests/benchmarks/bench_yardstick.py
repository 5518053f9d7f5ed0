"""Our kernel against the workplace's C yardstick (../shared/bench), side by side.

The yardstick is an efficient plain-C Wisdom-Holman step (unmerged
drift-kick-drift); it is not part of this project and is not copied in. Both
are timed on its two systems (four giants at dt = 0.5 yr; eight planets at
dt = 4 d), alternated in one run, best of several repetitions each; the
figure is our ns/step divided by the yardstick's (below 1: we are faster).

Run:  .venv/bin/python tests/benchmarks/bench_yardstick.py [--steps N] [--reps R]
Needs ../shared/bench beside the repository. Reports; asserts nothing.
"""

import argparse
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
sys.path.insert(0, ROOT)
BENCH = os.path.join(os.path.dirname(ROOT), "shared", "bench")

from orbitledger.integrators import System, WisdomHolman  # noqa: E402
from orbitledger.integrators.system import inertial_from_jacobi  # noqa: E402


def our_system(mass, jac, G):
    """The yardstick's Jacobi state as our System (same bodies, same numbers)."""
    gm = G * mass
    n = len(mass)
    xj = np.zeros((n, 3))
    vj = np.zeros((n, 3))
    xj[1:] = jac[:, :3]
    vj[1:] = jac[:, 3:]
    x = inertial_from_jacobi(gm, xj)
    v = inertial_from_jacobi(gm, vj)
    names = ["star"] + [f"p{k}" for k in range(1, n)]
    return System(names, gm, x, v, 0.0, np.zeros(n))


def time_ours(system, dt, steps, corrector):
    wh = WisdomHolman(system, dt, corrector=corrector)
    wh.advance(100)
    t0 = time.perf_counter()
    wh.advance(steps)
    return (time.perf_counter() - t0) / steps * 1e9


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--steps", type=int, default=400_000)
    ap.add_argument("--reps", type=int, default=5)
    ap.add_argument("--corrector", type=int, default=0)
    args = ap.parse_args()
    if not os.path.isdir(BENCH):
        sys.exit(f"the yardstick is expected at {BENCH}")
    sys.path.insert(0, BENCH)
    import bench_ref

    print(f"{args.steps} steps, best of {args.reps}, alternated; corrector {args.corrector}")
    print("| system | ours (ns/step) | yardstick (ns/step) | ratio |")
    print("|---|---|---|---|")
    for name, elements, dt in bench_ref.SYSTEMS:
        mass, jac = bench_ref.setup(elements)
        system = our_system(mass, jac, bench_ref.G)
        ours, ref = [], []
        for _ in range(args.reps):
            ours.append(time_ours(system, dt, args.steps, args.corrector))
            ref.append(bench_ref.time_c(mass, jac, dt, args.steps, reps=1))
        o, r = min(ours), min(ref)
        print(f"| {name} | {o:.0f} | {r:.0f} | {o / r:.2f} |")


if __name__ == "__main__":
    main()
