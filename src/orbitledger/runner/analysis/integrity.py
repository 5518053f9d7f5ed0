"""Audits of a job: the hash chain, the store against the ledger, replays.

- :func:`verify` recomputes the checkpoint hash chain from the ledger's rows
  and checks every stored checkpoint state and every block of samples
  against the hashes recorded when it was committed; it names the first bad
  checkpoint.
- :func:`replay` re-runs the stretch from checkpoint k and requires
  checkpoint k+1 bit for bit.
"""

from dataclasses import dataclass, field
import random

import numpy as np

from orbitledger.integrators import Integrator
from orbitledger.integrators.constants import YEAR_D
from orbitledger.runner.errors import StoreError
from orbitledger.runner.ledger.operations import GENESIS
from orbitledger.runner.store.zarr_store import chain_sha256, samples_sha256


@dataclass
class VerifyReport:
    """Outcome of :func:`verify`."""

    job_id: int
    checked: int = 0
    first_bad: int | None = None
    problem: str | None = None
    problems: list = field(default_factory=list)

    @property
    def ok(self):
        return self.first_bad is None

    @property
    def bad_checkpoints(self):
        """Indices of the checkpoints with at least one problem, in order."""
        return sorted({idx for idx, _ in self.problems})


def verify(ledger, job_id):
    """Check the chain, the stored states and the sample blocks of a job."""
    ledger.job(job_id)  # NotFoundError for a job that does not exist
    rep = VerifyReport(job_id)
    prev = GENESIS
    n_prev = 0
    stored = None
    for ck in ledger.checkpoints(job_id):
        idx = ck["idx"]
        issues = []
        if chain_sha256(prev, ck["state_sha256"], ck["samples_sha256"]) != ck["chain_sha256"]:
            issues.append("its chain hash does not follow from the previous checkpoint")
        try:
            ledger.store.read_checkpoint(job_id, idx, ck["fence"], ck["state_sha256"])
        except StoreError as err:
            issues.append(str(err))
        try:
            if stored is None:
                stored = _all_samples(ledger, job_id)
            if stored is False:
                # The whole read failed: read this checkpoint's block alone, so
                # the first damaged block is named, not checkpoint 0.
                block = ledger.store.read_samples(job_id, ck["n_samples"], start=n_prev)
            else:
                block = {k: v[n_prev:ck["n_samples"]] for k, v in stored.items()}
            if samples_sha256(block) != ck["samples_sha256"]:
                issues.append(f"its samples (rows {n_prev}..{ck['n_samples'] - 1}) do not match "
                              "their recorded hash")
            elif "time_yr" in block and not np.array_equal(block["time_yr"],
                                                          block["time"] / YEAR_D):
                issues.append(f"its samples' time in years (rows {n_prev}.."
                              f"{ck['n_samples'] - 1}) is not their time in days / 365.25")
        except StoreError as err:
            issues.append(str(err))
        for msg in issues:
            rep.problems.append((idx, msg))
        if issues and rep.first_bad is None:
            rep.first_bad, rep.problem = idx, issues[0]
        rep.checked += 1
        prev, n_prev = ck["chain_sha256"], ck["n_samples"]
    return rep


def _all_samples(ledger, job_id):
    """Every committed sample in one read, or False if that read fails."""
    try:
        return ledger.store.read_samples(job_id, ledger.job(job_id)["n_samples"])
    except StoreError:
        return False


def replay(ledger, job_id, indices=None, sample=None, seed=None):
    """Re-run from checkpoint k to k+1 for each k; returns [(k, reproduced?)].

    ``indices`` chooses k explicitly; ``sample`` picks that many at random.
    """
    ledger.job(job_id)  # NotFoundError for a job that does not exist
    cks = ledger.checkpoints(job_id)
    ks = list(range(len(cks) - 1))
    if indices is not None:
        bad = [k for k in indices if k not in ks]
        if bad:
            raise ValueError(f"checkpoint {bad[0]} has no successor to replay to; "
                             f"choose from 0..{len(cks) - 2}.")
        ks = list(indices)
    elif sample is not None:
        ks = sorted(random.Random(seed).sample(ks, min(sample, len(ks))))
    out = []
    for k in ks:
        a, b = cks[k], cks[k + 1]
        arrays = ledger.store.read_checkpoint(job_id, a["idx"], a["fence"], a["state_sha256"])
        integ = Integrator.from_state_arrays(arrays)
        integ.advance(b["step"] - a["step"])
        from orbitledger.runner.store.zarr_store import state_sha256, to_storable

        out.append((k, state_sha256(to_storable(integ.state_arrays())) == b["state_sha256"]))
    return out
