"""A process-wide stop request, set by SIGTERM, SIGINT, SIGHUP or SIGUSR1.

Installed first thing by `orbitledger work` (this module imports nothing
heavy), so a signal that arrives while the worker is still starting up is
honoured as a clean stop rather than killing the process.
"""

import signal

STOP_SIGNALS = (signal.SIGTERM, signal.SIGINT, signal.SIGHUP, signal.SIGUSR1)
_requested = [None]


def _handler(signum, _frame):
    _requested[0] = signal.Signals(signum).name


def install():
    """Route the stop signals to the flag."""
    for sig in STOP_SIGNALS:
        signal.signal(sig, _handler)


def requested():
    """Name of the signal that asked for a stop, or None."""
    return _requested[0]


def clear():
    """Forget a request (tests)."""
    _requested[0] = None



def exit_now(code):
    """Leave the process with `code` at once, stop handlers still installed.

    Used by `work` once everything is committed and its exit code decided.
    A normal exit would run interpreter finalization, which restores the
    default signal handlers; a batch system's signal arriving then (it may
    be delivered to any thread, e.g. the store's I/O thread) would kill a
    process that has already finished cleanly and hide its exit code.
    """
    import os
    import sys

    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)
