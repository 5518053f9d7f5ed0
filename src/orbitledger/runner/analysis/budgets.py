"""Energy-budget audit: how |dE/E| grows, and whether the run will stay in budget.

The relative energy error of a symplectic map oscillates boundedly; round-off
adds a random walk (|dE/E| ~ t^(1/2), Brouwer 1937); a systematic error gives
a drift (~ t). The growth law |dE/E| ~ C t^alpha is fitted to the typical
level of |dE/E| in each of a set of log-spaced time windows (its median
there: the bounded oscillation inside a window averages out, and unlike the
maximum the median does not grow with the number of samples in a window), by
least squares on log |dE/E| against log t, with the slope's standard error.
The projection to the job's end scales the largest error seen so far by the
fitted law.
"""

from dataclasses import dataclass
import math

import numpy as np

# Windows of the envelope fit.
WINDOWS = 12
# alpha at or above this, and clearly above 1/2, is called systematic drift.
DRIFT_ALPHA = 0.8


@dataclass
class GrowthFit:
    """Fitted growth law |dE/E| ~ C t^alpha."""

    alpha: float
    alpha_err: float
    log10_c: float
    windows: int

    def at(self, t):
        """The fitted envelope at time t."""
        return 10.0 ** self.log10_c * t ** self.alpha


@dataclass
class Verdict:
    """Audit of one quantity (energy or angular momentum)."""

    quantity: str
    max_error: float
    budget: float | None
    fit: GrowthFit | None
    projected: float | None
    verdict: str


def fit_growth(t, err, windows=WINDOWS):
    """Fit the envelope of |err| over log-spaced windows of t > 0; None if too few."""
    t = np.abs(np.asarray(t, dtype=float))
    err = np.abs(np.asarray(err, dtype=float))
    keep = (t > 0) & (err > 0) & np.isfinite(err)
    t, err = t[keep], err[keep]
    if len(t) < 8 or t.max() <= t.min():
        return None
    edges = np.geomspace(t.min(), t.max() * (1 + 1e-12), windows + 1)
    xs, ys = [], []
    for lo, hi in zip(edges[:-1], edges[1:]):
        sel = (t >= lo) & (t < hi)
        if sel.sum() >= 3:
            xs.append(math.log10(float(np.median(t[sel]))))
            ys.append(math.log10(float(np.median(err[sel]))))
    if len(xs) < 4:
        return None
    x, y = np.array(xs), np.array(ys)
    a, b = np.polyfit(x, y, 1)
    resid = y - (a * x + b)
    dof = len(x) - 2
    s2 = float(resid @ resid) / dof if dof > 0 else 0.0
    err_a = math.sqrt(s2 / float(((x - x.mean()) ** 2).sum()))
    return GrowthFit(float(a), err_a, float(b), len(x))


def judge(quantity, t, err, budget, t_end):
    """A :class:`Verdict`: within budget / projected over budget / over budget / systematic drift."""
    max_err = float(np.max(np.abs(err))) if len(err) else 0.0
    fit = fit_growth(t, err)
    projected = None
    if fit is not None and len(t):
        t_now = float(np.max(np.abs(t)))
        growth = (abs(t_end) / t_now) ** max(fit.alpha, 0.0) if t_now > 0 else 1.0
        projected = max_err * max(growth, 1.0)
    if budget is not None and max_err > budget:
        verdict = "over budget"
    elif fit is not None and fit.alpha >= DRIFT_ALPHA and fit.alpha - 2 * fit.alpha_err > 0.5:
        verdict = "systematic drift"
    elif budget is not None and projected is not None and projected > budget:
        verdict = "projected over budget"
    else:
        verdict = "within budget"
    return Verdict(quantity, max_err, budget, fit, projected, verdict)


def audit_job(ledger, job_id):
    """Energy and angular-momentum verdicts of a job from its committed samples."""
    import json

    row = ledger.job(job_id)
    s = ledger.store.read_samples(job_id, row["n_samples"])
    spec = json.loads(row["spec_json"])
    t = s["time"] - s["time"][0]
    t_end = row["total_steps"] * row["dt"]
    return [judge("energy", t, s["energy_error"], spec["budget"]["energy"], t_end),
            judge("angular momentum", t, s["angmom_error"], spec["budget"].get("angular_momentum"),
                  t_end)]
