"""Workers: claim jobs, integrate chunk by chunk, commit by the fenced protocol.

One worker is one process running :meth:`Worker.run`. SIGTERM, SIGINT, SIGHUP
and SIGUSR1 ask it to checkpoint at the next safe point (between kernel calls
of at most MAX_STEPS_PER_CALL steps), release its lease and exit with
EXIT_WORK_REMAINS if any work is left, 0 otherwise.

A chunk's commit (fence check, store write, ledger transaction, in that order)
usually runs on the worker's helper thread while the kernel computes the next
chunk or the next claim's job; see DEVELOPERS.md, "Commits behind the kernel".
"""

import logging
import os
import socket
import time

import numpy as np

from orbitledger.runner import defaults
from orbitledger.runner.ledger import provenance
from orbitledger.runner.execution import signals as stopflag

from orbitledger.runner.errors import (DiskFullError, FencedError, NumericalFailureError,
                                      StoreError)
from orbitledger.runner.ledger.basics import CommitResult
from orbitledger.runner.ledger.operations import repair_by_replay
from orbitledger.runner.ledger.retry import DatabaseGoneError
from orbitledger.runner.store.sampling import sample_now
from orbitledger.runner.execution import batches
from orbitledger.runner.execution.runs import (Budget, ClaimRun, Commit, PendingCommit,
                                               helper_thread, new_events,
                                               over_budget, process_seconds, raise_if_broken,
                                               rate_of)
from orbitledger.runner.execution.failpoints import failpoint
from orbitledger.runner.ledger.status import ACTIVE, JobStatus
from orbitledger.runner.execution.worklog import LOG

STOP_SIGNALS = stopflag.STOP_SIGNALS


def disk_full(err, ledger):
    """A DiskFullError for an error that means no space was left (the store's, an
    OSError's ENOSPC, or the ledger database's), else None."""
    import errno

    from orbitledger.runner.diskspace import no_space_text

    if isinstance(err, DiskFullError):
        return err
    if isinstance(err, OSError) and err.errno == errno.ENOSPC:
        return DiskFullError(no_space_text(f"{err.filename or 'a file'}", err.filename or ".",
                                           "a write was refused") + ".")
    orig = getattr(err, "orig", None)
    text = str(orig if orig is not None else err)
    if "database or disk is full" in text:  # SQLite
        path = ledger.engine.url.database or "."
        return DiskFullError(no_space_text(f"the ledger database {path}",
                                           os.path.dirname(os.path.abspath(path)),
                                           "a commit was refused")
                             + "; the jobs resume from their last commits.")
    if getattr(orig, "sqlstate", None) == "53100":  # PostgreSQL: disk_full
        return DiskFullError(f"no space left on the PostgreSQL server's disk "
                             f"({text.strip().splitlines()[0]}): free space there and run "
                             "`work` again; the jobs resume from their last commits.")
    return None


class Worker:
    """A worker over one ledger.

    Parameters
    ----------
    ledger : Ledger
    owner : str, optional
        Lease owner name; default host:pid.
    deadline : float, optional
        Wall-clock time (epoch seconds) after which the worker checkpoints and exits.
    job_id : int, optional
        Work on this job only.
    order : {"breadth", "depth"}
        Claim the least advanced job first (breadth) or the most advanced (depth).
    progress : callable, optional
        Called as progress(job_row, step, rate_days_per_s) now and then.
    clock : callable
        Wall clock, for tests.
    max_steps_per_call : int
        Most steps one kernel call takes.
    slice_seconds : float or None
        Wall time one kernel call aims at (fewer steps for a large system), so
        signals and requests are seen within about this long; None: every call
        takes ``max_steps_per_call`` steps (tests that need exact slices).
    lanes : int
        Most members of one ensemble worked together by the batched kernel
        (see :mod:`runner.execution.batches`); 1: every job alone.
    peers : int
        Workers of the same pool: a batch takes at most this share of an
        ensemble's queued and running members, so the pool's workers split it.
    """

    def __init__(self, ledger, owner=None, deadline=None, job_id=None, order="breadth",
                 progress=None, clock=time.time, max_steps_per_call=defaults.MAX_STEPS_PER_CALL,
                 heartbeat_seconds=defaults.HEARTBEAT_SECONDS,
                 slice_seconds=defaults.SLICE_SECONDS, lanes=defaults.BATCH_LANES, peers=1,
                 db_wait=None):
        self.ledger = ledger
        if db_wait is not None:
            # How long the ledger's operations wait for a database that went away.
            ledger.retry_seconds = float(db_wait)
        self.owner = owner or f"{socket.gethostname()}:{os.getpid()}"
        self.deadline = deadline
        self.job_id = job_id
        self.order = order
        self.progress = progress
        self.clock = clock
        self.max_steps_per_call = int(max_steps_per_call)
        self.heartbeat_seconds = float(heartbeat_seconds)
        self.slice_seconds = None if slice_seconds is None else float(slice_seconds)
        self.lanes = max(1, int(lanes))
        self.peers = max(1, int(peers))
        self.stop_requested = None
        self._pending = None  # a claim's last commit, to run (or running) on the helper thread
        self._use_flag = False
        self.failed = False
        self.results = []
        self.kernel_seconds = 0.0  # wall time in the kernel calls (in-loop samples included)
        self.kernel_cpu_seconds = 0.0  # the CPU time this thread got during them

    # -- signals ------------------------------------------------------------------
    def install_signal_handlers(self):
        """Make the stop signals request a clean stop instead of killing the process."""
        stopflag.install()
        self._use_flag = True

    def _should_stop(self):
        if self._use_flag and stopflag.requested():
            self.stop_requested = stopflag.requested()
        return self.stop_requested is not None or (
            self.deadline is not None and self.clock() >= self.deadline)

    # -- main loop ----------------------------------------------------------------
    def run(self):
        """Work until nothing is claimable, a deadline, or a stop signal. Returns an exit code."""
        LOG.info("worker %s started", self.owner)
        t_run = time.perf_counter()
        try:
            while not self._should_stop():
                claim = self.ledger.claim(self.owner, now=self.clock(), job_id=self.job_id,
                                          order=self.order, provenance=provenance.collect())
                if claim is None:
                    # A member being handed back may be the only job left.
                    if self._settle_pending() == JobStatus.QUEUED:
                        continue
                    LOG.info("nothing left to claim")
                    break
                LOG.info("job %d claimed (fencing token %d)", claim.job_id, claim.fence)
                mates = batches.claim_mates(self, claim)
                if mates:
                    # Ensemble members level with this one share its kernel calls.
                    self._settle_pending()
                    for c, status in batches.run_batch(self, [claim] + mates):
                        self._record(c, status)
                    continue
                status = self.run_claim(claim, overlap=True)
                # At most one claim's last commit in flight: the one before
                # this claim's started when this claim's kernel did (so the
                # claim and the load ran alone) and has had its chunk to finish.
                self._settle_pending()
                if isinstance(status, PendingCommit):
                    self._pending = status
                else:
                    self._record(claim, status)
        except Exception as err:  # noqa: BLE001 - only a full disk is mapped here
            # A batch hands its claims back before its error comes up; a claim
            # or a commit may meet the full disk too: one line either way.
            full = disk_full(err, self.ledger)
            if full is None:
                raise
            text = str(full).rstrip(".")
            if text.endswith(("last commit", "last commits", "on this host)")):
                raise full from err
            raise DiskFullError(f"{text}; the jobs resume from their last commits.") from err
        finally:
            self._settle_pending()
        if self.stop_requested is not None:
            LOG.info("stopped by %s", self.stop_requested)
        elif self.deadline is not None and self.clock() >= self.deadline:
            LOG.info("deadline reached")
        code = self.exit_code()
        run_s = time.perf_counter() - t_run
        up = process_seconds()
        LOG.info("worker %s spent %.2f s in kernel calls (%.2f s of CPU) of its %.2f s of work "
                 "(%.1f %%)%s", self.owner, self.kernel_seconds, self.kernel_cpu_seconds, run_s,
                 100.0 * self.kernel_seconds / run_s if run_s > 0 else 0.0,
                 "" if up is None else f"; {up - run_s:.2f} s of start-up before it")
        LOG.info("worker %s exits with code %d", self.owner, code)
        return code

    def _record(self, claim, status):
        LOG.info("job %d: %s", claim.job_id, getattr(status, "value", status))
        self.results.append((claim.job_id, status))

    def _settle_pending(self):
        """Wait for the last commit of a claim in flight, if any; record and return the
        job's status after it (None if nothing was in flight)."""
        pending, self._pending = self._pending, None
        if pending is None:
            return None
        try:
            status = pending.result().status
        except Exception as err:  # noqa: BLE001 - mapped like a synchronous commit's errors
            status = self._failed_claim(pending.claim, pending.seg, err)
        self._record(pending.claim, status)
        return status

    def exit_code(self):
        """EXIT_WORK_REMAINS if stopped early with work left, EXIT_FAILED on failure, else 0."""
        if self._should_stop():
            counts = self.ledger.counts()
            if any(counts.get(s.value, 0) for s in ACTIVE) if self.job_id is None else \
                    JobStatus(self.ledger.job(self.job_id)["status"]) in ACTIVE:
                return defaults.EXIT_WORK_REMAINS
        return defaults.EXIT_FAILED if self.failed else 0

    def run_claim(self, claim, overlap=False):
        """Integrate one claimed job until it ends, is interrupted or is fenced out.

        Returns the job's status afterwards (or "fenced"). With ``overlap``, a
        claim that ends after a chunk (the job's end or stop, a member handed
        back in breadth order) may be returned as a :class:`PendingCommit` whose last
        commit is still running on the helper thread, so the caller can claim
        the next job meanwhile (:meth:`run` does).
        """
        opened = self._open(claim)
        if not isinstance(opened, tuple):
            return opened
        row, plan, integ, ck, seg = opened
        try:
            return self._chunks(claim, row, plan, integ, ck, seg, overlap)
        except Exception as err:  # noqa: BLE001 - each kind is mapped below
            return self._failed_claim(claim, seg, err)

    def _open(self, claim):
        """The claimed job's row, budget, integrator at its last checkpoint, that
        checkpoint's row and the segment of work; or the job's status if its
        checkpoint could not be loaded (then held)."""
        row = claim.job if claim.job is not None else self.ledger.job(claim.job_id)
        # The budget is plain numbers in the stored spec: no unit parsing (and
        # no astropy import) on the resume path.
        plan = Budget.from_spec_json(row["spec_json"])
        try:
            try:
                integ, ck = self.ledger.load_integrator(claim.job_id, row=claim.checkpoint)
            except StoreError:
                # Damaged or truncated checkpoint: fall back to the last good
                # one and replay from there, checking every recorded hash.
                integ, ck, _ = repair_by_replay(self.ledger, claim.job_id, claim)
        except StoreError as err:
            # Store damage is the operator's to mend (restore, or `verify` to
            # see the extent): hold the job with the reason, never fail it.
            self.ledger.give_back(claim, now=self.clock(), status=JobStatus.HELD,
                                  reason=f"could not load the last checkpoint: {err}")
            if claim.segment_id is not None:
                self.ledger.end_segment(claim.segment_id, None, "load_failed", now=self.clock())
            return JobStatus.HELD
        seg = claim.segment_id
        if seg is None:
            seg = self.ledger.start_segment(claim, integ.step, provenance.collect(),
                                            now=self.clock())
        return row, plan, integ, ck, seg

    def _failed_claim(self, claim, seg, err):
        """What a claim that ended in an error leaves: the job's status (or "fenced").

        A lost lease discards the uncommitted chunk; a numerical failure fails
        the job with the reason (a rerun would fail the same way); store damage
        holds it for the operator; anything else fails it and is re-raised.
        """
        if isinstance(err, DatabaseGoneError):
            raise err  # nothing can be written: the lease lapses, the job resumes
        if isinstance(err, FencedError):
            self.ledger.end_segment(seg, None, "fenced", now=self.clock())
            return "fenced"
        full = disk_full(err, self.ledger)
        if full is not None:
            # No space: nothing after the last commit is kept; the job goes back
            # to the queue and this worker stops (the next write would fail too).
            # With the database's own disk full the hand-back may fail as well:
            # the lease then lapses (at once for a worker on this host).
            try:
                self.ledger.give_back(claim, now=self.clock())
                self.ledger.end_segment(seg, None, "disk_full", now=self.clock())
                fate = f"job {claim.job_id} was handed back at its last commit"
            except Exception:  # noqa: BLE001 - the database may be the full one
                fate = (f"job {claim.job_id} resumes from its last commit (its lease "
                        "lapses, at once for a worker on this host)")
            text = str(full).rstrip(".")
            if text.endswith("last commits"):  # the database's own message says it
                raise full from err
            raise DiskFullError(f"{text}; {fate}.") from err
        if isinstance(err, NumericalFailureError):
            self.failed = True
            self.ledger.give_back(claim, now=self.clock(), status=JobStatus.FAILED,
                                  reason=str(err))
            self.ledger.end_segment(seg, None, "numerical_failure", now=self.clock())
            return JobStatus.FAILED
        if isinstance(err, StoreError):
            # Nothing beyond the last commit is lost; hold the job with the reason.
            self.ledger.give_back(claim, now=self.clock(), status=JobStatus.HELD,
                                  reason=f"checkpoint store failed: {err}")
            self.ledger.end_segment(seg, None, "store_error", now=self.clock())
            return JobStatus.HELD
        self.failed = True
        self.ledger.give_back(claim, now=self.clock(), status=JobStatus.FAILED,
                              reason=f"{type(err).__name__}: {err}")
        self.ledger.end_segment(seg, None, "failed", now=self.clock())
        raise err

    def _chunks(self, claim, row, plan, integ, ck, seg, overlap=False, run=None):
        # `run`: a claim already under way (a member leaving a batch) goes on
        # with its own counters.
        run = run or ClaimRun(claim, row, plan, integ, ck, seg)
        buf = run.buf
        # With a wall-time slice, a short first call measures the cost of a step.
        steps_per_call = (self.max_steps_per_call if self.slice_seconds is None
                          else min(self.max_steps_per_call, 100))
        last_beat = self.clock()
        pending = None  # the previous chunk's commit, running on the helper thread
        try:
            while True:
                prepared = None
                chunk_end = run.chunk_end()
                buf.clear()
                stop = None
                request = None
                interrupted = False
                wall0 = self.clock()
                step0 = integ.step
                while integ.step < chunk_end:
                    n_call = min(chunk_end - integ.step, steps_per_call)
                    t_call, c_call = time.perf_counter(), time.thread_time()
                    res = buf.advance(integ, n_call, run.out)
                    self.kernel_seconds += time.perf_counter() - t_call
                    self.kernel_cpu_seconds += time.thread_time() - c_call
                    # Kernel calls last about SLICE_SECONDS whatever the system's
                    # size, so signals and requests are seen within seconds. How
                    # the steps are sliced never changes the trajectory.
                    steps_per_call = self._next_call_steps(steps_per_call, t_call, res.steps)
                    failpoint("first_step")
                    if prepared is None:
                        prepared = self._behind_first_call(claim.job_id, run.idx, claim.fence,
                                                           run.layout)
                    if res.stopped:
                        raise_if_broken(integ, res)
                        stop = res
                        break
                    now = self.clock()
                    if now - last_beat >= self.heartbeat_seconds:
                        request = self.ledger.heartbeat(claim, now=now)
                        last_beat = now
                        if request in ("hold", "cancel"):
                            interrupted = True
                            break
                    if self._should_stop():
                        interrupted = True
                        break
                    if self.progress is not None:
                        self.progress(row, integ.step, rate_of(integ, step0, wall0, self.clock()))
                if prepared is None:
                    prepared = self._behind_first_call(claim.job_id, run.idx, claim.fence,
                                                       run.layout)
                if pending is not None:
                    # The previous chunk's commit decides whether this one counts:
                    # a hold or cancel applied there ends the claim, and this
                    # chunk, never committed, is discarded.
                    result, pending = pending.result(), None
                    run.total = result.total_steps
                    if result.status != JobStatus.RUNNING:
                        return result.status
                # The chunk's commit may run on the helper thread while the
                # kernel goes on, when it is small: with the next chunk of this
                # job (whose commit waits for this one's, and which is discarded
                # if this one fails or ends the claim), or, when the claim ends
                # here (a member handed back, the end, a stop) and the caller
                # goes on claiming (``overlap``), with the next job. A signal or
                # a request is answered with the commit made before going on.
                commit, then = self._chunk_commit(run, prepared, stop, interrupted, request,
                                                  wall0, step0, overlap)
                if commit.behind and then == "continue":
                    pending = helper_thread().submit(self._commit, commit)
                    continue
                if commit.behind:
                    commit.ends_claim = True
                    return PendingCommit(claim, seg, self._commit, commit)
                result = self._commit(commit)
                run.total = result.total_steps
                if result.status != JobStatus.RUNNING:
                    return result.status
        except BaseException:
            # Nothing of this claim may stay in flight when it ends; an error of
            # the earlier commit came first, so it is the one reported.
            if pending is not None:
                pending.result()
            raise

    def _next_call_steps(self, steps_per_call, t_call, steps):
        """Steps of the next kernel call: about ``slice_seconds`` of wall time."""
        if self.slice_seconds is None:
            return steps_per_call
        per_step = (time.perf_counter() - t_call) / max(steps, 1)
        return max(1, min(self.max_steps_per_call, int(self.slice_seconds / max(per_step, 1e-9))))

    def _chunk_commit(self, run, prepared, stop, interrupted, request, wall0, step0,
                      overlap=False):
        """The commit of the chunk just integrated, and what follows it ("continue",
        "release", "done", "stopped" or "held"); advances the run's counters."""
        integ, row, plan = run.integ, run.row, run.plan
        block = run.buf.block()
        here = sample_now(integ, run.e0, run.l0)
        e_err = float(abs(here["energy_error"][0]))
        l_err = float(here["angmom_error"][0])
        if len(block["time"]):
            run.max_e = max(run.max_e, float(np.abs(block["energy_error"]).max()))
            run.max_l = max(run.max_l, float(block["angmom_error"].max()))
        run.max_e, run.max_l = max(run.max_e, e_err), max(run.max_l, l_err)
        then, outcome, reason = "continue", None, None
        if stop is not None:
            then = "stopped"
            outcome = (stop.kind.value, integ.step, integ.time, stop.bodies)
        elif integ.step >= run.total:
            then = "done"
        elif interrupted and request is None:
            then = "release"
        elif self.order == "breadth" and row["ensemble_id"] is not None:
            # Fair progress: hand the member back after each chunk so the
            # least advanced member is always the next one worked on.
            then = "release"
        over = over_budget(plan, run.max_e, run.max_l)
        if over and then != "stopped" and plan.on_exceed != "continue":
            if plan.on_exceed == "hold":
                then, reason = "held", over
            else:
                then, reason = "stopped", over
                outcome = ("over_budget", integ.step, integ.time, ())
        fresh = new_events(integ, run.seen)
        nbytes = sum(v.nbytes for v in block.values())
        behind = (not interrupted and nbytes <= defaults.OVERLAP_COMMIT_BYTES
                  and (then == "continue" or overlap))
        if behind:
            block = {k: v.copy() for k, v in block.items()}
        commit = Commit(
            run.claim, prepared, run.n_samples, block, integ.state_arrays(),
            dict(idx=run.idx + 1, step=integ.step, time_=integ.time,
                 n_samples=run.n_samples + len(block["time"]), energy_error=e_err,
                 angmom_error=l_err, max_energy_error=run.max_e, max_angmom_error=run.max_l,
                 then=then, outcome=outcome, reason=reason, segment_id=run.seg,
                 wall_seconds=self.clock() - wall0,
                 rate=rate_of(integ, step0, wall0, self.clock()), events=fresh))
        commit.behind = behind
        run.seen += len(fresh)
        run.idx += 1
        run.n_samples += len(block["time"])
        return commit, then

    def _behind_first_call(self, job_id, idx, fence, layout):
        """Start the helper thread's work for a chunk once its first kernel call is done.

        The previous claim's last commit starts now, and the job's arrays are
        opened and the coming checkpoint's array created, all while the
        kernel (which releases the GIL) goes on: not earlier, so that none of
        it slows this claim, its load or, in a new process, the first call's
        loading of the compiled kernel (the first prepare also imports zarr).
        Returns the prepare's future.
        """
        if self._pending is not None:
            self._pending.start()
        return helper_thread().submit(self.ledger.store.prepare, job_id, (idx + 1, fence, layout))

    def _commit(self, c):
        """Write a chunk's samples and checkpoint, then record it in the ledger under
        the claim's fence (on the helper thread when it overlaps the kernel)."""
        claim, job_id = c.claim, c.claim.job_id
        # Fence check right before touching the store (read only; the commit
        # that follows renews the lease).
        self.ledger.check_fence(claim)
        c.prepared.result()  # re-raises a StoreError from the helper
        failpoint("before_store_write")
        # Samples and checkpoint in one batch ("mid_store_write" fires inside
        # it, after the writes and before the fsyncs).
        s_hash, st_hash = self.ledger.store.write_chunk(
            job_id, c.start, c.block, c.fields["idx"], claim.fence, c.state)
        failpoint("after_store_write")
        result = self.ledger.commit_checkpoint(claim, state_hash=st_hash, samples_hash=s_hash,
                                               now=self.clock(), **c.fields)
        if LOG.isEnabledFor(logging.INFO):
            rate, step, total = c.fields["rate"], c.fields["step"], result.total_steps
            LOG.info("job %d checkpoint %d at step %d, t = %.6g yr (%.3g%%), %s",
                     job_id, c.fields["idx"], step, abs(c.fields["time_"]) / 365.25,
                     100.0 * step / total if total else 100.0,
                     "rate unknown" if rate is None else f"{rate * 3600 / 365.25e6:.3g} Myr/h")
        if result.status in (JobStatus.DONE, JobStatus.STOPPED, JobStatus.CANCELLED):
            # Finished: leave exactly the committed rows for readers.
            self.ledger.store.trim_samples(job_id, c.fields["n_samples"], claim.fence)
        elif result.status == JobStatus.RUNNING and c.ends_claim:
            # Extended while its last chunk ran ("done" became "continue"), but
            # this worker has gone on to its next claim: hand the job back so
            # that a claim goes on with it at once.
            # A hold or cancel requested since the commit is applied here, and
            # is what the job's result and its segment record.
            left = self.ledger.give_back(claim, now=self.clock()) or JobStatus.QUEUED
            self.ledger.end_segment(c.fields["segment_id"], None, left.value, now=self.clock())
            result = CommitResult(left, result.total_steps, result.requested)
        return result
