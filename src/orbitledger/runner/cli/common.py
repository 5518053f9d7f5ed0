"""What every command shares: the typer app, the consoles, the shared options, and one-line
error handling (``_guard``)."""

from pathlib import Path
import sys
from typing import Annotated, Optional

import typer
from rich.console import Console

from orbitledger.runner import defaults
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
