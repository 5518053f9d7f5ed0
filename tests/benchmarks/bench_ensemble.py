"""Ensembles use every core: `work --workers N` against N times the bare kernel.

An ensemble of 4 x N stable members (the invented Veyra giants, clones that
differ by 1e-12 au in one semi-major axis; checkpoints at the spec's default
interval, 1000 outputs = 5 Myr here, or every --chunk, e.g. the job file's
"500 kyr", ten times as often) is run by `orbitledger work --workers N` in a
fresh workspace; its rate is the member steps committed
per wall-clock second, from the start of the command to its exit (process
start, imports, claims, commits and samples included). It is compared, in
the same run, with

- the bare kernel in one process (steps per second of `advance`), times N;
- N bare kernels in N processes at once: what this machine gives N busy
  processes (a shared 2-core virtual machine gives less than N times one).

The machine is noisy (a shared 2-core virtual machine: the same kernel
varies by ±10 % from minute to minute), so `--rounds R` alternates the three
measures R times and compares the best of each; and, since the best of
short bare runs favours them against a long `work` run, the N bare kernels
at once also run for as long as each round's `work` (the first round's
first run: --bare-seconds), and each round's `work` is set against the mean
of the bare runs just before and just after it. The CPU the host took from
this virtual machine during each `work` run (steal time) is printed too.
`--also-chunk X` runs, in each round, `work` on the same ensemble with
checkpoints every X as well (the two plans in alternating order), and gives
the ratio of the two rates per round: what the checkpoints cost, side by side.

`--inside` adds a measure the machine's drift cannot blur: one in-process
worker on the same ensemble, with the time spent in the kernel calls
(SampleBuffer.advance) summed; what is left of its wall time is the worker's
own cost (claims, loads, commits, samples), from one and the same run; and
its CPU time outside the kernel on every thread (what a worker takes from
the other workers' kernels when there are as many workers as cores).

Run:  .venv/bin/python tests/benchmarks/bench_ensemble.py [--workers 2] [--length "2 Myr"]
          [--chunk "500 kyr"] [--also-chunk "500 kyr"] [--rounds 3] [--inside]
Reports; asserts nothing.
"""

import argparse
import json
import multiprocessing as mp
import os
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
SPEC = os.path.join(ROOT, "jobs", "veyra-giants.toml")


def ensemble_text(members, length, chunk=None):
    """The job file with this span, as an ensemble of ``members``; checkpoints every
    ``chunk``, or, None, at the spec's default interval (1000 outputs: 5 Myr here;
    the job file's own 500 kyr is `chunk="500 kyr"`)."""
    base = open(SPEC, encoding="utf-8").read()
    base = base.replace('length = "10 Myr"', f'length = "{length}"')
    base = base.replace('chunk = "500 kyr"\n', "" if chunk is None else f'chunk = "{chunk}"\n')
    return base + f"""
[ensemble]
members = {members}
[ensemble.perturb]
body = "Veyra d"
quantity = "a"
rule = "step"
size = "1e-12 au"
"""


def bare_rate(spec_text, seconds):
    """Steps per second of the bare kernel on member 0 (after a warm-up)."""
    from orbitledger.runner.inputs import ensemble, spec as S

    spec = S.load_text(spec_text)
    member = ensemble.member_spec(spec, 0) if spec.ensemble is not None else spec
    integ = S.resolve(member).make_integrator()
    integ.advance(1000)
    n, t0 = 20000, time.perf_counter()
    integ.advance(n)
    per_step = (time.perf_counter() - t0) / n
    steps = max(1, int(seconds / per_step))
    t0 = time.perf_counter()
    integ.advance(steps)
    return steps / (time.perf_counter() - t0)


def _bare_worker(args):
    text, seconds = args
    return bare_rate(text, seconds)


def together_rate(text, n, seconds):
    """Member steps per second of n bare kernels in n processes at once."""
    with mp.get_context("spawn").Pool(n) as pool:
        return sum(pool.map(_bare_worker, [(text, seconds)] * n))


def steal():
    """CPU seconds the host has taken from this virtual machine so far (all cores)."""
    with open("/proc/stat", encoding="ascii") as fh:
        fields = fh.readline().split()
    return int(fields[8]) / os.sysconf("SC_CLK_TCK") if len(fields) > 8 else 0.0


def work_rate(text, n):
    """Member steps per second of `work --workers n` on a fresh workspace; (rate, wall, done)."""
    with tempfile.TemporaryDirectory() as tmp:
        spec_path = os.path.join(tmp, "ens.toml")
        with open(spec_path, "w", encoding="utf-8") as fh:
            fh.write(text)
        ws = os.path.join(tmp, "ws")
        exe = [sys.executable, "-m", "orbitledger.runner.cli"]
        subprocess.run(exe + ["init", "--workspace", ws], check=True, capture_output=True)
        subprocess.run(exe + ["submit", spec_path, "--workspace", ws], check=True,
                       capture_output=True)
        log = os.path.join(tmp, "work.log")
        t0 = time.perf_counter()
        subprocess.run(exe + ["work", "--workers", str(n), "--workspace", ws, "--quiet",
                              "--log-level", "info", "--log-file", log], check=True)
        wall = time.perf_counter() - t0
        # Each worker's last words: time in kernel calls, time worked, start-up.
        for line in open(log, encoding="utf-8"):
            if " in kernel calls (" in line:
                print("  " + line.split(" INFO ", 1)[-1].strip())
        status = subprocess.run(exe + ["status", "--json", "--all", "--workspace", ws],
                                check=True, capture_output=True, text=True).stdout
    jobs = json.loads(status)["jobs"]
    steps = sum(j["steps_done"] for j in jobs)
    done = sum(j["status"] == "done" for j in jobs)
    return steps / wall, wall, steps, done


def inside_share(text):
    """One in-process Worker on the ensemble: (wall s, kernel s, chunks committed,
    CPU s outside the kernel), kernel = time in SampleBuffer.advance (the kernel
    calls, in-loop samples); the CPU is the process's, every thread's (the
    helper's commits, the store's writes), less the kernel calls' own."""
    from orbitledger.runner.execution.worker import Worker
    from orbitledger.runner.inputs import spec as S
    from orbitledger.runner.ledger.operations import Ledger
    from orbitledger.runner.store import sampling

    spent = [0.0, 0.0]
    advance = sampling.SampleBuffer.advance

    def timed(self, *a, **k):
        t, c = time.perf_counter(), time.thread_time()
        try:
            return advance(self, *a, **k)
        finally:
            spent[0] += time.perf_counter() - t
            spent[1] += time.thread_time() - c

    sampling.SampleBuffer.advance = timed
    try:
        with tempfile.TemporaryDirectory() as tmp:
            led = Ledger(f"sqlite:///{tmp}/l.sqlite", os.path.join(tmp, "store"))
            _, ids = led.submit_ensemble(S.load_text(text))
            t0, c0 = time.perf_counter(), time.process_time()
            Worker(led).run()
            wall = time.perf_counter() - t0
            cpu = time.process_time() - c0 - spent[1]
            chunks = sum(led.job(j)["n_checkpoints"] for j in ids)
            led.close()
    finally:
        sampling.SampleBuffer.advance = advance
    return wall, spent[0], chunks, cpu


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--length", default="2 Myr", help="span of each member")
    ap.add_argument("--chunk", default=None,
                    help="checkpoint interval (default: the spec's, 1000 outputs = 5 Myr; "
                         "the job file's is 500 kyr)")
    ap.add_argument("--also-chunk", default=None,
                    help="each round also runs `work` with checkpoints this often (the two "
                         "plans in alternating order), to set their rates side by side")
    ap.add_argument("--bare-seconds", type=float, default=8.0)
    ap.add_argument("--rounds", type=int, default=1,
                    help="alternate bare kernels and `work` this many times; best of each")
    ap.add_argument("--inside", action="store_true",
                    help="also: one in-process worker's time outside the kernel calls")
    args = ap.parse_args()
    n = args.workers
    members = 4 * n
    text = ensemble_text(members, args.length, args.chunk)

    other = None if args.also_chunk is None else ensemble_text(members, args.length,
                                                               args.also_chunk)
    ones, togethers, works, steals, alsos = [], [], [], [], []
    together_seconds = args.bare_seconds
    for r in range(args.rounds):
        ones.append(bare_rate(text, args.bare_seconds))
        togethers.append(together_rate(text, n, together_seconds))
        also = None
        if other is not None and r % 2 == 1:
            also = work_rate(other, n)  # the two plans in alternating order
        s0 = steal()
        works.append(work_rate(text, n))
        steals.append(steal() - s0)
        if other is not None and r % 2 == 0:
            also = work_rate(other, n)
        rate, wall, steps, done = works[-1]
        together_seconds = wall
        print(f"round {r + 1}: one bare kernel {ones[-1]:,.0f}/s, {n} at once "
              f"{togethers[-1]:,.0f}/s, `work` {rate:,.0f}/s ({wall:.1f} s wall; "
              f"{steals[-1]:.1f} s of CPU stolen by the host)", flush=True)
        if also is not None:
            alsos.append(also)
            print(f"round {r + 1}: `work` with checkpoints every {args.also_chunk} "
                  f"{also[0]:,.0f}/s ({also[1]:.1f} s wall), {also[0] / rate:.3f} of the "
                  "rate above", flush=True)
    # N bare kernels at once once more, for as long as the last `work`: each
    # round's `work` is bracketed by two runs of the bare kernels as long as it
    # (the first round's first: --bare-seconds).
    togethers.append(together_rate(text, n, together_seconds))
    one, together = max(ones), max(togethers)
    rate, wall, steps, done = max(works)
    print(f"{members} members of {args.length}, checkpoints every "
          f"{args.chunk or '5 Myr (the default: 1000 outputs)'} "
          f"({steps} member steps, {done} done), --workers {n}: {wall:.1f} s wall"
          + (f" (best of {args.rounds} rounds, each measure its own best)"
             if args.rounds > 1 else ""))
    print("| measure | member steps / s | ensemble ÷ this |")
    print("|---|---|---|")
    print(f"| bare kernel, one process | {one:,.0f} | |")
    print(f"| {n} × bare kernel, one process | {n * one:,.0f} | {rate / (n * one):.3f} |")
    print(f"| {n} bare kernels in {n} processes at once | {together:,.0f} | "
          f"{rate / together:.3f} |")
    print(f"| `work --workers {n}` on the ensemble | {rate:,.0f} | |")
    # The best of an 8 s measure against the best of a 40 s one favours the
    # short one; so also: each round's `work` against the mean of the N bare
    # kernels at once just before and just after it.
    bracketed = [w[0] / (0.5 * (togethers[r] + togethers[r + 1])) for r, w in enumerate(works)]
    print(f"each round's `work` ÷ the mean of {n} bare kernels at once before and after it: "
          + ", ".join(f"{b:.3f}" for b in bracketed)
          + f" (median {sorted(bracketed)[len(bracketed) // 2]:.3f})")
    if alsos:
        ratios = sorted(a[0] / w[0] for a, w in zip(alsos, works))
        print(f"checkpoints every {args.also_chunk} ÷ every "
              f"{args.chunk or '5 Myr (the default)'}, per round: "
              + ", ".join(f"{a[0] / w[0]:.3f}" for a, w in zip(alsos, works))
              + f" (median {ratios[len(ratios) // 2]:.3f}); ÷ the mean of {n} bare kernels "
              "at once around the round: " + ", ".join(
                  f"{a[0] / (0.5 * (togethers[r] + togethers[r + 1])):.3f}"
                  for r, a in enumerate(alsos)))
    if args.inside:
        inside_share(ensemble_text(2, "500 kyr", args.chunk))  # compile and warm
        for r in range(args.rounds):
            wall, kernel, chunks, cpu = inside_share(text)
            print(f"one in-process worker, round {r + 1}: wall {wall:.2f} s, in the kernel "
                  f"{kernel:.2f} s, outside it {100 * (1 - kernel / wall):.2f}% "
                  f"({1e3 * (wall - kernel) / chunks:.1f} ms per chunk, {chunks} chunks); "
                  f"CPU outside the kernel, all threads: {1e3 * cpu / chunks:.1f} ms per chunk")


if __name__ == "__main__":
    main()
