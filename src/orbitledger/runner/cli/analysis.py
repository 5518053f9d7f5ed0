"""Commands that analyse committed work: outcomes and map of an ensemble;
frequencies, particles, recheck and audit of a job."""

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
