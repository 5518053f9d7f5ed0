"""Outcomes of an ensemble: counts, instability fraction, survival curve.

A member is *unstable* when a stop condition ended it (close encounter,
ejection, collision with the star, eccentricity limit) and its time is the
stop time. Every other member is *censored* at the time it has reached: it
survived so far (finished, still running, held, over budget, cancelled).
Statistics:

- instability fraction k/n with the Wilson score interval (Wilson 1927),
  via scipy.stats.binomtest(k, n).proportion_ci(method="wilson");
- survival curve by Kaplan-Meier (Kaplan & Meier 1958) with unfinished
  members right-censored, via scipy.stats.ecdf on CensoredData, with its
  pointwise confidence band (Greenwood's formula, scipy's default),
  undefined (NaN) where the curve has reached 0;
- median time to instability: the first time the survival curve falls to
  0.5 or below, when it does.
"""

from dataclasses import dataclass

import numpy as np

from orbitledger.runner.ledger.status import JobStatus

UNSTABLE = ("close_encounter", "ejection", "star_collision", "eccentricity", "collision")
YEAR_D = 365.25


@dataclass
class Summary:
    """Outcome statistics of an ensemble (times in years)."""

    n: int
    counts: dict
    unstable: int
    fraction: float
    ci: tuple
    times: np.ndarray          # time reached or stop time of every member, years
    events: np.ndarray         # True where the member went unstable
    km_t: np.ndarray           # Kaplan-Meier step times, years
    km_s: np.ndarray           # survival probability just after each time
    km_lo: np.ndarray          # pointwise confidence band; NaN where undefined (S = 0)
    km_hi: np.ndarray
    median: float | None       # median time to instability, years
    rows: list
    names: list | None = None  # body names (star first) of the ensemble, for its stops


def member_outcome(row):
    """(label, time in years, unstable?) of one member job row."""
    if row["status"] == JobStatus.STOPPED.value and row["outcome"] in UNSTABLE:
        return row["outcome"], abs(row["outcome_time"]) / YEAR_D, True
    t = abs(row["steps_done"] * row["dt"]) / YEAR_D
    if row["status"] == JobStatus.DONE.value:
        return "survived", t, False
    if row["outcome"] == "over_budget":
        return "over_budget", t, False
    return f"survived so far ({row['status']})", t, False


def kaplan_meier(times, events, confidence=0.95):
    """Kaplan-Meier survival (t, S, lo, hi) via scipy.stats.ecdf on censored data."""
    from scipy import stats

    times = np.asarray(times, dtype=float)
    events = np.asarray(events, dtype=bool)
    if not events.any():
        return np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0)
    data = stats.CensoredData(uncensored=times[events], right=times[~events])
    res = stats.ecdf(data)
    sf = res.sf
    ci = sf.confidence_interval(confidence_level=confidence)
    q = np.asarray(sf.quantiles)
    # scipy lists censoring times too; the curve only steps at event times.
    keep = np.isin(q, np.unique(times[events]))
    # Where the curve has reached 0, Greenwood's variance is 0/0 and scipy
    # gives NaN: the band is undefined there and stays NaN (plots leave it
    # out, tables print a dash); it is never filled with 0 or 1.
    return (q[keep], np.asarray(sf.probabilities)[keep],
            np.asarray(ci.low.probabilities, dtype=float)[keep],
            np.asarray(ci.high.probabilities, dtype=float)[keep])


def wilson(k, n, confidence=0.95):
    """Wilson score interval of k successes in n trials, via scipy.stats.binomtest."""
    from scipy import stats

    ci = stats.binomtest(k, n).proportion_ci(confidence_level=confidence, method="wilson")
    return float(ci.low), float(ci.high)


def summarise(rows, confidence=0.95, names=None):
    """A :class:`Summary` of member job rows (``names``: the ensemble's body names)."""
    n = len(rows)
    labels, times, events = [], [], []
    for r in rows:
        lab, t, ev = member_outcome(r)
        labels.append(lab)
        times.append(t)
        events.append(ev)
    times = np.array(times)
    events = np.array(events, dtype=bool)
    counts = {}
    for lab in labels:
        counts[lab] = counts.get(lab, 0) + 1
    k = int(events.sum())
    ci = wilson(k, n, confidence) if n else (0.0, 1.0)
    km_t, km_s, lo, hi = kaplan_meier(times, events, confidence)
    below = np.nonzero(km_s <= 0.5)[0]
    median = float(km_t[below[0]]) if len(below) else None
    return Summary(n, counts, k, k / n if n else 0.0, ci, times, events, km_t, km_s, lo, hi,
                   median, [dict(r, label=lab) for r, lab in zip(rows, labels)], names)


# Events that change a member's bodies (runs with `method.encounters = "switch"`).
BODY_EVENTS = ("merger", "ejection", "star_merger")


def event_counts(events, n_members, names=None):
    """Members by what happened to their bodies: {"merger: b, c": members, ...,
    "kept every body": members}, from (job id, kind, bodies) event rows; a member
    counts once per label however often it happened to it."""
    from orbitledger.runner.inputs.text import body_list

    seen = {}
    touched = set()
    for job_id, kind, bodies in events:
        label = kind
        if bodies and names:
            label += ": " + ", ".join(str(b) for b in body_list(bodies, names))
        seen.setdefault(label, set()).add(job_id)
        touched.add(job_id)
    out = {label: len(ids) for label, ids in sorted(seen.items())}
    if out:
        out["kept every body"] = n_members - len(touched)
    return out


def member_bodies(row, names=None):
    """The bodies of a member's stop, by name (empty when it did not stop).

    ``names`` (star first) saves reading them from the member's own spec.
    """
    from orbitledger.runner.inputs.text import body_list, body_names_from_json

    if not row.get("outcome_bodies"):
        return []
    if names is None:
        names = body_names_from_json(row["spec_json"])
    return [str(b) for b in body_list(row["outcome_bodies"], names)]


def counts_by_body(summary):
    """{outcome: {"body, body": members}} for members whose stop names bodies."""
    out = {}
    for r in summary.rows:
        names = member_bodies(r, summary.names)
        if names:
            per = out.setdefault(r["label"], {})
            key = ", ".join(names)
            per[key] = per.get(key, 0) + 1
    return out


def summary_rows(summary):
    """(times header, rows) for tables: one row per outcome and bodies, times in one unit.

    Rows read ("ejection: Ilvar d", members, "1.2, 3.4, 5.6") with the times
    in the unit of the header ("times (Myr)"), the first twelve in order.
    """
    from orbitledger.runner.inputs.text import time_unit

    by = {}
    for r, t in zip(summary.rows, summary.times):
        names = member_bodies(r, summary.names)
        label = r["label"] + (f": {', '.join(names)}" if names else "")
        by.setdefault(label, []).append(t)
    name, scale = time_unit(365.25 * float(summary.times.max()) if summary.n else 0.0)
    per = scale / 365.25
    rows = [(lab, len(ts), ", ".join(f"{t / per:.4g}" for t in sorted(ts)[:12])
             + (" ..." if len(ts) > 12 else "")) for lab, ts in sorted(by.items())]
    return f"times ({name})", rows
