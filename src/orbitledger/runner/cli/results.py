"""Commands that put committed work out or check it: report, plot, compare,
export, backward, reversibility, verify, replay, and the live page (serve)."""

from pathlib import Path
from typing import Annotated, Optional

import typer

from orbitledger.runner import defaults

from orbitledger.runner.cli.common import (DbOpt, JobArg, JsonOpt, WorkspaceOpt, _guard, app,
                                           fail, open_ledger, out, print_json, write_atomic)


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


@app.command()
@_guard
def serve(workspace: WorkspaceOpt = None, db: DbOpt = None,
          host: Annotated[str, typer.Option(
              help="Address to listen on; any but loopback needs --token.")] = "127.0.0.1",
          port: Annotated[int, typer.Option(help="Port to listen on.")] = 8350,
          token: Annotated[Optional[str], typer.Option(
              envvar="ORBITLEDGER_SERVE_TOKEN",
              help="A secret the page asks for (needed off loopback).")] = None,
          poll: Annotated[float, typer.Option(help="Seconds between the page's updates.")]
          = 2.0):
    """A live, read-only web page of the campaign: jobs, energy errors, ensembles'
    survival curves and stability maps, events (needs the 'serve' extra)."""
    from orbitledger.runner.ledger.operations import Ledger
    from orbitledger.runner.ledger.workspace import check_workspace, db_url
    from orbitledger.runner.presentation.live import LOOPBACK, make_app

    if host not in LOOPBACK and not token:
        fail(f"--host {host} opens the page to other machines; give --token SECRET (or "
             "ORBITLEDGER_SERVE_TOKEN) so that the page asks for it, or use --host 127.0.0.1.")
    if not 0 < port < 65536:
        fail(f"--port must be between 1 and 65535, got {port}.")
    if not poll > 0:
        fail(f"--poll must be a positive number of seconds, got {poll}.")
    try:
        import uvicorn
    except ImportError:
        fail("serve needs Starlette, uvicorn and plotly: pip install 'orbitledger[serve]'.")
    ws = check_workspace(workspace)
    with Ledger(db_url(ws, db), ws / defaults.STORE_NAME, read_only=True) as ledger:
        app_ = make_app(ledger, token=token, poll_seconds=poll)
        out.print(f"serving the campaign read-only at http://{host}:{port}/ (Ctrl-C stops)")
        uvicorn.run(app_, host=host, port=port, log_level="warning")
