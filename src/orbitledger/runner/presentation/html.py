"""A static, self-contained HTML report of one job: status, provenance, audit, plots."""

import html
import json
import time

from orbitledger.runner.analysis.budgets import audit_job
from orbitledger.runner.presentation import plots
from orbitledger.runner.inputs.text import format_time
from orbitledger.runner.presentation.tables import (every_text, format_duration, outcome_text,
                                                    progress_fraction, span_text, step_text)


def _spec_tables(spec, row):
    """The inputs as a referee reads them: description, bodies as given, settings."""
    from orbitledger.runner.inputs.units import parse_quantity

    parts = []
    total = abs(row["total_steps"] * row["dt"])
    asked = parse_quantity("span.length", spec["span"]["length"], "time")
    extended = (f" as submitted, extended to {format_time(total)}"
                if abs(total - asked) > abs(row["dt"]) else "")
    if spec.get("description"):
        parts.append(f"<p>{html.escape(spec['description'])}</p>")
    system = spec["system"]
    star = system["star"]
    parts.append("<h3>System as specified</h3>")
    parts.append(plots.kv_html([
        ("frame of the elements", system.get("frame", "heliocentric")),
        ("star", f"{star['name']}, mass {star['mass']}"
                 + (f", radius {star['radius']}" if star.get("radius") else ""))]))
    rows = []
    for b in system["bodies"]:
        if b.get("position") is not None:
            rows.append((b["name"], b["mass"], "position " + ", ".join(b["position"]),
                         "velocity " + ", ".join(b["velocity"] or []), "", "", "", ""))
        else:
            rows.append((b["name"], b["mass"], b["a"], b["e"], b["i"], b["node"], b["peri"],
                         b["mean_anomaly"]))
    parts.append(plots.table_html(["body", "mass", "a", "e", "i", "node", "peri",
                                   "mean anomaly"], rows))
    method, span, stops, budget = spec["method"], spec["span"], spec["stops"], spec["budget"]
    settings = [
        ("method", f"{method['name']}, step {method['step']}, corrector order "
                   f"{method['corrector']}, general relativity "
                   f"{'on' if method['relativity'] else 'off'}"),
        ("span", f"{span['length']} {span['direction']}" + extended
         + f", checkpoint every {span['chunk'] or 'default'}, sample every "
           f"{span['output'] or 'default'}"),
        ("energy budget", f"{budget['energy']:g} (relative), on exceeding it: "
                          f"{budget['on_exceed']}"),
        ("angular-momentum budget", "none" if budget["angular_momentum"] is None
         else f"{budget['angular_momentum']:g}"),
        ("stop: close encounter", "off" if not stops["hill"] else
         f"within {stops['hill']:g} mutual Hill radii"),
        ("stop: escape", stops["escape_distance"] or "off"),
        ("stop: unbound and beyond", stops["unbound_escape_distance"] or "off"),
        ("stop: star contact", stops["star_contact_distance"] or "the star's radius"),
        ("stop: eccentricity", "off" if not stops["max_ecc"] else f"above {stops['max_ecc']:g}"),
    ]
    if spec.get("ensemble"):
        ens = spec["ensemble"]
        pert = ens.get("perturb") or {}
        rule = ", ".join(f"{k} {v}" for k, v in pert.items()) or "; ".join(
            f"{a['body']} {a['quantity']} from {a['first']} to {a['last']} in {a['count']}"
            for a in ens.get("grid") or [])
        settings.append(("ensemble member", f"{spec.get('member')} of {ens['members']}: "
                         + rule))
    parts.append("<h3>Settings</h3>" + plots.kv_html(settings))
    eph = spec["system"].get("ephemeris")
    if eph and eph.get("sources"):
        parts.append("<h3>Where the initial conditions came from</h3><ul>"
                     + "".join(f"<li>{html.escape(line)}</li>" for line in eph["sources"])
                     + "</ul>")
    parts.append("<details><summary>The spec as stored (JSON)</summary><pre>"
                 + html.escape(json.dumps(spec, indent=2, sort_keys=True)) + "</pre></details>")
    return "".join(parts)


def _initial_elements(samples, names):
    """Heliocentric osculating elements of every body at the first sample."""
    el = samples["elements"][0]
    rows = [(name, f"{el[b, 0]:.9g}", f"{el[b, 1]:.6g}", f"{el[b, 2]:.6g}", f"{el[b, 3]:.6g}",
             f"{el[b, 4]:.6g}", f"{el[b, 5]:.6g}") for b, name in enumerate(names)]
    return plots.table_html(["body", "a (au)", "e", "i (deg)", "node (deg)", "peri (deg)",
                             "mean anomaly (deg)"], rows)


# How a segment of work ended, in words (the ledger stores the job's next state).
_ENDED = {"queued": "handed back (deadline, slice or stop signal)",
          "lease_expired": "lease lapsed (worker lost)", "done": "finished the span",
          "stopped": "a stop condition", "held": "held", "cancelled": "cancelled",
          "failed": "failed", "fenced": "fenced off (another worker holds the job)",
          "load_failed": "its checkpoint could not be loaded",
          "numerical_failure": "numerical failure", "store_error": "store error"}


def _provenance(ledger, job_id):
    """Segments of work, then the software and machines they ran on (one row each)."""
    segs, soft = [], {}
    for k, s in enumerate(ledger.segments(job_id), start=1):
        v = json.loads(s["versions"] or "{}")
        key = (s["cpu"] or "-", s["platform"] or "-",
               f"orbitledger {v.get('orbitledger')} (source {v.get('source_commit') or 'unknown'})"
               f"; python {v.get('python')}, numpy {v.get('numpy')}, numba {v.get('numba')}, "
               f"zarr {v.get('zarr')}, SQLAlchemy {v.get('sqlalchemy')}")
        ref = soft.setdefault(key, f"S{len(soft) + 1}")
        wall = (s["ended_at"] - s["started_at"]) if s["ended_at"] else None
        steps = "-" if s["end_step"] is None else f"{s['start_step']} to {s['end_step']}"
        segs.append((k, s["host"], s["pid"], s["user"] or "-", steps,
                     time.strftime("%Y-%m-%d %H:%M:%S", time.gmtime(s["started_at"])),
                     format_duration(wall), _ENDED.get(s["end_reason"], s["end_reason"])
                     or "still running", ref))
    return (plots.table_html(["#", "host", "pid", "user", "steps", "started (UTC)", "wall",
                              "ended by", "software"], segs)
            + plots.table_html(["software", "CPU", "platform", "versions"],
                               [(ref,) + key for key, ref in soft.items()]))


def chaos_text(ledger, job_id, samples=None):
    """One line on a job's chaos indicator at its last sample, or None without one."""
    row = ledger.job(job_id)
    if samples is None:
        n = row["n_samples"]
        samples = ledger.store.read_samples(job_id, n, start=max(n - 1, 0)) if n else {}
    if "megno" not in samples or not len(samples["megno"]):
        return None
    y = float(samples["megno"][-1])
    lam = float(samples["lyapunov"][-1]) * 365.25
    t = format_time(abs(float(samples["time"][-1])))
    verdict = ("near 2: quasi-periodic so far" if abs(y - 2.0) <= 0.5 else
               "below 2: nearly periodic so far" if y < 1.5 else
               "above 2: chaotic (it grows like lambda t / 2)")
    if abs(y - 2.0) > 0.5 and y > 2.0 and lam > 0:
        life = f"Lyapunov time {1.0 / lam:.4g} yr"
    else:
        life = "not a Lyapunov time: on a regular orbit it falls like ln(t)/t"
    return (f"MEGNO <Y> = {y:.4g} at {t} ({verdict}); finite-time Lyapunov exponent "
            f"{lam:.3g} /yr ({life}). Finite-time indicators: thresholds are conventions.")


def _frequency_section(ledger, job_id):
    """Leading frequencies of each planet's z and zeta (or why there are none)."""
    from orbitledger.runner.analysis.frequency import analyse_job

    try:
        res = analyse_job(ledger, job_id, n_terms=2)
    except ValueError as err:
        return f"<p>{html.escape(str(err))}</p>"
    rows = []
    for name, entry in res["bodies"].items():
        for label in ("z", "zeta"):
            for k, term in enumerate(entry[label]["terms"]):
                rows.append((name if k == 0 and label == "z" else "", label if k == 0 else "",
                             f"{term['frequency_arcsec_per_yr']:.6g}",
                             f"{term['period_yr']:.6g}", f"{term['amplitude']:.4g}",
                             f"{entry[label]['drift']:.2e}" if k == 0 else ""))
    return (f"<p>Over {res['span_yr']:.6g} yr ({res['samples']} samples, invariable plane): "
            "z = e exp(i varpi), zeta = sin(i/2) exp(i node), terms found one by one with a "
            "Hanning window (Laskar 1990, 1993); the drift is the relative change of the "
            "leading frequency between the two halves (large: chaotic diffusion, or a "
            "stretch too short for that frequency).</p>"
            + plots.table_html(["body", "signal", "frequency (\"/yr)", "period (yr)",
                                "amplitude", "drift between halves"], rows))


def _particles_section(ledger, job_id, title):
    """Removals by kind and the figure of `orbitledger particles`."""
    from orbitledger.runner.analysis.particles import particle_summary

    s = particle_summary(ledger, job_id)
    rows = [("still integrated", s.left)] + sorted(s.counts.items())
    fig = plots.particles_figure(s, title)
    return (f"<p>{s.n} test particles; {s.left} still integrated. Removed particles met a "
            "stop condition (or stopped being finite numbers); the survival curve censors "
            "the others at the time reached.</p>"
            + plots.table_html(["outcome", "particles"], rows)
            + f"<img alt='test particles' src='{plots.png_data_uri(fig)}'>")


def event_marks(ledger, job_id, samples):
    """(days since the first sample, label) of a job's mergers and ejections, for plots."""
    from orbitledger.runner.analysis.outcomes import BODY_EVENTS
    from orbitledger.runner.inputs.text import body_list

    if not len(samples.get("time", ())):
        return []
    names = ledger.store.body_names(job_id)
    t0 = float(samples["time"][0])
    out = []
    for e in ledger.events(job_id):
        if e["kind"] in BODY_EVENTS and e["time"] is not None:
            who = ", ".join(map(str, body_list(e["bodies"], names)))
            out.append((abs(float(e["time"]) - t0), f"{e['kind']} ({who})"))
    return out


def job_report(ledger, job_id, compare_with=None):
    """The report page (str) of a job, optionally with its divergence from another job."""
    from orbitledger.runner.analysis.integrity import verify

    row = ledger.job(job_id)
    spec = json.loads(row["spec_json"])
    samples = ledger.store.read_samples(job_id, row["n_samples"])
    names = ledger.store.body_names(job_id)
    status = [("status", row["status"] + (f" ({row['reason']})" if row["reason"] else "")),
              ("outcome", outcome_text(row)),
              ("simulated", span_text(row)),
              ("progress", f"{row['steps_done']} of {row['total_steps']} steps "
                           f"({100 * progress_fraction(row):.2f}%)"),
              ("step", step_text(row["dt"])),
              ("checkpoints", f"{row['n_checkpoints'] + 1}, every "
                              f"{every_text(row['chunk_steps'], row['dt'])}"),
              ("samples", f"{row['n_samples']}, every "
                          f"{every_text(row['output_steps'], row['dt'])}"),
              ("wall time", format_duration(row["wall_seconds"])),
              ("spec SHA-256", row["spec_sha256"])]
    if row["parent_job_id"]:
        status.append(("started from", f"job {row['parent_job_id']}, checkpoint "
                                       f"{row['parent_checkpoint']}"))
    rep = verify(ledger, job_id)
    check = (f"{rep.checked} of {rep.checked} checkpoints: hash chain, stored states and "
             "sample blocks match the ledger" if rep.ok else
             f"checkpoint {rep.first_bad}: {rep.problem}")
    verdicts = [(v.quantity, f"{v.max_error:.3e}", "-" if v.budget is None else f"{v.budget:.1e}",
                 "-" if v.fit is None else f"{v.fit.alpha:.2f} ± {v.fit.alpha_err:.2f}",
                 "-" if v.projected is None else f"{v.projected:.3e}", v.verdict)
                for v in audit_job(ledger, job_id)]
    title = f"job {job_id}: {row['name']}"
    marks = event_marks(ledger, job_id, samples)
    sections = [
        ("Summary", plots.kv_html(status)),
        ("Inputs", _spec_tables(spec, row)),
        ("Initial conditions", "<p>Heliocentric osculating elements at the first sample, "
                               "as integrated (after any ensemble perturbation).</p>"
                               + _initial_elements(samples, names[1:])),
        ("Provenance", _provenance(ledger, job_id)),
        ("Audit", plots.kv_html([("store check (verify)", check)])
         + plots.table_html(["quantity", "max so far", "budget", "growth t^alpha",
                             "projected at end", "verdict"], verdicts)),
        ("Energy error", f"<img alt='energy error' src='"
                         f"{plots.png_data_uri(plots.energy_figure(samples, title, marks))}'>"),
        ("Orbital elements", "<img alt='elements' src='" + plots.png_data_uri(
            plots.elements_figure(samples, names[1:], title, marks)) + "'>"),
    ]
    chaos = chaos_text(ledger, job_id, samples)
    if chaos is not None:
        sections.append(("Chaos indicator", f"<p>{html.escape(chaos)}</p><img alt='megno' src='"
                         f"{plots.png_data_uri(plots.megno_figure(samples, title))}'>"))
    sections.append(("Frequencies", _frequency_section(ledger, job_id)))
    if "particles_left" in samples:
        sections.append(("Test particles", _particles_section(ledger, job_id, title)))
    if compare_with is not None:
        from orbitledger.runner.analysis.divergence import compare_jobs, describe_divergence

        t, d, fit = compare_jobs(ledger, job_id, compare_with)
        text = describe_divergence(fit)
        fig = plots.divergence_figure(t, d, fit, f"jobs {job_id} and {compare_with}")
        sections.append((f"Divergence from job {compare_with}",
                         f"<p>{html.escape(text)}</p><img alt='divergence' "
                         f"src='{plots.png_data_uri(fig)}'>"))
    sections.append(("Cautions", "<p>A symplectic map is not accurate through close "
                     "encounters; a bounded energy error is not phase accuracy; in a chaotic "
                     "system one trajectory is a sample, not a prediction.</p>"))
    generated = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime())
    return plots.page(f"orbitledger report, {title}", sections,
                      subtitle=f"Generated {generated} from the ledger and the store.")


def ensemble_section(ledger, ensemble_id):
    """HTML section of an ensemble's outcomes (table, statistics, survival plot)."""
    from orbitledger.runner.analysis.outcomes import summarise, summary_rows
    from orbitledger.runner.inputs.text import body_names_from_json
    from orbitledger.runner.inputs.text import format_time

    ens = ledger.ensemble(ensemble_id)
    s = summarise(ledger.member_outcomes(ensemble_id),
                      names=body_names_from_json(ens["spec_json"]))
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
