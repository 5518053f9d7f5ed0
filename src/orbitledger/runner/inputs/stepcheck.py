"""How well a job's step resolves its orbits, and a warning when it does not.

A fixed-step map is only as good as its step is short against the fastest
motion it must follow. For each bound Jacobi orbit at the start this module
counts the steps per orbital period and per pericentre passage, taking the
passage's time scale as 2 pi sqrt(q^3 / (mu (1 + e))) with q = a (1 - e): the
period a circular orbit of radius q moving at the pericentre speed would
have (it equals the period when e = 0). Eccentric orbits thus ask for shorter
steps than their period alone suggests.

The threshold is a rule of thumb of the trade (common practice, no source):
Wisdom-Holman runs commonly take tens of steps per shortest orbit, and below
about ten steps per pericentre passage the map's error rises steeply.
"""

from dataclasses import dataclass
import math

from orbitledger.integrators.elements import from_state
from orbitledger.integrators.system import jacobi_from_inertial, jacobi_mu

MIN_STEPS_PER_PASSAGE = 10.0


@dataclass(frozen=True)
class Resolution:
    """Steps per orbit and per pericentre passage of one bound Jacobi orbit."""

    body: str
    period: float            # days
    passage: float           # days, 2 pi sqrt(q^3 / (mu (1 + e)))
    steps_per_orbit: float
    steps_per_passage: float


def resolution(plan):
    """One :class:`Resolution` per bound orbit of the plan's system at its start."""
    sysm = plan.system
    xj = jacobi_from_inertial(sysm.gm, sysm.x)
    vj = jacobi_from_inertial(sysm.gm, sysm.v)
    mu = jacobi_mu(sysm.gm)
    dt = abs(plan.dt)
    out = []
    for i in range(1, len(sysm.gm)):
        a, ecc = from_state(mu[i], xj[i], vj[i])[:2]
        if not (0.0 < a < math.inf and ecc < 1.0):
            continue  # unbound: the stop conditions, not the step, deal with it
        period = 2.0 * math.pi * math.sqrt(a ** 3 / mu[i])
        q = a * (1.0 - ecc)
        passage = 2.0 * math.pi * math.sqrt(q ** 3 / (mu[i] * (1.0 + ecc)))
        out.append(Resolution(sysm.names[i], period, passage, period / dt, passage / dt))
    if getattr(plan, "particles", None) is not None:
        out += _particles(plan, dt)
    return out


def _particles(plan, dt):
    """The test particles' least resolved bound orbits (heliocentric, about the star):
    the one with the shortest pericentre passage and the one with the shortest period."""
    import numpy as np

    from orbitledger.integrators.particles import particle_elements

    ps = plan.particles
    mu = float(plan.system.gm[0])
    el = particle_elements(ps.x, ps.v, mu, np.empty((len(ps.names), 6)))
    a, ecc = el[:, 0], el[:, 1]
    bound = np.nonzero((a > 0) & np.isfinite(a) & (ecc < 1))[0]
    if not len(bound):
        return []
    a, ecc = a[bound], ecc[bound]
    period = 2.0 * np.pi * np.sqrt(a ** 3 / mu)
    q = a * (1.0 - ecc)
    passage = 2.0 * np.pi * np.sqrt(q ** 3 / (mu * (1.0 + ecc)))
    picks = sorted({int(np.argmin(passage)), int(np.argmin(period))})
    return [Resolution(f"test particle {ps.names[bound[k]]}", float(period[k]),
                       float(passage[k]), float(period[k]) / dt, float(passage[k]) / dt)
            for k in picks]


def advice(plan):
    """Warning lines (key, value, fix) when the step under-resolves an orbit; else []."""
    res = resolution(plan)
    if not res or plan.method == "gauss_radau":
        return []  # adaptive substeps: its step is only the frame of samples
    worst = min(res, key=lambda r: r.steps_per_passage)
    if worst.steps_per_passage >= MIN_STEPS_PER_PASSAGE:
        return []
    return [f"warning: `method.step` = {abs(plan.dt):.6g} d gives only "
            f"{worst.steps_per_passage:.3g} steps per pericentre passage of {worst.body} "
            f"({worst.passage:.6g} d; {worst.steps_per_orbit:.3g} steps per orbit); below about "
            f"{MIN_STEPS_PER_PASSAGE:.0f} the map's error rises steeply (common practice); "
            f"a step of at most {worst.passage / MIN_STEPS_PER_PASSAGE:.4g} d resolves it."]


def summary(plan):
    """One line for `show`: the least resolved orbit."""
    if plan.method == "gauss_radau":
        return "adaptive substeps (Gauss-Radau); the step is the frame of samples"
    res = resolution(plan)
    if not res:
        return "no bound orbit"
    worst = min(res, key=lambda r: r.steps_per_passage)
    return (f"{worst.steps_per_orbit:.3g} steps per orbit, {worst.steps_per_passage:.3g} per "
            f"pericentre passage ({worst.body}, the least resolved)")
