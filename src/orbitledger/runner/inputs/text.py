"""Light helpers for reading the ledger back (no astropy, no pydantic, no numba): readable
times and the body names stored in a job's spec JSON. Commands that only read, such as
`status`, import these and start quickly."""

import json


def format_time(days):
    """A readable time: 0 yr, 8 d, 0.5 yr, 37.2 yr, 500 kyr, 9.95 Myr, 2 Gyr.

    Below a year, a round number of years (0.5 yr, 0.25 yr) reads as years
    and anything else in days.
    """
    yr = days / 365.25
    a = abs(yr)
    if days == 0:
        return "0 yr"
    if a < 1:
        r = float(f"{yr:.3g}")
        if abs(r - yr) <= 1e-12 * a:
            return f"{r:g} yr"
        return f"{days:.4g} d"
    for scale, name in ((1e9, "Gyr"), (1e6, "Myr"), (1e3, "kyr")):
        if a >= scale:
            return f"{yr / scale:.4g} {name}"
    return f"{yr:.4g} yr"


TIME_UNITS = (("d", 1.0), ("yr", 365.25), ("kyr", 365.25e3), ("Myr", 365.25e6),
              ("Gyr", 365.25e9))


def time_unit(days):
    """(name, days per unit) of the unit in which ``days`` reads as 1 to 1000 (at least yr).

    One unit for a whole column or axis: pass its largest value.
    """
    a = abs(days)
    name, scale = "yr", 365.25
    for n, sc in TIME_UNITS[2:]:
        if a >= sc:
            name, scale = n, sc
    return name, scale


def body_names_from_json(spec_json):
    """Body names (star first) from a job's stored spec JSON, or None if it has none."""
    try:
        system = json.loads(spec_json)["system"]
        return [system["star"]["name"]] + [b["name"] for b in system["bodies"]]
    except (KeyError, TypeError, ValueError):
        return None


def body_list(text, names):
    """Body indices stored as "1,2" (star = 0) as names; an index without a name stays
    an index."""
    if not text:
        return []
    idx = [int(k) for k in str(text).split(",") if k != ""]
    return [names[k] if names and 0 <= k < len(names) else k for k in idx]
