"""The cost of carrying MEGNO: ns per step with and without the tangent vector.

The invented Veyra systems of jobs/ (four giants; eight planets), their own
steps and correctors; alternated rounds, best of each.

Run:  .venv/bin/python tests/benchmarks/bench_megno.py [--steps 200000] [--rounds 5]
Reports; asserts nothing.
"""

import argparse
import os
import time

from orbitledger.integrators import WisdomHolman
from orbitledger.runner.inputs import spec as S

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--steps", type=int, default=200_000)
    ap.add_argument("--rounds", type=int, default=5)
    args = ap.parse_args()
    print("| system | plain map (ns/step) | with MEGNO (ns/step) | ratio |")
    print("|---|---|---|---|")
    for name in ("veyra-giants.toml", "veyra-full.toml"):
        plan = S.resolve(S.load(os.path.join(ROOT, "jobs", name)))
        best = {None: float("inf"), "megno": float("inf")}
        for ind in best:
            WisdomHolman(plan.system, plan.dt, corrector=plan.corrector, indicator=ind).advance(100)
        for _ in range(args.rounds):
            for ind in best:
                w = WisdomHolman(plan.system, plan.dt, corrector=plan.corrector, indicator=ind)
                t = time.perf_counter()
                w.advance(args.steps)
                best[ind] = min(best[ind], (time.perf_counter() - t) / args.steps * 1e9)
        print(f"| {name} | {best[None]:.0f} | {best['megno']:.0f} | "
              f"{best['megno'] / best[None]:.2f} |")


if __name__ == "__main__":
    main()
