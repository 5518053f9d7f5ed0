"""orbitledger's job manager: everything with a database, files or a command line.

Subpackages, arrows only downward (a package imports those listed after it,
never those before; `defaults` and `errors` are shared by all):

- ``cli``, ``entry``, ``demo``: the command line and the demo (import anything).
- ``presentation``: terminal tables, plots, the HTML report.
- ``analysis``: verify and replay, error budgets, divergence and Lyapunov
  times, ensemble outcomes.
- ``execution``: workers, stop signals, fault points, SLURM, the work log.
- ``ledger``: the database, the status table, ledger operations, workspaces,
  provenance.
- ``store``: the Zarr checkpoint store and what a sample holds.
- ``inputs``: job specs, units, wall times, what `submit` refuses, ensemble
  members, step resolution.

The numerical core is the separate package ``integrators``, which imports
nothing from here.
"""
