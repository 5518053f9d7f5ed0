"""Execution: the worker loop and pools, stop signals, named fault points for tests,
SLURM array scripts and the work log.

Imports ``runner.ledger``, ``runner.store``, ``runner.inputs`` and the shared modules.
"""
