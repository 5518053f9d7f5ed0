"""The `orbitledger` command: a thin shell over the runner's functions.

``common`` holds the typer app and what every command shares; ``campaign``
the commands that set up, queue and run work; ``analysis`` those that
analyse committed work (ensembles' outcomes and maps, a job's frequencies,
particles, recheck, audit); ``results`` those that put it out or check it. The CLI only parses options and prints: every decision is
made in the packages below it (it may import all of them).
"""

from orbitledger.runner.cli.common import _AS_PROGRAM, app
from orbitledger.runner.cli import analysis, campaign, results  # noqa: F401 - they register commands

__all__ = ["app", "main"]


def main():
    """Entry point of the `orbitledger` program."""
    _AS_PROGRAM[0] = True
    app()
