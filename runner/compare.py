"""Comparisons of runs: the reversibility residual of a backward run."""

import numpy as np

from .errors import LedgerError


def reversibility(ledger, backward_id):
    """How far a finished backward run misses its forward job's start.

    Returns a dict with per-body absolute position and velocity differences
    (au, au/d) between the backward run's final synchronized state and the
    forward job's initial one (both barycentric), their maxima, and the same
    relative to each body's heliocentric distance and speed.
    """
    row = ledger.job(backward_id)
    if row["parent_job_id"] is None:
        raise LedgerError(f"job {backward_id} is not a backward run of another job.")
    if row["steps_done"] != row["total_steps"]:
        raise LedgerError(f"job {backward_id} has not returned to the start yet "
                          f"({row['steps_done']} of {row['total_steps']} steps).")
    back, _ = ledger.load_integrator(backward_id)
    start, _ = ledger.load_integrator(row["parent_job_id"], 0)
    a, b = back.synchronized(), start.synchronized()
    dx = np.linalg.norm(a.x - b.x, axis=1)
    dv = np.linalg.norm(a.v - b.v, axis=1)
    xh, vh = b.heliocentric()
    r = np.linalg.norm(xh, axis=1)[1:]
    s = np.linalg.norm(vh, axis=1)[1:]
    return {"bodies": b.names[1:], "dx": dx[1:], "dv": dv[1:], "dx_rel": dx[1:] / r,
            "dv_rel": dv[1:] / s, "max_dx": float(dx.max()), "max_dv": float(dv.max()),
            "max_dx_rel": float((dx[1:] / r).max()), "max_dv_rel": float((dv[1:] / s).max()),
            "time": abs(back.time - back.t0)}
