"""Reading the ledger: jobs, checkpoints, segments, events, and integrators loaded from
committed checkpoints (part of :class:`~orbitledger.runner.ledger.operations.Ledger`)."""

import json

from sqlalchemy import and_, func, select

from orbitledger.runner.errors import NotFoundError
from orbitledger.runner.ledger.db import checkpoints, ensembles, events, jobs, segments
from orbitledger.runner.ledger.retry import retrying
from orbitledger.runner.ledger.status import JobStatus


class Reading:
    """Ledger methods that only read."""

    @retrying("reading a job")
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

    def recent_events(self, limit):
        """The latest `limit` events of all jobs, newest first."""
        with self.engine.connect() as conn:
            return [dict(r) for r in conn.execute(
                select(events).order_by(events.c.id.desc()).limit(limit)).mappings()]

    def member_outcomes(self, ensemble_id):
        """What outcome statistics need of an ensemble's members (no specs): dicts of
        id, status, outcome, outcome_time, outcome_bodies, steps_done, dt, oldest first."""
        cols = (jobs.c.id, jobs.c.status, jobs.c.outcome, jobs.c.outcome_time,
                jobs.c.outcome_bodies, jobs.c.steps_done, jobs.c.dt)
        with self.engine.connect() as conn:
            return [dict(r) for r in conn.execute(select(*cols).where(
                jobs.c.ensemble_id == ensemble_id).order_by(jobs.c.id)).mappings()]

    def member_events(self, ensemble_id, kinds):
        """(job id, kind, bodies) of the events of these kinds in an ensemble's members."""
        q = (select(events.c.job_id, events.c.kind, events.c.bodies)
             .select_from(events.join(jobs, jobs.c.id == events.c.job_id))
             .where(and_(jobs.c.ensemble_id == ensemble_id, events.c.kind.in_(list(kinds))))
             .order_by(events.c.id))
        with self.engine.connect() as conn:
            return [tuple(r) for r in conn.execute(q)]

    def n_jobs(self):
        """Number of jobs in the ledger."""
        with self.engine.connect() as conn:
            return int(conn.execute(select(func.count()).select_from(jobs)).scalar())

    def jobs_outside_ensembles(self, limit=None):
        """Rows of jobs that belong to no ensemble, newest last (the last `limit` of them)."""
        q = select(jobs).where(jobs.c.ensemble_id.is_(None)).order_by(jobs.c.id.desc())
        if limit is not None:
            q = q.limit(limit)
        with self.engine.connect() as conn:
            return [dict(r) for r in conn.execute(q).mappings()][::-1]

    def ensemble_summaries(self):
        """Per ensemble, aggregated in the database (fast for any number of members):
        dicts with id, name, members, counts by status, steps done and in all, the
        largest energy error, the members stopped by each outcome, the step and
        the spans (days) of its members."""
        out = {}
        with self.engine.connect() as conn:
            for e in conn.execute(select(ensembles.c.id, ensembles.c.name,
                                         ensembles.c.members)).mappings():
                out[e["id"]] = dict(e, counts={}, outcomes={}, steps_done=0, total_steps=0,
                                    max_energy_error=0.0, done_days=[], total_days=[])
            q = select(jobs.c.ensemble_id, jobs.c.status, func.count(),
                       func.sum(jobs.c.steps_done), func.sum(jobs.c.total_steps),
                       func.max(jobs.c.max_energy_error),
                       func.min(func.abs(jobs.c.steps_done * jobs.c.dt)),
                       func.max(func.abs(jobs.c.total_steps * jobs.c.dt))).where(
                jobs.c.ensemble_id.is_not(None)).group_by(jobs.c.ensemble_id, jobs.c.status)
            for ens, st, n, done, total, emax, tmin, tmax in conn.execute(q):
                e = out[ens]
                e["counts"][st] = int(n)
                e["steps_done"] += int(done or 0)
                e["total_steps"] += int(total or 0)
                e["max_energy_error"] = max(e["max_energy_error"], float(emax or 0.0))
                e["done_days"].append(float(tmin or 0.0))
                e["total_days"].append(float(tmax or 0.0))
            q = select(jobs.c.ensemble_id, jobs.c.outcome, func.count()).where(and_(
                jobs.c.ensemble_id.is_not(None), jobs.c.status == JobStatus.STOPPED.value)
            ).group_by(jobs.c.ensemble_id, jobs.c.outcome)
            for ens, outcome, n in conn.execute(q):
                out[ens]["outcomes"][outcome or "-"] = int(n)
        return [e for e in out.values() if e["counts"]]

    @retrying("counting jobs")
    def counts(self):
        """Number of jobs by status."""
        with self.engine.connect() as conn:
            rows = conn.execute(select(jobs.c.status, func.count()).group_by(jobs.c.status))
            return {s: int(n) for s, n in rows}

    @retrying("loading a checkpoint")
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


def angmom0(row):
    """The job's initial angular-momentum vector."""
    import numpy as np  # here: the ledger's light paths (`status`) do not load numpy

    return np.array(json.loads(row["angmom0"]))
