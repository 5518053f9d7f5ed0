"""Stability maps: a grid ensemble's members as cells of a map over one or two quantities.

Each cell holds what its member has committed so far: whether it stopped
(and how, and when), how far it has run, and, for jobs with
``method.indicator = "megno"``, the last sampled MEGNO <Y> and finite-time
Lyapunov exponent. An ensemble worked breadth first advances every cell
together, so the map of a running ensemble is the whole grid at an earlier
time, sharpening as the members run on.

Classes of a cell (conventions, stated with the map): "unstable" if the
member stopped on a stop condition; otherwise "chaotic" if |<Y> - 2| is
above ``CHAOS_MARGIN`` and "regular" if not (without the indicator, a cell
that has not stopped is "survived").
"""

import json

import numpy as np

from orbitledger.runner.errors import LedgerError
# The Julian year in days (as integrators.constants.YEAR_D; this module loads no kernel).
YEAR_D = 365.25

# |<Y> - 2| above which a cell counts as chaotic (a convention: <Y> of a
# quasi-periodic orbit approaches 2 from the transient; 0.5 leaves room for
# it over short spans).
CHAOS_MARGIN = 0.5
# Codes of cell_class, in order.
CLASSES = ("regular", "chaotic", "unstable", "survived")


def stability_map(ledger, ensemble_id):
    """The map of a grid ensemble as an xarray Dataset.

    Coordinates: one per grid axis (named by quantity, or quantity_body when
    two axes share a quantity), in au, 1 or degrees. Variables per cell:
    ``megno`` and ``lyapunov_time`` (yr; nan without the indicator),
    ``survival_time`` (yr: the stop time, else the time reached),
    ``time_reached`` (yr), ``stopped`` (bool), ``outcome`` and ``cell_class``
    (integer codes with CF ``flag_values``/``flag_meanings``; see
    :func:`classes`), ``job_id``.
    """
    import xarray as xr

    from orbitledger.runner.inputs.ensemble import GRID_NAMES, GRID_UNITS, grid_axes
    from orbitledger.runner.inputs.spec import from_json

    ens = ledger.ensemble(ensemble_id)
    spec = from_json(ens["spec_json"])
    if spec.ensemble.grid is None:
        raise LedgerError(f"ensemble {ensemble_id} perturbs clones ([ensemble.perturb]); a "
                          "map needs a grid ensemble ([[ensemble.grid]] axes).")
    axes = grid_axes(spec.ensemble)
    shape = tuple(len(v) for _, _, v in axes)
    rows = ledger.member_outcomes(ensemble_id)
    if len(rows) != int(np.prod(shape)):
        raise LedgerError(f"ensemble {ensemble_id} has {len(rows)} members, not the "
                          f"{int(np.prod(shape))} cells of its grid.")
    n = len(rows)
    megno = np.full(n, np.nan)
    lyap = np.full(n, np.nan)
    reached = np.empty(n)
    survival = np.empty(n)
    stopped = np.zeros(n, dtype=bool)
    outcome = np.empty(n, dtype=object)
    ids = np.empty(n, dtype=np.int64)
    for k, r in enumerate(rows):  # members in id order = row-major cell order
        ids[k] = r["id"]
        reached[k] = abs(r["steps_done"] * r["dt"]) / YEAR_D
        stopped[k] = r["status"] == "stopped"
        outcome[k] = r["outcome"] or r["status"]
        survival[k] = (abs(r["outcome_time"]) / YEAR_D if stopped[k] and r["outcome_time"]
                       is not None else reached[k])
        last = _last_indicator(ledger, r["id"])
        if last is not None:
            megno[k], lyap[k] = last
    with np.errstate(divide="ignore"):
        lyap_time = np.where(lyap > 0, 1.0 / (lyap * YEAR_D), np.inf)
    lyap_time[np.isnan(lyap)] = np.nan
    cls = np.where(stopped, CLASSES.index("unstable"),
                   np.where(np.isnan(megno), CLASSES.index("survived"),
                            np.where(np.abs(megno - 2.0) > CHAOS_MARGIN, CLASSES.index("chaotic"),
                                     CLASSES.index("regular")))).astype(np.int8)
    kinds = sorted(set(outcome))
    outcome_code = np.array([kinds.index(o) for o in outcome], dtype=np.int16)
    names = [q for _, q, _ in axes]
    dims = [q if names.count(q) == 1 else f"{q}_{body.replace(' ', '_')}"
            for body, q, _ in axes]
    coords = {d: (d, v, {"units": GRID_UNITS[q], "long_name": f"{body}: {GRID_NAMES[q]}"})
              for d, (body, q, v) in zip(dims, axes)}

    def grid(values, **attrs):
        return (dims, np.asarray(values).reshape(shape), attrs)

    ds = xr.Dataset(
        {"megno": grid(megno, units="1", long_name="MEGNO <Y> at the last sample"),
         "lyapunov_time": grid(lyap_time, units="yr",
                               long_name="Lyapunov time (1 / finite-time exponent)"),
         "survival_time": grid(survival, units="yr",
                               long_name="time of the stop, else the time reached"),
         "time_reached": grid(reached, units="yr", long_name="time integrated so far"),
         "stopped": grid(stopped, long_name="stopped by a stop condition"),
         # Categories as CF flags (integer codes with their meanings), which
         # every netCDF/zarr reader keeps.
         "outcome": grid(outcome_code, long_name="outcome, or status if none",
                         flag_values=list(range(len(kinds))), flag_meanings=" ".join(kinds)),
         "cell_class": grid(cls, long_name=f"class of the cell (chaotic: |<Y> - 2| > "
                                           f"{CHAOS_MARGIN}; survived: no indicator)",
                            flag_values=list(range(len(CLASSES))),
                            flag_meanings=" ".join(CLASSES)),
         "job_id": grid(ids, long_name="member job")},
        coords=coords,
        attrs={"ensemble_id": int(ensemble_id), "ensemble_name": ens["name"],
               "chaos_margin": CHAOS_MARGIN,
               "spec": json.dumps(json.loads(ens["spec_json"]), sort_keys=True)})
    return ds


def _last_indicator(ledger, job_id):
    """(megno, lyapunov per day) at a member's last committed sample, or None."""
    n = ledger.job(job_id)["n_samples"]
    if not n:
        return None
    try:
        s = ledger.store.read_samples(job_id, n, start=n - 1)
    except Exception:  # noqa: BLE001 - a damaged store shows as an unknown cell
        return None
    if "megno" not in s:
        return None
    return float(s["megno"][-1]), float(s["lyapunov"][-1])



def classes(ds):
    """cell_class as an array of names ("regular", "chaotic", "unstable", "survived")."""
    return np.array(CLASSES, dtype=object)[ds["cell_class"].values]
