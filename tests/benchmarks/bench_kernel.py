"""Kernel benchmark: ns per step of the numba Wisdom-Holman kernel, side by side
with a plain C reference (tests/benchmarks/wh_ref.c, gcc -O2 -ffp-contract=off)
and with scipy's DOP853 at matched energy error. Also the warm-start time.

Run:  .venv/bin/python tests/benchmarks/bench_kernel.py [--steps N]
Figures go into docs/benchmarks.md. This reports; it asserts nothing.
"""

import argparse
import os
import platform
import subprocess
import sys
import tempfile
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
sys.path.insert(0, ROOT)

from orbitledger.integrators import WisdomHolman  # noqa: E402
from orbitledger.integrators.nbody import accelerations, energy  # noqa: E402
from orbitledger.runner.inputs import spec as spec_mod  # noqa: E402


def bench_system(spec_file):
    """The invented system of a jobs/ spec, around a star of exactly 1 Msun."""
    spec = spec_mod.load(os.path.join(ROOT, "jobs", spec_file))
    star = spec.system.star.model_copy(update={"mass": "1 Msun"})
    spec = spec.model_copy(update={"system": spec.system.model_copy(update={"star": star})})
    return spec_mod.build_system(spec.system)


def build_c():
    exe = os.path.join(tempfile.gettempdir(), "orbitledger_wh_ref")
    subprocess.run(["gcc", "-O2", "-ffp-contract=off", "-o", exe, os.path.join(HERE, "wh_ref.c"),
                    "-lm"], check=True)
    return exe


def run_c(exe, system, dt, steps, mode):
    wh = WisdomHolman(system, dt)
    lines = [str(system.n), " ".join(repr(float(g)) for g in system.gm)]
    lines += [" ".join(repr(float(q)) for q in row) for row in wh.xj]
    lines += [" ".join(repr(float(q)) for q in row) for row in wh.vj]
    lines.append(f"{dt!r} {steps} {mode}")
    out = subprocess.run([exe], input="\n".join(lines), capture_output=True, text=True, check=True)
    rows = out.stdout.split("\n")
    state = np.array([[float(t) for t in r.split()] for r in rows[1:] if r.strip()])
    return float(rows[0]), state


def numba_ns(system, dt, steps, repeats=3):
    best = np.inf
    for _ in range(repeats):
        wh = WisdomHolman(system, dt)
        wh.advance(10)
        wh = WisdomHolman(system, dt)
        t = time.perf_counter()
        wh.advance(steps)
        best = min(best, (time.perf_counter() - t) / steps * 1e9)
    return best, wh


def wh_energy_error(system, dt, span):
    wh = WisdomHolman(system, dt)
    e0 = wh.energy()
    n = int(span / dt)
    per = max(1, n // 200)
    worst = 0.0
    for _ in range(n // per):
        wh.advance(per)
        worst = max(worst, abs(wh.energy() / e0 - 1))
    return worst


def dop853_at_matched_error(system, dt, span, target):
    """Wall time per WH-step-equivalent of DOP853 at the loosest rtol meeting target."""
    from scipy.integrate import solve_ivp

    n = system.n
    gm = system.gm
    acc = np.zeros((n, 3))

    def rhs(_, y):
        accelerations(y[: 3 * n].reshape(n, 3), gm, 0.0, acc)
        return np.concatenate([y[3 * n:], acc.ravel()])

    y0 = np.concatenate([system.x.ravel(), system.v.ravel()])
    e0 = energy(system.x, system.v, gm)
    for rtol in (1e-6, 1e-7, 1e-8, 1e-9, 1e-10, 1e-11, 1e-12, 1e-13):
        t = time.perf_counter()
        sol = solve_ivp(rhs, (0, span), y0, method="DOP853", rtol=rtol, atol=rtol * 1e-3,
                        dense_output=False, t_eval=np.linspace(0, span, 201))
        wall = time.perf_counter() - t
        errs = [abs(energy(sol.y[: 3 * n, k].reshape(n, 3), sol.y[3 * n:, k].reshape(n, 3), gm)
                    / e0 - 1) for k in range(sol.y.shape[1])]
        if max(errs) <= target:
            return rtol, max(errs), wall / (span / dt) * 1e9, sol.nfev
    return None, None, None, None


def warm_start_seconds():
    code = ("import time; t=time.perf_counter(); import sys; sys.path.insert(0, %r);"
            "from orbitledger.integrators import WisdomHolman, System;"
            "s = System.from_elements(['S','p'], [1.0, 1e-3], [[1.0, 0.1, 0, 0, 0, 0]]);"
            "w = WisdomHolman(s, 1.0, corrector=5); w.advance(1); w.energy();"
            "print(time.perf_counter()-t)") % ROOT
    subprocess.run([sys.executable, "-c", code], check=True, capture_output=True)  # fill cache
    t = time.perf_counter()
    inner = float(subprocess.run([sys.executable, "-c", code], check=True, capture_output=True,
                                 text=True).stdout)
    return time.perf_counter() - t, inner


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--steps", type=int, default=400_000)
    args = ap.parse_args()
    exe = build_c()
    print(f"# {time.strftime('%Y-%m-%d')} {platform.node()} {platform.processor() or platform.machine()}"
          f" python {platform.python_version()}")
    cases = [("four giants", "veyra-giants.toml", 0.5 * 365.25, 2000 * 365.25),
             ("eight planets", "veyra-full.toml", 4.0, 50 * 365.25)]
    print("| system | dt | numba merged | C unmerged | C merged | numba / C unmerged "
          "| numba / C merged | DOP853 at matched error |")
    print("|---|---|---|---|---|---|---|---|")
    for label, spec_file, dt, span in cases:
        system = bench_system(spec_file)
        nb, wh = numba_ns(system, dt, args.steps)
        c0, _ = min((run_c(exe, system, dt, args.steps, 0) for _ in range(3)), key=lambda r: r[0])
        c1, c_state = min((run_c(exe, system, dt, args.steps, 1) for _ in range(3)),
                          key=lambda r: r[0])
        # The C merged run and the numba kernel follow the same trajectory.
        sync = WisdomHolman(system, dt)
        sync.advance(args.steps)
        from orbitledger.integrators.wisdom_holman import drift_all

        xj, vj = sync.xj.copy(), sync.vj.copy()
        drift_all(xj, vj, sync.mu, 0.5 * dt)
        diff = np.abs(np.hstack([xj, vj]) - c_state).max()
        target = wh_energy_error(system, dt, span)
        rtol, err, dop_ns, nfev = dop853_at_matched_error(system, dt, span, target)
        dop = "none up to rtol 1e-13" if rtol is None else \
            f"{dop_ns:.0f} ns/step-equivalent (rtol {rtol:.0e}, dE/E {err:.1e} vs WH {target:.1e})"
        print(f"| {label} | {dt:g} d | {nb:.0f} ns | {c0:.0f} ns | {c1:.0f} ns | {nb / c0:.2f} "
              f"| {nb / c1:.2f} | {dop} |   (numba vs C merged max state diff {diff:.1e})")
    outer, inner = warm_start_seconds()
    print(f"\nwarm start (new process, cached compile, import + build + first step + energy): "
          f"{outer:.2f} s wall, {inner:.2f} s inside the interpreter")


if __name__ == "__main__":
    main()
