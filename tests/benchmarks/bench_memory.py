"""A worker's memory whatever the plan: peak RSS on the heaviest plans submit accepts.

Each case submits one job of the invented Veyra giants (jobs/veyra-giants.toml),
or an ensemble of 32 of them worked in batches, with an extreme output plan, runs `orbitledger work` on it in a subprocess
for a while, then stops it: by SIGTERM, or by `cancel` from another process
(which trims the store to the committed rows). The worker's peak resident
memory is read from /proc (VmHWM) just before it exits, and the time from
the stop to its exit is measured.

Run:  .venv/bin/python tests/benchmarks/bench_memory.py [--seconds 20]
Reports; asserts nothing.
"""

import argparse
import os
import signal
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
SPEC = os.path.join(ROOT, "jobs", "veyra-giants.toml")

CASES = [
    # (label, length, output, chunk, stop by)
    # 100 kyr = 200 000 steps: 54 MB of samples per chunk, near the 64 MB limit
    ("1 Gyr, a sample every step, 100 kyr chunks", "1 Gyr", "1 step", "100 kyr", "SIGTERM"),
    ("1 Gyr, a sample every step, 100 kyr chunks", "1 Gyr", "1 step", "100 kyr", "cancel"),
    ("1 Gyr, a sample every step, 1000-step chunks", "1 Gyr", "1 step", None, "SIGTERM"),
    ("1 Gyr, default outputs and chunks", "1 Gyr", None, None, "SIGTERM"),
    # Ensembles of 32 members worked as batches (the batch is cut so that its
    # members' chunk samples fit defaults.BATCH_SAMPLE_BYTES together).
    ("32 members, 1 Gyr, a sample every step, 100 kyr chunks", "1 Gyr", "1 step", "100 kyr",
     "SIGTERM"),
    ("32 members, 1 Gyr, default outputs and chunks", "1 Gyr", None, None, "SIGTERM"),
]

ENSEMBLE = """
[ensemble]
members = 32
[ensemble.perturb]
body = "Veyra c"
quantity = "a"
rule = "step"
size = "1e-12 au"
"""


def spec_text(length, output, chunk):
    text = open(SPEC, encoding="utf-8").read().replace('length = "10 Myr"',
                                                      f'length = "{length}"')
    lines = []
    for line in text.splitlines():
        if output is not None and line.startswith("output ="):
            continue
        if line.startswith("chunk ="):
            continue
        lines.append(line)
        if line.strip() == "[span]":
            if output is not None:
                lines.append(f'output = "{output}"')
            if chunk is not None:
                lines.append(f'chunk = "{chunk}"')
            lines.append("max_store_gb = 100000")
    return "\n".join(lines) + "\n"


def peak_rss_mb(pid):
    try:
        with open(f"/proc/{pid}/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        return None
    return None


def run_case(tmp, k, length, output, chunk, how, seconds, ensemble=False):
    exe = [sys.executable, "-m", "orbitledger.runner.cli"]
    ws = os.path.join(tmp, f"ws{k}")
    path = os.path.join(tmp, f"job{k}.toml")
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(spec_text(length, output, chunk) + (ENSEMBLE if ensemble else ""))
    subprocess.run(exe + ["init", "--workspace", ws], check=True, capture_output=True)
    sub = subprocess.run(exe + ["submit", path, "--workspace", ws], capture_output=True,
                         text=True)
    if sub.returncode != 0:
        return f"refused at submit: {sub.stderr.strip()}"
    proc = subprocess.Popen(exe + ["work", "--workspace", ws, "--quiet", "--log-level",
                                   "warning"])
    peak = 0.0
    t_end = time.time() + seconds
    while time.time() < t_end and proc.poll() is None:
        peak = max(peak, peak_rss_mb(proc.pid) or 0.0)
        time.sleep(0.2)
    t_stop = time.perf_counter()
    if how == "SIGTERM":
        proc.send_signal(signal.SIGTERM)
    else:
        subprocess.run(exe + ["cancel", "1", "--workspace", ws], check=True,
                       capture_output=True)
    while proc.poll() is None:
        peak = max(peak, peak_rss_mb(proc.pid) or 0.0)
        time.sleep(0.05)
    exit_s = time.perf_counter() - t_stop
    store = sum(os.path.getsize(os.path.join(d, f)) for d, _, fs in
                os.walk(os.path.join(ws, "store")) for f in fs)
    return (f"peak RSS {peak:.0f} MB; exit {exit_s:.1f} s after the {how} "
            f"(code {proc.returncode}); store {store / 1e6:.0f} MB")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--seconds", type=float, default=20.0)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        for k, (label, length, output, chunk, how) in enumerate(CASES):
            result = run_case(tmp, k, length, output, chunk, how, args.seconds,
                              ensemble=label.startswith("32 members"))
            print(f"- {label}, stopped by {how}: {result}", flush=True)


if __name__ == "__main__":
    main()
