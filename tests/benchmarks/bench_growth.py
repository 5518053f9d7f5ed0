"""Growth law of the energy error in a long run with a corrector.

An invented three-planet system (Orrin, tests/helpers.py) with the order-17
corrector and a small step, so that truncation error is far below round-off:
what is left is how round-off accumulates. Brouwer (1937) predicts alpha = 1/2
for unbiased round-off. Reports the fitted alpha for energy and angular momentum.

With --job, the same for a spec from jobs/ (its own step and corrector), e.g.
the four-giant job, whose angular-momentum error grows linearly (see
bench_drift_bias.py for why).

Run:  .venv/bin/python tests/benchmarks/bench_growth.py [--steps N] [--job jobs/x.toml]
"""

import argparse
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(os.path.dirname(HERE)))
sys.path.insert(0, os.path.dirname(HERE))

from helpers import small_spec  # noqa: E402
from orbitledger.runner.inputs import spec as S  # noqa: E402
from orbitledger.runner.analysis.budgets import fit_growth  # noqa: E402
from orbitledger.runner.store.sampling import SampleBuffer  # noqa: E402


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--steps", type=int, default=20_000_000)
    ap.add_argument("--runs", type=int, default=4)
    ap.add_argument("--job", help="a spec file to use instead of Orrin")
    args = ap.parse_args()
    every = args.steps // 2000
    rows, series = [], []
    for k in range(args.runs):
        # Clones differing in the last bits of one mean anomaly give independent round-off.
        if args.job:
            spec = S.load(args.job)
        else:
            spec = small_spec(step="2 d", corrector=17, length="1 yr", output="1 steps",
                              chunk="1 steps")
        m0 = float(str(spec.system.bodies[0].mean_anomaly).split()[0])
        spec = spec.model_copy(update={"system": spec.system.model_copy(update={"bodies": [
            b.model_copy(update={"mean_anomaly": f"{m0 + 1e-9 * k!r} deg"}) if i == 0 else b
            for i, b in enumerate(spec.system.bodies)]})})
        integ = S.resolve(spec).make_integrator()
        e0, l0, _ = integ.diagnostics()
        buf = SampleBuffer(len(integ.gm), e0, l0, capacity=args.steps // every + 2)
        t = time.perf_counter()
        while integ.step < args.steps:
            buf.advance(integ, min(1_000_000, args.steps - integ.step), every)
        wall = time.perf_counter() - t
        b = buf.block()
        fe = fit_growth(b["time"], b["energy_error"])
        fl = fit_growth(b["time"], b["angmom_error"])
        rows.append((fe.alpha, fl.alpha))
        series.append((b["time"].copy(), b["energy_error"].copy(), b["angmom_error"].copy()))
        print(f"run {k}: {args.steps} steps in {wall:.1f} s; energy alpha {fe.alpha:.2f} "
              f"+/- {fe.alpha_err:.2f}, max |dE/E| {np.abs(b['energy_error']).max():.2e}; "
              f"angular momentum alpha {fl.alpha:.2f} +/- {fl.alpha_err:.2f}, "
              f"max {b['angmom_error'].max():.2e}")
    a = np.array(rows)
    print(f"mean of the {len(rows)} fitted alphas: energy {a[:, 0].mean():.2f}, "
          f"angular momentum {a[:, 1].mean():.2f}")
    # Brouwer's law is a statement about the ensemble: fit the RMS over clones.
    n = min(len(s_[0]) for s_ in series)
    t = series[0][0][:n]
    rms_e = np.sqrt(np.mean([s_[1][:n] ** 2 for s_ in series], axis=0))
    rms_l = np.sqrt(np.mean([s_[2][:n] ** 2 for s_ in series], axis=0))
    fe, fl = fit_growth(t, rms_e), fit_growth(t, rms_l)
    print(f"RMS over the {len(series)} clones: energy alpha {fe.alpha:.2f} +/- {fe.alpha_err:.2f}, "
          f"angular momentum alpha {fl.alpha:.2f} +/- {fl.alpha_err:.2f}")


if __name__ == "__main__":
    main()
