"""Comparisons of runs: the reversibility residual of a backward run, the divergence of two runs."""

import numpy as np

from orbitledger.runner.errors import LedgerError


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

# Largest power of t with which two runs may separate and still count as
# regular. Quasi-periodic motion separates linearly in time from an initial
# offset (phase drift; common practice, no source); a difference seeded by
# round-off alone grows as t^(3/2) (Brouwer 1937, the along-track error of a
# random walk in energy) and at most as t^2 with a systematic drift. Anything
# steeper is not regular (an overlap-zone pair once fitted t^5.24).
POWER_REGULAR_MAX = 2.2


def describe_divergence(fit):
    """Two plain sentences on a divergence: its kind, and the Lyapunov time if known."""
    if fit["kind"] == "regular":
        kind = (f"regular: the runs separate as t^{fit['power']:.2f} (polynomially, as "
                "regular orbits and round-off do), no sign of chaos over this span")
        if fit.get("exponent_per_yr") is not None:
            kind += (f"; the renormalised shadow's finite-time exponent is "
                     f"{fit['exponent_per_yr']:.3g} ± {fit['exponent_err_per_yr']:.2g} per yr "
                     f"over {fit['lyapunov_span_yr']:.4g} yr, which for a regular orbit falls "
                     "like ln(t)/t (not a Lyapunov time)")
        return kind + "."
    else:
        kind = (f"chaotic: the runs separate faster than linearly (t^{fit['power']:.2f} "
                "before saturation)")
    if fit.get("lyapunov_time") is None:
        if fit.get("exponent_per_yr") is None:
            return kind + "."
        return kind + ("; renormalised shadow estimate: no positive exponent over "
                       f"{fit['lyapunov_span_yr']:.4g} yr.")
    text = kind + (f"; Lyapunov time {fit['lyapunov_time']:.4g} ± "
                   f"{fit['lyapunov_time_err']:.2g} yr (renormalised shadow over the first "
                   f"{fit['lyapunov_span_yr']:.4g} yr, before the runs saturate; error from the "
                   "spread over 10 windows)")
    if fit.get("lyapunov_time_full"):
        text += (f"; over the whole common span of {fit['lyapunov_span_yr_full']:.4g} yr "
                 f"{fit['lyapunov_time_full']:.4g} ± {fit['lyapunov_time_err_full']:.2g} yr")
    return text + "."


def states_from_samples(samples, gm):
    """Heliocentric positions and velocities (n_samples, n_bodies-1, 3) from sampled elements."""
    from orbitledger.integrators import elements as el

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
    """Regular or chaotic growth of the separation d(t) of two runs.

    Fits ln d = a + p ln t (power law) and ln d = a + k t (exponential) on the
    stretch before d reaches `saturation` (the separation of unrelated
    orbits). Regular only if the power law fits at least as well AND p is at
    most POWER_REGULAR_MAX; super-linear or exponential growth is chaotic.
    Returns a dict with "kind" ("regular" or "chaotic"), "power", "samples"
    (the stretch fitted) and "efold_time" (1/k of the exponential fit, in the
    unit of t; a description of this curve, not a Lyapunov time: see
    :mod:`runner.analysis.lyapunov`).
    """
    t = np.asarray(t, dtype=float)
    d = np.asarray(d, dtype=float)
    keep = (t > 0) & (d > 0) & np.isfinite(d)
    t, d = t[keep], d[keep]
    saturated = bool(d.max() >= saturation)
    if saturated:
        stop = int(np.argmax(d >= saturation))
        t, d = t[:max(stop, 8)], d[:max(stop, 8)]
    if len(t) < 8:
        raise LedgerError("too few common samples with a non-zero separation to classify.")
    y = np.log(d)
    pw, pw_res = np.polyfit(np.log(t), y, 1, full=True)[:2]
    ex, ex_res = np.polyfit(t, y, 1, full=True)[:2]
    pw_res = float(pw_res[0]) if len(pw_res) else 0.0
    ex_res = float(ex_res[0]) if len(ex_res) else 0.0
    power = float(pw[0])
    regular = pw_res <= ex_res and power <= POWER_REGULAR_MAX
    return {"power": power, "kind": "regular" if regular else "chaotic",
            "samples": len(t), "window": float(t[-1]), "saturated": saturated,
            "efold_time": 1.0 / ex[0] if ex[0] > 0 else None,
            "lyapunov_time": None, "lyapunov_time_err": None}


def compare_jobs(ledger, a_id, b_id, lyapunov=True):
    """Divergence of two jobs of the same system at their common output times.

    Returns (t in years, scaled distance, dict from :func:`classify_divergence`
    with the renormalised shadow estimate of job a over the common span added
    unless ``lyapunov`` is false).
    """
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
    # Time runs from where the two runs start together: a backward run is
    # measured along its own axis, from its start back towards the past.
    lead, lead_row = (b_id, rb) if rb["dt"] < 0 < ra["dt"] else (a_id, ra)
    t_start = ledger.checkpoints(lead)[0]["time"]
    t = np.abs(common - t_start) / 365.25
    order = np.argsort(t, kind="stable")
    t = t[order]
    d = phase_distance(xa, va, xb, vb)[order]
    fit = classify_divergence(t, d)
    if lyapunov:
        fit.update(_shadow_estimates(ledger, lead, lead_row, fit, float(t[-1] * 365.25)))
    return t, d, fit


def _shadow_estimates(ledger, job_id, row, fit, common_days):
    """The Lyapunov time by the renormalised shadow of one job (Benettin et al. 1980).

    Not a fit of the two-run curve, which mixes the early, linearly growing
    stretch in and whose formal error ignores the estimate's spread. Taken
    over the stretch the two runs share before they saturate (the stretch
    the divergence describes) and, when they saturate, over their whole
    common span too (the exponent of a system heading for instability
    grows). At least 200 renormalisations per stretch, at most one per output.
    """
    from orbitledger.runner.analysis.lyapunov import job_lyapunov

    dt = abs(row["dt"])
    done = int(row["steps_done"])
    out = {}
    spans = [("", fit["window"] * 365.25)]
    if fit["saturated"]:
        spans.append(("_full", common_days))
    for suffix, days in spans:
        steps = min(int(round(days / dt)), done)
        every = max(1, min(int(row["output_steps"]), steps // 200))
        est = job_lyapunov(ledger, job_id, 0, span_steps=steps, every=every)
        chaotic = fit["kind"] == "chaotic"
        out.update({f"lyapunov_time{suffix}": est["lyapunov_time_yr"] if chaotic else None,
                    f"lyapunov_time_err{suffix}": est["lyapunov_time_err_yr"] if chaotic else None,
                    f"exponent_per_yr{suffix}": est["exponent_per_yr"],
                    f"exponent_err_per_yr{suffix}": est["exponent_err_per_yr"],
                    f"lyapunov_span_yr{suffix}": est["span_yr"]})
    return out


def element_ranges(ledger, job_id):
    """Per body: (min, max) of a, e, i over the job's samples."""
    row = ledger.job(job_id)
    s = ledger.store.read_samples(job_id, row["n_samples"])
    els = s["elements"]
    return {k: [(float(els[:, b, k].min()), float(els[:, b, k].max()))
                for b in range(els.shape[1])] for k in (0, 1, 2)}
