"""Helpers for ledger tests: small invented systems and comparisons."""

import os
import subprocess
import sys

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

# An invented star, Orrin, with three planets; all numbers made up.
SMALL_SPEC = """
name = "{name}"
[system]
star = {{ name = "Orrin", mass = "0.88 Msun", radius = "0.004 au" }}
[[system.bodies]]
name = "Orrin b"
mass = "0.0007 Msun"
a = "2.9 au"
e = 0.07
i = "1.1 deg"
node = "20 deg"
peri = "75 deg"
mean_anomaly = "10 deg"
[[system.bodies]]
name = "Orrin c"
mass = "0.0002 Msun"
a = "6.1 au"
e = 0.04
i = "2.0 deg"
node = "140 deg"
peri = "300 deg"
mean_anomaly = "190 deg"
[[system.bodies]]
name = "Orrin d"
mass = "4e-5 Msun"
a = "11.4 au"
e = 0.02
mean_anomaly = "77 deg"
[method]
step = "{step}"
corrector = {corrector}
[span]
length = "{length}"
chunk = "{chunk}"
output = "{output}"
[budget]
energy = {budget}
on_exceed = "{on_exceed}"
"""


def small_spec_text(name="orrin", step="10 d", corrector=3, length="2000 yr",
                    chunk="5000 steps", output="500 steps", budget=1e-6, on_exceed="hold"):
    return SMALL_SPEC.format(name=name, step=step, corrector=corrector, length=length,
                             chunk=chunk, output=output, budget=budget, on_exceed=on_exceed)


def small_spec(**kw):
    from orbitledger.runner.inputs import spec

    return spec.load_text(small_spec_text(**kw))


def final_state(ledger, job_id):
    """State arrays of the last committed checkpoint, as one bytes string."""
    integ, _ = ledger.load_integrator(job_id)
    arrs = integ.state_arrays()
    return b"".join(k.encode() + np.ascontiguousarray(arrs[k]).tobytes() for k in sorted(arrs))


def samples_bytes(ledger, job_id):
    """All committed samples of a job as bytes per series."""
    n = ledger.job(job_id)["n_samples"]
    s = ledger.store.read_samples(job_id, n)
    return {k: np.ascontiguousarray(v).tobytes() for k, v in s.items()}


def cli(*args, env=None, timeout=300):
    """Run `python -m orbitledger.runner.cli ...` as a subprocess."""
    full_env = dict(os.environ)
    full_env.update(env or {})
    return subprocess.run([sys.executable, "-m", "orbitledger.runner.cli", *map(str, args)], cwd=ROOT,
                          env=full_env, capture_output=True, text=True, timeout=timeout)


def assert_no_double_commit(ledger, job_id):
    """Committed checkpoints advance strictly and tile the run without overlap."""
    cks = ledger.checkpoints(job_id)
    steps = [c["step"] for c in cks]
    assert [c["idx"] for c in cks] == list(range(len(cks)))
    assert all(a < b for a, b in zip(steps, steps[1:])), steps
    n = [c["n_samples"] for c in cks]
    assert all(a <= b for a, b in zip(n, n[1:]))
    row = ledger.job(job_id)
    assert steps[-1] == row["steps_done"]
    assert n[-1] == row["n_samples"]


def stepping_clock(step=0.05):
    """A wall clock for in-process workers that advances `step` seconds per reading."""
    t = [0.0]

    def clock():
        t[0] += step
        return t[0]

    return clock


def ejecting_ensemble_text(name, members=6, escape="11.79 au"):
    """Six clones of the Orrin system whose Orrin d eccentricity steps from 0.020 by 0.002:
    the secular rise of its eccentricity carries the more eccentric members past the
    escape distance at different times (about 13000 to 20000 yr); the others survive."""
    return small_spec_text(name=name, length="20000 yr", chunk="20000 steps",
                           output="2000 steps") + f"""
[stops]
escape_distance = "{escape}"
[ensemble]
members = {members}
[ensemble.perturb]
body = "Orrin d"
quantity = "e"
rule = "step"
size = 0.002
"""


def run_with_kills(ws, led, jid, modes, rng, random_kills=8, pause=(1.0, 2.0)):
    """Run `orbitledger work` on workspace ws until job jid is done, really killing its
    processes: one process per entry of `modes` (a failpoint spec such as
    "in_commit:1", or None: SIGKILL at a random moment, while fewer than `random_kills`
    kills happened), then plain runs. Returns how many processes were SIGKILLed."""
    import signal
    import time

    kills = 0
    for mode in list(modes) + [None] * 20:
        if led.job(jid)["status"] == "done":
            break
        env = dict(os.environ)
        env.pop("ORBITLEDGER_FAILPOINTS", None)
        if mode:
            env["ORBITLEDGER_FAILPOINTS"] = mode
        proc = subprocess.Popen([sys.executable, "-m", "orbitledger.runner.cli", "work",
                                 "--workspace", str(ws), "--quiet", "--lease", "5"], cwd=ROOT,
                                env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        if mode is None and kills < random_kills:
            time.sleep(rng.uniform(*pause))
            if proc.poll() is None:
                proc.send_signal(signal.SIGKILL)
        rc = proc.wait(timeout=300)
        kills += rc == -signal.SIGKILL
        assert rc in (0, 3, -signal.SIGKILL), proc.stderr.read()
    return kills


def spawn_work(ws, db=None, failpoints=None, lease=5, extra=(), **popen):
    """Start a real `orbitledger work` process on workspace ws (optionally another
    database URL), with the given failpoints (and no inherited ones); its
    stderr is a pipe, its stdout discarded."""
    env = {k: v for k, v in os.environ.items() if k != "ORBITLEDGER_FAILPOINTS"}
    if failpoints:
        env["ORBITLEDGER_FAILPOINTS"] = failpoints
    argv = [sys.executable, "-m", "orbitledger.runner.cli", "work", "--workspace", str(ws),
            "--quiet", "--lease", str(lease), *extra]
    if db:
        argv += ["--db", db]
    return subprocess.Popen(argv, cwd=ROOT, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, **popen)
