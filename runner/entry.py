"""The `orbitledger` program's entry point: stop signals first, then the CLI.

For `work` the stop signals are routed to the stop flag before anything heavy
is imported, so SIGTERM from a batch system during start-up is a clean stop
(exit code 3 when work remains), not a kill.
"""

import sys


def main():
    """Run the `orbitledger` command line."""
    from orbitledger.runner.execution import signals as stopflag

    words = [a for a in sys.argv[1:] if not a.startswith("-")]
    if words[:1] == ["work"]:
        stopflag.install()
    from orbitledger.runner.cli import main as cli_main

    cli_main()
