"""A static, self-contained HTML report of one job: status, provenance, audit, plots."""

import json
import time

from orbitledger.runner.presentation import plots
from orbitledger.runner.analysis.budgets import audit_job
from orbitledger.runner.presentation.tables import format_duration, outcome_text, progress_fraction
from orbitledger.runner.inputs.units import format_time


def job_report(ledger, job_id, compare_with=None):
    """The report page (str) of a job, optionally with its divergence from another job."""
    row = ledger.job(job_id)
    spec = json.loads(row["spec_json"])
    samples = ledger.store.read_samples(job_id, row["n_samples"])
    names = ledger.store.body_names(job_id)
    status = [("status", row["status"] + (f" ({row['reason']})" if row["reason"] else "")),
              ("method", f"{row['method']}, step {abs(row['dt']):.6g} d, corrector "
                         f"{spec['method']['corrector']}, relativity {spec['method']['relativity']}"),
              ("progress", f"{row['steps_done']} / {row['total_steps']} steps "
                           f"({100 * progress_fraction(row):.2f}%)"),
              ("simulated", format_time(row["steps_done"] * row["dt"])),
              ("outcome", outcome_text(row)),
              ("checkpoints", row["n_checkpoints"] + 1), ("samples", row["n_samples"]),
              ("spec sha256", row["spec_sha256"]),
              ("wall time", format_duration(row["wall_seconds"]))]
    prov = []
    for k, s in enumerate(ledger.segments(job_id), start=1):
        v = json.loads(s["versions"] or "{}")
        prov.append((k, s["host"], s["pid"], s["user"], f"{s['start_step']}..{s['end_step']}",
                     time.strftime("%Y-%m-%d %H:%M:%S", time.gmtime(s["started_at"])),
                     s["end_reason"] or "running", s["cpu"], s["platform"],
                     f"orbitledger {v.get('orbitledger')} ({v.get('source_commit')}), "
                     f"python {v.get('python')}, numpy {v.get('numpy')}, numba {v.get('numba')}, "
                     f"zarr {v.get('zarr')}, SQLAlchemy {v.get('sqlalchemy')}"))
    verdicts = [(v.quantity, f"{v.max_error:.3e}", "-" if v.budget is None else f"{v.budget:.1e}",
                 "-" if v.fit is None else f"{v.fit.alpha:.2f} ± {v.fit.alpha_err:.2f}",
                 "-" if v.projected is None else f"{v.projected:.3e}", v.verdict)
                for v in audit_job(ledger, job_id)]
    title = f"job {job_id}: {row['name']}"
    sections = [
        ("Status", plots.table_html(["", ""], status)),
        ("Provenance", plots.table_html(["#", "host", "pid", "user", "steps", "started (UTC)",
                                         "end", "CPU", "platform", "versions"], prov)),
        ("Error budgets", plots.table_html(["quantity", "max so far", "budget", "growth t^alpha",
                                            "projected at end", "verdict"], verdicts)),
        ("Energy error", f"<img alt='energy error' src='"
                         f"{plots.png_data_uri(plots.energy_figure(samples, title))}'>"),
        ("Orbital elements", f"<img alt='elements' src='"
                             f"{plots.png_data_uri(plots.elements_figure(samples, names[1:], title))}'>"),
    ]
    if compare_with is not None:
        from orbitledger.runner.analysis.divergence import compare_jobs, describe_divergence

        t, d, fit = compare_jobs(ledger, job_id, compare_with)
        text = describe_divergence(fit)
        fig = plots.divergence_figure(t, d, fit, f"jobs {job_id} and {compare_with}")
        sections.append((f"Divergence from job {compare_with}",
                         f"<p>{text}</p><img alt='divergence' src='{plots.png_data_uri(fig)}'>"))
    sections.append(("Cautions", "<p>A symplectic map is not accurate through close "
                     "encounters; a bounded energy error is not phase accuracy; in a chaotic "
                     "system one trajectory is a sample, not a prediction.</p>"))
    return plots.page(f"orbitledger report, {title}", sections)


def ensemble_section(ledger, ensemble_id):
    """HTML section of an ensemble's outcomes (table, statistics, survival plot)."""
    from orbitledger.runner.analysis.outcomes import summarise, summary_rows
    from orbitledger.runner.inputs.units import format_time

    ens = ledger.ensemble(ensemble_id)
    s = summarise(ledger.jobs(ensemble_id=ensemble_id))
    stats_rows = [("members", s.n), ("unstable", s.unstable),
                  ("instability fraction", f"{s.fraction:.3f}"),
                  ("95% Wilson interval", f"{s.ci[0]:.3f} - {s.ci[1]:.3f}"),
                  ("median time to instability",
                   "not reached" if s.median is None else format_time(s.median * 365.25))]
    img = plots.png_data_uri(plots.survival_figure(s, f"ensemble {ensemble_id}: {ens['name']}"))
    head, rows = summary_rows(s)
    return (plots.table_html(["outcome", "members", head], rows)
            + plots.table_html(["statistic", "value"], stats_rows)
            + f"<img alt='survival curve' src='{img}'>"), s
