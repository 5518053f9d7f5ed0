"""Test particles cost linearly: ns per step of the map with 0, 10, 100, 1000 particles.

The invented star Cadmus with two giants (1e-3 and 3e-4 Msun at 1 and 1.9 au)
and particles on circular orbits spread between 2.5 and 6 au (all survive).
Alternated rounds, best of each; the cost per particle-step is the slope.

Run:  .venv/bin/python tests/benchmarks/bench_particles.py [--steps 20000] [--rounds 5]
Reports; asserts nothing.
"""

import argparse
import math
import time

import numpy as np

from orbitledger.integrators import G, StopConditions, System, WisdomHolman


def make(k):
    s = System.from_elements(["Cadmus", "Cadmus b", "Cadmus c"], [1.0, 1e-3, 3e-4],
                             [(1.0, 0.02, 0.0, 0, 0, 0), (1.9, 0.03, 1.0, 40, 80, 200)])
    if k == 0:
        return WisdomHolman(s, 365.25 / 40, stops=StopConditions(hill=1.0))
    rng = np.random.default_rng(3)
    a = rng.uniform(2.5, 6.0, k)
    ph = rng.uniform(0, 2 * math.pi, k)
    x = np.stack([a * np.cos(ph), a * np.sin(ph), np.zeros(k)], axis=1)
    v = np.sqrt(G / a)[:, None] * np.stack([-np.sin(ph), np.cos(ph), np.zeros(k)], axis=1)
    return WisdomHolman(s, 365.25 / 40, particles=(x, v), stops=StopConditions(hill=1.0))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--steps", type=int, default=20000)
    ap.add_argument("--rounds", type=int, default=5)
    args = ap.parse_args()
    counts = (0, 10, 100, 1000)
    best = {k: math.inf for k in counts}
    for k in counts:
        make(k).advance(100)  # compile
    for _ in range(args.rounds):
        for k in counts:
            w = make(k)
            t = time.perf_counter()
            w.advance(args.steps)
            best[k] = min(best[k], (time.perf_counter() - t) / args.steps * 1e9)
    print("| particles | ns per step | ns per particle-step (over none) |")
    print("|---|---|---|")
    for k in counts:
        extra = "" if k == 0 else f"{(best[k] - best[0]) / k:.1f}"
        print(f"| {k} | {best[k]:.0f} | {extra} |")


if __name__ == "__main__":
    main()
