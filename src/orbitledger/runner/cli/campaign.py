"""Commands that set up, queue and run work: init, submit, work, status, show, extend,
hold, release, cancel, batch, demo."""

import os
from pathlib import Path
import time
from typing import Annotated, Optional

import typer

from orbitledger.runner import defaults
from orbitledger.runner.cli.common import (_AS_PROGRAM, DbOpt, JobArg, JsonOpt, WorkspaceOpt,
                                           _guard, app, err, fail, init_workspace, open_ledger,
                                           out, print_json)
from orbitledger.runner.execution import signals as stopflag


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
    from orbitledger.runner.diskspace import human_bytes

    err.print(f"projected sample store: {human_bytes(size)} (at most {projected_samples(plan)} "
              f"samples per job x {len(ids)} job(s)); limit per job `span.max_store_gb` = "
              f"{spec.span.max_store_gb:g}", markup=False, highlight=False)
    for line in advice(plan):
        err.print(line, markup=False, highlight=False)


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
             help="Append the log here instead of standard error.")] = None,
         lanes: Annotated[int, typer.Option(
             min=1, help="Ensemble members a worker advances together with the batched "
                         "kernel (1: one at a time).")] = defaults.BATCH_LANES,
         peers: Annotated[int, typer.Option(
             min=1, hidden=True, help="Workers of the pool this one belongs to.")] = 1,
         db_wait: Annotated[float, typer.Option(
             min=0.0, help="Seconds to wait for a ledger database that went away (a "
                           "restart, a cut connection, a long lock) before stopping; "
                           "0: do not wait.")] = defaults.DB_WAIT_SECONDS):
    """Run workers until no work is left, a deadline, or a stop signal.

    Exit code 0: nothing left to claim; 3: stopped with work remaining; 1: a worker failed.
    """
    stopflag.install()  # before the heavy imports: a stop during start-up is clean
    from orbitledger.runner.execution.pool import run_pool, self_command
    from orbitledger.runner.execution.worklog import setup_logging

    show = not quiet and out.is_terminal
    setup_logging(log_level, log_file, quiet_default=show)

    if order not in ("breadth", "depth"):
        fail(f"--order must be 'breadth' or 'depth', got {order!r}.")
    end = None if deadline is None else time.time() + _parse_wall(deadline)
    if workers > 1:
        # Beside the live lines the workers log warnings only (as one worker does
        # beside its progress bars), unless a level was asked for.
        level = log_level or ("warning" if show else "info")
        argv = self_command() + ["work", "--workers", "1", "--order", order, "--quiet",
                                 "--lease", str(lease), "--log-level", level,
                                 "--lanes", str(lanes), "--peers", str(workers),
                                 "--db-wait", str(db_wait)]
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
        # Fail fast with one line if there is no workspace (or, given a database URL,
        # no database); a plain workspace is checked without the heavy imports, so
        # the workers start at once.
        from orbitledger.runner.ledger.workspace import check_workspace

        if db or os.environ.get(defaults.ENV_DB):
            open_ledger(workspace, db).close()
        else:
            check_workspace(workspace)
        if show:
            code = _pool_with_lines(argv, workers, workspace, db)
        else:
            code = run_pool(argv, workers)
        if _AS_PROGRAM[0]:
            stopflag.exit_now(code)
        raise typer.Exit(code)
    from orbitledger.runner.execution.worker import Worker

    beat = min(defaults.HEARTBEAT_SECONDS, lease / 4)
    with open_ledger(workspace, db, lease_seconds=lease) as ledger:
        if show:
            code = _work_with_progress(ledger, end, job, order, beat, lanes, db_wait)
        else:
            w = Worker(ledger, deadline=end, job_id=job, order=order, heartbeat_seconds=beat,
                       lanes=lanes, peers=peers, db_wait=db_wait)
            w.install_signal_handlers()
            code = w.run()
    if _AS_PROGRAM[0]:
        stopflag.exit_now(code)
    raise typer.Exit(code)


def _pool_with_lines(argv, workers, workspace, db):
    """Run the pool with a live line per worker (read from the ledger)."""
    from orbitledger.runner.execution.pool import run_pool
    from orbitledger.runner.ledger.workspace import check_workspace, db_url
    from orbitledger.runner.presentation.pool_lines import PoolLines

    ws = check_workspace(workspace)
    lines = PoolLines(db_url(ws, db), ws / defaults.STORE_NAME, out)
    lines.start()
    try:
        return run_pool(argv, workers, started=lines.add_worker)
    finally:
        lines.stop()


def _work_with_progress(ledger, end, job, order, beat, lanes, db_wait):
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    from orbitledger.runner.presentation.tables import format_rate
    from orbitledger.runner.inputs.text import format_time
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
                   heartbeat_seconds=beat, lanes=lanes, db_wait=db_wait)
        w.install_signal_handlers()
        return w.run()


@app.command()
@_guard
def status(workspace: WorkspaceOpt = None, db: DbOpt = None,
           ensemble: Annotated[Optional[int], typer.Option(help="Only this ensemble's members.")]
           = None,
           all_jobs: Annotated[bool, typer.Option(
               "--all", help="List every job, even in a large ledger.")] = False,
           as_json: JsonOpt = False):
    """A table of the jobs; in a large ledger, one row per ensemble and the other jobs."""
    from orbitledger.runner.presentation.tables import ensemble_table, status_table

    with open_ledger(workspace, db) as ledger:
        if ensemble is not None:
            ledger.ensemble(ensemble)  # one line if there is no such ensemble
        summarise = (not all_jobs and ensemble is None and not as_json
                     and ledger.n_jobs() > defaults.STATUS_LIST_MAX)
        if summarise:
            ens = ledger.ensemble_summaries()
            alone = ledger.jobs_outside_ensembles(limit=defaults.STATUS_LIST_MAX)
        else:
            rows = ledger.jobs(ensemble_id=ensemble)
    if as_json:
        from orbitledger.runner.presentation.records import job_record

        print_json({"jobs": [job_record(r) for r in rows]})
        return
    if not summarise:
        out.print(status_table(rows))
        return
    if ens:
        out.print(ensemble_table(ens))
    if alone:
        out.print(status_table(alone, title="Jobs outside ensembles"
                               + (f" (the last {len(alone)})"
                                  if len(alone) == defaults.STATUS_LIST_MAX else "")))
    out.print(f"{sum(sum(e['counts'].values()) for e in ens)} members of {len(ens)} "
              "ensemble(s) summarised; `status --ensemble ID` lists one ensemble's "
              "members, `status --all` every job.")


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
        import json

        eph = json.loads(ledger.job(job_id)["spec_json"])["system"].get("ephemeris")
        if eph and eph.get("sources"):
            out.print("Initial conditions read from an ephemeris; where every number came "
                      "from:", markup=False)
            for line in eph["sources"]:
                out.print("  " + line, markup=False, highlight=False)


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
