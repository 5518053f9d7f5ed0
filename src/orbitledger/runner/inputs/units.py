"""Quantities with units at the edges: "4 d", "0.5 yr", "2 Gyr", "1000 au".

Parsing uses astropy.units; the year is the Julian year (365.25 d), as in
astropy. Everything is converted to the internal units au, day, solar mass.
"""

import math

import astropy.units as u

from orbitledger.runner.errors import SpecError

_KIND_UNITS = {
    "time": u.day,
    "length": u.au,
    "mass": u.M_sun,
    "angle": u.deg,
    "speed": u.au / u.day,
}
_EXAMPLES = {
    "time": '"4 d", "0.5 yr" or "2 Gyr"',
    "length": '"1.5 au" or "7e5 km"',
    "mass": '"1 Msun", "0.001 Msun" or "317.8 earthMass"',
    "angle": '"12.5 deg" or "0.2 rad"',
    "speed": '"0.017 au/d" or "29.8 km/s"',
}


# (text, kind) -> float, for texts already converted: an ensemble's members
# repeat the same few hundred quantities, and astropy's parser is the slow part.
_DONE = {}


def parse_quantity(key, value, kind):
    """Convert a string with a unit to internal units (float).

    Parameters
    ----------
    key : str
        Spec key, for the error message.
    value : str
        e.g. "4 d".
    kind : {"time", "length", "mass", "angle", "speed"}
    """
    if isinstance(value, str):
        done = _DONE.get((value, kind))
        if done is not None:
            return done
    if isinstance(value, bool) or not isinstance(value, str):
        raise SpecError(f"`{key}` must be a string with a unit such as {_EXAMPLES[kind]}, "
                        f"got {value!r}.")
    try:
        q = u.Quantity(value)
    except (TypeError, ValueError):
        raise SpecError(f"`{key}` could not be read as a quantity, got {value!r}; "
                        f"write it as {_EXAMPLES[kind]}.") from None
    if q.unit == u.dimensionless_unscaled:
        raise SpecError(f"`{key}` needs a unit, got {value!r}; write it as {_EXAMPLES[kind]}.")
    try:
        out = float(q.to_value(_KIND_UNITS[kind]))
    except u.UnitConversionError:
        raise SpecError(f"`{key}` must be a {kind}, got {value!r} ({q.unit.physical_type}); "
                        f"write it as {_EXAMPLES[kind]}.") from None
    if not math.isfinite(out):
        raise SpecError(f"`{key}` must be finite, got {value!r}; give a finite number with a unit.")
    if len(_DONE) > 100_000:
        _DONE.clear()
    _DONE[(value, kind)] = out
    return out


# Readable times live in a light module (no astropy) for the status commands.
from orbitledger.runner.inputs.text import TIME_UNITS, format_time, time_unit  # noqa: E402,F401
