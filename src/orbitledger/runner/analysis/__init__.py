"""Analysis of committed work: verify and replay (hash chain, store against ledger),
error budgets and their growth law, divergence of runs and Lyapunov times, ensemble
outcomes.

Imports ``runner.ledger``, ``runner.store``, ``runner.inputs`` and the shared modules;
plots only through ``runner.presentation`` when asked for.
"""
