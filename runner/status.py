"""Job status: one enum and one table of allowed transitions."""

from enum import Enum

from .errors import TransitionError


class JobStatus(str, Enum):
    """Where a job is. Values are stored in the database as these strings."""

    QUEUED = "queued"        # waiting for a worker
    RUNNING = "running"      # claimed by a worker holding a lease
    HELD = "held"            # paused by the user or by the ledger (reason recorded)
    DONE = "done"            # reached its end time; `extend` can queue it again
    STOPPED = "stopped"      # ended early by a stop condition (outcome recorded)
    CANCELLED = "cancelled"  # abandoned by the user
    FAILED = "failed"        # a worker hit an error it could not recover from


# The one table of allowed changes. RUNNING -> RUNNING is a takeover of an
# expired lease (new owner, new fencing token) or a commit that keeps going.
TRANSITIONS = {
    JobStatus.QUEUED: {JobStatus.RUNNING, JobStatus.HELD, JobStatus.CANCELLED},
    JobStatus.RUNNING: {JobStatus.RUNNING, JobStatus.QUEUED, JobStatus.DONE, JobStatus.STOPPED,
                        JobStatus.HELD, JobStatus.FAILED, JobStatus.CANCELLED},
    JobStatus.HELD: {JobStatus.QUEUED, JobStatus.CANCELLED},
    JobStatus.DONE: {JobStatus.QUEUED},
    JobStatus.STOPPED: set(),
    JobStatus.CANCELLED: set(),
    JobStatus.FAILED: {JobStatus.QUEUED, JobStatus.CANCELLED},
}

# Statuses in which a job still has work a worker could do.
ACTIVE = {JobStatus.QUEUED, JobStatus.RUNNING}


def is_allowed(old, new):
    """True if the table allows old -> new."""
    return JobStatus(new) in TRANSITIONS[JobStatus(old)]


def check_transition(job_id, old, new):
    """Raise TransitionError unless old -> new is allowed."""
    old, new = JobStatus(old), JobStatus(new)
    if new not in TRANSITIONS[old]:
        allowed = ", ".join(sorted(s.value for s in TRANSITIONS[old])) or "nothing"
        raise TransitionError(f"job {job_id} is {old.value} and cannot become {new.value} "
                              f"(from {old.value} it can become: {allowed}).")
