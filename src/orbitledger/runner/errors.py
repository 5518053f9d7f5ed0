"""Project errors. Every error derives from :class:`OrbitLedgerError`."""


class OrbitLedgerError(Exception):
    """Base class of orbitledger's errors; the CLI prints them as one line."""


class SpecError(OrbitLedgerError, ValueError):
    """A job spec is malformed: the message names the key, the value and the fix."""


class LedgerError(OrbitLedgerError, RuntimeError):
    """A ledger operation was asked in the wrong state or order."""


class NotFoundError(LedgerError):
    """No such job, checkpoint or workspace."""


class TransitionError(LedgerError):
    """A status change that the transition table does not allow."""


class FencedError(LedgerError):
    """This worker's lease was taken over: its work must be discarded."""


class StoreError(OrbitLedgerError, IOError):
    """The checkpoint store is damaged or could not be written."""


class DiskFullError(StoreError):
    """No space left for the store or the ledger's database: the worker stops, the
    job is handed back at its last commit, and `work` resumes once space is freed."""


class NumericalFailureError(OrbitLedgerError, ArithmeticError):
    """The integration produced non-finite numbers (a degenerate system or step)."""
