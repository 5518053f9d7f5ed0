"""A claimed job being integrated, and what its chunks are committed with: the
run's counters (ClaimRun), one chunk's commit (Commit), a claim whose last
commit runs behind the kernel (PendingCommit), the error budget, the helper
thread, and small helpers shared by the worker loop (worker.py) and batches
(batches.py)."""

import json
import os

from orbitledger.integrators import StopKind
from orbitledger.runner.errors import NumericalFailureError
from orbitledger.runner.ledger.operations import angmom0
from orbitledger.runner.store.sampling import SampleBuffer
from orbitledger.runner.store.zarr_store import state_layout


class Commit:
    """One chunk's commit: the claim, the prepared checkpoint array (a future), the
    first sample row, the samples block, the state arrays and the ledger fields."""

    __slots__ = ("claim", "prepared", "start", "block", "state", "fields", "ends_claim",
                 "behind")

    def __init__(self, claim, prepared, start, block, state, fields):
        self.claim, self.prepared, self.start = claim, prepared, start
        self.block, self.state, self.fields = block, state, fields
        self.ends_claim = False  # the worker has left the claim (a PendingCommit)
        self.behind = False  # may run on the helper thread while the kernel goes on


class ClaimRun:
    """A claimed job being integrated: its claim, row, budget, integrator, segment,
    sample buffer and the counters its next commit starts from."""

    def __init__(self, claim, row, plan, integ, ck, seg):
        self.claim, self.row, self.plan, self.integ, self.seg = claim, row, plan, integ, seg
        self.e0 = row["energy0"]
        self.l0 = angmom0(row)
        self.out = int(row["output_steps"])
        self.chunk = int(row["chunk_steps"])
        self.total = int(row["total_steps"])
        self.idx = int(ck["idx"])
        self.n_samples = int(ck["n_samples"])
        self.max_e, self.max_l = row["max_energy_error"], row["max_angmom_error"]
        self.buf = SampleBuffer(len(integ.gm), self.e0, self.l0,
                                capacity=min(self.chunk // self.out + 1, 4096),
                                indicator=integ.indicator is not None,
                                particles=getattr(integ, "particle_count", 0))
        self.layout = state_layout(integ.state_arrays())
        # Method switches and events already recorded.
        self.seen = len(getattr(integ, "events", ()))

    def chunk_end(self):
        """The step the current chunk ends at."""
        return min((self.integ.step // self.chunk + 1) * self.chunk, self.total)


class PendingCommit:
    """A claim whose last commit runs on the helper thread: started by the next
    claim's first kernel call (or when waited for), at most once."""

    __slots__ = ("claim", "seg", "_run", "_commit", "_future")

    def __init__(self, claim, seg, run, commit):
        self.claim, self.seg, self._run, self._commit = claim, seg, run, commit
        self._future = None

    def start(self):
        if self._future is None:
            self._future = helper_thread().submit(self._run, self._commit)

    def result(self):
        """The commit's CommitResult; re-raises its error."""
        self.start()
        return self._future.result()


def process_seconds():
    """Wall seconds since this process started (Linux /proc), or None."""
    try:
        with open("/proc/self/stat", "rb") as fh:
            start_ticks = int(fh.read().rsplit(b")", 1)[1].split()[19])
        with open("/proc/uptime", "rb") as fh:
            uptime = float(fh.read().split()[0])
        return uptime - start_ticks / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError):
        return None


def new_events(integ, seen):
    """Ledger rows (kind, step, time, bodies, detail) of the integrator's events after the
    first `seen` (runs that switch methods through encounters; none otherwise)."""
    rows = getattr(integ, "events", None)
    if rows is None or len(rows) <= seen:
        return []
    from orbitledger.integrators.switching import EVENT_NAMES

    out = []
    for step, kind, a, b, d_energy in rows[seen:]:
        bodies = tuple(int(q) for q in (a, b) if q >= 0)
        detail = {"relative_energy_change": float(d_energy)} if d_energy else None
        out.append((EVENT_NAMES[int(kind)], int(step), integ.t0 + int(step) * integ.dt, bodies,
                    detail))
    return out


def raise_if_broken(integ, res):
    """NumericalFailureError if the advance stopped because the state broke."""
    if res.kind == StopKind.NUMERICAL_FAILURE:
        raise NumericalFailureError(
            f"numerical failure at step {integ.step} (t = {integ.time:.6g} d):"
            " the state is no longer finite numbers (first seen in "
            f"{body_names(integ, res.bodies)}; bodies at the same place, or "
            "a step far too long); nothing after the last checkpoint was kept")


def body_names(integ, bodies):
    names = [integ.names[b] for b in bodies if 0 <= b < len(integ.names)]
    return ", ".join(names) or "?"


_HELPER = None


def helper_thread():
    """One helper thread per process for store work that overlaps the kernel."""
    global _HELPER
    if _HELPER is None:
        from concurrent.futures import ThreadPoolExecutor

        _HELPER = ThreadPoolExecutor(max_workers=1, thread_name_prefix="store-helper")
    return _HELPER


class Budget:
    """The error budget of a job and what to do when it is exceeded."""

    def __init__(self, energy, angmom, on_exceed):
        self.energy_budget = float(energy)
        self.angmom_budget = None if angmom is None else float(angmom)
        self.on_exceed = on_exceed

    @classmethod
    def from_spec_json(cls, text):
        """From a job's stored canonical spec JSON."""
        b = json.loads(text)["budget"]
        return cls(b["energy"], b.get("angular_momentum"), b["on_exceed"])


def rate_of(integ, step0, wall0, now):
    """Simulated days per wall-clock second since (step0, wall0)."""
    dt_wall = now - wall0
    return abs((integ.step - step0) * integ.dt) / dt_wall if dt_wall > 0 else None


def over_budget(plan, max_e, max_l):
    """A reason string if an error budget is exceeded, else None."""
    if max_e > plan.energy_budget:
        return f"energy error {max_e:.3g} exceeds the budget {plan.energy_budget:.3g}"
    if plan.angmom_budget is not None and max_l > plan.angmom_budget:
        return f"angular-momentum error {max_l:.3g} exceeds the budget {plan.angmom_budget:.3g}"
    return None
