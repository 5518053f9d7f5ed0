"""The worker's side of the ledger: claims and leases, heartbeats, fenced commits,
giving work back, segments of work and events (part of
:class:`~orbitledger.runner.ledger.operations.Ledger`)."""

import json

from sqlalchemy import and_, func, insert, or_, select, update

from orbitledger.runner.errors import FencedError, LedgerError
from orbitledger.runner.execution.failpoints import failpoint
from orbitledger.runner.ledger import statements
from orbitledger.runner.ledger.db import (checkpoints, events, is_sqlite, jobs, segments)
from orbitledger.runner.ledger.retry import retrying
from orbitledger.runner.ledger.status import JobStatus
from orbitledger.runner.store.chain import chain_sha256
from orbitledger.runner.ledger.basics import Claim, CommitResult, _now


class WorkerSide:
    """Ledger methods a worker calls."""

    @retrying("claiming a job")
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
            # Lapsed: running, and the lease has expired or the owner is a
            # dead process of this host.
            lapsed = {"now": now, "dead": _dead_local_owners(conn)}
            self._apply_lapsed_requests(conn, lapsed, now)
            return self._claim_in(conn, lapsed, owner, now, job_id, order, provenance)

    @retrying("claiming a batch")
    def claim_each(self, owner, job_ids, now=None, order="breadth", provenance=None):
        """Claims of each of these jobs that is still claimable, in one transaction
        (a batch's members): one Claim per job, each with its own lease, fencing
        token and segment, in the order given; a job another worker took
        meanwhile is left out."""
        now = _now(now)
        out = []
        with self.engine.begin() as conn:
            lapsed = {"now": now, "dead": _dead_local_owners(conn)}
            self._apply_lapsed_requests(conn, lapsed, now)
            for job_id in job_ids:
                c = self._claim_in(conn, lapsed, owner, now, job_id, order, provenance)
                if c is not None:
                    out.append(c)
        return out

    def _claim_in(self, conn, lapsed, owner, now, job_id, order, provenance):
        """The claim of :meth:`claim` inside an open transaction."""
        # The best queued job and the best lapsed one, each read in claim
        # order (queued ones through an index), then the better of the two
        # by the same order: as one query over both, without sorting every
        # queued row.
        if order == "breadth":
            rank = lambda r: (-r["priority"], r["steps_done"], r["id"])  # noqa: E731
        else:
            order = "depth"
            rank = lambda r: (-r["priority"], -r["steps_done"], r["id"])  # noqa: E731
        found = []
        for which, params in (("queued", {}), ("lapsed", lapsed)):
            q = statements.candidate(which, order, job_id is not None,
                                     not is_sqlite(self.engine))
            if job_id is not None:
                params = dict(params, job_id=job_id)
            r = conn.execute(q, params).mappings().first()
            if r is not None:
                found.append(dict(r))
        if not found:
            return None
        row = min(found, key=rank)
        fence = int(row["fence"]) + 1
        expires = now + self.lease_seconds
        self._transition(conn, row["id"], row["status"], JobStatus.RUNNING, "claim",
                         if_fence=row["fence"],
                         owner=owner, lease_expires=expires, fence=fence, updated_at=now)
        # Everything the worker needs to start, read in the same transaction.
        job = dict(self._row(conn, row["id"]))
        if row["status"] == JobStatus.RUNNING.value:
            self._event(conn, row["id"], "lease_taken_over", job["steps_done"], None, None,
                        {"new_owner": owner, "fence": fence}, now)
            self._close_lapsed_segments(conn, row["id"], job["steps_done"], now)
        ck = conn.execute(statements.checkpoint_row(), {
            "job_id": row["id"], "idx": job["n_checkpoints"]}).mappings().first()
        seg = None
        if provenance is not None:
            seg = self._insert_segment(conn, row["id"], fence, owner, job["steps_done"],
                                       provenance, now)
        return Claim(int(row["id"]), fence, owner, expires, seg, job,
                     None if ck is None else dict(ck))

    @retrying("finding batch mates")
    def batch_mates(self, job, limit, now=None):
        """Ids of up to `limit` claimable members of the job's ensemble (queued, or
        running with a lapsed lease or a dead local owner, as :meth:`claim` takes
        them) that can share a batch with it: the same progress, span, chunk,
        cadence, step and priority (so they stand level with it in breadth-first
        order), lowest ids first."""
        if job["ensemble_id"] is None or limit <= 0:
            return []
        c = jobs.c
        with self.engine.connect() as conn:
            dead = _dead_local_owners(conn)
            claimable = or_(c.status == JobStatus.QUEUED.value, and_(
                c.status == JobStatus.RUNNING.value,
                or_(c.lease_expires < _now(now), c.id.in_(dead))))
            q = select(c.id).where(and_(
                c.ensemble_id == job["ensemble_id"], claimable,
                c.id != job["id"], c.steps_done == job["steps_done"],
                c.total_steps == job["total_steps"], c.chunk_steps == job["chunk_steps"],
                c.output_steps == job["output_steps"], c.dt == job["dt"],
                c.method == job["method"],
                c.priority == job["priority"])).order_by(c.id).limit(limit)
            return [int(r[0]) for r in conn.execute(q)]

    @retrying("noting the kernel")
    def note_kernel(self, segment_ids, kernel):
        """Record in segments' provenance which kernel path ran them (e.g. "batched, 8
        members"); segments without the note ran the scalar kernel."""
        with self.engine.begin() as conn:
            for seg in segment_ids:
                text = conn.execute(select(segments.c.versions).where(
                    segments.c.id == seg)).scalar()
                ver = json.loads(text or "{}")
                ver["kernel"] = kernel
                conn.execute(update(segments).where(segments.c.id == seg).values(
                    versions=json.dumps(ver, sort_keys=True)))

    @retrying("counting members")
    def active_members(self, ensemble_id):
        """Members of an ensemble queued or running (the work its workers share)."""
        c = jobs.c
        q = select(func.count()).select_from(jobs).where(and_(
            c.ensemble_id == ensemble_id,
            c.status.in_((JobStatus.QUEUED.value, JobStatus.RUNNING.value))))
        with self.engine.connect() as conn:
            return int(conn.execute(q).scalar())

    def _apply_lapsed_requests(self, conn, lapsed, now):
        """Running jobs whose worker is gone and which carry a hold or cancel request:
        apply the request now (their worker cannot), closing its open segment."""
        rows = conn.execute(statements.lapsed_requests(), lapsed).mappings().all()
        for r in rows:
            new = JobStatus.HELD if r["requested"] == "hold" else JobStatus.CANCELLED
            reason = "held on request" if new == JobStatus.HELD else "cancelled on request"
            self._transition(conn, r["id"], JobStatus.RUNNING, new, "give_back",
                             if_fence=r["fence"], owner=None,
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

    @retrying("checking the lease")
    def check_fence(self, claim):
        """Raise FencedError unless the claim's fencing token is still current (read only)."""
        with self.engine.connect() as conn:
            row = conn.execute(statements.fence_of(), {"job_id": claim.job_id}).first()
        if row is None or row[0] != claim.fence or row[1] != JobStatus.RUNNING.value:
            raise FencedError(f"job {claim.job_id}: lease with token {claim.fence} "
                              "is no longer held; discarding uncommitted work.")

    @retrying("renewing the lease")
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

    @retrying("committing")
    def commit_checkpoint(self, claim, *, idx, step, time_, state_hash, samples_hash,
                          n_samples, energy_error, angmom_error, max_energy_error,
                          max_angmom_error, then, outcome=None, reason=None,
                          segment_id=None, wall_seconds=0.0, rate=None, now=None,
                          end_reason=None, events=(), again=False):
        """Record checkpoint idx and advance progress, only under the current fence.

        ``then`` says what the worker wants next: "continue", "release" (work
        remains, let another worker take it), "done", "stopped" (with
        ``outcome`` = (kind, step, time, bodies)), "held" (with ``reason``).
        ``events`` are rows (kind, step, time, bodies, detail) the chunk produced
        (switches of method, mergers, ejections), recorded in the same
        transaction as the checkpoint that contains them.
        A pending user request (hold, cancel) and an extension made meanwhile
        are applied here. If the job stops running, the segment is closed in
        the same transaction (``end_reason`` defaults to the new status).
        Returns a :class:`CommitResult`.

        ``again``: this is a retry after the database went away (see
        :mod:`runner.ledger.retry`); if the last try did commit (its answer was
        lost), its checkpoint row is found and the commit is not made twice.
        """
        now = _now(now)
        with self.engine.begin() as conn:
            if again:
                mine = conn.execute(statements.checkpoint_row(), {
                    "job_id": claim.job_id, "idx": idx}).mappings().first()
                if (mine is not None and mine["fence"] == claim.fence
                        and mine["state_sha256"] == state_hash and mine["step"] == step):
                    row = self._row(conn, claim.job_id)
                    return CommitResult(JobStatus(row["status"]), int(row["total_steps"]), None)
            row = self._row(conn, claim.job_id, lock=True)
            if (row["fence"] != claim.fence or row["owner"] != claim.owner
                    or row["status"] != JobStatus.RUNNING.value):
                raise FencedError(f"job {claim.job_id}: lease with token {claim.fence} was "
                                  "taken over; this worker's chunk is discarded.")
            if idx != row["n_checkpoints"] + 1 or step <= row["steps_done"] and idx > 0:
                raise LedgerError(f"job {claim.job_id}: checkpoint {idx} at step {step} does not "
                                  f"follow checkpoint {row['n_checkpoints']} at step "
                                  f"{row['steps_done']}.")
            prev = conn.execute(statements.checkpoint_row(), {
                "job_id": claim.job_id, "idx": row["n_checkpoints"]}).mappings().first()
            prev = None if prev is None else prev["chain_sha256"]
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
                             if_fence=claim.fence, **fields)
            failpoint("in_commit")  # inside the open transaction: a kill here rolls back
            conn.execute(statements.insert_into(checkpoints), dict(
                job_id=claim.job_id, idx=idx, step=step, time=time_, fence=claim.fence,
                state_sha256=state_hash, chain_sha256=chain_sha256(prev, state_hash, samples_hash),
                samples_sha256=samples_hash, n_samples=n_samples, energy_error=energy_error,
                angmom_error=angmom_error, segment_id=segment_id, created_at=now))
            for kind, e_step, e_time, bodies, detail in events:
                self._event(conn, claim.job_id, kind, e_step, e_time, bodies, detail, now)
            if then == "stopped":
                kind, o_step, o_time, bodies = outcome
                self._event(conn, claim.job_id, kind, o_step, o_time, bodies, None, now)
            if then == "held" and reason:
                self._event(conn, claim.job_id, "held", step, time_, (), {"reason": reason}, now)
            if segment_id is not None and new != JobStatus.RUNNING:
                conn.execute(statements.end_segment_at_commit(), {
                    "seg_id": segment_id, "end_step": step, "ended_at": now,
                    "end_reason": end_reason or new.value})
            failpoint("before_commit")
        failpoint("after_commit")
        return CommitResult(new, total, requested)

    @retrying("handing a job back")
    def give_back(self, claim, now=None, status=JobStatus.QUEUED, reason=None):
        """A worker gives up its claim without committing (work remains from the last
        checkpoint); a pending hold or cancel request is applied. Returns the
        status the job was left in, or None if the claim was no longer current."""
        now = _now(now)
        with self.engine.begin() as conn:
            row = self._row(conn, claim.job_id, lock=True)
            if row["fence"] != claim.fence or row["status"] != JobStatus.RUNNING.value:
                return None
            req = row["requested"]
            if req == "hold":
                status, reason = JobStatus.HELD, reason or "held on request"
            elif req == "cancel":
                status, reason = JobStatus.CANCELLED, "cancelled on request"
            self._transition(conn, claim.job_id, JobStatus.RUNNING, status, "give_back",
                             if_fence=claim.fence, owner=None,
                             lease_expires=None, requested=None, updated_at=now,
                             **({"reason": reason} if reason else {}))
            if status in (JobStatus.HELD, JobStatus.FAILED) and reason:
                self._event(conn, claim.job_id, status.value, row["steps_done"], None, (),
                            {"reason": reason}, now)
        if status == JobStatus.CANCELLED:
            self._trim_finished(claim.job_id, row["n_samples"])
        return status

    def _trim_finished(self, job_id, n_samples):
        """Leave exactly the committed sample rows of a job that will never run again."""
        from orbitledger.runner.errors import StoreError

        try:
            self.store.trim_samples(job_id, int(n_samples))
        except StoreError:
            pass  # a damaged store is reported by verify; the status change stands

    # -- user operations -------------------------------------------------------------

    @retrying("opening a segment")
    def start_segment(self, claim, start_step, prov, now=None):
        """Record the start of a stretch of work by this worker; returns its id."""
        now = _now(now)
        with self.engine.begin() as conn:
            return self._insert_segment(conn, claim.job_id, claim.fence, claim.owner, start_step,
                                        prov, now)

    @staticmethod
    def _insert_segment(conn, job_id, fence, owner, start_step, prov, now):
        return int(conn.execute(statements.insert_into(segments), dict(
            job_id=job_id, fence=fence, worker=owner, host=prov["host"],
            pid=prov["pid"], user=prov.get("user"), argv=prov.get("argv"),
            versions=json.dumps(prov.get("versions", {}), sort_keys=True),
            platform=prov.get("platform"), cpu=prov.get("cpu"), start_step=start_step,
            started_at=now)).inserted_primary_key[0])

    @retrying("closing a segment")
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

    @retrying("recording an event")
    def record_event(self, job_id, kind, step=None, time_=None, bodies=(), detail=None, now=None):
        """Add an event row (outside a commit)."""
        with self.engine.begin() as conn:
            self._event(conn, job_id, kind, step, time_, bodies, detail, _now(now))

    # -- queries -----------------------------------------------------------------------


def _dead_local_owners(conn):
    """Ids of running jobs owned by a process of this host that is gone."""
    import os
    import socket

    prefix = socket.gethostname() + ":"
    dead = []
    for job_id, owner in conn.execute(statements.running_local(), {"prefix": prefix + "%"}):
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
