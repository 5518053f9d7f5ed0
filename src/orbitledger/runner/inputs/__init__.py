"""Inputs: job specs (TOML, pydantic) resolved to internal units, quantities and wall
times as people type them, what `submit` refuses, ensemble members, step resolution.

Imports ``integrators`` and the shared ``runner.defaults`` / ``runner.errors`` only.
"""
