"""Ensemble members worked as one batch by the batched kernel.

A worker that claims a member of an ensemble run by the Wisdom-Holman map
(with or without the corrector, GR and MEGNO; no test particles, no
switching) also claims up to ``lanes - 1`` queued members level with it
(same progress, span, chunk and cadence: equally least advanced in
breadth-first order). Each member keeps its own claim, lease, fencing token,
segment and commits; only the kernel calls are shared
(:func:`integrators.batch.advance_together`), and they give every member the
bytes its own run would. A member that meets a stop condition, is asked to
hold or cancel, or is fenced out leaves the batch at its own step and is
committed (or discarded) exactly as alone; the others go on. Commits run on
the worker's main thread after the chunk's kernel calls.
"""

import json
import time

from orbitledger.runner import defaults
from orbitledger.runner.execution.failpoints import failpoint
from orbitledger.runner.ledger.retry import DatabaseGoneError
from orbitledger.runner.execution.runs import ClaimRun, helper_thread, raise_if_broken, rate_of
from orbitledger.runner.execution.worklog import LOG
from orbitledger.runner.ledger import provenance
from orbitledger.runner.ledger.status import JobStatus
from orbitledger.runner.store.sampling import advance_members


def batchable(row):
    """True if a job's members can run in the batched kernel (read from its spec)."""
    if row["ensemble_id"] is None or row["method"] != "wisdom_holman":
        return False
    spec = json.loads(row["spec_json"])
    method = spec.get("method", {})
    return (method.get("indicator", "none") in ("none", "megno") and not spec.get("particles")
            and method.get("encounters", "stop") != "switch")


def claim_mates(worker, claim):
    """Claims of up to ``worker.lanes - 1`` members to batch with `claim` (may be none)."""
    row = claim.job if claim.job is not None else worker.ledger.job(claim.job_id)
    if worker.lanes <= 1 or worker.job_id is not None or not batchable(row):
        return []
    # The workers of one pool split the ensemble between them rather than the
    # first one taking every member it can.
    share = -(-worker.ledger.active_members(row["ensemble_id"]) // worker.peers)
    want = min(worker.lanes, share, _fit(row)) - 1
    mates = []
    # Workers starting together ask for the same queued members; a member
    # another worker took meanwhile is replaced by asking again (each round
    # offers only members still queued, so the rounds end), so that no worker
    # is left with a small batch beside a full one.
    while len(mates) < want:
        offered = worker.ledger.batch_mates(row, want - len(mates), now=worker.clock())
        if not offered:
            break
        # One transaction claims every offered member still claimable (a member
        # another worker took meanwhile is left out of the answer).
        claims = worker.ledger.claim_each(worker.owner, offered, now=worker.clock(),
                                          order=worker.order, provenance=provenance.collect())
        if not claims:
            continue  # all taken meanwhile: ask again
        for c in claims:
            if c.job["steps_done"] != row["steps_done"]:
                left = worker.ledger.give_back(c, now=worker.clock()) or JobStatus.QUEUED
                worker.ledger.end_segment(c.segment_id, None, left.value, now=worker.clock())
                continue  # moved on meanwhile (no longer level, so not offered again)
            mates.append(c)
    return mates


def _fit(row):
    """Most members whose chunk samples fit in defaults.BATCH_SAMPLE_BYTES together."""
    megno = json.loads(row["spec_json"]).get("method", {}).get("indicator", "none") == "megno"
    per_sample = 8 * (5 + 6 * (int(row["n_bodies"]) - 1) + (2 if megno else 0))
    per_member = (int(row["chunk_steps"]) // int(row["output_steps"]) + 1) * per_sample
    return max(1, defaults.BATCH_SAMPLE_BYTES // per_member)


def run_batch(worker, claims):
    """Integrate the claimed members together until each ends its claim; returns
    [(claim, status)] in the order they ended.

    Whatever happens, no claim is left held: on an error every member still
    claimed is handed back (nothing after its last commit is lost) before the
    error goes on up.
    """
    from orbitledger.integrators.batch import compatible

    ended = []
    runs = []
    held = {}  # job id -> (claim, segment) of every claim not yet ended
    try:
        for claim in claims:
            held[claim.job_id] = (claim, claim.segment_id)
            opened = worker._open(claim)
            if not isinstance(opened, tuple):
                _end(ended, held, claim, opened)
                continue
            row, plan, integ, ck, seg = opened
            held[claim.job_id] = (claim, seg)
            run = ClaimRun(claim, row, plan, integ, ck, seg)
            if runs and not (compatible(runs[0].integ, integ) and _level(run, runs[0])):
                # Not batchable with the first (its stored state says otherwise):
                # handed back untouched, for a claim of its own.
                _end(ended, held, claim, _hand_back(worker, run))
                continue
            runs.append(run)
        if len(runs) > 1:
            LOG.info("batch of %d members (jobs %s) on the batched kernel", len(runs),
                     ", ".join(str(r.claim.job_id) for r in runs))
            worker.ledger.note_kernel([r.seg for r in runs], f"batched, {len(runs)} members")
        while runs:
            # Members no longer level with the first (one extended, or one that
            # went on from mid-chunk after a request came to nothing) have just
            # committed: they are handed back rather than kept waiting.
            level = [r for r in runs if _level(r, runs[0])]
            for run in runs:
                if run not in level:
                    _end(ended, held, run.claim, _hand_back(worker, run))
            if len(level) == 1:
                run = level[0]
                try:
                    status = worker._chunks(run.claim, run.row, run.plan, run.integ, None,
                                            run.seg, run=run)
                except Exception as err:  # noqa: BLE001 - mapped as for any claim
                    status = worker._failed_claim(run.claim, run.seg, err)
                _end(ended, held, run.claim, status)
                break
            runs = _batch_chunk(worker, level, lambda c, s: _end(ended, held, c, s))
    except BaseException as err:
        if isinstance(err, DatabaseGoneError):
            raise  # nothing can be handed back: the leases lapse instead
        for claim, seg in list(held.values()):
            left = worker.ledger.give_back(claim, now=worker.clock())
            if left is None:
                continue  # already ended (failed, fenced) or taken over
            if seg is not None:
                worker.ledger.end_segment(seg, None, "interrupted", now=worker.clock())
            LOG.info("job %d handed back (%s) after an error in its batch", claim.job_id,
                     left.value)
        raise
    return ended


def _end(ended, held, claim, status):
    ended.append((claim, status))
    held.pop(claim.job_id, None)


def _level(a, b):
    """True if two members stand at the same step with the same chunk end."""
    return a.integ.step == b.integ.step and a.chunk_end() == b.chunk_end()


def _hand_back(worker, run):
    """Give back a member with nothing uncommitted; its status afterwards."""
    left = worker.ledger.give_back(run.claim, now=worker.clock()) or JobStatus.QUEUED
    worker.ledger.end_segment(run.seg, None, left.value, now=worker.clock())
    return left


def _batch_chunk(worker, runs, end):
    """One chunk of every member (they share the chunk's end); a member that stops
    or is asked to hold or cancel is committed as soon as it leaves. Calls
    end(claim, status) for each member whose claim ends; returns the members that
    go on with the next chunk."""
    chunk_end = runs[0].chunk_end()
    live = list(runs)
    for run in live:
        run.buf.clear()
        run.prepared = None
        run.stop = None
        run.request = None
        run.interrupted = False
    wall0 = worker.clock()
    step0 = live[0].integ.step
    steps_per_call = (worker.max_steps_per_call if worker.slice_seconds is None
                      else min(worker.max_steps_per_call, 100))
    last_beat = worker.clock()
    going_on = []

    def leave(run):
        status = _commit_member(worker, run, wall0, step0)
        if status is None:
            going_on.append(run)
        else:
            end(run.claim, status)

    while live and live[0].integ.step < chunk_end:
        n_call = min(chunk_end - live[0].integ.step, steps_per_call)
        t_call, c_call = time.perf_counter(), time.thread_time()
        results = advance_members([r.buf for r in live], [r.integ for r in live], n_call,
                                  live[0].out, worker.lanes)
        worker.kernel_seconds += time.perf_counter() - t_call
        worker.kernel_cpu_seconds += time.thread_time() - c_call
        # A call of the whole batch lasts about the slice (at most
        # max_steps_per_call steps of each member).
        steps_per_call = worker._next_call_steps(steps_per_call, t_call, n_call)
        failpoint("first_step")
        for run in live:
            if run.prepared is None:
                run.prepared = helper_thread().submit(worker.ledger.store.prepare, run.claim.job_id,
                                                (run.idx + 1, run.claim.fence, run.layout))
        stay = []
        for run, res in zip(live, results):
            if not res.stopped:
                stay.append(run)
                continue
            try:
                raise_if_broken(run.integ, res)
            except Exception as err:  # noqa: BLE001 - a numerical failure fails the member
                end(run.claim, worker._failed_claim(run.claim, run.seg, err))
                continue
            run.stop = res
            leave(run)
        live = stay
        now = worker.clock()
        if now - last_beat >= worker.heartbeat_seconds:
            last_beat = now
            stay = []
            for run in live:
                try:
                    run.request = worker.ledger.heartbeat(run.claim, now=now)
                except Exception as err:  # noqa: BLE001 - fenced out: its work is discarded
                    end(run.claim, worker._failed_claim(run.claim, run.seg, err))
                    continue
                if run.request in ("hold", "cancel"):
                    run.interrupted = True
                    leave(run)
                else:
                    stay.append(run)
            live = stay
        if worker.progress is not None:
            for run in live:
                worker.progress(run.row, run.integ.step,
                                rate_of(run.integ, step0, wall0, worker.clock()))
        if worker._should_stop():
            for run in live:
                run.interrupted = True
            break
    for run in live:
        leave(run)
    return going_on


def _commit_member(worker, run, wall0, step0):
    """Commit a member's chunk; None if its claim goes on, else its status."""
    if run.prepared is None:
        run.prepared = helper_thread().submit(worker.ledger.store.prepare, run.claim.job_id,
                                        (run.idx + 1, run.claim.fence, run.layout))
    try:
        commit, then = worker._chunk_commit(run, run.prepared, run.stop, run.interrupted,
                                            run.request, wall0, step0)
        result = worker._commit(commit)
    except Exception as err:  # noqa: BLE001 - each kind mapped as for a claim alone
        return worker._failed_claim(run.claim, run.seg, err)
    run.total = result.total_steps
    # Still running: it goes on (a "done" turned "continue" by an extension
    # made while its last chunk ran, too).
    return None if result.status == JobStatus.RUNNING else result.status
