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


# -- divergence of two runs and Lyapunov times ---------------------------------

def shadow_lyapunov(step, x0, d0, n, distance, towards, discard=50):
    """Largest Lyapunov exponent per step by a renormalised shadow trajectory.

    (Benettin, Galgani, Giorgilli & Strelcyn 1980.) ``step(x)`` advances a
    state one step; ``distance(a, b)`` measures separation; ``towards(a, b, f)``
    returns the point a + f (b - a). The shadow starts d0 away and is pulled
    back to distance d0 along the separation after every step. The first
    `discard` steps, while the separation turns towards the most unstable
    direction, are left out. Returns (lambda, standard error of the mean of
    the per-step log growths).
    """
    x = np.asarray(x0, dtype=float)
    y = towards(x, x + np.r_[d0, np.zeros(len(x) - 1)], 1.0)
    logs = np.empty(n)
    for k in range(n):
        x, y = step(x), step(y)
        d = distance(x, y)
        logs[k] = np.log(d / d0)
        y = towards(x, y, d0 / d)
    logs = logs[discard:]
    return float(logs.mean()), float(logs.std(ddof=1) / np.sqrt(len(logs)))


def states_from_samples(samples, gm):
    """Heliocentric positions and velocities (n_samples, n_bodies-1, 3) from sampled elements."""
    from integrators import elements as el

    els = samples["elements"]
    ns, nb, _ = els.shape
    x = np.empty((ns, nb, 3))
    v = np.empty((ns, nb, 3))
    rad = np.pi / 180.0
    for s in range(ns):
        for b in range(nb):
            a, e, i, node, peri, m = els[s, b]
            x[s, b], v[s, b] = el.to_state(gm[0] + gm[b + 1], a, e, i * rad, node * rad,
                                           peri * rad, m * rad)
    return x, v


def phase_distance(xa, va, xb, vb):
    """Scaled phase-space distance per sample: bodies far out count as much as close ones.

    d = sqrt(mean over bodies of (|dx| / r)^2 + (|dv| / v)^2).
    """
    r = np.linalg.norm(xa, axis=2)
    s = np.linalg.norm(va, axis=2)
    dx = np.linalg.norm(xa - xb, axis=2) / r
    dv = np.linalg.norm(va - vb, axis=2) / s
    return np.sqrt((dx * dx + dv * dv).mean(axis=1))


def classify_divergence(t, d, saturation=0.1):
    """Linear (power law) or exponential growth of d(t), with a Lyapunov time if exponential.

    Fits ln d = a + b ln t (power law; regular motion gives b near 1) and
    ln d = a + lambda t (exponential) on the stretch before d reaches
    `saturation` (the separation of unrelated orbits); the model with the
    smaller residual is chosen. Returns a dict with "kind", "power",
    "lyapunov_time" and "lyapunov_time_err" (years if t is in years).
    """
    t = np.asarray(t, dtype=float)
    d = np.asarray(d, dtype=float)
    keep = (t > 0) & (d > 0) & np.isfinite(d)
    t, d = t[keep], d[keep]
    if d.max() >= saturation:
        stop = int(np.argmax(d >= saturation))
        t, d = t[:max(stop, 8)], d[:max(stop, 8)]
    if len(t) < 8:
        raise LedgerError("too few common samples with a non-zero separation to classify.")
    y = np.log(d)
    lt = np.log(t)
    pw, pw_res = np.polyfit(lt, y, 1, full=True)[:2]
    ex, ex_res = np.polyfit(t, y, 1, full=True)[:2]
    pw_res = float(pw_res[0]) if len(pw_res) else 0.0
    ex_res = float(ex_res[0]) if len(ex_res) else 0.0
    out = {"power": float(pw[0]), "kind": "linear" if pw_res <= ex_res else "exponential",
           "lyapunov_time": None, "lyapunov_time_err": None, "samples": len(t)}
    if out["kind"] == "exponential":
        lam = float(ex[0])
        resid = y - np.polyval(ex, t)
        se = np.sqrt(float(resid @ resid) / (len(t) - 2) / float(((t - t.mean()) ** 2).sum()))
        out["lyapunov_time"] = 1.0 / lam
        out["lyapunov_time_err"] = se / lam**2
    return out


def compare_jobs(ledger, a_id, b_id):
    """Divergence of two jobs of the same system at their common output times."""
    ra, rb = ledger.job(a_id), ledger.job(b_id)
    if ra["n_bodies"] != rb["n_bodies"]:
        raise LedgerError(f"jobs {a_id} and {b_id} are not of the same system "
                          f"({ra['n_bodies']} and {rb['n_bodies']} bodies).")
    sa = ledger.store.read_samples(a_id, ra["n_samples"])
    sb = ledger.store.read_samples(b_id, rb["n_samples"])
    common, ia, ib = np.intersect1d(np.round(sa["time"], 6), np.round(sb["time"], 6),
                                    return_indices=True)
    if len(common) < 8:
        raise LedgerError(f"jobs {a_id} and {b_id} share only {len(common)} output times; "
                          "give them the same output cadence.")
    gm = ledger.load_integrator(a_id, 0)[0].gm
    pick = lambda s, i: {k: v[i] for k, v in s.items()}  # noqa: E731
    xa, va = states_from_samples(pick(sa, ia), gm)
    xb, vb = states_from_samples(pick(sb, ib), gm)
    t = np.abs(common - common[0]) / 365.25
    d = phase_distance(xa, va, xb, vb)
    return t, d, classify_divergence(t, d)


def element_ranges(ledger, job_id):
    """Per body: (min, max) of a, e, i over the job's samples."""
    row = ledger.job(job_id)
    s = ledger.store.read_samples(job_id, row["n_samples"])
    els = s["elements"]
    return {k: [(float(els[:, b, k].min()), float(els[:, b, k].max()))
                for b in range(els.shape[1])] for k in (0, 1, 2)}
