"""Terminal tables and summaries (rich) shared by the CLI commands."""

import json
import time

from rich.table import Table

from orbitledger.runner.inputs.text import format_time, time_unit
from orbitledger.runner.ledger.status import JobStatus
from orbitledger.runner.inputs.text import body_list, body_names_from_json


def progress_fraction(row):
    """Fraction of the job's steps done."""
    return row["steps_done"] / row["total_steps"] if row["total_steps"] else 1.0


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
    """Outcome kind with its time and the bodies by name, or '-'."""
    if not row["outcome"]:
        return row["reason"] or "-" if row["status"] in ("held", "failed", "cancelled") else "-"
    text = row["outcome"]
    if row["outcome"] != "survived" and row["outcome_time"] is not None:
        text += f" at {format_time(abs(row['outcome_time']))}"
        if row["outcome_bodies"]:
            names = body_list(row["outcome_bodies"], body_names_from_json(row["spec_json"]))
            text += f" ({', '.join(map(str, names))})"
    return text


def rate_column(rows):
    """(header, formatter) of the rate column: one time unit per hour for the whole column."""
    rates = [abs(r["rate"]) * 3600.0 for r in rows if r["rate"]]
    name, scale = time_unit(max(rates) if rates else 0.0)
    return f"{name}/h", lambda rate: "-" if not rate else f"{abs(rate) * 3600.0 / scale:.3g}"


def format_rate(rate_days_per_s):
    """A rate of simulated time per wall-clock hour in a readable unit: "2.61 Gyr/h"."""
    if not rate_days_per_s:
        return ""
    per_h = abs(rate_days_per_s) * 3600.0
    name, scale = time_unit(per_h)
    return f"{per_h / scale:.3g} {name}/h"


def span_text(row, sep=" of "):
    """Simulated time so far and in all: "9.95 Myr of 20 Myr"."""
    return (f"{format_time(abs(row['steps_done'] * row['dt']))}{sep}"
            f"{format_time(abs(row['total_steps'] * row['dt']))}")


def every_text(steps, dt):
    """An interval in steps as time: "500 kyr (1000000 steps)"."""
    return f"{format_time(abs(steps * dt))} ({steps} steps)"


def step_text(dt):
    """The step in a readable unit, with its exact value in days."""
    t = format_time(abs(dt))
    return t if t.endswith(" d") else f"{t} ({abs(dt):.10g} d)"


def status_table(rows, title="Jobs"):
    """The status table: job, status, progress, simulated time, rate, ETA, energy error, outcome."""
    t = Table(title=title, header_style="bold")
    rate_head, rate_fmt = rate_column(rows)
    for col, just in (("job", "right"), ("name", "left"), ("status", "left"),
                      ("progress", "right"), ("simulated", "right"), (rate_head, "right"),
                      ("to finish", "right"), ("max |dE/E|", "right"), ("outcome", "left")):
        t.add_column(col, justify=just)
    for r in rows:
        t.add_row(str(r["id"]), r["name"], r["status"], f"{100 * progress_fraction(r):.1f}%",
                  span_text(r), rate_fmt(r["rate"]), format_duration(time_to_finish(r)),
                  f"{r['max_energy_error']:.2e}", outcome_text(r))
    return t


def ensemble_table(summaries):
    """One row per ensemble (from Ledger.ensemble_summaries): members by status, progress,
    simulated time, the largest energy error, the members stopped unstable so far."""
    t = Table(title="Ensembles", header_style="bold")
    for col, just in (("ensemble", "right"), ("name", "left"), ("members", "right"),
                      ("by status", "left"), ("progress", "right"), ("simulated", "right"),
                      ("max |dE/E|", "right"), ("stopped", "left")):
        t.add_column(col, justify=just)
    for e in summaries:
        frac = e["steps_done"] / e["total_steps"] if e["total_steps"] else 1.0
        lo, hi = min(e["done_days"]), max(e["total_days"])
        t.add_row(str(e["id"]), e["name"], str(sum(e["counts"].values())),
                  ", ".join(f"{n} {st}" for st, n in sorted(e["counts"].items())),
                  f"{100 * frac:.1f}%", f"{format_time(lo)} (least) of {format_time(hi)}",
                  f"{e['max_energy_error']:.2e}",
                  ", ".join(f"{n} {k}" for k, n in sorted(e["outcomes"].items())) or "-")
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
        ("method", f"{row['method']}, step {step_text(row['dt'])}, corrector "
                   f"{spec['method']['corrector']}, relativity {spec['method']['relativity']}"),
        ("direction", spec["span"]["direction"]),
        ("bodies", str(row["n_bodies"])),
        ("progress", f"{row['steps_done']} / {row['total_steps']} steps "
                     f"({100 * progress_fraction(row):.2f}%)"),
        ("simulated", span_text(row)),
        ("checkpoints", f"{row['n_checkpoints'] + 1}, every "
                        f"{every_text(row['chunk_steps'], row['dt'])}"),
        ("samples", f"{row['n_samples']}, every {every_text(row['output_steps'], row['dt'])}"),
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
    story = _encounter_story(ledger, job_id)
    if story:
        fields.insert(1 + [k for k, _ in fields].index("method"), ("through encounters", story))
    if spec.get("particles"):
        fields.insert(1 + [k for k, _ in fields].index("bodies"),
                      ("test particles", particles_text(spec["particles"])))
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
                  f"numpy {ver.get('numpy')}; kernel {ver.get('kernel', 'scalar')}")
    return t, p, segs


def _encounter_story(ledger, job_id):
    """One line on a switching run's stretches of Gauss-Radau and its events, or ""."""
    evs = [e for e in ledger.events(job_id) if e["kind"] in (
        "switch_to_gauss_radau", "merger", "ejection", "star_merger")]
    if not evs:
        return ""
    names = json.loads(ledger.job(job_id)["spec_json"])["system"]
    names = [names["star"]["name"]] + [b["name"] for b in names["bodies"]]
    stretches = sum(e["kind"] == "switch_to_gauss_radau" for e in evs)
    parts = [f"{stretches} stretch{'es' if stretches != 1 else ''} of Gauss-Radau"]
    for e in evs:
        if e["kind"] != "switch_to_gauss_radau":
            who = ", ".join(map(str, body_list(e["bodies"], names)))
            parts.append(f"{e['kind']} of {who} at {format_time(abs(e['time'] or 0.0))}")
    return "; ".join(parts)


def particles_text(ps):
    """How a spec's test particles are given: "41 (1 listed; 40 drawn, seed 11, a 3.3 au-5.8 au)"."""
    listed = len(ps.get("listed") or [])
    d = ps.get("drawn")
    parts = [f"{listed} listed"] if listed else []
    if d:
        parts.append(f"{d['count']} drawn, seed {d['seed']}, a {d['a'][0]}-{d['a'][1]}, "
                     f"e {d['e'][0]}-{d['e'][1]}, i {d['i'][0]}-{d['i'][1]}")
    return f"{listed + (d['count'] if d else 0)} ({'; '.join(parts)})"


def _step_resolution(row):
    """The least resolved orbit at the job's start (see runner.inputs.stepcheck)."""
    from orbitledger.runner.inputs.spec import from_json, resolve
    from orbitledger.runner.inputs.stepcheck import summary

    return summary(resolve(from_json(row["spec_json"])))
