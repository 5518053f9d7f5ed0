"""Job specs: TOML in, validated by pydantic, resolved to internal units.

A spec names the system, the method and its settings, the span, chunking and
output cadence, the energy budget and the stop conditions. Errors name the key,
the bad value and the fix in one sentence. The canonical JSON of a validated
spec (defaults filled in, keys sorted) and its SHA-256 identify the job's inputs.
"""

import hashlib
import json
import tomllib

from pydantic import ValidationError

from orbitledger.integrators.constants import SUN_RADIUS_AU

from orbitledger.runner import defaults
from orbitledger.runner.errors import SpecError

from orbitledger.runner.inputs.plan import (Particles, Plan, build_particles, build_system,
                                            resolve)
from orbitledger.runner.inputs.schema import EphemerisSpec, JobSpec

# Part of this module's API, defined in plan.py and schema.py.
__all__ = ["SpecError", "JobSpec", "EphemerisSpec", "Plan", "Particles", "parse", "load",
           "load_text", "canonical_json", "spec_sha256", "from_json", "resolve",
           "build_system", "build_particles", "RENAMED_STOP_KEYS"]


def _dotted(loc):
    out = ""
    for part in loc:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out


_FIX = {
    "missing": "add it",
    "extra_forbidden": "remove it or check its spelling",
    "literal_error": "use one of the allowed values",
}


def _one_line(err, data, prefix=()):
    e = err.errors()[0]
    key = _dotted(tuple(prefix) + tuple(e["loc"]))
    kind = e["type"]
    if kind == "missing":
        return f"`{key}` is required but missing; add it to the spec."
    if kind == "extra_forbidden":
        return (f"`{key}` is not a known key (value {e.get('input')!r}); "
                "remove it or check its spelling.")
    msg = e["msg"]
    if msg.startswith("Value error, "):
        msg = msg[len("Value error, "):]
    fix = _FIX.get(kind, "correct it")
    return f"`{key}` {msg[0].lower() + msg[1:]}, got {e.get('input')!r}; {fix}."


# Stop keys of earlier versions, still read: old key -> new key.
RENAMED_STOP_KEYS = {"eject_distance": "escape_distance",
                     "star_radius": "star_contact_distance",
                     "unbound_distance": "unbound_escape_distance"}


def _renamed(data, notes):
    """The spec with stop keys of earlier versions renamed; a note per renamed key."""
    stops = data.get("stops")
    if not isinstance(stops, dict) or not (set(stops) & (set(RENAMED_STOP_KEYS) | {"unbound"})):
        return data
    stops = dict(stops)
    unbound = stops.pop("unbound", None)
    for old, new in RENAMED_STOP_KEYS.items():
        if old in stops:
            if new in stops:
                raise SpecError(f"`stops.{old}` and `stops.{new}` are the same setting under "
                                f"its old and new name; keep `stops.{new}`.")
            value = stops.pop(old)
            if old != "unbound_distance" or unbound:
                stops[new] = value
            notes.append(f"note: `stops.{old}` is now called `stops.{new}`; the spec was "
                         "read with the new name.")
    if unbound is not None:
        if unbound and "unbound_escape_distance" not in stops:
            stops["unbound_escape_distance"] = "0 au"
        notes.append("note: `stops.unbound` (with `stops.unbound_distance`) is now "
                     "`stops.unbound_escape_distance` = the distance; the spec was read so.")
    return dict(data, stops=stops)


def parse(data, notes=None):
    """Validate a spec given as a dict; raise SpecError with one line on failure.

    Keys renamed since earlier versions are read under their new names; a
    line about each is appended to `notes` (a list) when one is given.
    """
    if not isinstance(data, dict):
        raise SpecError("a spec must be a TOML table of keys, got something else.")
    data = _renamed(data, notes if notes is not None else [])
    data = _from_ephemeris(data)
    try:
        spec = JobSpec.model_validate(data)
    except ValidationError as err:
        raise SpecError(_one_line(err, data)) from None
    resolve(spec)  # every quantity, unit and physical constraint is checked here
    return spec


def _from_ephemeris(data):
    """A spec whose [system.ephemeris] asks for planets, with the star and bodies read
    from the ephemeris written out (exact numbers, so the stored spec no longer needs
    the ephemeris); a spec that lists its bodies as well (a stored one) is left as is."""
    system = data.get("system")
    if not isinstance(system, dict) or not isinstance(system.get("ephemeris"), dict):
        return data
    if "bodies" in system or "star" in system:
        if "bodies" in system and "star" in system:
            return data
        raise SpecError("`system.ephemeris` gives the star and the bodies; remove "
                        "`system.star` and `system.bodies` (or the ephemeris section).")
    try:
        eph = EphemerisSpec.model_validate(system["ephemeris"])
    except ValidationError as err:
        raise SpecError(_one_line(err, system["ephemeris"], ("system", "ephemeris"))) from None
    from orbitledger.runner.inputs.ephemeris import ephemeris_system

    names, masses, x, v, sources = ephemeris_system(eph)
    bodies = [{"name": n, "mass": f"{float(m)!r} Msun",
               "position": [f"{float(q)!r} au" for q in xx],
               "velocity": [f"{float(q)!r} au/d" for q in vv]}
              for n, m, xx, vv in zip(names[1:], masses[1:], x[1:], v[1:])]
    eph_out = dict(system["ephemeris"], sources=[f"{who}: {what} ({src})"
                                               for who, what, src in sources])
    system = dict(system, star={"name": names[0], "mass": f"{float(masses[0])!r} Msun",
                                "radius": f"{SUN_RADIUS_AU!r} au"},
                  bodies=bodies, frame="heliocentric", ephemeris=eph_out)
    return dict(data, system=system)


def load_text(text, source="spec", notes=None):
    """Validate a spec from TOML text (see :func:`parse` for `notes`)."""
    if len(text.encode("utf-8")) > defaults.MAX_SPEC_BYTES:
        raise SpecError(f"{source} is larger than {defaults.MAX_SPEC_BYTES} bytes; "
                        "split the campaign into smaller specs.")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise SpecError(f"{source} is not valid TOML ({err}); fix the syntax.") from None
    return parse(data, notes)


def load(path, notes=None):
    """Validate a spec from a TOML file (see :func:`parse` for `notes`)."""
    try:
        with open(path, "rb") as fh:
            raw = fh.read(defaults.MAX_SPEC_BYTES + 1)
    except OSError as err:
        raise SpecError(f"spec file {path} could not be read ({err.strerror}).") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise SpecError(f"spec file {path} is not UTF-8 text.") from None
    return load_text(text, source=f"spec file {path}", notes=notes)


def canonical_json(spec):
    """Canonical JSON of a validated spec: defaults filled, keys sorted, no spaces."""
    data = spec.model_dump(mode="json")
    # Keys added later are left out at their defaults, as for particles below.
    for key, default in (("tolerance", None), ("encounters", "stop"), ("switch_back", None)):
        if data["method"].get(key) == default:
            data["method"].pop(key, None)
    if data.get("particles") is None:
        # Only when given, so specs without particles keep the text (and hash)
        # they had before particles existed.
        data.pop("particles", None)
    return json.dumps(data, sort_keys=True, separators=(",", ":"),
                      ensure_ascii=False, allow_nan=False)


def spec_sha256(spec):
    """SHA-256 hex digest of the canonical JSON."""
    return hashlib.sha256(canonical_json(spec).encode("utf-8")).hexdigest()


def from_json(text):
    """A validated spec from its canonical JSON (as stored in the ledger)."""
    return parse(json.loads(text))
