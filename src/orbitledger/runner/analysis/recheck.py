"""Check a stretch: integrate a committed stretch of a job again with Gauss-Radau 15 from
the same checkpoint and compare the two states at its end.

The energy error says whether a map's run is broken, not where its planets
are (docs/cautions.md). This is the other check: the stretch between two
committed checkpoints is integrated again, from the first checkpoint's
physical (synchronized) state, by the adaptive high-order method in frames of
the job's own step, so both end on the same time; the differences of
positions and elements at the end are the map's error over the stretch (for
a regular, well-resolved run, where the reference is far more accurate than
the map). In a chaotic stretch longer than a few Lyapunov times the
difference is mostly the divergence of two nearby orbits, not the map's error.
"""

from dataclasses import dataclass

import numpy as np

from orbitledger.runner.errors import LedgerError

YEAR_D = 365.25


@dataclass
class Recheck:
    job_id: int
    start: dict               # checkpoint rows
    end: dict
    names: list
    tolerance: float
    substeps: int
    reference_energy_change: float   # relative, of the Gauss-Radau run over the stretch
    map_energy_change: float         # relative, of the job between the two checkpoints
    position: np.ndarray             # |r_map - r_ref| per body, au (heliocentric)
    velocity: np.ndarray             # |v_map - v_ref| per body, au/d
    d_elements: np.ndarray           # map - reference: a (au), e, i (deg), mean longitude (deg)


def recheck(ledger, job_id, start=None, end=None, tolerance=1e-9):
    """A :class:`Recheck` of the stretch from checkpoint `start` to `end` (indices;
    default the last two committed checkpoints)."""
    from orbitledger.integrators.gauss_radau import GaussRadau
    from orbitledger.runner.inputs.spec import from_json

    row = ledger.job(job_id)
    cks = ledger.checkpoints(job_id)
    if len(cks) < 2:
        raise LedgerError(f"job {job_id} has only checkpoint 0; run it further before "
                          "checking a stretch.")
    idx = {c["idx"]: c for c in cks}
    end = cks[-1]["idx"] if end is None else int(end)
    start = (end - 1) if start is None else int(start)
    if start not in idx or end not in idx or not start < end:
        raise LedgerError(f"job {job_id}: choose committed checkpoints with start < end among "
                          f"0..{cks[-1]['idx']}, got {start} and {end}.")
    spec = from_json(row["spec_json"])
    a, ck_a = ledger.load_integrator(job_id, start)
    b, ck_b = ledger.load_integrator(job_id, end)
    sys_a, sys_b = a.synchronized(), b.synchronized()
    ref = GaussRadau(sys_a, a.dt, gr=spec.method.relativity, tolerance=tolerance)
    e0 = ref.energy()
    ref.advance(ck_b["step"] - ck_a["step"])
    sys_r = ref.synchronized()
    xm, vm = sys_b.heliocentric()
    xr, vr = sys_r.heliocentric()
    em = sys_b.elements()
    er = sys_r.elements()
    d = np.empty((len(em), 4))
    d[:, 0] = em[:, 0] - er[:, 0]
    d[:, 1] = em[:, 1] - er[:, 1]
    d[:, 2] = em[:, 2] - er[:, 2]
    lam = lambda e: e[:, 3] + e[:, 4] + e[:, 5]  # noqa: E731 - mean longitude, degrees
    d[:, 3] = (lam(em) - lam(er) + 180.0) % 360.0 - 180.0
    ea, eb = a.energy(), b.energy()
    return Recheck(int(job_id), dict(ck_a), dict(ck_b), list(sys_b.names), float(tolerance),
                   ref.substeps[0], float((ref.energy() - e0) / abs(e0)),
                   float((eb - ea) / abs(ea)),
                   np.linalg.norm(xm[1:] - xr[1:], axis=1),
                   np.linalg.norm(vm[1:] - vr[1:], axis=1), d)
