"""Terminal tables and summaries (rich) shared by the CLI commands."""

import json
import time

from rich.table import Table

from orbitledger.runner.ledger.status import JobStatus
from orbitledger.runner.inputs.units import format_time

MYR_D = 365.25e6  # days in a megayear


def progress_fraction(row):
    """Fraction of the job's steps done."""
    return row["steps_done"] / row["total_steps"] if row["total_steps"] else 1.0


def myr_per_hour(rate_days_per_s):
    """Simulated Myr per wall-clock hour from days per second."""
    return None if not rate_days_per_s else rate_days_per_s * 3600.0 / MYR_D


def time_to_finish(row):
    """Wall seconds left at the job's last measured rate, or None."""
    if row["status"] not in (JobStatus.QUEUED.value, JobStatus.RUNNING.value) or not row["rate"]:
        return None
    left = (row["total_steps"] - row["steps_done"]) * abs(row["dt"])
    return left / row["rate"]


def format_duration(seconds):
    """A wall-clock duration: 45 s, 12 min, 3.2 h, 4.1 d."""
    if seconds is None:
        return "-"
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    if seconds < 172800:
        return f"{seconds / 3600:.1f} h"
    return f"{seconds / 86400:.1f} d"


def outcome_text(row):
    """Outcome kind with its time and bodies, or '-'."""
    if not row["outcome"]:
        return row["reason"] or "-" if row["status"] in ("held", "failed", "cancelled") else "-"
    text = row["outcome"]
    if row["outcome"] != "survived" and row["outcome_time"] is not None:
        text += f" at {format_time(row['outcome_time'])}"
        if row["outcome_bodies"]:
            text += f" (bodies {row['outcome_bodies']})"
    return text


def status_table(rows, title="Jobs"):
    """The status table: job, status, progress, simulated time, rate, ETA, energy error, outcome."""
    t = Table(title=title, header_style="bold")
    for col, just in (("job", "right"), ("name", "left"), ("status", "left"),
                      ("progress", "right"), ("simulated", "right"), ("Myr/h", "right"),
                      ("to finish", "right"), ("max |dE/E|", "right"), ("outcome", "left")):
        t.add_column(col, justify=just)
    for r in rows:
        rate = myr_per_hour(r["rate"])
        t.add_row(str(r["id"]), r["name"], r["status"], f"{100 * progress_fraction(r):.1f}%",
                  f"{format_time(r['steps_done'] * r['dt'])} / {format_time(r['total_steps'] * r['dt'])}",
                  "-" if rate is None else f"{rate:.3g}", format_duration(time_to_finish(r)),
                  f"{r['max_energy_error']:.2e}", outcome_text(r))
    return t


def show_tables(ledger, job_id):
    """Tables for `show`: the job, its checkpoints summary and its provenance."""
    row = ledger.job(job_id)
    spec = json.loads(row["spec_json"])
    t = Table(title=f"Job {job_id}: {row['name']}", show_header=False)
    t.add_column("key", style="bold")
    t.add_column("value")
    fields = [
        ("status", row["status"] + (f" ({row['reason']})" if row["reason"] else "")),
        ("requested", row["requested"] or "-"),
        ("method", f"{row['method']}, step {abs(row['dt']):.6g} d, corrector "
                   f"{spec['method']['corrector']}, relativity {spec['method']['relativity']}"),
        ("direction", spec["span"]["direction"]),
        ("bodies", str(row["n_bodies"])),
        ("progress", f"{row['steps_done']} / {row['total_steps']} steps "
                     f"({100 * progress_fraction(row):.2f}%)"),
        ("simulated", f"{format_time(row['steps_done'] * row['dt'])} of "
                      f"{format_time(row['total_steps'] * row['dt'])}"),
        ("checkpoints", f"{row['n_checkpoints'] + 1} (every {row['chunk_steps']} steps)"),
        ("samples", f"{row['n_samples']} (every {row['output_steps']} steps)"),
        ("energy error", f"last {row['last_energy_error']:.3e}, max {row['max_energy_error']:.3e}, "
                         f"budget {spec['budget']['energy']:.1e}"),
        ("ang. mom. error", f"last {row['last_angmom_error']:.3e}, max {row['max_angmom_error']:.3e}"),
        ("outcome", outcome_text(row)),
        ("lease", "-" if not row["owner"] else
         f"{row['owner']} (token {row['fence']}, expires in "
         f"{row['lease_expires'] - time.time():.0f} s)"),
        ("spec sha256", row["spec_sha256"]),
        ("wall time", format_duration(row["wall_seconds"])),
    ]
    fields.insert(1 + [k for k, _ in fields].index("method"),
                  ("step resolution", _step_resolution(row)))
    if row["parent_job_id"]:
        fields.append(("started from", f"job {row['parent_job_id']} checkpoint "
                                       f"{row['parent_checkpoint']}"))
    for k, v in fields:
        t.add_row(k, v)
    segs = ledger.segments(job_id)
    p = Table(title="Provenance (segments of work)", header_style="bold")
    for col in ("#", "host", "pid", "steps", "started", "wall", "end", "code"):
        p.add_column(col)
    for k, s in enumerate(segs, start=1):
        ver = json.loads(s["versions"] or "{}")
        wall = (s["ended_at"] - s["started_at"]) if s["ended_at"] else None
        steps = "-" if s["end_step"] is None else f"{s['start_step']}..{s['end_step']}"
        p.add_row(str(k), s["host"], str(s["pid"]), steps,
                  time.strftime("%Y-%m-%d %H:%M:%S", time.gmtime(s["started_at"])),
                  format_duration(wall), s["end_reason"] or "running",
                  f"orbitledger {ver.get('orbitledger')} "
                  f"({(ver.get('source_commit') or 'no commit')[:12]}), numba {ver.get('numba')}, "
                  f"numpy {ver.get('numpy')}")
    return t, p, segs


def _step_resolution(row):
    """The least resolved orbit at the job's start (see runner.inputs.stepcheck)."""
    from orbitledger.runner.inputs.spec import from_json, resolve
    from orbitledger.runner.inputs.stepcheck import summary

    return summary(resolve(from_json(row["spec_json"])))
