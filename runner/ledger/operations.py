"""Ledger operations: submit, claim, heartbeat, fenced commit, hold, cancel, extend.

Guarantee (see docs/guarantees in the user guide): a stretch of integration is
committed at most once, by the worker holding the current fencing token, in
one transaction that records the checkpoint and advances progress together.
A crash anywhere leaves the last committed checkpoint intact.
"""

from dataclasses import dataclass
import json
import time

import numpy as np
from sqlalchemy import and_, func, insert, or_, select, update

from orbitledger.runner import defaults
from orbitledger.runner.ledger.db import (checkpoints, create_schema, ensembles, events, is_sqlite, jobs, make_engine,
                 segments)
from orbitledger.runner.errors import FencedError, LedgerError, NotFoundError
from orbitledger.runner.execution.failpoints import failpoint
from orbitledger.runner.ledger.status import JobStatus, check_transition
from orbitledger.runner.store.zarr_store import Store, chain_sha256
from orbitledger.runner.inputs.units import format_time

GENESIS = "0" * 64  # chain link before checkpoint 0


@dataclass(frozen=True)
class Claim:
    """A worker's hold on one job: valid while its fencing token is current."""

    job_id: int
    fence: int
    owner: str
    lease_expires: float
    segment_id: int | None = None
    job: dict | None = None  # the job row and its last checkpoint row, read at claim time
    checkpoint: dict | None = None


@dataclass(frozen=True)
class CommitResult:
    """What the ledger did with a commit: the job's status afterwards and why."""

    status: JobStatus
    total_steps: int
    requested: str | None


def _now(now):
    return time.time() if now is None else float(now)


class Ledger:
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

    def __init__(self, url, store_root, lease_seconds=defaults.LEASE_SECONDS):
        self.url = url
        self.engine = make_engine(url)
        self.store = Store(store_root)
        self.lease_seconds = float(lease_seconds)
        from sqlalchemy.exc import SQLAlchemyError

        from orbitledger.runner.ledger.db import redact

        self.read_only = False
        try:
            create_schema(self.engine)
        except SQLAlchemyError as err:
            from orbitledger.runner.ledger.db import read_only_engine

            ro = read_only_engine(url)
            if ro is None:
                reason = str(getattr(err, "orig", err)).strip().splitlines()[0]
                raise LedgerError(f"cannot open the ledger database {redact(url)}: {reason}; "
                                  "check the URL and that the server is running.") from None
            # A read-only workspace (a read-only mount, an archive): viewable.
            self.engine.dispose()
            self.engine, self.read_only = ro, True

    def close(self):
        """Release database connections."""
        self.engine.dispose()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # -- the one place status changes ------------------------------------------
    def _transition(self, conn, job_id, old, new, op, where=(), **fields):
        """Change status old -> new by operation `op` (checked against the table).

        Raises TransitionError if the table does not allow it, FencedError if
        the row no longer matches (status changed or, with a fence in
        ``where``, the lease was taken over).
        """
        check_transition(job_id, old, new, op)
        cond = [jobs.c.id == job_id, jobs.c.status == JobStatus(old).value, *where]
        res = conn.execute(update(jobs).where(and_(*cond)).values(
            status=JobStatus(new).value, **fields))
        if res.rowcount != 1:
            raise FencedError(f"job {job_id} changed under this operation "
                              f"(expected {JobStatus(old).value}); nothing was written.")

    def _row(self, conn, job_id, lock=False):
        q = select(jobs).where(jobs.c.id == job_id)
        if lock and not is_sqlite(self.engine):
            q = q.with_for_update()
        row = conn.execute(q).mappings().first()
        if row is None:
            raise NotFoundError(f"no job {job_id} in this ledger.")
        return row

    # -- submit -------------------------------------------------------------------
    def submit(self, spec, now=None, priority=0, plan=None, integrator=None, parent=None):
        """Queue a validated spec; writes checkpoint 0 and the first sample. Returns the id.

        A spec with an [ensemble] section (and no member index) is submitted
        as an ensemble: use :meth:`submit_ensemble`. ``integrator`` may give
        the exact starting state (e.g. a backward run from a forward job's
        checkpoint); otherwise the spec's system is used.
        """
        if spec.ensemble is not None and spec.member is None:
            return self.submit_ensemble(spec, now=now, priority=priority)[1][0]
        now = _now(now)
        with self.engine.begin() as conn:
            return self._submit_in(conn, spec, now, priority, None, plan, integrator, parent)

    def submit_ensemble(self, spec, now=None, priority=0):
        """Create an ensemble and all its members in one transaction.

        Returns (ensemble id, [member job ids]).
        """
        from orbitledger.runner.inputs.ensemble import member_spec

        now = _now(now)
        members = [member_spec(spec, k) for k in range(spec.ensemble.members)]
        with self.engine.begin() as conn:
            ens_id = int(conn.execute(insert(ensembles).values(
                name=spec.name, spec_json=_spec_json(spec), spec_sha256=_spec_sha(spec),
                members=spec.ensemble.members, created_at=now)).inserted_primary_key[0])
            ids = [self._submit_in(conn, m, now, priority, ens_id, None, None, None)
                   for m in members]
        return ens_id, ids

    def _submit_in(self, conn, spec, now, priority, ensemble_id, plan, integrator, parent):
        if plan is None:
            from orbitledger.runner.inputs.spec import resolve

            plan = resolve(spec)
        integ = integrator if integrator is not None else plan.make_integrator()
        sysm = integ.synchronized()
        energy0 = integ.energy()
        angmom0 = integ.angular_momentum()
        from orbitledger.runner.store.sampling import sample_now

        first = sample_now(integ, energy0, angmom0)
        total = integ.step + plan.total_steps if parent else plan.total_steps
        job_id = conn.execute(insert(jobs).values(
            name=spec.name, spec_json=_spec_json(spec), spec_sha256=_spec_sha(spec),
            status=JobStatus.QUEUED.value, method=plan.method, n_bodies=sysm.n, dt=plan.dt,
            total_steps=total, chunk_steps=plan.chunk_steps, output_steps=plan.output_steps,
            steps_done=integ.step, n_checkpoints=0, n_samples=1, energy0=energy0,
            angmom0=json.dumps([float(q) for q in angmom0]), fence=0, priority=priority,
            ensemble_id=ensemble_id,
            parent_job_id=None if parent is None else parent[0],
            parent_checkpoint=None if parent is None else parent[1],
            created_at=now, updated_at=now)).inserted_primary_key[0]
        # The store is written inside the open transaction: if it fails the
        # job row is rolled back and nothing is left in the ledger.
        # The first row, then one per output (one more when the outputs are
        # shifted off this job's own grid, as for a backward run).
        off_grid = integ.sample_offset % plan.output_steps != 0
        self.store.create_job(job_id, sysm.names,
                              capacity=(total - integ.step) // plan.output_steps + 1 + off_grid)
        digest = self.store.write_checkpoint(job_id, 0, 0, integ.state_arrays())
        s_hash = self.store.write_samples(job_id, 0, first)
        conn.execute(insert(checkpoints).values(
            job_id=job_id, idx=0, step=integ.step, time=integ.time, fence=0,
            state_sha256=digest, chain_sha256=chain_sha256(GENESIS, digest, s_hash),
            samples_sha256=s_hash, n_samples=1, energy_error=0.0, angmom_error=0.0,
            created_at=now))
        return int(job_id)

    def submit_backward(self, job_id, checkpoint=None, now=None):
        """Queue a backward job from a committed checkpoint of a forward job.

        It starts from that checkpoint's exact internal state and runs back to
        the forward job's start. Returns the new job id.
        """
        from orbitledger.runner.inputs.spec import from_json, resolve

        integ, ck = self.load_integrator(job_id, checkpoint)
        if ck["step"] == 0:
            raise LedgerError(f"job {job_id} checkpoint {ck['idx']} is at the start; choose a "
                              "later checkpoint to run backward from.")
        row = self.job(job_id)
        fwd = from_json(row["spec_json"])
        direction = "backward" if row["dt"] > 0 else "forward"
        days = abs(ck["step"] * row["dt"])
        span = fwd.span.model_copy(update={"direction": direction, "length": f"{days!r} d"})
        name = f"{fwd.name}-back{ck['idx']}"[:100]
        spec = fwd.model_copy(update={"span": span, "name": name})
        plan = resolve(spec)
        if plan.total_steps != ck["step"]:
            raise LedgerError(f"job {job_id}: could not express {ck['step']} steps back as a span.")
        back = integ.reversed()
        with self.engine.begin() as conn:
            return self._submit_in(conn, spec, _now(now), row["priority"], None, plan, back,
                                   (job_id, ck["idx"]))

    def ensemble(self, ensemble_id):
        """One ensemble's row as a dict."""
        with self.engine.connect() as conn:
            row = conn.execute(select(ensembles).where(
                ensembles.c.id == ensemble_id)).mappings().first()
        if row is None:
            raise NotFoundError(f"no ensemble {ensemble_id} in this ledger.")
        return dict(row)

    def ensembles(self):
        """All ensembles' rows."""
        with self.engine.connect() as conn:
            return [dict(r) for r in conn.execute(select(ensembles).order_by(ensembles.c.id))
                    .mappings()]

    # -- claim / heartbeat ----------------------------------------------------------
    def claim(self, owner, now=None, job_id=None, order="breadth", provenance=None):
        """Claim one runnable job (queued, or running with an expired lease).

        A running job whose owner is a process on this host that no longer
        exists is runnable at once (its lease cannot be renewed by anyone).

        One atomic update sets the owner, the lease expiry and a new fencing
        token. With ``provenance`` (see :mod:`runner.ledger.provenance`) the segment
        of work is opened in the same transaction. Returns a :class:`Claim`
        or None if nothing is runnable.
        """
        now = _now(now)
        with self.engine.begin() as conn:
            dead = _dead_local_owners(conn)
            lapsed = and_(jobs.c.status == JobStatus.RUNNING.value,
                          or_(jobs.c.lease_expires < now, jobs.c.id.in_(dead)))
            self._apply_lapsed_requests(conn, lapsed, now)
            runnable = or_(jobs.c.status == JobStatus.QUEUED.value, lapsed)
            q = select(jobs.c.id, jobs.c.status, jobs.c.fence).where(runnable)
            if job_id is not None:
                q = q.where(jobs.c.id == job_id)
            if order == "breadth":
                q = q.order_by(jobs.c.priority.desc(), jobs.c.steps_done, jobs.c.id)
            else:
                q = q.order_by(jobs.c.priority.desc(), jobs.c.steps_done.desc(), jobs.c.id)
            q = q.limit(1)
            if not is_sqlite(self.engine):
                q = q.with_for_update(skip_locked=True)
            row = conn.execute(q).mappings().first()
            if row is None:
                return None
            fence = int(row["fence"]) + 1
            expires = now + self.lease_seconds
            self._transition(conn, row["id"], row["status"], JobStatus.RUNNING, "claim",
                             where=(jobs.c.fence == row["fence"],),
                             owner=owner, lease_expires=expires, fence=fence, updated_at=now)
            # Everything the worker needs to start, read in the same transaction.
            job = dict(self._row(conn, row["id"]))
            if row["status"] == JobStatus.RUNNING.value:
                self._event(conn, row["id"], "lease_taken_over", job["steps_done"], None, None,
                            {"new_owner": owner, "fence": fence}, now)
                self._close_lapsed_segments(conn, row["id"], job["steps_done"], now)
            ck = conn.execute(select(checkpoints).where(and_(
                checkpoints.c.job_id == row["id"],
                checkpoints.c.idx == job["n_checkpoints"]))).mappings().first()
            seg = None
            if provenance is not None:
                seg = self._insert_segment(conn, row["id"], fence, owner, job["steps_done"],
                                           provenance, now)
        return Claim(int(row["id"]), fence, owner, expires, seg, job,
                     None if ck is None else dict(ck))

    def _apply_lapsed_requests(self, conn, lapsed, now):
        """Running jobs whose worker is gone and which carry a hold or cancel request:
        apply the request now (their worker cannot), closing its open segment."""
        rows = conn.execute(select(jobs.c.id, jobs.c.fence, jobs.c.requested,
                                   jobs.c.steps_done).where(
            and_(lapsed, jobs.c.requested.is_not(None)))).mappings().all()
        for r in rows:
            new = JobStatus.HELD if r["requested"] == "hold" else JobStatus.CANCELLED
            reason = "held on request" if new == JobStatus.HELD else "cancelled on request"
            self._transition(conn, r["id"], JobStatus.RUNNING, new, "give_back",
                             where=(jobs.c.fence == r["fence"],), owner=None,
                             lease_expires=None, requested=None, reason=reason, updated_at=now)
            self._close_lapsed_segments(conn, r["id"], r["steps_done"], now)
            if new == JobStatus.CANCELLED:
                self._trim_finished(r["id"], conn.execute(select(jobs.c.n_samples).where(
                    jobs.c.id == r["id"])).scalar())

    @staticmethod
    def _close_lapsed_segments(conn, job_id, steps_done, now):
        """Close the segments of a worker whose lease lapsed, at the last committed step."""
        conn.execute(update(segments).where(and_(
            segments.c.job_id == job_id, segments.c.ended_at.is_(None))).values(
                end_step=steps_done, ended_at=now, end_reason="lease_expired"))

    def check_fence(self, claim):
        """Raise FencedError unless the claim's fencing token is still current (read only)."""
        with self.engine.connect() as conn:
            row = conn.execute(select(jobs.c.fence, jobs.c.status).where(
                jobs.c.id == claim.job_id)).first()
        if row is None or row[0] != claim.fence or row[1] != JobStatus.RUNNING.value:
            raise FencedError(f"job {claim.job_id}: lease with token {claim.fence} "
                              "is no longer held; discarding uncommitted work.")

    def heartbeat(self, claim, now=None):
        """Extend the lease; returns the job's pending request ('hold', 'cancel' or None).

        Raises FencedError if the lease was taken over.
        """
        now = _now(now)
        with self.engine.begin() as conn:
            res = conn.execute(update(jobs).where(and_(
                jobs.c.id == claim.job_id, jobs.c.fence == claim.fence,
                jobs.c.status == JobStatus.RUNNING.value)).values(
                    lease_expires=now + self.lease_seconds))
            if res.rowcount != 1:
                raise FencedError(f"job {claim.job_id}: lease with token {claim.fence} "
                                  "is no longer held; discarding uncommitted work.")
            return conn.execute(select(jobs.c.requested).where(
                jobs.c.id == claim.job_id)).scalar()

    # -- the fenced commit -------------------------------------------------------------
    def commit_checkpoint(self, claim, *, idx, step, time_, state_hash, samples_hash,
                          n_samples, energy_error, angmom_error, max_energy_error,
                          max_angmom_error, then, outcome=None, reason=None,
                          segment_id=None, wall_seconds=0.0, rate=None, now=None,
                          end_reason=None):
        """Record checkpoint idx and advance progress, only under the current fence.

        ``then`` says what the worker wants next: "continue", "release" (work
        remains, let another worker take it), "done", "stopped" (with
        ``outcome`` = (kind, step, time, bodies)), "held" (with ``reason``).
        A pending user request (hold, cancel) and an extension made meanwhile
        are applied here. If the job stops running, the segment is closed in
        the same transaction (``end_reason`` defaults to the new status).
        Returns a :class:`CommitResult`.
        """
        now = _now(now)
        with self.engine.begin() as conn:
            row = self._row(conn, claim.job_id, lock=True)
            if (row["fence"] != claim.fence or row["owner"] != claim.owner
                    or row["status"] != JobStatus.RUNNING.value):
                raise FencedError(f"job {claim.job_id}: lease with token {claim.fence} was "
                                  "taken over; this worker's chunk is discarded.")
            if idx != row["n_checkpoints"] + 1 or step <= row["steps_done"] and idx > 0:
                raise LedgerError(f"job {claim.job_id}: checkpoint {idx} at step {step} does not "
                                  f"follow checkpoint {row['n_checkpoints']} at step "
                                  f"{row['steps_done']}.")
            prev = conn.execute(select(checkpoints.c.chain_sha256).where(and_(
                checkpoints.c.job_id == claim.job_id,
                checkpoints.c.idx == row["n_checkpoints"]))).scalar()
            total = int(row["total_steps"])
            requested = row["requested"]
            fields = dict(steps_done=step, n_checkpoints=idx, n_samples=n_samples,
                          last_energy_error=energy_error, last_angmom_error=angmom_error,
                          max_energy_error=max_energy_error, max_angmom_error=max_angmom_error,
                          wall_seconds=row["wall_seconds"] + wall_seconds, updated_at=now)
            if rate is not None:
                fields["rate"] = rate
            if then == "done" and step < total:
                then = "continue"  # extended while this chunk ran
            if then == "stopped":
                new = JobStatus.STOPPED
                kind, o_step, o_time, bodies = outcome
                fields.update(outcome=kind, outcome_step=o_step, outcome_time=o_time,
                              outcome_bodies=",".join(map(str, bodies)), reason=reason)
            elif then == "done":
                new = JobStatus.DONE
                fields.update(outcome="survived", outcome_step=step, outcome_time=time_)
            elif then == "held" or requested == "hold":
                new = JobStatus.HELD
                fields["reason"] = reason or "held on request"
            elif requested == "cancel":
                new = JobStatus.CANCELLED
                fields["reason"] = "cancelled on request"
            elif then == "release":
                new = JobStatus.QUEUED
            else:
                new = JobStatus.RUNNING
                fields["lease_expires"] = now + self.lease_seconds
            if new != JobStatus.RUNNING:
                fields.update(owner=None, lease_expires=None, requested=None)
            self._transition(conn, claim.job_id, JobStatus.RUNNING, new, "commit",
                             where=(jobs.c.fence == claim.fence,), **fields)
            failpoint("in_commit")  # inside the open transaction: a kill here rolls back
            conn.execute(insert(checkpoints).values(
                job_id=claim.job_id, idx=idx, step=step, time=time_, fence=claim.fence,
                state_sha256=state_hash, chain_sha256=chain_sha256(prev, state_hash, samples_hash),
                samples_sha256=samples_hash, n_samples=n_samples, energy_error=energy_error,
                angmom_error=angmom_error, segment_id=segment_id, created_at=now))
            if then == "stopped":
                kind, o_step, o_time, bodies = outcome
                self._event(conn, claim.job_id, kind, o_step, o_time, bodies, None, now)
            if then == "held" and reason:
                self._event(conn, claim.job_id, "held", step, time_, (), {"reason": reason}, now)
            if segment_id is not None and new != JobStatus.RUNNING:
                conn.execute(update(segments).where(segments.c.id == segment_id).values(
                    end_step=step, ended_at=now, end_reason=end_reason or new.value))
            failpoint("before_commit")
        failpoint("after_commit")
        return CommitResult(new, total, requested)

    def give_back(self, claim, now=None, status=JobStatus.QUEUED, reason=None):
        """A worker gives up its claim without committing (work remains from the last
        checkpoint); a pending hold or cancel request is applied. Returns False if
        the claim was no longer current."""
        now = _now(now)
        with self.engine.begin() as conn:
            row = self._row(conn, claim.job_id, lock=True)
            if row["fence"] != claim.fence or row["status"] != JobStatus.RUNNING.value:
                return False
            req = row["requested"]
            if req == "hold":
                status, reason = JobStatus.HELD, reason or "held on request"
            elif req == "cancel":
                status, reason = JobStatus.CANCELLED, "cancelled on request"
            self._transition(conn, claim.job_id, JobStatus.RUNNING, status, "give_back",
                             where=(jobs.c.fence == claim.fence,), owner=None,
                             lease_expires=None, requested=None, updated_at=now,
                             **({"reason": reason} if reason else {}))
            if status in (JobStatus.HELD, JobStatus.FAILED) and reason:
                self._event(conn, claim.job_id, status.value, row["steps_done"], None, (),
                            {"reason": reason}, now)
        if status == JobStatus.CANCELLED:
            self._trim_finished(claim.job_id, row["n_samples"])
        return True

    def _trim_finished(self, job_id, n_samples):
        """Leave exactly the committed sample rows of a job that will never run again."""
        from orbitledger.runner.errors import StoreError

        try:
            self.store.trim_samples(job_id, int(n_samples))
        except StoreError:
            pass  # a damaged store is reported by verify; the status change stands

    # -- user operations -------------------------------------------------------------
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
    def start_segment(self, claim, start_step, prov, now=None):
        """Record the start of a stretch of work by this worker; returns its id."""
        now = _now(now)
        with self.engine.begin() as conn:
            return self._insert_segment(conn, claim.job_id, claim.fence, claim.owner, start_step,
                                        prov, now)

    @staticmethod
    def _insert_segment(conn, job_id, fence, owner, start_step, prov, now):
        return int(conn.execute(insert(segments).values(
            job_id=job_id, fence=fence, worker=owner, host=prov["host"],
            pid=prov["pid"], user=prov.get("user"), argv=prov.get("argv"),
            versions=json.dumps(prov.get("versions", {}), sort_keys=True),
            platform=prov.get("platform"), cpu=prov.get("cpu"), start_step=start_step,
            started_at=now)).inserted_primary_key[0])

    def end_segment(self, segment_id, end_step, reason, now=None):
        """Record the end of a stretch of work, unless it is already closed.

        ``end_step`` None means: the last step this segment committed (its
        start step if it committed nothing).
        """
        now = _now(now)
        with self.engine.begin() as conn:
            if end_step is None:
                end_step = conn.execute(select(func.max(checkpoints.c.step)).where(
                    checkpoints.c.segment_id == segment_id)).scalar()
            if end_step is None:
                end_step = conn.execute(select(segments.c.start_step).where(
                    segments.c.id == segment_id)).scalar()
            conn.execute(update(segments).where(and_(
                segments.c.id == segment_id, segments.c.ended_at.is_(None))).values(
                    end_step=end_step, ended_at=now, end_reason=reason))

    def _event(self, conn, job_id, kind, step, time_, bodies, detail, now):
        conn.execute(insert(events).values(
            job_id=job_id, kind=kind, step=step, time=time_,
            bodies=",".join(map(str, bodies or ())), created_at=now,
            detail=None if detail is None else json.dumps(detail, sort_keys=True)))

    def record_event(self, job_id, kind, step=None, time_=None, bodies=(), detail=None, now=None):
        """Add an event row (outside a commit)."""
        with self.engine.begin() as conn:
            self._event(conn, job_id, kind, step, time_, bodies, detail, _now(now))

    # -- queries -----------------------------------------------------------------------
    def job(self, job_id):
        """One job's row as a dict."""
        with self.engine.connect() as conn:
            return dict(self._row(conn, job_id))

    def jobs(self, status=None, ensemble_id=None):
        """All jobs' rows (dicts), oldest first."""
        q = select(jobs).order_by(jobs.c.id)
        if status is not None:
            q = q.where(jobs.c.status == JobStatus(status).value)
        if ensemble_id is not None:
            q = q.where(jobs.c.ensemble_id == ensemble_id)
        with self.engine.connect() as conn:
            return [dict(r) for r in conn.execute(q).mappings()]

    def _job_rows(self, table, job_id, order):
        with self.engine.connect() as conn:
            return [dict(r) for r in conn.execute(select(table).where(
                table.c.job_id == job_id).order_by(order)).mappings()]

    def checkpoints(self, job_id):
        """A job's committed checkpoints, in order."""
        return self._job_rows(checkpoints, job_id, checkpoints.c.idx)

    def last_checkpoint(self, job_id):
        """The last committed checkpoint row."""
        with self.engine.connect() as conn:
            n = conn.execute(select(jobs.c.n_checkpoints).where(jobs.c.id == job_id)).scalar()
            if n is None:
                raise NotFoundError(f"no job {job_id} in this ledger.")
            return dict(conn.execute(select(checkpoints).where(and_(
                checkpoints.c.job_id == job_id, checkpoints.c.idx == n))).mappings().one())

    def checkpoint_at(self, job_id, time_days):
        """Index of the committed checkpoint at a time (days from the job's start), within
        half a step; raises NotFoundError naming the nearest ones otherwise."""
        row = self.job(job_id)
        cks = self.checkpoints(job_id)
        t0 = cks[0]["time"]
        best = min(cks, key=lambda c: abs(abs(c["time"] - t0) - time_days))
        if abs(abs(best["time"] - t0) - time_days) <= 0.5 * abs(row["dt"]):
            return int(best["idx"])
        yr = lambda d: f"{d / 365.25:.9g} yr"  # noqa: E731 - precise enough to paste back
        near = ", ".join(yr(abs(c["time"] - t0)) for c in
                         sorted(cks, key=lambda c: abs(abs(c["time"] - t0) - time_days))[:3])
        raise NotFoundError(f"job {job_id} has no checkpoint at {yr(time_days)}; the nearest "
                            f"are at {near}.")

    def segments(self, job_id):
        """A job's segments, in order."""
        return self._job_rows(segments, job_id, segments.c.id)

    def events(self, job_id):
        """A job's events, in order."""
        return self._job_rows(events, job_id, events.c.id)

    def counts(self):
        """Number of jobs by status."""
        with self.engine.connect() as conn:
            rows = conn.execute(select(jobs.c.status, func.count()).group_by(jobs.c.status))
            return {s: int(n) for s, n in rows}

    def load_integrator(self, job_id, checkpoint=None, row=None):
        """The exact integrator state at a committed checkpoint (hash-checked).

        ``checkpoint`` is an index (default: the last); ``row`` a checkpoint
        row already read (a claim carries the last one).
        """
        from orbitledger.integrators import Integrator

        if row is not None:
            ck = row
        elif checkpoint is None:
            ck = self.last_checkpoint(job_id)
        else:
            ck = next((c for c in self.checkpoints(job_id) if c["idx"] == checkpoint), None)
        if ck is None:
            raise NotFoundError(f"job {job_id} has no checkpoint {checkpoint}.")
        arrays = self.store.read_checkpoint(job_id, ck["idx"], ck["fence"], ck["state_sha256"])
        return Integrator.from_state_arrays(arrays), ck


def repair_by_replay(ledger, job_id, claim=None):
    """Recover a job whose last checkpoint in the store is damaged.

    Walks back to the newest checkpoint whose stored state still matches its
    recorded hash, then integrates forward from it; every later checkpoint
    must be reproduced bit for bit (its hash equals the recorded one) and is
    rewritten in the store. Returns (integrator at the last checkpoint, its
    row, [indices rewritten]). Raises StoreError if nothing can be recovered.
    """
    from orbitledger.integrators import Integrator

    from orbitledger.runner.errors import StoreError

    cks = ledger.checkpoints(job_id)
    good = None
    for ck in reversed(cks):
        try:
            arrays = ledger.store.read_checkpoint(job_id, ck["idx"], ck["fence"],
                                                  ck["state_sha256"])
            good = ck
            break
        except StoreError:
            continue
    if good is None:
        raise StoreError(f"job {job_id}: no stored checkpoint matches its recorded hash.")
    integ = Integrator.from_state_arrays(arrays)
    rewritten = []
    for ck in cks[good["idx"] + 1:]:
        integ.advance(ck["step"] - integ.step)
        if claim is not None:
            ledger.check_fence(claim)
        digest = ledger.store.write_checkpoint(job_id, ck["idx"], ck["fence"],
                                               integ.state_arrays())
        if digest != ck["state_sha256"]:
            raise StoreError(f"job {job_id}: replay from checkpoint {good['idx']} did not "
                             f"reproduce checkpoint {ck['idx']}; the run cannot be repaired.")
        rewritten.append(ck["idx"])
    ledger.record_event(job_id, "repaired", integ.step, integ.time, (),
                        {"from_checkpoint": good["idx"], "rewritten": rewritten})
    return integ, cks[-1], rewritten


def _dead_local_owners(conn):
    """Ids of running jobs owned by a process of this host that is gone."""
    import os
    import socket

    prefix = socket.gethostname() + ":"
    dead = []
    for job_id, owner in conn.execute(select(jobs.c.id, jobs.c.owner).where(and_(
            jobs.c.status == JobStatus.RUNNING.value, jobs.c.owner.like(prefix + "%")))):
        pid_text = owner[len(prefix):]
        if not pid_text.isdigit():
            continue
        try:
            os.kill(int(pid_text), 0)
        except ProcessLookupError:
            dead.append(job_id)
        except PermissionError:
            pass  # alive, someone else's
    return dead


def _spec_json(spec):
    from orbitledger.runner.inputs.spec import canonical_json

    return canonical_json(spec)


def _spec_sha(spec):
    from orbitledger.runner.inputs.spec import spec_sha256

    return spec_sha256(spec)


def angmom0(row):
    """The job's initial angular-momentum vector."""
    return np.array(json.loads(row["angmom0"]))
