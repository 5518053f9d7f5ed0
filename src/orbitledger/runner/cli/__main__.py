"""`python -m orbitledger.runner.cli`: the `orbitledger` program."""

from orbitledger.runner.cli import main

main()
