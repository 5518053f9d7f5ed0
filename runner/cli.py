"""The `orbitledger` command: a thin shell over the runner's functions."""

from pathlib import Path
import sys
import time
from typing import Annotated, Optional

import typer
from rich.console import Console

from orbitledger.runner import defaults
from orbitledger.runner.execution import signals as stopflag
from orbitledger.runner.errors import OrbitLedgerError

app = typer.Typer(add_completion=True, no_args_is_help=True, pretty_exceptions_show_locals=False,
                  rich_markup_mode=None,
                  help="Queue, run, resume and audit long planetary-system integrations.")


def _version(value: bool):
    if value:
        from importlib.metadata import PackageNotFoundError, version

        try:
            print(f"orbitledger {version('orbitledger')}")
        except PackageNotFoundError:
            print("orbitledger (not installed)")
        raise typer.Exit(0)


@app.callback()
def _main(version: Annotated[Optional[bool], typer.Option(
        "--version", callback=_version, is_eager=True,
        help="Print the version and exit.")] = None):
    """Queue, run, resume and audit long planetary-system integrations."""
# Wide tables when output goes to a file or pipe (rich would assume 80 columns).
out = Console(width=None if sys.stdout.isatty() else 150)
err = Console(stderr=True, width=None if sys.stderr.isatty() else 400)

# Shared options, defined once.
WorkspaceOpt = Annotated[Optional[Path], typer.Option(
    "--workspace", "-w", envvar=defaults.ENV_WORKSPACE,
    help="Workspace folder (default ./ledger).")]
DbOpt = Annotated[Optional[str], typer.Option(
    "--db", envvar=defaults.ENV_DB,
    help="Database URL (default: the workspace's SQLite file).")]
JsonOpt = Annotated[bool, typer.Option("--json", help="Print JSON (stable keys, units in the key names) instead of tables.")]
JobArg = Annotated[int, typer.Argument(help="Job id.", min=1, max=2**62)]
# True when running as the `orbitledger` program (not inside a test's CliRunner).
_AS_PROGRAM = [False]


def init_workspace(path, url):
    from orbitledger.runner.ledger.workspace import init

    return init(path, url)


def open_ledger(path, url, **kw):
    from orbitledger.runner.ledger.workspace import open_ledger as _open

    return _open(path, url, **kw)


def write_atomic(path, text):
    """Write a text file so that readers never see it half-written (nothing left on failure)."""
    path = Path(path)
    if path.is_dir():
        fail(f"{path} is a folder; give a file name, e.g. {path / 'report.html'}.")
    tmp = path.with_name(path.name + ".part")
    try:
        tmp.write_text(text, encoding="utf-8")
        tmp.replace(path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def print_json(obj):
    """Print a record as JSON on stdout."""
    import json

    print(json.dumps(obj, indent=1, sort_keys=True, allow_nan=False))


def fail(message, code=2):
    """Print one line to stderr and exit non-zero."""
    err.print(f"error: {message}", markup=False, highlight=False, soft_wrap=True)
    raise typer.Exit(code)


def _db_errors():
    from sqlalchemy.exc import SQLAlchemyError

    return SQLAlchemyError


def _guard(fn):
    """Turn project errors into one line on stderr and exit code 2."""
    import functools

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except OrbitLedgerError as exc:
            fail(str(exc))
        except _db_errors() as exc:
            text = str(getattr(exc, "orig", exc)).strip().splitlines()[0]
            if "readonly" in text or "read-only" in text:
                fail("the ledger is read-only (a read-only workspace): viewing works, but "
                     "this command writes; run it where the workspace is writable.")
            fail(f"the ledger database refused the operation: {text}")
        except OSError as exc:
            if getattr(exc, "errno", None) == 30:  # EROFS
                fail(f"{exc.filename or 'the workspace'} is on a read-only file system; "
                     "this command writes, run it where the workspace is writable.")
            # A file the user named (or a folder it needs) cannot be written or read.
            where = f" {exc.filename}" if exc.filename else ""
            fail(f"could not use{where}: {exc.strerror or exc}; check the path and its "
                 "permissions.")
    return wrapper


@app.command()
@_guard
def init(workspace: WorkspaceOpt = None, db: DbOpt = None):
    """Create a workspace: a SQLite ledger (unless --db) and a Zarr store folder."""
    ws, ledger = init_workspace(workspace, db)
    ledger.close()
    out.print(f"workspace ready at {ws.resolve()}")


@app.command()
@_guard
def submit(spec_file: Annotated[Path, typer.Argument(help="Job spec (TOML).")],
           workspace: WorkspaceOpt = None, db: DbOpt = None,
           priority: Annotated[int, typer.Option(help="Higher runs first.")] = 0):
    """Validate a spec and queue it; prints the job id."""
    from orbitledger.runner.inputs import spec as spec_mod

    from orbitledger.runner.inputs.stepcheck import advice

    from orbitledger.runner.inputs.sanity import projected_samples, projected_store_bytes

    notes = []
    spec = spec_mod.load(spec_file, notes=notes)  # validated before the ledger is touched
    for line in notes:
        err.print(line, markup=False, highlight=False)
    with open_ledger(workspace, db) as ledger:
        if spec.ensemble is not None and spec.member is None:
            ens_id, ids = ledger.submit_ensemble(spec, priority=priority)
            out.print(f"ensemble {ens_id}: jobs {ids[0]}..{ids[-1]}")
        else:
            ids = [ledger.submit(spec, priority=priority)]
            out.print(ids[0])
    plan = spec_mod.resolve(spec)
    size = projected_store_bytes(plan) * len(ids)
    err.print(f"projected sample store: {_bytes(size)} (at most {projected_samples(plan)} "
              f"samples per job x {len(ids)} job(s)); limit per job `span.max_store_gb` = "
              f"{spec.span.max_store_gb:g}", markup=False, highlight=False)
    for line in advice(plan):
        err.print(line, markup=False, highlight=False)


def _bytes(n):
    for unit, size in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{n:.0f} B"


def _parse_wall(value, option="--deadline"):
    """A wall-clock duration in seconds (see :mod:`runner.walltime`)."""
    from orbitledger.runner.inputs.walltime import parse_wall

    return parse_wall(option, value)


@app.command()
@_guard
def work(workspace: WorkspaceOpt = None, db: DbOpt = None,
         workers: Annotated[int, typer.Option(min=1, help="Worker processes.")] = 1,
         deadline: Annotated[Optional[str], typer.Option(
             help="Checkpoint and stop after this wall time, e.g. '47 h'.")] = None,
         job: Annotated[Optional[int], typer.Option(help="Work on this job only.")] = None,
         order: Annotated[str, typer.Option(help="breadth (least advanced first) or depth.")]
         = "breadth",
         lease: Annotated[float, typer.Option(
             min=1.0, help="Lease length in seconds; a crashed worker's job waits this long.")]
         = defaults.LEASE_SECONDS,
         quiet: Annotated[bool, typer.Option(help="No progress display (events are still logged; see --log-level).")] = False,
         log_level: Annotated[Optional[str], typer.Option(
             help="Log events at this level: debug, info, warning (default: info, or "
                  "warning beside a progress display).")] = None,
         log_file: Annotated[Optional[Path], typer.Option(
             help="Append the log here instead of standard error.")] = None):
    """Run workers until no work is left, a deadline, or a stop signal.

    Exit code 0: nothing left to claim; 3: stopped with work remaining; 1: a worker failed.
    """
    stopflag.install()  # before the heavy imports: a stop during start-up is clean
    from orbitledger.runner.execution.worker import Worker, run_pool, self_command
    from orbitledger.runner.execution.worklog import setup_logging

    show = not quiet and out.is_terminal and workers == 1
    setup_logging(log_level, log_file, quiet_default=show)

    if order not in ("breadth", "depth"):
        fail(f"--order must be 'breadth' or 'depth', got {order!r}.")
    end = None if deadline is None else time.time() + _parse_wall(deadline)
    if workers > 1:
        argv = self_command() + ["work", "--workers", "1", "--order", order, "--quiet",
                                 "--lease", str(lease), "--log-level", log_level or "info"]
        if log_file is not None:
            argv += ["--log-file", str(log_file)]
        if workspace:
            argv += ["--workspace", str(workspace)]
        if db:
            argv += ["--db", db]
        if end is not None:
            argv += ["--deadline", f"{max(0.0, end - time.time()):.3f} s"]
        if job is not None:
            argv += ["--job", str(job)]
        open_ledger(workspace, db).close()  # fail fast with one line if there is no workspace
        code = run_pool(argv, workers)
        if _AS_PROGRAM[0]:
            stopflag.exit_now(code)
        raise typer.Exit(code)
    beat = min(defaults.HEARTBEAT_SECONDS, lease / 4)
    with open_ledger(workspace, db, lease_seconds=lease) as ledger:
        if show:
            code = _work_with_progress(ledger, end, job, order, beat)
        else:
            w = Worker(ledger, deadline=end, job_id=job, order=order, heartbeat_seconds=beat)
            w.install_signal_handlers()
            code = w.run()
    if _AS_PROGRAM[0]:
        stopflag.exit_now(code)
    raise typer.Exit(code)


def _work_with_progress(ledger, end, job, order, beat):
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    from orbitledger.runner.presentation.tables import format_rate
    from orbitledger.runner.inputs.units import format_time
    from orbitledger.runner.execution.worker import Worker

    tasks = {}
    last = [0.0]
    with Progress(TextColumn("{task.description}"), BarColumn(), TextColumn("{task.percentage:>5.1f}%"),
                  TextColumn("{task.fields[sim]}"), TextColumn("{task.fields[rate]}"),
                  TimeRemainingColumn(), console=out) as bar:
        def progress(row, step, rate):
            now = time.time()
            if now - last[0] < 0.2:
                return
            last[0] = now
            if row["id"] not in tasks:
                tasks[row["id"]] = bar.add_task(f"job {row['id']} {row['name']}",
                                                total=row["total_steps"], sim="", rate="")
            bar.update(tasks[row["id"]], completed=step, sim=format_time(abs(step * row["dt"])),
                       rate=format_rate(rate))

        w = Worker(ledger, deadline=end, job_id=job, order=order, progress=progress,
                   heartbeat_seconds=beat)
        w.install_signal_handlers()
        return w.run()


@app.command()
@_guard
def status(workspace: WorkspaceOpt = None, db: DbOpt = None,
           ensemble: Annotated[Optional[int], typer.Option(help="Only this ensemble's members.")]
           = None, as_json: JsonOpt = False):
    """A table of all jobs."""
    from orbitledger.runner.presentation.tables import status_table

    with open_ledger(workspace, db) as ledger:
        if ensemble is not None:
            ledger.ensemble(ensemble)  # one line if there is no such ensemble
        rows = ledger.jobs(ensemble_id=ensemble)
    if as_json:
        from orbitledger.runner.presentation.records import job_record

        print_json({"jobs": [job_record(r) for r in rows]})
        return
    out.print(status_table(rows))


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
    from orbitledger.runner.inputs.units import format_time
    from orbitledger.runner.presentation import plots

    with open_ledger(workspace, db) as ledger:
        ens = ledger.ensemble(ensemble_id)
        s = summarise(ledger.jobs(ensemble_id=ensemble_id))
        if as_json:
            from orbitledger.runner.presentation.records import outcomes_record

            print_json(outcomes_record(ensemble_id, ens["name"], s))
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


@app.command()
@_guard
def show(job_id: JobArg, workspace: WorkspaceOpt = None, db: DbOpt = None,
         as_json: JsonOpt = False):
    """One job in detail, with its provenance."""
    from orbitledger.runner.presentation.tables import show_tables

    with open_ledger(workspace, db) as ledger:
        if as_json:
            from orbitledger.runner.presentation.records import full_record

            print_json(full_record(ledger, job_id))
            return
        t, p, _ = show_tables(ledger, job_id)
        out.print(t)
        out.print(p)


@app.command()
@_guard
def extend(job_id: JobArg,
           to: Annotated[Optional[str], typer.Option(help="New span length, e.g. '4 Myr'.")] = None,
           by: Annotated[Optional[str], typer.Option(help="Add this much, e.g. '1 Myr'.")] = None,
           workspace: WorkspaceOpt = None, db: DbOpt = None):
    """Move a job's end to a later time; a done job is queued again."""
    from orbitledger.runner.inputs.units import format_time, parse_quantity

    if (to is None) == (by is None):
        fail("give exactly one of --to (new span length) or --by (time to add).")
    with open_ledger(workspace, db) as ledger:
        row = ledger.job(job_id)
        step = abs(row["dt"])
        if to is not None:
            length = parse_quantity("--to", to, "time")
            new_total = round(length / step)
        else:
            new_total = row["total_steps"] + round(parse_quantity("--by", by, "time") / step)
        ledger.extend(job_id, new_total)
        out.print(f"job {job_id} now runs to {format_time(new_total * step)} "
                  f"({new_total} steps of {format_time(step)})")


def _simple(verb):
    def command(job_id: JobArg, workspace: WorkspaceOpt = None, db: DbOpt = None):
        with open_ledger(workspace, db) as ledger:
            result = getattr(ledger, verb)(job_id)
        out.print(f"job {job_id}: {result or verb + 'd'}")
    command.__name__ = verb
    return command


app.command("hold", help="Pause a job (a running one at its next safe point).")(_guard(_simple("hold")))
app.command("release", help="Queue a held or failed job again.")(_guard(_simple("release")))
app.command("cancel", help="Abandon a job (a running one at its next safe point).")(
    _guard(_simple("cancel")))


@app.command()
@_guard
def audit(job_id: JobArg, workspace: WorkspaceOpt = None, db: DbOpt = None,
          as_json: JsonOpt = False):
    """Energy and angular-momentum budgets: growth law, projection, verdict."""
    from rich.table import Table

    from orbitledger.runner.analysis.budgets import audit_job

    with open_ledger(workspace, db) as ledger:
        verdicts = audit_job(ledger, job_id)
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
         kind: Annotated[str, typer.Option(help="energy or elements.")] = "energy",
         workspace: WorkspaceOpt = None, db: DbOpt = None):
    """Plot a job's energy error (log-log, with a t^1/2 line) or its elements over time."""
    from orbitledger.runner.presentation import plots

    if kind not in ("energy", "elements"):
        fail(f"--kind must be 'energy' or 'elements', got {kind!r}.")
    if to.suffix.lower() not in (".png", ".svg"):
        fail(f"--to must end in .png or .svg, got {to.name!r}.")
    with open_ledger(workspace, db) as ledger:
        row = ledger.job(job_id)
        samples = ledger.store.read_samples(job_id, row["n_samples"])
        names = ledger.store.body_names(job_id)[1:]
    title = f"job {job_id}: {row['name']}"
    fig = plots.energy_figure(samples, title) if kind == "energy" else \
        plots.elements_figure(samples, names, title)
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
def batch(workspace: WorkspaceOpt = None, db: DbOpt = None,
          tasks: Annotated[int, typer.Option(help="Array tasks (one worker each).")] = 1,
          time_limit: Annotated[str, typer.Option("--time", help="Wall time per task, e.g. '48 h'.")]
          = "24 h",
          margin: Annotated[float, typer.Option(
              help="Seconds before the limit at which SLURM sends SIGUSR1.")] = 300.0,
          partition: Annotated[Optional[str], typer.Option(help="SLURM partition.")] = None,
          output: Annotated[Optional[Path], typer.Option(
              help="Script file (default <workspace>/slurm/orbitledger.sbatch).")] = None,
          do_submit: Annotated[bool, typer.Option("--submit", help="Also sbatch it.")] = False,
          dry_run: Annotated[bool, typer.Option(
              "--dry-run", help="Only write the script; do not connect to the database "
              "(prepare it anywhere).")] = False):
    """Write (and with --submit, submit) a SLURM array script of workers."""
    from orbitledger.runner.execution import slurm as cluster
    from orbitledger.runner.ledger.status import ACTIVE
    from orbitledger.runner.ledger.workspace import resolve_path

    if dry_run and do_submit:
        fail("--dry-run and --submit exclude each other; drop one.")
    ws = resolve_path(workspace)
    url = cluster.resolve_url(ws, db)
    cluster.check_shared_db(url)
    text = cluster.script(ws, tasks, _parse_wall(time_limit, "--time"), margin,
                         partition=partition)
    if not dry_run:
        with open_ledger(workspace, db) as ledger:  # the workspace must exist
            counts = ledger.counts()
        left = sum(counts.get(st.value, 0) for st in ACTIVE)
        if tasks > left:
            err.print(f"note: --tasks {tasks} for {left} job(s) with work left: "
                      f"{tasks - left} task(s) would find nothing to claim and end at once.",
                      markup=False, highlight=False)
    if output is None:
        (ws / "slurm").mkdir(parents=True, exist_ok=True)
    path = output or ws / "slurm" / "orbitledger.sbatch"
    cluster.write(path, text)
    out.print(f"script written to {path}")
    if do_submit:
        out.print(f"submitted SLURM job {cluster.submit(path, url)}")


@app.command()
@_guard
def demo(workspace: Annotated[Path, typer.Option(help="Demo workspace folder.")]
         = Path("demo-ledger")):
    """Set up a demo workspace, queue two invented-system jobs, interrupt, resume, report."""
    from orbitledger.runner.demo import run_demo

    raise typer.Exit(run_demo(workspace, out))


def main():
    """Entry point of the `orbitledger` program."""
    _AS_PROGRAM[0] = True
    app()


if __name__ == "__main__":
    main()
