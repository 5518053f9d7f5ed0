"""SLURM array scripts: many `work` processes against a shared database and store.

Each array task runs one worker with a deadline inside its wall time. SLURM
is asked for SIGUSR1 `margin` seconds before the limit (``--signal=B:USR1``,
delivered to the batch shell, which passes it to the worker); the worker
checkpoints, releases its lease and exits with EXIT_WORK_REMAINS, and the
task requeues itself. The database URL is read from ORBITLEDGER_DB in the
submitting environment (sbatch exports it): it is never written into the
script, so a password cannot leak into files.
"""

import os
import shlex
import subprocess
import sys
from pathlib import Path

from orbitledger.runner import defaults
from orbitledger.runner.errors import LedgerError
from orbitledger.runner.ledger.workspace import db_url

# Seconds between the worker's own deadline and SLURM's warning signal.
DEADLINE_SLACK = 30


def check_shared_db(url):
    """Refuse a SQLite ledger for a cluster run, with the fix."""
    if url.startswith("sqlite"):
        raise LedgerError("a cluster run needs a database all nodes share; this ledger is "
                          "SQLite. Set --db or ORBITLEDGER_DB to postgresql+psycopg://user@host/db.")


def script(workspace, tasks, wall_seconds, margin, name="orbitledger", partition=None,
           program=None, lease=defaults.LEASE_SECONDS):
    """The text of an sbatch array script; its tasks run the `orbitledger` program
    (the console script beside this Python unless ``program`` names another)."""
    if tasks < 1:
        raise LedgerError(f"--tasks must be at least 1, got {tasks}.")
    if wall_seconds < 120:
        raise LedgerError(f"--time must be at least 2 min, got {wall_seconds:.0f} s.")
    if not 0 < margin < wall_seconds / 2:
        raise LedgerError(f"--margin must be between 0 and half the wall time, got {margin} s.")
    ws = Path(workspace).resolve()
    minutes = int(-(-wall_seconds // 60))
    deadline = max(30, minutes * 60 - margin - DEADLINE_SLACK)
    prog = shlex.quote(program or os.path.join(os.path.dirname(sys.executable), "orbitledger"))
    lines = [
        "#!/bin/bash",
        f"#SBATCH --job-name={name}",
        f"#SBATCH --array=0-{tasks - 1}",
        f"#SBATCH --time={minutes}",
        "#SBATCH --ntasks=1",
        f"#SBATCH --signal=B:USR1@{int(margin)}",
        "#SBATCH --requeue",
        "#SBATCH --open-mode=append",
        f"#SBATCH --output={ws}/slurm/%A_%a.out",
    ]
    if partition:
        lines.append(f"#SBATCH --partition={partition}")
    lines += [
        "# Written by `orbitledger batch`. The database URL comes from ORBITLEDGER_DB",
        "# in the environment sbatch exports; it is not stored here.",
        "set -u",
        'if [ -z "${ORBITLEDGER_DB:-}" ]; then',
        '  echo "orbitledger: ORBITLEDGER_DB is not set; export it before sbatch." >&2',
        "  exit 2",
        "fi",
        f"export ORBITLEDGER_WORKSPACE={shlex.quote(str(ws))}",
        f'echo "task ${{SLURM_ARRAY_TASK_ID:-0}} of job ${{SLURM_JOB_ID}}, '
        f'restart ${{SLURM_RESTART_COUNT:-0}}, on $(hostname)"',
        f"{prog} work --quiet --lease {lease:g} --deadline '{deadline} s' &",
        "pid=$!",
        "# The warning signal reaches this shell; pass it to the worker, which",
        "# checkpoints at its next safe point.",
        "trap 'kill -USR1 $pid 2>/dev/null' USR1 TERM",
        "wait $pid; code=$?",
        "while kill -0 $pid 2>/dev/null; do wait $pid; code=$?; done",
        'echo "worker exit code $code"',
        f"if [ $code -eq {defaults.EXIT_WORK_REMAINS} ]; then",
        '  echo "work remains: requeueing"',
        '  scontrol requeue "$SLURM_JOB_ID"',
        "  exit 0",
        "fi",
        "exit $code",
    ]
    return "\n".join(lines) + "\n"


def write(path, text):
    """Write the script atomically."""
    path = Path(path)
    tmp = path.with_name(path.name + ".part")
    tmp.write_text(text)
    os.chmod(tmp, 0o755)
    tmp.replace(path)


def submit(path, url):
    """sbatch the script with ORBITLEDGER_DB set; returns the SLURM job id."""
    env = dict(os.environ, ORBITLEDGER_DB=url)
    try:
        out = subprocess.run(["sbatch", "--parsable", str(path)], env=env, capture_output=True,
                             text=True, timeout=60)
    except FileNotFoundError:
        raise LedgerError("sbatch was not found; run this on a SLURM login node.") from None
    if out.returncode != 0:
        raise LedgerError(f"sbatch failed: {out.stderr.strip()}")
    return out.stdout.strip().split(";")[0]


def resolve_url(workspace, url):
    """The database URL a cluster run would use (option, env, or the workspace's SQLite)."""
    return db_url(workspace, url)
