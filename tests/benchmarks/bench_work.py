"""Worker benchmark: the cost of `work` over the bare kernel, and resume latency.

1. A job of 10^6 steps with the default chunking and outputs (a sample every
   1000 steps, a checkpoint every 1000 samples), run by an in-process Worker,
   against the bare kernel taking the same 10^6 steps in one call.
   Alternated, best of 7 each, in two settings:
   - "running worker": the job is submitted to a ledger this process has
     already worked on (a campaign: one worker takes job after job);
   - "new ledger": a fresh SQLite file and a new Ledger object per job, so
     every SQL statement is compiled and every Zarr group opened afresh.
2. A campaign: CAMPAIGN jobs of 10^6 steps submitted at once and taken one
   after another by one Worker.run(), against CAMPAIGN times the bare kernel
   (a job's last commit overlaps the next job's claim and kernel).
3. The worker's own time per job, in one process: wall time minus the
   time in the kernel calls, min / median / max over 8 jobs (the figure to
   compare between versions of the code; the ratios above move with the
   machine's drift).
4. Resume latency: from starting `orbitledger work` on a job with committed
   checkpoints to its first kernel step (the process is killed there by the
   `first_step` failpoint).

5. With --resume-batch (alone): the same for 32 members of an ensemble
   resumed together as one batch.

Run:  .venv/bin/python tests/benchmarks/bench_work.py [--resume-batch]
"""

import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
sys.path.insert(0, ROOT)

from orbitledger.runner.inputs import spec as spec_mod  # noqa: E402
from orbitledger.runner.ledger.operations import Ledger  # noqa: E402
from orbitledger.runner.execution.worker import Worker  # noqa: E402

STEPS = 1_000_000
CAMPAIGN = 6


def job_spec(spec_file, length):
    """A jobs/ spec with the default chunk and output and a span of STEPS steps."""
    spec = spec_mod.load(os.path.join(ROOT, "jobs", spec_file))
    span = spec.span.model_copy(update={"length": length, "chunk": None, "output": None})
    return spec.model_copy(update={"span": span})


def bare(spec):
    integ = spec_mod.resolve(spec).make_integrator()
    t = time.perf_counter()
    integ.advance(STEPS)
    return time.perf_counter() - t


def worker(spec, tmp):
    """A job on a new ledger (fresh file, statements compiled afresh)."""
    shutil.rmtree(tmp, ignore_errors=True)
    led = Ledger(f"sqlite:///{tmp}.sqlite", tmp)
    out = worker_warm(spec, led)
    led.close()
    os.remove(f"{tmp}.sqlite")
    return out


def worker_warm(spec, led):
    """A job submitted to `led` and worked by a new Worker: (wall s, samples, checkpoints)."""
    jid = led.submit(spec)
    t = time.perf_counter()
    Worker(led).run()
    wall = time.perf_counter() - t
    row = led.job(jid)
    assert row["status"] == "done" and row["steps_done"] == STEPS, row
    return wall, row["n_samples"], row["n_checkpoints"]


def campaign(spec, led):
    """CAMPAIGN jobs submitted to `led`, all worked by one new Worker: wall s."""
    ids = [led.submit(spec) for _ in range(CAMPAIGN)]
    t = time.perf_counter()
    Worker(led).run()
    wall = time.perf_counter() - t
    assert all(led.job(j)["status"] == "done" for j in ids)
    return wall


def resume_latency(spec, tmp, repeats=5):
    shutil.rmtree(tmp, ignore_errors=True)
    from orbitledger.runner.ledger.workspace import init

    ws, led = init(tmp)
    led.submit(spec)
    w = Worker(led, max_steps_per_call=10_000)
    w.deadline = time.time() + 0.5
    w.run()  # leave it part-way, with committed checkpoints
    assert led.job(1)["status"] == "queued", "the job ended before the deadline"
    led.close()
    times = []
    for _ in range(repeats):
        env = dict(os.environ, ORBITLEDGER_FAILPOINTS="first_step:1")
        t = time.perf_counter()
        subprocess.run([sys.executable, "-m", "orbitledger.runner.cli", "work", "--workspace", str(ws),
                        "--quiet"], env=env, cwd=ROOT)
        times.append(time.perf_counter() - t)
    return min(times), max(times)


def resume_latency_batch(members, tmp, repeats=5):
    """Resume of an ensemble's members worked as one batch: from starting
    `orbitledger work` on members with committed checkpoints to the batch's first
    kernel call (claims of every member, their checkpoints loaded, the batched
    kernel loaded from numba's cache)."""
    shutil.rmtree(tmp, ignore_errors=True)
    from orbitledger.runner.ledger.workspace import init

    text = open(os.path.join(ROOT, "jobs", "veyra-giants.toml"), encoding="utf-8").read()
    text = text.replace('length = "10 Myr"', 'length = "5 Myr"').replace(
        'chunk = "500 kyr"', 'chunk = "50 kyr"') + f"""
[ensemble]
members = {members}
[ensemble.perturb]
body = "Veyra c"
quantity = "a"
rule = "step"
size = "1e-12 au"
"""
    ws, led = init(tmp)
    _, ids = led.submit_ensemble(spec_mod.load_text(text))
    w = Worker(led, max_steps_per_call=2_000)
    w.deadline = time.time() + 3.0
    w.run()  # every member part-way, with committed checkpoints
    assert all(led.job(j)["status"] == "queued" and led.job(j)["steps_done"] > 0 for j in ids)
    led.close()
    times = []
    for _ in range(repeats):
        env = dict(os.environ, ORBITLEDGER_FAILPOINTS="first_step:1")
        t = time.perf_counter()
        subprocess.run([sys.executable, "-m", "orbitledger.runner.cli", "work", "--workspace",
                        str(ws), "--quiet"], env=env, cwd=ROOT)
        times.append(time.perf_counter() - t)
    return min(times), max(times)


def fixed_cost(spec, tmp, jobs=8):
    """The worker's own time per job in one process, which the machine's drift cannot
    blur: wall time of Worker.run minus the time in the kernel calls
    (SampleBuffer.advance, in-loop samples included), over `jobs` jobs taken one
    at a time by a running worker (the first, warming, not counted). Returns
    (min, median, max) in ms."""
    from orbitledger.runner.store import sampling

    spent = [0.0]
    advance = sampling.SampleBuffer.advance

    def timed(self, *a, **k):
        t = time.perf_counter()
        try:
            return advance(self, *a, **k)
        finally:
            spent[0] += time.perf_counter() - t

    sampling.SampleBuffer.advance = timed
    out = []
    try:
        led = Ledger(f"sqlite:///{tmp}.sqlite", tmp)
        for i in range(jobs + 1):
            led.submit(spec)
            spent[0] = 0.0
            t = time.perf_counter()
            Worker(led).run()
            if i:
                out.append(1e3 * (time.perf_counter() - t - spent[0]))
        led.close()
    finally:
        sampling.SampleBuffer.advance = advance
    out.sort()
    return out[0], out[len(out) // 2], out[-1]


def main():
    tmp = tempfile.mkdtemp()
    if "--resume-batch" in sys.argv:
        lo, hi = resume_latency_batch(32, os.path.join(tmp, "rb"))
        print(f"resume of 32 batched members: start of `orbitledger work` to the batch's first "
              f"kernel call: {lo:.2f} s best, {hi:.2f} s worst of 5")
        shutil.rmtree(tmp, ignore_errors=True)
        return
    print(f"# {time.strftime('%Y-%m-%d')} {platform.node()} python {platform.python_version()}")
    cases = [("four giants, dt 0.5 yr", job_spec("veyra-giants.toml", "500000 yr")),
             ("eight planets, dt 4 d", job_spec("veyra-full.toml", "4000000 d"))]
    print("| job (10^6 steps) | worker | bare kernel | work | overhead | samples | checkpoints |")
    print("|---|---|---|---|---|---|---|")
    fixed = []
    for label, spec in cases:
        bare(spec)  # compile and warm
        worker(spec, os.path.join(tmp, "w"))
        led = Ledger(f"sqlite:///{tmp}/campaign.sqlite", os.path.join(tmp, "campaign"))
        worker_warm(spec, led)
        b, cold, warm, many = [], [], [], []
        for _ in range(7):
            b.append(bare(spec))
            wall, ns, nc = worker_warm(spec, led)
            warm.append(wall)
            b.append(bare(spec))
            cold.append(worker(spec, os.path.join(tmp, "w"))[0])
            many.append(campaign(spec, led) / CAMPAIGN)
        led.close()
        for kind, w in (("running worker", warm), ("new ledger", cold),
                        (f"campaign of {CAMPAIGN} jobs, per job", many)):
            print(f"| {label} | {kind} | {min(b):.3f} s | {min(w):.3f} s "
                  f"| {100 * (min(w) / min(b) - 1):+.1f}% | {ns} | {nc + 1} |")
        fixed.append((label, min(b), fixed_cost(spec, os.path.join(tmp, "f"))))
    print("\nThe worker's own time per job, outside the kernel calls (one running worker, "
          "8 jobs, in-process; not blurred by the machine's drift):")
    for label, kernel, (lo, mid, hi) in fixed:
        print(f"- {label}: {lo:.1f} / {mid:.1f} / {hi:.1f} ms (min / median / max), "
              f"median {100 * mid / 1e3 / kernel:.1f} % of the bare kernel's {kernel:.3f} s")
    # Ten times longer, so the job is still part-way after the half second
    # the first worker is given (a 10^6-step job can end within it).
    lo, hi = resume_latency(job_spec("veyra-giants.toml", "5000000 yr"),
                            os.path.join(tmp, "r"))
    print(f"\nresume: start of `orbitledger work` to the first kernel step: {lo:.2f} s best, "
          f"{hi:.2f} s worst of 5")
    shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
