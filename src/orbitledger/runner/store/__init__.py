"""The checkpoint store: one Zarr group per job (exact states, samples), hashes, and
what a sample of a running integration holds.

Imports ``integrators``, ``runner.inputs`` and the shared modules only; knows nothing of
the database (the ledger says what is committed).
"""
