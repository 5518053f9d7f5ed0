"""Reproducibility test (not correctness): the numba kernel against a plain C implementation
of the same map, bit for bit.

tests/benchmarks/wh_ref.c is written in C for the benchmark and compiled by
gcc -O2 -ffp-contract=off. Identical bits show that the compiled kernel has
no compiler-dependent arithmetic (no FMA contraction, no reassociation).
"""

import os
import shutil
import subprocess
import sys

import numpy as np
import pytest

from orbitledger.integrators import WisdomHolman
from orbitledger.integrators.wisdom_holman import drift_all

sys.path.insert(0, os.path.dirname(__file__))
from conftest import solar_subset  # noqa: E402
from helpers import small_spec  # noqa: E402

SRC = os.path.join(os.path.dirname(__file__), "benchmarks", "wh_ref.c")


@pytest.fixture(scope="module")
def c_exe(tmp_path_factory):
    if shutil.which("gcc") is None:
        pytest.fail("gcc is needed for the C reference test (apt-get install gcc)")
    exe = tmp_path_factory.mktemp("c") / "wh_ref"
    subprocess.run(["gcc", "-O2", "-ffp-contract=off", "-o", str(exe), SRC, "-lm"], check=True)
    return str(exe)


def run_c(exe, system, dt, steps):
    wh = WisdomHolman(system, dt)
    lines = [str(system.n), " ".join(repr(float(g)) for g in system.gm)]
    lines += [" ".join(repr(float(q)) for q in row) for row in np.vstack([wh.xj])]
    lines += [" ".join(repr(float(q)) for q in row) for row in np.vstack([wh.vj])]
    lines.append(f"{dt!r} {steps} 1")
    out = subprocess.run([exe], input="\n".join(lines), capture_output=True, text=True, check=True)
    return np.array([[float(t) for t in r.split()] for r in out.stdout.split("\n")[1:] if r.strip()])


@pytest.mark.parametrize("make,dt", [
    (lambda: solar_subset(["Jupiter", "Saturn"]), 30.0),
    (lambda: __import__("orbitledger.runner.inputs.spec", fromlist=["resolve"]).resolve(small_spec()).system, 10.0),
])
def test_kernel_equals_plain_c_bit_for_bit(c_exe, make, dt):
    system = make()
    steps = 3000
    c_state = run_c(c_exe, system, dt, steps)
    wh = WisdomHolman(system, dt)
    wh.advance(steps)
    xj, vj = wh.xj.copy(), wh.vj.copy()
    drift_all(xj, vj, wh.mu, 0.5 * dt)  # the C run ends synchronized
    assert np.array_equal(np.hstack([xj, vj]), c_state)
