"""A pool of worker processes: start them, forward stop signals, collect exit codes.

Light on purpose: `work --workers N` starts its workers before importing
anything heavy (numba, zarr, the database layer), so the pool's own start-up
does not delay theirs.
"""

import os
import signal
import subprocess
import sys

from orbitledger.runner import defaults
from orbitledger.runner.entry import one_thread_libraries
from orbitledger.runner.execution import signals as stopflag
from orbitledger.runner.execution.signals import STOP_SIGNALS
from orbitledger.runner.execution.worklog import LOG


def run_pool(argv_one, n_workers, started=None):
    """Run n_workers worker processes (each `argv_one`) and forward stop signals.

    The pool forwards every stop signal to every worker at any moment of its
    life, including one that arrived while the pool itself was starting
    (recorded by :mod:`stopflag`, installed first thing by `work`). Workers
    start with the stop signals blocked until their handlers are in place
    and get SIGTERM if the pool dies, and with numpy's BLAS kept to one
    thread unless the user set its variables. Returns the most telling exit code:
    EXIT_FAILED if any failed, else EXIT_WORK_REMAINS if any says work
    remains, else 0. `started(pid)`, if given, is told each worker's process id.
    """
    procs = []
    env = one_thread_libraries(dict(os.environ))

    def forward(signum, frame):
        stopflag._handler(signum, frame)
        for p in list(procs):
            if p.poll() is None:
                p.send_signal(signum)

    old = {sig: signal.signal(sig, forward) for sig in STOP_SIGNALS}
    try:
        for _ in range(n_workers):
            procs.append(subprocess.Popen(argv_one, preexec_fn=stopflag.child_setup, env=env))
            if started is not None:
                started(procs[-1].pid)
            pending = stopflag.requested()
            if pending is not None:
                # Asked to stop before or while this worker started: it gets
                # the request too (blocked until its handler is in place).
                procs[-1].send_signal(signal.Signals[pending])
        codes = [p.wait() for p in procs]
        for p, c in zip(procs, codes):
            if c < 0:
                LOG.warning("worker pid %d died by %s", p.pid, signal.Signals(-c).name)
            else:
                LOG.info("worker pid %d exited with code %d", p.pid, c)
    finally:
        for sig, h in old.items():
            signal.signal(sig, h)
    if any(c not in (0, defaults.EXIT_WORK_REMAINS) for c in codes):
        return defaults.EXIT_FAILED
    return defaults.EXIT_WORK_REMAINS if defaults.EXIT_WORK_REMAINS in codes else 0


def self_command():
    """argv that starts this program again (for worker subprocesses)."""
    return [sys.executable, "-m", "orbitledger.runner.cli"]
