"""Plain log lines for `work`: one per event, for batch logs (standard `logging`).

Events: start, claim, commit (time reached and rate), end of a job, deadline,
stop signal, exit code, and, in a pool, a worker's death with its signal.
"""

import logging
import sys

LOG = logging.getLogger("orbitledger.work")
_LEVELS = {"debug": logging.DEBUG, "info": logging.INFO, "warning": logging.WARNING}


def setup_logging(level=None, path=None, quiet_default=False):
    """Send the work log to `path` (appended) or standard error at `level`."""
    from orbitledger.runner.errors import OrbitLedgerError

    if level is not None and level.lower() not in _LEVELS:
        raise OrbitLedgerError(f"--log-level must be one of debug, info, warning, got {level!r}.")
    lvl = _LEVELS[level.lower()] if level else (logging.WARNING if quiet_default else logging.INFO)
    handler = logging.FileHandler(path) if path else logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s pid=%(process)d %(message)s",
                                           "%Y-%m-%dT%H:%M:%S%z"))
    LOG.handlers[:] = [handler]
    LOG.setLevel(lvl)
    LOG.propagate = False
