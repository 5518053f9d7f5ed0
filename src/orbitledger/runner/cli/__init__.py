"""The `orbitledger` command: a thin shell over the runner's functions.

``common`` holds the typer app and what every command shares; ``campaign``
the commands that set up, queue and run work; ``results`` those that read
committed work. The CLI only parses options and prints: every decision is
made in the packages below it (it may import all of them).
"""

from orbitledger.runner.cli.common import _AS_PROGRAM, app
from orbitledger.runner.cli import campaign, results  # noqa: F401 - they register the commands

__all__ = ["app", "main"]


def main():
    """Entry point of the `orbitledger` program."""
    _AS_PROGRAM[0] = True
    app()
