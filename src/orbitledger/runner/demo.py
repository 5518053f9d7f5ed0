"""The demo: two invented-system jobs, run with an interruption and a resume."""

import os
from pathlib import Path
import shutil
import signal
import subprocess
import sys
import time

from rich.table import Table

from orbitledger.runner.inputs import spec as spec_mod
from orbitledger.runner.presentation.tables import status_table
from orbitledger.runner.ledger.status import JobStatus
from orbitledger.runner.inputs.text import format_time
from orbitledger.runner.ledger.workspace import MARKER, init

# src/orbitledger/runner/demo.py -> the checkout's jobs/ folder
JOBS_DIR = Path(__file__).resolve().parents[3] / "jobs"
DEMO_SPECS = ("veyra-giants.toml", "veyra-full.toml")


def _work(ws, seconds=None):
    """Run `orbitledger work` with two worker processes; SIGTERM it after `seconds`."""
    argv = [sys.executable, "-m", "orbitledger.runner.cli", "work", "--workspace", str(ws),
            "--workers", "2", "--quiet"]
    proc = subprocess.Popen(argv)
    if seconds is None:
        return proc.wait()
    try:
        return proc.wait(timeout=seconds)
    except subprocess.TimeoutExpired:
        proc.send_signal(signal.SIGTERM)
        return proc.wait()


def run_demo(ws, console):
    """Run the demo in folder ws (recreated if it is an earlier demo workspace)."""
    ws = Path(ws)
    if ws.exists():
        if not (ws / MARKER).exists():
            console.print(f"{ws} exists and is not a workspace; choose another --workspace.")
            return 2
        shutil.rmtree(ws)
    ws, ledger = init(ws)
    console.print(f"[bold]1.[/] workspace {ws.resolve()}")
    ids = []
    for name in DEMO_SPECS:
        spec = spec_mod.load(JOBS_DIR / name)
        ids.append(ledger.submit(spec))
        console.print(f"   queued job {ids[-1]} from jobs/{name}: {spec.description}")
    console.print("[bold]2.[/] two workers start; after 8 s they are sent SIGTERM "
                  "(as a batch system does at its wall-time limit)")
    t0 = time.time()
    code = _work(ws, seconds=8.0)
    console.print(f"   workers checkpointed and exited with code {code} "
                  f"({'work remains' if code == 3 else 'no work left'}) after {time.time() - t0:.1f} s")
    console.print(status_table(ledger.jobs(), title="After the interruption"))
    console.print("[bold]3.[/] workers resume from the last committed checkpoints")
    code = _work(ws)
    console.print(f"   workers exited with code {code} after {time.time() - t0:.1f} s in all")
    console.print(status_table(ledger.jobs(), title="Finished"))
    summary = Table(title="Summary", header_style="bold")
    for col in ("job", "segments", "checkpoints", "samples", "max |dE/E|", "budget", "verdict"):
        summary.add_column(col)
    for jid in ids:
        row = ledger.job(jid)
        budget = spec_mod.from_json(row["spec_json"]).budget.energy
        summary.add_row(str(jid), str(len(ledger.segments(jid))), str(row["n_checkpoints"] + 1),
                        str(row["n_samples"]), f"{row['max_energy_error']:.2e}", f"{budget:.0e}",
                        "within budget" if row["max_energy_error"] <= budget else "over budget")
    console.print(summary)
    done = [ledger.job(j)["status"] == JobStatus.DONE.value for j in ids]
    console.print(f"Each job ran in more than one segment and resumed from its checkpoint; "
                  f"simulated {format_time(sum(abs(ledger.job(j)['steps_done'] * ledger.job(j)['dt']) for j in ids))}"
                  f" in all. Inspect with: orbitledger show 1 --workspace {ws}")
    ledger.close()
    return 0 if all(done) else 1
