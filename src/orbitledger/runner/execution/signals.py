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
    """Route the stop signals to the flag, then let through any that arrived blocked.

    A worker started by a pool begins life with the stop signals blocked
    (see :func:`child_setup`), so one sent before this point waits for the
    handler instead of killing a half-started process.
    """
    for sig in STOP_SIGNALS:
        signal.signal(sig, _handler)
    signal.pthread_sigmask(signal.SIG_UNBLOCK, STOP_SIGNALS)


def child_setup():
    """Run in a pool's worker process between fork and exec (Linux).

    Blocks the stop signals until the new program installs its handlers, and
    asks the kernel to send SIGTERM if the pool dies, so no worker is ever
    left running unsupervised.
    """
    signal.pthread_sigmask(signal.SIG_BLOCK, STOP_SIGNALS)
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, int(signal.SIGTERM), 0, 0, 0)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass  # not Linux: the pool still forwards every signal it receives


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
