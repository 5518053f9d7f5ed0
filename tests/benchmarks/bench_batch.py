"""The batched member kernel against the scalar kernel, side by side.

An ensemble of clones (one part in 1e12 apart) of a shipped example's system
is advanced by the batched kernel (integrators/batch/) with several batch
sizes, and member by member by the scalar kernel, alternated in one run, best
of several repetitions each. Reported: ns per member-step and the speed-up
(scalar ns / batched ns). Every batched member is checked to end on the
scalar run's bytes. Also reports the vector width of the compiled lane loops
(from the generated assembly).

Run:  .venv/bin/python tests/benchmarks/bench_batch.py [--members 32] [--steps N] [--reps R]
      [--lanes 8,16,32] [--indicator megno]
Reports; asserts nothing but the bytes.
"""

import argparse
import os
import re
import sys
import time
from collections import Counter

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))

from orbitledger.integrators import Integrator, WisdomHolman  # noqa: E402
from orbitledger.integrators import batch  # noqa: E402
from orbitledger.runner.inputs import spec as spec_mod  # noqa: E402

SYSTEMS = (("four giants, 30 d", "veyra-giants.toml", 30.0),
           ("eight planets, 4 d", "veyra-full.toml", 4.0))


def clones(spec_file, dt, members, indicator=None):
    spec = spec_mod.load(os.path.join(ROOT, "jobs", spec_file))
    plan = spec_mod.resolve(spec)
    out = []
    for k in range(members):
        integ = WisdomHolman(plan.system, dt, corrector=plan.corrector, gr=plan.relativity,
                             stops=plan.stops, indicator=indicator, tangent_seed=k)
        integ.xj[1, 0] *= 1.0 + 1e-12 * k
        out.append(integ)
    return out


def copy(integ):
    return Integrator.from_state_arrays({k: np.array(v) for k, v in integ.state_arrays().items()})


def vector_width():
    """Counts of packed double instructions by register width in the lane kernel."""
    f = batch.wh_steps_lanes
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        asm = f.inspect_asm(f.signatures[0])
    count = Counter()
    for line in asm.splitlines():
        m = re.match(r"\s+v\w+pd\s+(.*)", line)
        if m:
            args = m.group(1)
            count["zmm (8 doubles)" if "zmm" in args else "ymm (4)" if "ymm" in args
                  else "xmm (2)"] += 1
    # numba cannot show the assembly of a kernel it loaded from its cache.
    return dict(count) or "unknown (loaded from numba's cache: run with NUMBA_CACHE_DIR=<empty folder>)"


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--members", type=int, default=32)
    ap.add_argument("--steps", type=int, default=20000)
    ap.add_argument("--reps", type=int, default=3)
    ap.add_argument("--lanes", default="8,16,32")
    ap.add_argument("--indicator", default=None, choices=[None, "megno"],
                    help="members carry MEGNO (tangent vectors), both paths")
    args = ap.parse_args()
    lanes = [int(x) for x in args.lanes.split(",")]
    for label, spec_file, dt in SYSTEMS:
        base = clones(spec_file, dt, args.members, args.indicator)
        batch.advance_together([copy(m) for m in base[:2]], 20, lanes=2)  # compile
        copy(base[0]).advance(20)
        best = {"scalar": np.inf, **{b: np.inf for b in lanes}}
        for _ in range(args.reps):
            alone = [copy(m) for m in base]
            t = time.perf_counter()
            for m in alone:
                m.advance(args.steps)
            best["scalar"] = min(best["scalar"], time.perf_counter() - t)
            for b in lanes:
                group = [copy(m) for m in base]
                t = time.perf_counter()
                batch.advance_together(group, args.steps, lanes=b)
                best[b] = min(best[b], time.perf_counter() - t)
                for g, a in zip(group, alone):
                    sg, sa = g.state_arrays(), a.state_arrays()
                    assert all(np.asarray(sg[k]).tobytes() == np.asarray(sa[k]).tobytes()
                               for k in sa)
        per = args.members * args.steps
        scalar_ns = best["scalar"] / per * 1e9
        what = " with MEGNO" if args.indicator else ""
        print(f"{label}{what}: {args.members} members x {args.steps} steps, best of {args.reps}, "
              "alternated; every member's bytes equal to its scalar run")
        print("| path | ns per member-step | speed-up |")
        print("|---|---|---|")
        print(f"| scalar, one member at a time | {scalar_ns:.0f} | 1.00 |")
        for b in lanes:
            ns = best[b] / per * 1e9
            print(f"| batched, {b} lanes | {ns:.0f} | {scalar_ns / ns:.2f} |")
    print("packed double instructions in the lane kernel:", vector_width())


if __name__ == "__main__":
    sys.exit(main())
