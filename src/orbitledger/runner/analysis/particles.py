"""Outcomes of a job's test particles: which were removed, when and how, the
Kaplan-Meier survival curve of the particles and the surviving fraction by
initial semi-major axis.

A particle is removed when it meets a stop condition (``[stops]``: within
``hill`` Hill radii of a planet, beyond ``escape_distance``, inside the
star's contact distance) or when its state stops being finite; the removal's
step, kind and body are part of the job's exact state (checkpointed, hashed
in the ledger). Particles still integrated are right-censored at the time the
job has reached. Statistics are the ensembles' own (:mod:`outcomes`):
Kaplan-Meier (Kaplan & Meier 1958) through scipy.stats.ecdf, and Wilson score
intervals (Wilson 1927) for the fraction surviving in each bin of initial a.
"""

from dataclasses import dataclass

import numpy as np

from orbitledger.runner.analysis.outcomes import kaplan_meier, wilson
from orbitledger.runner.errors import NotFoundError

YEAR_D = 365.25


@dataclass
class ParticleSummary:
    """Test-particle outcomes of one job (times in years since its start)."""

    job_id: int
    n: int
    left: int
    reached: float             # time the job has reached, years
    names: list
    a0: np.ndarray             # initial heliocentric a of every particle, au
    times: np.ndarray          # removal time, or the time reached for particles left
    events: np.ndarray         # True where the particle was removed
    kinds: list                # "" for particles left, else the kind (and body)
    counts: dict               # kind -> particles
    km_t: np.ndarray
    km_s: np.ndarray
    km_lo: np.ndarray
    km_hi: np.ndarray
    median: float | None
    edges: np.ndarray          # bins of initial a, au
    bin_n: np.ndarray
    bin_left: np.ndarray
    bin_lo: np.ndarray         # Wilson interval of the surviving fraction (NaN: empty bin)
    bin_hi: np.ndarray
    at_risk: int = 0           # particles not removed before this job's start


def particle_summary(ledger, job_id, bins=10, confidence=0.95):
    """A :class:`ParticleSummary` of a job's committed state (its last checkpoint)."""
    from orbitledger.integrators.stops import KIND_BY_CODE

    integ, ck = ledger.load_integrator(job_id)
    n = getattr(integ, "particle_count", 0)
    if not n:
        raise NotFoundError(f"job {job_id} carries no test particles; give them in the spec's "
                            "[particles] section.")
    ev = integ.particle_events()
    body_names = list(ledger.store.body_names(job_id))
    names = ledger.store.particle_names(job_id)
    first = ledger.store.read_samples(job_id, 1)
    a0 = np.asarray(first["particle_elements"][0, :, 0], dtype=float)
    dt = abs(integ.dt)
    reached = integ.step * dt / YEAR_D
    events = ev[:, 0] >= 0
    # Removed before this job's start (a backward run of a job with removals):
    # never at risk here, left out of the statistics.
    before = ev[:, 0] == 0
    times = np.where(events, ev[:, 0] * dt / YEAR_D, reached)
    kinds, counts = [], {}
    for k in range(n):
        if not events[k]:
            kinds.append("")
            continue
        kind = KIND_BY_CODE[int(ev[k, 1])].value
        if int(ev[k, 2]) > 0:
            kind += f" ({body_names[int(ev[k, 2])]})"
        if before[k]:
            kind = f"before this job's start: {kind}"
        kinds.append(kind)
        counts[kind] = counts.get(kind, 0) + 1
    risk = ~before
    km_t, km_s, lo, hi = kaplan_meier(times[risk], events[risk], confidence)
    below = np.nonzero(km_s <= 0.5)[0]
    median = float(km_t[below[0]]) if len(below) else None
    edges, bin_n, bin_left, bin_lo, bin_hi = by_initial_a(a0[risk], ~events[risk], bins,
                                                          confidence)
    return ParticleSummary(int(job_id), n, int((~events).sum()), reached, names, a0, times,
                           events, kinds, counts, km_t, km_s, lo, hi, median, edges, bin_n,
                           bin_left, bin_lo, bin_hi, int(risk.sum()))


def by_initial_a(a0, survived, bins=10, confidence=0.95):
    """Particles and survivors in `bins` equal bins of initial a (over the finite, bound
    values): (edges, n, survivors, Wilson low, Wilson high)."""
    a0 = np.asarray(a0, dtype=float)
    ok = np.isfinite(a0) & (a0 > 0)
    if not ok.any():
        raise NotFoundError("no test particle starts on a bound orbit; nothing to bin by a.")
    lo_a, hi_a = float(a0[ok].min()), float(a0[ok].max())
    if hi_a == lo_a:
        lo_a, hi_a = lo_a * (1 - 1e-9), hi_a * (1 + 1e-9)
    edges = np.linspace(lo_a, hi_a, int(bins) + 1)
    idx = np.clip(np.searchsorted(edges, a0[ok], side="right") - 1, 0, int(bins) - 1)
    n = np.bincount(idx, minlength=bins)
    k = np.bincount(idx, weights=np.asarray(survived)[ok].astype(float), minlength=bins)
    k = k.astype(np.int64)
    cl = np.full(bins, np.nan)
    ch = np.full(bins, np.nan)
    for b in range(bins):
        if n[b]:
            cl[b], ch[b] = wilson(int(k[b]), int(n[b]), confidence)
    return edges, n, k, cl, ch
