"""Largest Lyapunov exponent by a renormalised shadow trajectory.

The method of Benettin, Galgani, Giorgilli & Strelcyn (1980, Meccanica 15):
a shadow starts a small distance d0 from the trajectory; after every
renormalisation interval the separation d is measured, ln(d / d0) is
recorded and the shadow is pulled back to distance d0 along the separation.
The mean of the recorded logarithms per interval is the exponent. The first
intervals, while the separation turns towards the most unstable direction,
are left out.

The uncertainty is the spread of the estimate, not a fit's formal error: the
recorded logarithms are cut into consecutive windows, each window gives its
own exponent, and the error is the standard deviation of those window
exponents divided by the square root of their number (batch means; the
windows are long compared with the decorrelation of the logarithms).

One code path serves maps (the cat map and the Henon map in the tests) and
integrations (:func:`job_lyapunov`).
"""

from dataclasses import dataclass

import numpy as np

from orbitledger.runner.errors import LedgerError

WINDOWS = 10  # windows of the batch-means error
DISCARD_FRACTION = 0.1  # share of the intervals left out at the start (at most 50)
D0 = 1e-9  # starting separation of a shadow integration (scaled phase space)


@dataclass
class LyapunovEstimate:
    """A renormalised shadow estimate: exponent per interval and its uncertainty."""

    exponent: float  # per renormalisation interval
    error: float  # standard error from the spread over windows
    windows: np.ndarray  # the exponent of each window
    intervals: int  # intervals used (after the discarded ones)
    discarded: int

    def per(self, interval):
        """(exponent, error) per unit of time when one interval lasts `interval`."""
        return self.exponent / interval, self.error / interval


def shadow_lyapunov(step, x0, y0, n, distance, towards, windows=WINDOWS, discard=None):
    """Renormalised shadow estimate of the largest Lyapunov exponent.

    Parameters
    ----------
    step : callable
        ``step(state) -> state`` advances one renormalisation interval (it may
        change `state` in place).
    x0, y0 : state
        The trajectory and its shadow; their distance is d0.
    n : int
        Intervals to take. Fewer are used if ``step`` raises StopIteration
        (the trajectory ended, e.g. at a close encounter).
    distance : callable
        ``distance(x, y) -> float``.
    towards : callable
        ``towards(x, y, f) -> state``: the point x + f (y - x) (it may reuse y).
    windows : int
        Windows of the batch-means error.
    discard : int, optional
        Intervals left out at the start (default: 10% of n, at most 50).

    Returns
    -------
    LyapunovEstimate
    """
    x, y = x0, y0
    d0 = float(distance(x, y))
    if not d0 > 0.0:
        raise ValueError("the shadow must start at a positive distance from the trajectory.")
    logs = []
    for _ in range(int(n)):
        try:
            x = step(x)
            y = step(y)
        except StopIteration:
            break
        d = float(distance(x, y))
        if not (d > 0.0 and np.isfinite(d)):
            break
        logs.append(np.log(d / d0))
        y = towards(x, y, d0 / d)
    if discard is None:
        discard = min(int(DISCARD_FRACTION * len(logs)), 50)
    logs = np.asarray(logs[discard:])
    if len(logs) < 2 * windows:
        raise LedgerError(f"only {len(logs)} renormalisation intervals to estimate from; "
                          f"at least {2 * windows} are needed (a longer span or a shorter "
                          "interval).")
    per_window = np.array([w.mean() for w in np.array_split(logs, windows)])
    return LyapunovEstimate(float(logs.mean()),
                            float(per_window.std(ddof=1) / np.sqrt(windows)),
                            per_window, len(logs), int(discard))


# -- integrations ------------------------------------------------------------------

def _scaled_distance(a, b):
    """sqrt(mean over Jacobi orbits of (|dx| / |x|)^2 + (|dv| / |v|)^2), internal coordinates."""
    xa, va = a.xj[1:], a.vj[1:]
    dx = np.linalg.norm(b.xj[1:] - xa, axis=1) / np.linalg.norm(xa, axis=1)
    dv = np.linalg.norm(b.vj[1:] - va, axis=1) / np.linalg.norm(va, axis=1)
    return float(np.sqrt((dx * dx + dv * dv).mean()))


def _towards(a, b, f):
    b.xj[:] = a.xj + f * (b.xj - a.xj)
    b.vj[:] = a.vj + f * (b.vj - a.vj)
    return b


def integration_lyapunov(integ, steps_per_interval, intervals, d0=D0, seed=1,
                         windows=WINDOWS):
    """Shadow estimate for an integrator from its current state.

    The shadow is an exact copy (same method, step, corrector and carries)
    whose internal Jacobi positions and velocities are moved by d0 in the
    scaled phase space, in a fixed pseudo-random direction (``seed``). Both
    advance `steps_per_interval` steps between renormalisations; a stop of
    either (close encounter, ejection...) ends the estimate there. Returns
    (LyapunovEstimate, exponent per year, its error per year).
    """
    from orbitledger.integrators import Integrator

    if not hasattr(integ, "xj"):
        raise LedgerError(f"the {integ.method} method keeps no Jacobi state to shadow.")
    x = Integrator.from_state_arrays(integ.state_arrays())
    y = Integrator.from_state_arrays(integ.state_arrays())
    rng = np.random.default_rng(seed)
    nb = len(x.xj) - 1
    ux = rng.standard_normal((nb, 3))
    uv = rng.standard_normal((nb, 3))
    ux /= np.linalg.norm(ux, axis=1)[:, None]
    uv /= np.linalg.norm(uv, axis=1)[:, None]
    scale = d0 / np.sqrt(2.0)
    y.xj[1:] += scale * ux * np.linalg.norm(x.xj[1:], axis=1)[:, None]
    y.vj[1:] += scale * uv * np.linalg.norm(x.vj[1:], axis=1)[:, None]

    def step(it):
        res = it.advance(int(steps_per_interval))
        if res.stopped:
            raise StopIteration
        return it

    est = shadow_lyapunov(step, x, y, intervals, _scaled_distance, _towards, windows=windows)
    years = abs(steps_per_interval * integ.dt) / 365.25
    lam, err = est.per(years)
    return est, lam, err


def job_lyapunov(ledger, job_id, checkpoint=0, span_steps=None, every=None, d0=D0):
    """Renormalised shadow estimate from a job's committed checkpoint.

    ``span_steps`` (default: the job's committed span after the checkpoint)
    and ``every`` (renormalisation interval in steps; default the job's
    output cadence) fix the stretch. Returns a dict: exponent and error per
    year, Lyapunov time and its error in years, the span in years, the
    number of intervals and the per-window exponents.
    """
    integ, ck = ledger.load_integrator(job_id, checkpoint)
    row = ledger.job(job_id)
    every = int(every or row["output_steps"])
    if span_steps is None:
        span_steps = int(row["steps_done"]) - int(ck["step"])
    intervals = int(span_steps) // every
    est, lam, err = integration_lyapunov(integ, every, intervals, d0=d0)
    out = {"exponent_per_yr": lam, "exponent_err_per_yr": err,
           "span_yr": est.intervals * every * abs(integ.dt) / 365.25,
           "intervals": est.intervals, "discarded": est.discarded,
           "interval_yr": every * abs(integ.dt) / 365.25,
           "window_exponents_per_yr": [w / (every * abs(integ.dt) / 365.25) for w in est.windows],
           "lyapunov_time_yr": None, "lyapunov_time_err_yr": None}
    if lam > 0:
        out["lyapunov_time_yr"] = 1.0 / lam
        out["lyapunov_time_err_yr"] = err / lam ** 2
    return out
