"""What the ledger's parts share: the genesis link, claims, commit results, the clock."""

from dataclasses import dataclass
import time

from orbitledger.runner.ledger.status import JobStatus

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
