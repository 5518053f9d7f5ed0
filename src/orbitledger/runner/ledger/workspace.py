"""Workspaces: a folder holding the SQLite ledger (unless a URL is given) and the store."""

import os
from pathlib import Path

from orbitledger.runner import defaults
from orbitledger.runner.errors import NotFoundError

MARKER = "orbitledger-workspace"


def resolve_path(path=None):
    """The workspace folder: the option, else $ORBITLEDGER_WORKSPACE, else ./ledger."""
    return Path(path or os.environ.get(defaults.ENV_WORKSPACE) or defaults.DEFAULT_WORKSPACE)


def db_url(workspace, url=None):
    """The database URL: the option, else $ORBITLEDGER_DB, else the workspace's SQLite file."""
    url = url or os.environ.get(defaults.ENV_DB)
    if url:
        return url
    return f"sqlite:///{(Path(workspace) / defaults.SQLITE_NAME).resolve()}"


def init(path=None, url=None):
    """Create a workspace (idempotent); returns (folder, Ledger)."""
    ws = resolve_path(path)
    ws.mkdir(parents=True, exist_ok=True)
    (ws / defaults.STORE_NAME).mkdir(exist_ok=True)
    (ws / MARKER).write_text("This folder is an orbitledger workspace.\n")
    from orbitledger.runner.ledger.operations import Ledger

    return ws, Ledger(db_url(ws, url), ws / defaults.STORE_NAME)


def check_workspace(path=None):
    """The workspace folder, or NotFoundError in one line if there is none (light)."""
    ws = resolve_path(path)
    if not (ws / MARKER).exists():
        raise NotFoundError(f"no workspace at {ws}; run `orbitledger init` there first "
                            f"or point --workspace / ${defaults.ENV_WORKSPACE} at one.")
    return ws


def open_ledger(path=None, url=None, lease_seconds=defaults.LEASE_SECONDS):
    """Open an existing workspace's ledger."""
    from orbitledger.runner.ledger.operations import Ledger

    ws = check_workspace(path)
    return Ledger(db_url(ws, url), ws / defaults.STORE_NAME, lease_seconds=lease_seconds)
