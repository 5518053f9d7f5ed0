"""The Ledger: one database and one store, with the user's operations on jobs (hold,
release, cancel, extend). Submitting, the worker's side and reading live in
``submission``, ``work`` and ``reading`` and are mixed in here.

Guarantee (see docs/guarantees in the user guide): a stretch of integration is
committed at most once, by the worker holding the current fencing token, in
one transaction that records the checkpoint and advances progress together.
A crash anywhere leaves the last committed checkpoint intact.
"""

__all__ = ["GENESIS", "Claim", "CommitResult", "Ledger", "angmom0", "repair_by_replay"]

import threading

from sqlalchemy import update

from orbitledger.runner import defaults
from orbitledger.runner.errors import FencedError, LedgerError, NotFoundError
from orbitledger.runner.inputs.text import format_time
# GENESIS, Claim, CommitResult, angmom0 and repair_by_replay are imported from here.
from orbitledger.runner.ledger.basics import GENESIS, Claim, CommitResult, _now  # noqa: F401
from orbitledger.runner.ledger import statements
from orbitledger.runner.ledger.db import create_schema, is_sqlite, jobs, make_engine
from orbitledger.runner.ledger.reading import Reading, angmom0, repair_by_replay  # noqa: F401
from orbitledger.runner.ledger.status import JobStatus, check_transition
from orbitledger.runner.ledger.submission import Submitting
from orbitledger.runner.ledger.work import WorkerSide


class Ledger(Submitting, WorkerSide, Reading):
    """The job ledger over one database and one checkpoint store.

    Parameters
    ----------
    url : str
        SQLAlchemy database URL (sqlite:///... or postgresql+psycopg://...).
    store_root : str or Path
        Folder of the Zarr checkpoint store.
    lease_seconds : float
        Lease granted by claims and heartbeats.
    """

    def __init__(self, url, store_root, lease_seconds=defaults.LEASE_SECONDS, read_only=False):
        self.url = url
        self._store_root = store_root
        self._store = None
        self._store_lock = threading.Lock()
        self.lease_seconds = float(lease_seconds)
        # How long a worker's operations wait for a database that went away
        # (runner.ledger.retry); 0: no retry (every command but `work`).
        self.retry_seconds = 0.0
        from sqlalchemy.exc import SQLAlchemyError

        from orbitledger.runner.ledger.db import read_only_engine, redact

        if read_only:
            # Asked for (the analysis API): a connection that cannot write.
            self.engine = read_only_engine(url)
            if self.engine is None:
                raise LedgerError(f"cannot open the ledger database {redact(url)} read-only: "
                                  "no ledger there; check the path or URL.")
            self.read_only = True
            return
        self.engine = make_engine(url)
        self.read_only = False
        try:
            create_schema(self.engine)
        except SQLAlchemyError as err:
            ro = read_only_engine(url)
            if ro is None:
                reason = str(getattr(err, "orig", err)).strip().splitlines()[0]
                raise LedgerError(f"cannot open the ledger database {redact(url)}: {reason}; "
                                  "check the URL and that the server is running.") from None
            # A read-only workspace (a read-only mount, an archive): viewable.
            self.engine.dispose()
            self.engine, self.read_only = ro, True

    @property
    def store(self):
        """The checkpoint store, opened on first use: the store module loads numpy
        (and, when it opens a group, zarr), which the ledger's light commands
        (`status`, `hold`, ...) never need. One Store per Ledger, also when a
        worker's main thread and its helper thread ask for it at once."""
        if self._store is None:
            with self._store_lock:
                if self._store is None:
                    from orbitledger.runner.store.zarr_store import Store

                    self._store = Store(self._store_root)
        return self._store

    def close(self):
        """Release database connections."""
        self.engine.dispose()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # -- the one place status changes ------------------------------------------

    def _transition(self, conn, job_id, old, new, op, if_fence=None, **fields):
        """Change status old -> new by operation `op` (checked against the table).

        Raises TransitionError if the table does not allow it, FencedError if
        the row no longer matches (status changed or, with ``if_fence``, the
        lease was taken over).
        """
        check_transition(job_id, old, new, op)
        fields["status"] = JobStatus(new).value
        names = tuple(sorted(fields))
        params = {f"v_{n}": fields[n] for n in names}
        params.update(w_id=job_id, w_status=JobStatus(old).value, w_fence=if_fence)
        res = conn.execute(statements.transition(if_fence is not None, names), params)
        if res.rowcount != 1:
            raise FencedError(f"job {job_id} changed under this operation "
                              f"(expected {JobStatus(old).value}); nothing was written.")

    def _row(self, conn, job_id, lock=False):
        q = statements.job_row(lock and not is_sqlite(self.engine))
        row = conn.execute(q, {"job_id": job_id}).mappings().first()
        if row is None:
            raise NotFoundError(f"no job {job_id} in this ledger.")
        return row

    # -- submit -------------------------------------------------------------------

    def hold(self, job_id, reason="held by user", now=None):
        """Pause a job: at once if queued, at the worker's next safe point if running."""
        return self._stop_or_request(job_id, "hold", JobStatus.HELD, reason, "held", now)

    def release(self, job_id, now=None):
        """Queue a held (or failed) job again; withdraw a running job's pending hold.

        Returns "released" or "hold request withdrawn". Any other status is
        refused by the transition table (a done job is continued by
        :meth:`extend`; a running job keeps its worker).
        """
        now = _now(now)
        with self.engine.begin() as conn:
            row = self._row(conn, job_id, lock=True)
            st = JobStatus(row["status"])
            if st == JobStatus.RUNNING and row["requested"] == "hold":
                conn.execute(update(jobs).where(jobs.c.id == job_id).values(requested=None))
                return "hold request withdrawn"
            self._transition(conn, job_id, st, JobStatus.QUEUED, "release", reason=None,
                             updated_at=now)
        return "released"

    def cancel(self, job_id, now=None):
        """Abandon a job: at once if not running, at the next safe point if running."""
        return self._stop_or_request(job_id, "cancel", JobStatus.CANCELLED, "cancelled by user",
                                     "cancelled", now)

    def _stop_or_request(self, job_id, request, target, reason, done_word, now):
        """Change a job to `target` now, or, if a worker holds it, leave it a request.

        The worker applies the request at its next safe point, in its commit
        (or release) transaction. Returns "requested" or `done_word`.
        """
        now = _now(now)
        with self.engine.begin() as conn:
            row = self._row(conn, job_id, lock=True)
            st = JobStatus(row["status"])
            if st == JobStatus.RUNNING:
                if row["requested"] == "cancel" and request == "hold":
                    raise LedgerError(f"job {job_id} is already to be cancelled at its "
                                      "worker's next checkpoint; a hold would not apply.")
                conn.execute(update(jobs).where(jobs.c.id == job_id).values(
                    requested=request, updated_at=now))
                return "requested"
            self._transition(conn, job_id, st, target, request, reason=reason, updated_at=now)
        if target == JobStatus.CANCELLED:
            self._trim_finished(job_id, row["n_samples"])
        return done_word

    def extend(self, job_id, new_total_steps, now=None):
        """Move a job's end to a later step; a done job is queued again."""
        now = _now(now)
        with self.engine.begin() as conn:
            row = self._row(conn, job_id, lock=True)
            st = JobStatus(row["status"])
            if new_total_steps <= row["total_steps"]:
                dt = abs(row["dt"])
                raise LedgerError(
                    f"job {job_id} already runs to {format_time(row['total_steps'] * dt)} "
                    f"(step {row['total_steps']}); the new end, "
                    f"{format_time(new_total_steps * dt)} (step {new_total_steps}), must be "
                    "later.")
            if st in (JobStatus.STOPPED, JobStatus.CANCELLED):
                raise LedgerError(f"job {job_id} is {st.value} and cannot be extended.")
            fields = dict(total_steps=int(new_total_steps), updated_at=now)
            if st == JobStatus.DONE:
                self._transition(conn, job_id, st, JobStatus.QUEUED, "extend", outcome=None,
                                 outcome_step=None, outcome_time=None, **fields)
            else:
                conn.execute(update(jobs).where(jobs.c.id == job_id).values(**fields))
            self._event(conn, job_id, "extended", row["steps_done"], None, (),
                        {"from_steps": int(row["total_steps"]), "to_steps": int(new_total_steps)},
                        now)

    # -- segments and events ---------------------------------------------------------
