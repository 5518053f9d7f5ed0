"""Submitting work: jobs, ensembles and backward runs enter the ledger with their first
checkpoint written (part of :class:`~orbitledger.runner.ledger.operations.Ledger`)."""

import json

from sqlalchemy import insert, select

from orbitledger.runner.errors import LedgerError, NotFoundError
from orbitledger.runner.ledger.db import (checkpoints, ensembles, jobs)
from orbitledger.runner.ledger.status import JobStatus
from orbitledger.runner.store.chain import chain_sha256
from orbitledger.runner.ledger.basics import GENESIS, _now


class Submitting:
    """Ledger methods that add jobs."""

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
        with self.engine.begin() as conn:
            ens_id = int(conn.execute(insert(ensembles).values(
                name=spec.name, spec_json=_spec_json(spec), spec_sha256=_spec_sha(spec),
                members=spec.ensemble.members, created_at=now)).inserted_primary_key[0])
            # Members' stores are written by a few threads while the next
            # members are prepared, without an fsync each; leaving the batch
            # waits for every write, and one sync makes them all durable
            # before the transaction that refers to them commits.
            with self.store.new_jobs(durable=False) as batch:
                # Member specs one at a time: a 100 000-member submit holds
                # only one in memory.
                ids = [self._submit_in(conn, member_spec(spec, k), now, priority, ens_id,
                                       None, None, None, batch=batch)
                       for k in range(spec.ensemble.members)]
            self.store.sync_all()
        return ens_id, ids

    def _submit_in(self, conn, spec, now, priority, ensemble_id, plan, integrator, parent,
                   batch=None):
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
        capacity = (total - integ.step) // plan.output_steps + 1 + off_grid
        carried = integ.indicator is not None
        parts = () if plan.particles is None else plan.particles.names
        if len(parts) != getattr(integ, "particle_count", 0):
            raise LedgerError(f"the starting state carries {integ.particle_count} test "
                              f"particles but the spec lists {len(parts)}.")
        if batch is None:
            self.store.create_job(job_id, sysm.names, capacity=capacity, indicator=carried,
                                  particles=parts)
            s_hash, digest = self.store.write_first(job_id, first, integ.state_arrays())
        else:
            s_hash, digest = batch.add(job_id, sysm.names, capacity, first, integ.state_arrays(),
                                       indicator=carried, particles=parts)
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


def _spec_json(spec):
    from orbitledger.runner.inputs.spec import canonical_json

    return canonical_json(spec)


def _spec_sha(spec):
    from orbitledger.runner.inputs.spec import spec_sha256

    return spec_sha256(spec)
