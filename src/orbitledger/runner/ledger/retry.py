"""Riding out a database that goes away for a while.

A PostgreSQL server restarted, a connection cut mid-transaction, a SQLite file
locked longer than its busy timeout: a worker's ledger operations are tried
again with growing pauses (0.25 s doubling up to 10 s) for at most
``Ledger.retry_seconds`` (the worker's `--db-wait`; 0, the default of every
other command, means no retry), then the worker stops with one line.

Every operation retried is safe to run again: a transaction the server did
not finish was rolled back whole, and a commit whose answer was lost is
recognised on the next try by its checkpoint row (same job, index, fencing
token and state hash) and not made twice.
"""

import functools
import logging
import time

from sqlalchemy.exc import DBAPIError

from orbitledger.runner.errors import LedgerError

LOG = logging.getLogger("orbitledger.work")

# SQLSTATE classes and codes that mean "the connection or server went away, try
# again": 08 connection exceptions; admin, crash and start-up shutdowns;
# serialization failures and deadlocks (the transaction was rolled back).
_AGAIN_CODES = ("57P01", "57P02", "57P03", "40001", "40P01")
_AGAIN_WORDS = ("database is locked", "database is busy", "connection refused",
                "could not connect", "server closed the connection", "connection is closed",
                "terminating connection", "connection is lost", "consuming input failed",
                "connection timeout", "no connection to the server", "connection failed",
                "the database system is shutting down", "the database system is starting up",
                "the database system is in recovery mode")


class DatabaseGoneError(LedgerError):
    """The ledger's database did not come back within the worker's wait."""


def transient(err):
    """Whether a database error means "gone for now" rather than "wrong"."""
    if not isinstance(err, DBAPIError):
        return False
    if err.connection_invalidated:
        return True
    orig = err.orig
    code = getattr(orig, "sqlstate", None)
    if code:
        return code.startswith("08") or code in _AGAIN_CODES
    text = str(orig if orig is not None else err).lower()
    return any(w in text for w in _AGAIN_WORDS)


def retrying(what):
    """Decorate a Ledger method: retry it while the database is away (see module)."""
    def decorate(fn):
        @functools.wraps(fn)
        def wrapper(self, *args, **kwargs):
            limit = getattr(self, "retry_seconds", 0.0)
            if not limit:
                return fn(self, *args, **kwargs)
            end = time.monotonic() + limit
            delay, tries = 0.25, 0
            while True:
                try:
                    if tries and what == "committing":
                        kwargs["again"] = True  # the last try may have committed
                    return fn(self, *args, **kwargs)
                except DBAPIError as err:
                    if not transient(err):
                        raise
                    first = str(err.orig if err.orig is not None else err).strip()
                    first = first.splitlines()[0] if first else type(err).__name__
                    left = end - time.monotonic()
                    if left <= 0:
                        raise DatabaseGoneError(
                            f"the ledger database did not come back within {limit:g} s "
                            f"(while {what}: {first}); this worker stops, and its jobs "
                            "resume from their last commits once the database is back "
                            "(`work --db-wait` sets the wait).") from None
                    tries += 1
                    LOG.warning("ledger database unavailable while %s (%s); trying again "
                                "in %.2g s", what, first, min(delay, left))
                    time.sleep(min(delay, left))
                    delay = min(2.0 * delay, 10.0)
        return wrapper
    return decorate
