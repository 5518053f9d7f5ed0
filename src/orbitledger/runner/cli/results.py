"""Commands that read committed work: outcomes, map, frequencies, particles, recheck, audit,
report, plot, compare, export, backward, reversibility, verify, replay."""

from pathlib import Path
from typing import Annotated, Optional

import typer

from orbitledger.runner.cli.common import (DbOpt, JobArg, JsonOpt, WorkspaceOpt, _guard, app,
                                           fail, open_ledger, out, print_json, write_atomic)


@app.command()
@_guard
def outcomes(ensemble_id: Annotated[int, typer.Argument(help="Ensemble id.", min=1)],
             workspace: WorkspaceOpt = None, db: DbOpt = None,
             plot: Annotated[Optional[Path], typer.Option(
                 help="Write the survival curve here (.png or .svg).")] = None,
             html: Annotated[Optional[Path], typer.Option(
                 help="Write a self-contained HTML report here.")] = None,
             as_json: JsonOpt = False):
    """An ensemble's outcomes: counts, instability fraction, survival curve."""
    from rich.table import Table

    from orbitledger.runner.analysis.outcomes import summarise, summary_rows
    from orbitledger.runner.inputs.text import body_names_from_json
    from orbitledger.runner.inputs.text import format_time
    from orbitledger.runner.presentation import plots

    from orbitledger.runner.analysis.outcomes import BODY_EVENTS, event_counts

    with open_ledger(workspace, db) as ledger:
        ens = ledger.ensemble(ensemble_id)
        names = body_names_from_json(ens["spec_json"])
        s = summarise(ledger.member_outcomes(ensemble_id), names=names)
        happened = event_counts(ledger.member_events(ensemble_id, BODY_EVENTS), s.n, names)
        if as_json:
            from orbitledger.runner.presentation.records import outcomes_record

            print_json(dict(outcomes_record(ensemble_id, ens["name"], s),
                            body_events=happened))
            return
        t = Table(title=f"Ensemble {ensemble_id}: {ens['name']} ({s.n} members)",
                  header_style="bold")
        head, rows = summary_rows(s)
        for col in ("outcome", "members", head):
            t.add_column(col)
        for r in rows:
            t.add_row(*map(str, r))
        out.print(t)
        out.print(f"instability fraction {s.unstable}/{s.n} = {s.fraction:.3f}, 95% Wilson "
                  f"interval {s.ci[0]:.3f}-{s.ci[1]:.3f}; median time to instability "
                  + ("not reached" if s.median is None else format_time(s.median * 365.25))
                  + " (Kaplan-Meier, unfinished members censored)")
        if happened:
            ev = Table(title="What happened to the members' bodies (through encounters)",
                       header_style="bold")
            ev.add_column("event")
            ev.add_column("members")
            for label, k in happened.items():
                ev.add_row(label, str(k))
            out.print(ev)
        if plot is not None:
            if plot.suffix.lower() not in (".png", ".svg"):
                fail(f"--plot must end in .png or .svg, got {plot.name!r}.")
            plots.save(plots.survival_figure(s, f"ensemble {ensemble_id}: {ens['name']}"), plot)
            out.print(f"survival curve written to {plot}")
        if html is not None:
            from orbitledger.runner.presentation.html import ensemble_section

            section, _ = ensemble_section(ledger, ensemble_id)
            write_atomic(html, plots.page(f"orbitledger ensemble {ensemble_id}: {ens['name']}",
                                          [("Outcomes", section)]))
            out.print(f"report written to {html}")


MAP_VIEWS = ("megno", "lyapunov_time", "survival_time")


@app.command("map")
@_guard
def map_cmd(ensemble_id: Annotated[int, typer.Argument(help="A grid ensemble's id.", min=1)],
            workspace: WorkspaceOpt = None, db: DbOpt = None,
            show: Annotated[str, typer.Option(
                help="Cell value to draw: megno, lyapunov_time or survival_time.")] = "megno",
            plot: Annotated[Optional[Path], typer.Option(
                help="Write the map here (.png or .svg).")] = None,
            dataset: Annotated[Optional[Path], typer.Option(
                help="Write the map as an xarray Dataset here (a .zarr folder).")] = None,
            html: Annotated[Optional[Path], typer.Option(
                help="Write a self-contained HTML page with all three maps here.")] = None):
    """A grid ensemble's stability map: each cell's class, MEGNO, Lyapunov and survival time."""
    from orbitledger.runner.analysis.stability_map import CHAOS_MARGIN, classes, stability_map
    from orbitledger.runner.inputs.text import format_time

    if show not in MAP_VIEWS:
        fail(f"--show must be one of {', '.join(MAP_VIEWS)}, got {show!r}.")
    if plot is not None and plot.suffix.lower() not in (".png", ".svg"):
        fail(f"--plot must end in .png or .svg, got {plot.name!r}.")
    if html is not None and html.suffix.lower() != ".html":
        fail(f"--html must end in .html, got {html.name!r}.")
    if dataset is not None and (dataset.suffix.lower() != ".zarr" or dataset.exists()):
        fail(f"--dataset must be a new folder ending in .zarr, got {str(dataset)!r}"
             + (" (it exists; remove it or choose another name)." if dataset.exists() else "."))
    with open_ledger(workspace, db) as ledger:
        ds = stability_map(ledger, ensemble_id)
    names = classes(ds)
    counts = {c: int((names == c).sum()) for c in ("regular", "chaotic", "unstable", "survived")}
    running = ~ds["stopped"].values
    reached = ds["time_reached"].values[running] if running.any() else ds["time_reached"].values
    shape = " x ".join(f"{ds.sizes[d]} {ds[d].attrs['long_name']} "
                       f"({ds[d].attrs['units']})" for d in ds["cell_class"].dims)
    out.print(f"ensemble {ensemble_id}: {ds.attrs['ensemble_name']}, {shape}; every cell not "
              f"stopped run to at least {format_time(float(reached.min()) * 365.25)}",
              markup=False)
    out.print(", ".join(f"{c} {n}" for c, n in counts.items() if n)
              + f" (chaotic: |<Y> - 2| > {CHAOS_MARGIN}, a convention)", markup=False)
    meanings = ds["outcome"].attrs["flag_meanings"].split()
    codes = ds["outcome"].values.ravel()
    pending = {m: int((codes == k).sum()) for k, m in enumerate(meanings)
               if m in ("queued", "running", "held", "cancelled", "failed")}
    if pending:
        out.print("not finished: " + ", ".join(f"{m} {n}" for m, n in pending.items())
                  + " (their cells show what they committed so far; `status` says why)",
                  markup=False)
    if plot is not None:
        from orbitledger.runner.presentation import plots

        plots.save(plots.stability_map_figure(ds, show), plot)
        out.print(f"map written to {plot}")
    if html is not None:
        from orbitledger.runner.presentation import plots

        summary = ", ".join(f"{c} {n}" for c, n in counts.items() if n)
        sections = [("Cells", plots.kv_html([
            ("grid", shape), ("classes", summary + f" (chaotic: |<Y> - 2| > {CHAOS_MARGIN}, "
                                                   "a convention)"),
            ("least advanced cell not stopped", format_time(float(reached.min()) * 365.25))]))]
        for view in MAP_VIEWS:
            fig = plots.stability_map_figure(ds, view)
            sections.append((view.replace("_", " "),
                             f"<img alt='{view}' src='{plots.png_data_uri(fig)}'>"))
        sections.append(("Cautions", "<p>MEGNO and the Lyapunov exponent are finite-time "
                         "indicators and the chaotic class is a convention; a cell's verdict "
                         "holds for the time it reached. A symplectic map is not accurate "
                         "through close encounters; in a chaotic system one trajectory is a "
                         "sample, not a prediction.</p>"))
        write_atomic(html, plots.page(f"orbitledger map, ensemble {ensemble_id}: "
                                      f"{ds.attrs['ensemble_name']}", sections))
        out.print(f"report written to {html}")
    if dataset is not None:
        tmp = dataset.with_name(dataset.name + ".part")
        ds.to_zarr(str(tmp), mode="w-", consolidated=False)
        tmp.rename(dataset)
        out.print(f"dataset written to {dataset}")


@app.command()
@_guard
def frequencies(job_id: JobArg, workspace: WorkspaceOpt = None, db: DbOpt = None,
                start: Annotated[Optional[str], typer.Option(
                    "--from", help="Start of the stretch (a time from the job's start).")] = None,
                end: Annotated[Optional[str], typer.Option(
                    "--to", help="End of the stretch (default: the last sample).")] = None,
                frame: Annotated[str, typer.Option(
                    help="invariable (plane normal to the total angular momentum) or "
                         "system (the spec's frame).")] = "invariable",
                terms: Annotated[int, typer.Option(help="Terms per signal.", min=1, max=20)] = 3,
                as_json: JsonOpt = False):
    """Fundamental frequencies of a job's samples (Laskar's frequency analysis).

    For each planet, the leading terms of z = e exp(i varpi) and zeta = sin(i/2)
    exp(i node), and how much the leading frequency moves between the two
    halves of the stretch (a chaos indicator: Laskar 1993).
    """
    from rich.table import Table

    from orbitledger.runner.analysis.frequency import analyse_job
    from orbitledger.runner.inputs.units import parse_quantity

    if frame not in ("invariable", "system"):
        fail(f"--frame must be invariable or system, got {frame!r}.")
    with open_ledger(workspace, db) as ledger:
        row = ledger.job(job_id)
        sign = 1.0 if row["dt"] > 0 else -1.0
        t0 = None if start is None else sign * parse_quantity("--from", start, "time")
        t1 = None if end is None else sign * parse_quantity("--to", end, "time")
        lo, hi = (t0, t1) if sign > 0 else (t1, t0)
        try:
            res = analyse_job(ledger, job_id, lo, hi, frame, terms)
        except ValueError as err:
            fail(str(err))
    if as_json:
        print_json(res)
        return
    t = Table(title=f"Job {job_id}: frequencies over {res['span_yr']:.6g} yr "
                    f"({res['samples']} samples, {frame} frame)", header_style="bold")
    for col in ("body", "signal", "frequency (\"/yr)", "period (yr)", "amplitude",
                "drift between halves"):
        t.add_column(col)
    for name, entry in res["bodies"].items():
        for label in ("z", "zeta"):
            first = True
            for term in entry[label]["terms"]:
                t.add_row(name if first and label == "z" else "", label if first else "",
                          f"{term['frequency_arcsec_per_yr']:.6g}", f"{term['period_yr']:.6g}",
                          f"{term['amplitude']:.4g}",
                          f"{entry[label]['drift']:.2e}" if first else "")
                first = False
    out.print(t)
    out.print("z = e exp(i varpi), zeta = sin(i/2) exp(i node); frequencies found one by one "
              "with a Hanning window (Laskar 1990, 1993). A drift of the leading frequency "
              "well above the analysis' own error between the halves marks chaotic diffusion.",
              markup=False)


@app.command()
@_guard
def particles(job_id: JobArg, workspace: WorkspaceOpt = None, db: DbOpt = None,
              bins: Annotated[int, typer.Option(help="Bins of initial semi-major axis.",
                                                min=1, max=200)] = 10,
              plot: Annotated[Optional[Path], typer.Option(
                  help="Write the survival curve and the fraction by initial a here "
                       "(.png or .svg).")] = None,
              as_json: JsonOpt = False):
    """A job's test particles: removals by kind, their survival curve, the fraction
    surviving by initial semi-major axis."""
    from rich.table import Table

    from orbitledger.runner.analysis.particles import particle_summary
    from orbitledger.runner.inputs.text import format_time
    from orbitledger.runner.presentation import plots

    if plot is not None and plot.suffix.lower() not in (".png", ".svg"):
        fail(f"--plot must end in .png or .svg, got {plot.name!r}.")
    with open_ledger(workspace, db) as ledger:
        row = ledger.job(job_id)
        s = particle_summary(ledger, job_id, bins=bins)
    if as_json:
        from orbitledger.runner.presentation.records import particles_record

        print_json(particles_record(s))
        return
    t = Table(title=f"Job {job_id}: {row['name']}, {s.n} test particles at "
                    f"{format_time(s.reached * 365.25)}", header_style="bold")
    t.add_column("outcome")
    t.add_column("particles")
    t.add_row("still integrated", str(s.left))
    for kind, c in sorted(s.counts.items()):
        t.add_row(f"removed: {kind}", str(c))
    out.print(t)
    out.print(f"surviving {s.left}/{s.at_risk}; median time to removal "
              + ("not reached" if s.median is None else format_time(s.median * 365.25))
              + " (Kaplan-Meier, particles left censored at the time reached)")
    b = Table(title="Surviving fraction by initial a", header_style="bold")
    for col in ("initial a (au)", "particles", "surviving", "fraction", "95% interval"):
        b.add_column(col)
    for k in range(len(s.bin_n)):
        n = int(s.bin_n[k])
        b.add_row(f"{s.edges[k]:.4g}-{s.edges[k + 1]:.4g}", str(n), str(int(s.bin_left[k])),
                  f"{s.bin_left[k] / n:.3f}" if n else "-",
                  f"{s.bin_lo[k]:.3f}-{s.bin_hi[k]:.3f}" if n else "-")
    out.print(b)
    if plot is not None:
        plots.save(plots.particles_figure(s, f"job {job_id}: {row['name']}"), plot)
        out.print(f"plot written to {plot}")


@app.command()
@_guard
def recheck(job_id: JobArg, workspace: WorkspaceOpt = None, db: DbOpt = None,
            start: Annotated[Optional[int], typer.Option(
                "--from", help="First checkpoint of the stretch (default: the one before "
                               "--to).", min=0)] = None,
            end: Annotated[Optional[int], typer.Option(
                "--to", help="Last checkpoint of the stretch (default: the last).",
                min=1)] = None,
            tolerance: Annotated[float, typer.Option(
                help="Gauss-Radau tolerance (|b7|/|a| per substep).", min=1e-9,
                max=1e-3)] = 1e-9,
            as_json: JsonOpt = False):
    """Integrate a committed stretch again with Gauss-Radau 15 and report how far the
    job's state at its end is from it: the map's error over the stretch, not just its
    energy error."""
    from rich.table import Table

    from orbitledger.runner.analysis.recheck import recheck as run_check
    from orbitledger.runner.inputs.text import format_time

    with open_ledger(workspace, db) as ledger:
        r = run_check(ledger, job_id, start, end, tolerance)
    span = abs(r.end["time"] - r.start["time"])
    if as_json:
        from orbitledger.runner.presentation.records import plain

        print_json(plain({
            "job": job_id, "from_checkpoint": r.start["idx"], "to_checkpoint": r.end["idx"],
            "span_yr": span / 365.25, "tolerance": r.tolerance, "substeps": r.substeps,
            "reference_energy_change": r.reference_energy_change,
            "map_energy_change": r.map_energy_change,
            "bodies": {name: {"position_au": p, "velocity_au_per_d": v, "d_a_au": d[0],
                              "d_e": d[1], "d_i_deg": d[2], "d_mean_longitude_deg": d[3]}
                       for name, p, v, d in zip(r.names[1:], r.position, r.velocity,
                                                r.d_elements)}}))
        return
    t = Table(title=f"Job {job_id}: checkpoints {r.start['idx']} to {r.end['idx']} "
                    f"({format_time(span)}) against Gauss-Radau 15", header_style="bold")
    for col in ("body", "|dr| (au)", "|dv| (au/d)", "da (au)", "de", "di (deg)",
                "d mean longitude (deg)"):
        t.add_column(col, justify="right" if col != "body" else "left")
    for name, p, v, d in zip(r.names[1:], r.position, r.velocity, r.d_elements):
        t.add_row(name, f"{p:.3e}", f"{v:.3e}", f"{d[0]:.3e}", f"{d[1]:.3e}", f"{d[2]:.3e}",
                  f"{d[3]:.3e}")
    out.print(t)
    out.print(f"the job minus the reference, heliocentric, at checkpoint {r.end['idx']}. "
              f"Reference: {r.substeps} substeps, tolerance {r.tolerance:g}, its energy "
              f"changed by {r.reference_energy_change:.2e} over the stretch (the job's by "
              f"{r.map_energy_change:.2e}). In a chaotic stretch of more than a few Lyapunov "
              "times the difference is mostly divergence, not the map's error.", markup=False)


@app.command()
@_guard
def audit(job_id: JobArg, workspace: WorkspaceOpt = None, db: DbOpt = None,
          as_json: JsonOpt = False):
    """Energy and angular-momentum budgets: growth law, projection, verdict."""
    from rich.table import Table

    from orbitledger.runner.analysis.budgets import audit_job

    from orbitledger.runner.presentation.html import chaos_text

    with open_ledger(workspace, db) as ledger:
        verdicts = audit_job(ledger, job_id)
        chaos = chaos_text(ledger, job_id)
    if as_json:
        from orbitledger.runner.presentation.records import audit_record

        print_json(audit_record(job_id, verdicts))
        return
    t = Table(title=f"Job {job_id}: error budgets", header_style="bold")
    for col in ("quantity", "max so far", "budget", "growth t^alpha", "projected at end", "verdict"):
        t.add_column(col)
    for v in verdicts:
        t.add_row(v.quantity, f"{v.max_error:.3e}", "-" if v.budget is None else f"{v.budget:.1e}",
                  "-" if v.fit is None else f"{v.fit.alpha:.2f} +/- {v.fit.alpha_err:.2f}",
                  "-" if v.projected is None else f"{v.projected:.3e}", v.verdict)
    out.print(t)
    out.print("alpha near 0: bounded oscillation; near 1/2: round-off random walk (Brouwer 1937);"
              " near 1: systematic drift.")
    if chaos is not None:
        out.print(chaos, markup=False)


@app.command()
@_guard
def report(job_id: JobArg, to: Annotated[Path, typer.Option(help="HTML file to write.")],
           workspace: WorkspaceOpt = None, db: DbOpt = None,
           compare: Annotated[Optional[int], typer.Option(
               help="Add the divergence from this job.")] = None):
    """Write a static, self-contained HTML report of a job."""
    from orbitledger.runner.presentation.html import job_report

    with open_ledger(workspace, db) as ledger:
        page = job_report(ledger, job_id, compare)
    write_atomic(to, page)
    out.print(f"report written to {to}")


@app.command()
@_guard
def plot(job_id: JobArg, to: Annotated[Path, typer.Option(help="Image file (.png or .svg).")],
         kind: Annotated[str, typer.Option(help="energy, elements or megno.")] = "energy",
         workspace: WorkspaceOpt = None, db: DbOpt = None):
    """Plot a job's energy error (log-log, with a t^1/2 line), its elements over time, or
    its MEGNO and Lyapunov exponent (jobs with `method.indicator = "megno"`)."""
    from orbitledger.runner.presentation import plots

    if kind not in ("energy", "elements", "megno"):
        fail(f"--kind must be 'energy', 'elements' or 'megno', got {kind!r}.")
    if to.suffix.lower() not in (".png", ".svg"):
        fail(f"--to must end in .png or .svg, got {to.name!r}.")
    from orbitledger.runner.presentation.html import event_marks

    with open_ledger(workspace, db) as ledger:
        row = ledger.job(job_id)
        samples = ledger.store.read_samples(job_id, row["n_samples"])
        names = ledger.store.body_names(job_id)[1:]
        marks = event_marks(ledger, job_id, samples)
    title = f"job {job_id}: {row['name']}"
    if kind == "megno" and "megno" not in samples:
        fail(f"job {job_id} carries no chaos indicator; submit it with "
             "`method.indicator = \"megno\"` to have one.")
    fig = (plots.energy_figure(samples, title, marks) if kind == "energy" else
           plots.elements_figure(samples, names, title, marks) if kind == "elements" else
           plots.megno_figure(samples, title))
    plots.save(fig, to)
    out.print(f"plot written to {to}")


@app.command("compare")
@_guard
def compare_cmd(job_a: JobArg, job_b: Annotated[int, typer.Argument(help="Other job id.", min=1)],
                workspace: WorkspaceOpt = None, db: DbOpt = None,
                plot: Annotated[Optional[Path], typer.Option(help="Divergence plot (.png/.svg).")]
                = None, as_json: JsonOpt = False):
    """Divergence of two jobs of one system; element ranges side by side."""
    from rich.table import Table

    from orbitledger.runner.presentation import plots
    from orbitledger.runner.analysis.divergence import compare_jobs, describe_divergence, element_ranges

    if job_a == job_b:
        fail(f"compare needs two different jobs, got job {job_a} twice.")
    with open_ledger(workspace, db) as ledger:
        t, d, fit = compare_jobs(ledger, job_a, job_b)
        ra, rb = element_ranges(ledger, job_a), element_ranges(ledger, job_b)
        names = ledger.store.body_names(job_a)[1:]
    if as_json:
        from orbitledger.runner.presentation.records import compare_record

        print_json(compare_record(job_a, job_b, t, d, fit, names, ra, rb))
        return
    out.print(describe_divergence(fit), markup=False, highlight=False)
    tab = Table(title=f"Element ranges: job {job_a} | job {job_b}", header_style="bold")
    for col in ("body", "a (au)", "e", "i (deg)"):
        tab.add_column(col)
    for b, name in enumerate(names):
        tab.add_row(name, *[f"{ra[k][b][0]:.5g}-{ra[k][b][1]:.5g} | {rb[k][b][0]:.5g}-"
                            f"{rb[k][b][1]:.5g}" for k in (0, 1, 2)])
    out.print(tab)
    if plot is not None:
        plots.save(plots.divergence_figure(t, d, fit, f"jobs {job_a} and {job_b}"), plot)
        out.print(f"plot written to {plot}")


@app.command()
@_guard
def export(job_id: JobArg, to: Annotated[Path, typer.Option(help="JSON file to write.")],
           workspace: WorkspaceOpt = None, db: DbOpt = None):
    """Write a job's record as JSON: spec, status, checkpoints, provenance of every segment, events."""
    import json

    from orbitledger.runner.presentation.records import full_record

    with open_ledger(workspace, db) as ledger:
        record = full_record(ledger, job_id)
    write_atomic(to, json.dumps(record, indent=1, sort_keys=True, allow_nan=False))
    out.print(f"job {job_id} exported to {to}")


@app.command()
@_guard
def backward(job_id: JobArg, workspace: WorkspaceOpt = None, db: DbOpt = None,
             checkpoint: Annotated[Optional[int], typer.Option(
                 help="Start from this checkpoint (default: the last).")] = None,
             at: Annotated[Optional[str], typer.Option(
                 help="Start from the committed checkpoint at this time, e.g. '300 kyr' "
                      "(checkpoint numbers shift with interruptions; times do not).")] = None):
    """Queue a backward run from a checkpoint of a job, back to its start."""
    from orbitledger.runner.inputs.units import parse_quantity

    if at is not None and checkpoint is not None:
        fail("give --at or --checkpoint, not both.")
    with open_ledger(workspace, db) as ledger:
        if at is not None:
            checkpoint = ledger.checkpoint_at(job_id, parse_quantity("--at", at, "time"))
        new = ledger.submit_backward(job_id, checkpoint)
    out.print(new)


@app.command()
@_guard
def reversibility(job_id: Annotated[int, typer.Argument(help="A finished backward job.", min=1)],
                  workspace: WorkspaceOpt = None, db: DbOpt = None):
    """How far a backward run misses its forward job's start."""
    from rich.table import Table

    from orbitledger.runner.analysis.divergence import reversibility as residual

    with open_ledger(workspace, db) as ledger:
        r = residual(ledger, job_id)
    t = Table(title=f"Reversibility of job {job_id} over {r['time'] / 365.25:.4g} yr",
              header_style="bold")
    for col in ("body", "|dx| (au)", "|dx|/r", "|dv| (au/d)", "|dv|/v"):
        t.add_column(col)
    for k, name in enumerate(r["bodies"]):
        t.add_row(name, f"{r['dx'][k]:.3e}", f"{r['dx_rel'][k]:.3e}", f"{r['dv'][k]:.3e}",
                  f"{r['dv_rel'][k]:.3e}")
    out.print(t)


@app.command()
@_guard
def verify(job_id: JobArg, workspace: WorkspaceOpt = None, db: DbOpt = None):
    """Check a job's hash chain, stored checkpoints and samples against the ledger."""
    from orbitledger.runner.analysis.integrity import verify as run_verify

    with open_ledger(workspace, db) as ledger:
        rep = run_verify(ledger, job_id)
    if rep.ok:
        out.print(f"job {job_id}: {rep.checked} checkpoints verified: chain, states and "
                  "samples match the ledger")
        return
    n_bad = len(rep.bad_checkpoints)
    fail(f"job {job_id}: checkpoint {rep.first_bad} is bad: {rep.problem} "
         f"({n_bad} of {rep.checked} checkpoints affected, {len(rep.problems)} problem(s) "
         "in all).", code=1)


@app.command()
@_guard
def replay(job_id: JobArg, workspace: WorkspaceOpt = None, db: DbOpt = None,
           checkpoint: Annotated[Optional[list[int]], typer.Option(
               help="Replay from this checkpoint to the next (repeatable).")] = None,
           sample: Annotated[Optional[int], typer.Option(
               help="Replay this many randomly chosen stretches.")] = None):
    """Re-run stretches between checkpoints and require them bit for bit."""
    from orbitledger.runner.analysis.integrity import replay as run_replay

    with open_ledger(workspace, db) as ledger:
        try:
            res = run_replay(ledger, job_id, indices=checkpoint, sample=sample)
        except ValueError as exc:
            fail(str(exc))
    bad = [k for k, ok in res if not ok]
    for k, ok in res:
        out.print(f"checkpoint {k} -> {k + 1}: {'reproduced bit for bit' if ok else 'DIFFERS'}")
    if bad:
        fail(f"job {job_id}: replay from checkpoint {bad[0]} does not reproduce checkpoint "
             f"{bad[0] + 1}.", code=1)
