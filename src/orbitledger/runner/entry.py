"""The `orbitledger` program's entry point: stop signals first, then the CLI.

For `work` the stop signals are routed to the stop flag before anything heavy
is imported, so SIGTERM from a batch system during start-up is a clean stop
(exit code 3 when work remains), not a kill.
"""

import os
import sys


def one_thread_libraries(env):
    """Keep numpy's BLAS (and OpenMP, MKL) to one thread unless the user chose:
    must run before numpy is imported (see defaults.ONE_THREAD_ENV)."""
    from orbitledger.runner.defaults import ONE_THREAD_ENV

    for name in ONE_THREAD_ENV:
        env.setdefault(name, "1")
    return env


def main():
    """Run the `orbitledger` command line."""
    from orbitledger.runner.execution import signals as stopflag

    words = [a for a in sys.argv[1:] if not a.startswith("-")]
    if words[:1] == ["work"]:
        stopflag.install()
        one_thread_libraries(os.environ)
    from orbitledger.runner.cli import main as cli_main

    cli_main()
