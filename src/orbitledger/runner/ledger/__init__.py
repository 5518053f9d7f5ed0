"""The ledger: the database schema (SQLite or PostgreSQL), the one status table,
the fenced operations (submit, claim, heartbeat, commit, hold, release, cancel,
extend), workspaces and provenance.

Imports ``runner.store``, ``runner.inputs`` and the shared modules.
"""
