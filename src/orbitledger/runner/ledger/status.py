"""Job status: one enum and one table of allowed transitions, by operation.

A status change is allowed only as a named operation: the same pair of
statuses may be open to a worker and closed to a user (a worker gives a
running job back to the queue after a chunk; a user's ``release`` must not,
or it would take the job from under its worker).
"""

from enum import Enum

from orbitledger.runner.errors import TransitionError


class JobStatus(str, Enum):
    """Where a job is. Values are stored in the database as these strings."""

    QUEUED = "queued"        # waiting for a worker
    RUNNING = "running"      # claimed by a worker holding a lease
    HELD = "held"            # paused by the user or by the ledger (reason recorded)
    DONE = "done"            # reached its end time; `extend` can queue it again
    STOPPED = "stopped"      # ended early by a stop condition (outcome recorded)
    CANCELLED = "cancelled"  # abandoned by the user
    FAILED = "failed"        # a worker hit an error it could not recover from


# Operations that change status. Worker operations: "claim" (a queued job,
# or a running job whose lease expired), "commit" (a fenced commit that
# keeps going or ends the job), "give_back" (a worker lets go of its claim
# without committing). User operations: "hold", "release" (queue a held or
# failed job again), "cancel", "extend" (queue a done job with a later end).
WORKER_OPS = {"claim", "commit", "give_back"}
USER_OPS = {"hold", "release", "cancel", "extend"}

# The one table of allowed changes: old -> {new: operations allowed to make it}.
# RUNNING -> RUNNING is a takeover of an expired lease (new owner, new fencing
# token) or a commit that keeps going. A user's hold or cancel of a running
# job is not a change of status: it leaves a request the worker applies at
# its next safe point, in its own commit or give-back.
TRANSITIONS = {
    JobStatus.QUEUED: {JobStatus.RUNNING: {"claim"}, JobStatus.HELD: {"hold"},
                       JobStatus.CANCELLED: {"cancel"}},
    JobStatus.RUNNING: {JobStatus.RUNNING: {"claim", "commit"},
                        JobStatus.QUEUED: {"commit", "give_back"},
                        JobStatus.DONE: {"commit"},
                        JobStatus.STOPPED: {"commit"},
                        JobStatus.HELD: {"commit", "give_back"},
                        JobStatus.FAILED: {"give_back"},
                        JobStatus.CANCELLED: {"commit", "give_back"}},
    JobStatus.HELD: {JobStatus.QUEUED: {"release"}, JobStatus.CANCELLED: {"cancel"}},
    JobStatus.DONE: {JobStatus.QUEUED: {"extend"}},
    JobStatus.STOPPED: {},
    JobStatus.CANCELLED: {},
    JobStatus.FAILED: {JobStatus.QUEUED: {"release"}, JobStatus.CANCELLED: {"cancel"}},
}

# What a user can do from each status, for the refusal message.
_USER_HINT = {
    JobStatus.QUEUED: "hold or cancel it",
    JobStatus.RUNNING: "hold or cancel it (applied at its worker's next checkpoint)",
    JobStatus.HELD: "release or cancel it",
    JobStatus.DONE: "extend it to a later end",
    JobStatus.STOPPED: None,  # final: the job has its outcome
    JobStatus.CANCELLED: None,  # final
    JobStatus.FAILED: "release or cancel it",
}

# Statuses in which a job still has work a worker could do.
ACTIVE = {JobStatus.QUEUED, JobStatus.RUNNING}


def is_allowed(old, new, op):
    """True if the table allows old -> new by operation `op`."""
    return op in TRANSITIONS[JobStatus(old)].get(JobStatus(new), ())


def check_transition(job_id, old, new, op):
    """Raise TransitionError unless the table allows old -> new by operation `op`."""
    old, new = JobStatus(old), JobStatus(new)
    if op not in WORKER_OPS | USER_OPS:
        raise ValueError(f"unknown status operation {op!r}.")
    if is_allowed(old, new, op):
        return
    if op in USER_OPS:
        hint = _USER_HINT[old]
        fix = f"you can {hint}" if hint else f"a {old.value} job is final; submit a new one"
        raise TransitionError(f"job {job_id} is {old.value}, so it cannot be {_past(op)}; "
                              f"{fix}.")
    raise TransitionError(f"job {job_id} is {old.value} and cannot become {new.value} "
                          f"by {op}.")


def _past(op):
    return {"hold": "held", "release": "released", "cancel": "cancelled",
            "extend": "extended"}[op]
