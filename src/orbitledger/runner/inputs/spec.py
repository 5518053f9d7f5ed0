"""Job specs: TOML in, validated by pydantic, resolved to internal units.

A spec names the system, the method and its settings, the span, chunking and
output cadence, the energy budget and the stop conditions. Errors name the key,
the bad value and the fix in one sentence. The canonical JSON of a validated
spec (defaults filled in, keys sorted) and its SHA-256 identify the job's inputs.
"""

from dataclasses import dataclass
import hashlib
import json
import math
import re
import tomllib
from typing import Literal

from pydantic import BaseModel, ConfigDict, ValidationError, field_validator, model_validator

from orbitledger.integrators import CORRECTOR_ORDERS, METHODS, StopConditions, System
from orbitledger.integrators.constants import G, SUN_RADIUS_AU

from orbitledger.runner import defaults
from orbitledger.runner.errors import SpecError
from orbitledger.runner.inputs.units import parse_quantity

_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9 ._+-]{0,99}$")
_STEPS_RE = re.compile(r"^\s*([0-9]+)\s*steps?\s*$")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=False, allow_inf_nan=False)


class StarSpec(_Strict):
    name: str
    mass: str
    radius: str | None = None


class _Orbit(_Strict):
    """Where a body or a particle starts: orbital elements, or a state vector."""

    a: str | None = None
    e: float | None = None
    i: str = "0 deg"
    node: str = "0 deg"
    peri: str = "0 deg"
    mean_anomaly: str = "0 deg"
    position: list[str] | None = None
    velocity: list[str] | None = None


class BodySpec(_Orbit):
    name: str
    mass: str
    radius: str | None = None


class EphemerisSpec(_Strict):
    """Initial conditions read from a solar-system ephemeris (see runner.inputs.ephemeris)."""

    epoch: str
    scale: Literal["tdb", "tt", "utc", "tai"] = "tdb"
    bodies: list[str]
    source: str = "builtin"
    plane: Literal["ecliptic", "invariable"] = "ecliptic"
    masses: dict[str, str] | None = None
    fold_unlisted: bool = True
    # Filled at submit: where every number came from (kept with the job's spec).
    sources: list[str] | None = None


class SystemSpec(_Strict):
    star: StarSpec
    bodies: list[BodySpec]
    frame: Literal["heliocentric", "jacobi"] = "heliocentric"
    ephemeris: EphemerisSpec | None = None


class MethodSpec(_Strict):
    name: Literal["wisdom_holman", "gauss_radau", "leapfrog"] = "wisdom_holman"
    step: str
    corrector: int = 0
    relativity: bool = False
    allow_long_step: bool = False
    indicator: Literal["none", "megno"] = "none"
    tolerance: float | None = None
    encounters: Literal["stop", "switch"] = "stop"
    switch_back: float | None = None

    @field_validator("tolerance")
    @classmethod
    def _tolerance(cls, v):
        if v is not None and not 1e-9 <= v <= 1e-3:
            raise ValueError("must be between 1e-9 and 1e-3 (below 1e-9 the last Radau "
                             "coefficient is rounding noise at close approaches)")
        return v

    @field_validator("corrector")
    @classmethod
    def _corrector(cls, v):
        if v not in CORRECTOR_ORDERS:
            raise ValueError(f"must be one of {', '.join(map(str, CORRECTOR_ORDERS))}")
        return v


class SpanSpec(_Strict):
    length: str
    direction: Literal["forward", "backward"] = "forward"
    chunk: str | None = None
    output: str | None = None
    max_store_gb: float = 20.0

    @field_validator("max_store_gb")
    @classmethod
    def _store(cls, v):
        if not v > 0:
            raise ValueError("must be a positive size in GB such as 50")
        return v


class BudgetSpec(_Strict):
    energy: float = 1e-6
    angular_momentum: float | None = None
    on_exceed: Literal["hold", "stop", "continue"] = "hold"

    @field_validator("energy", "angular_momentum")
    @classmethod
    def _positive(cls, v):
        if v is not None and not v > 0:
            raise ValueError("must be a positive relative error such as 1e-8")
        return v


class StopSpec(_Strict):
    hill: float = 0.0
    escape_distance: str | None = None
    unbound_escape_distance: str | None = None
    star_contact_distance: str | None = None
    max_ecc: float = 0.0

    @field_validator("hill", "max_ecc")
    @classmethod
    def _nonneg(cls, v):
        if v < 0:
            raise ValueError("must be >= 0 (0 turns the condition off)")
        return v


PERTURBABLE = ("a", "e", "i", "mean_anomaly", "x", "y", "z")


class PerturbSpec(_Strict):
    body: str
    quantity: Literal["a", "e", "i", "mean_anomaly", "x", "y", "z"]
    rule: Literal["step", "normal", "uniform"] = "step"
    size: str | float
    relative: bool = False


class GridAxisSpec(_Strict):
    """One axis of a grid ensemble: `count` values of one element of one body,
    evenly spaced from `first` to `last` (both included)."""

    body: str
    quantity: Literal["a", "e", "i", "mean_anomaly"]
    first: str | float
    last: str | float
    count: int

    @field_validator("count")
    @classmethod
    def _count(cls, v):
        if not 1 <= v <= 10_000:
            raise ValueError("must be between 1 and 10000")
        return v


class EnsembleSpec(_Strict):
    members: int | None = None
    seed: int = 0
    perturb: PerturbSpec | None = None
    grid: list[GridAxisSpec] | None = None

    @field_validator("members")
    @classmethod
    def _members(cls, v):
        if v is not None and not 1 <= v <= 100_000:
            raise ValueError("must be between 1 and 100000")
        return v

    @model_validator(mode="after")
    def _rule(self):
        if (self.perturb is None) == (self.grid is None):
            raise ValueError("give either [ensemble.perturb] (clones) or [[ensemble.grid]] "
                             "axes (a map), not both or neither")
        if self.grid is not None:
            if not 1 <= len(self.grid) <= 2:
                raise ValueError(f"a grid has one or two axes, got {len(self.grid)}")
            cells = 1
            for axis in self.grid:
                cells *= axis.count
            if self.members is None:
                self.members = cells
            elif self.members != cells:
                raise ValueError(f"members = {self.members} but the grid has {cells} cells; "
                                 "remove `members` or make it the product of the counts")
            if self.members > 100_000:
                raise ValueError(f"the grid has {self.members} cells, more than 100000")
        elif self.members is None:
            raise ValueError("`ensemble.members` is required with [ensemble.perturb]")
        return self


class ParticleSpec(_Orbit):
    """One listed test particle: heliocentric elements about the star, or a state."""

    name: str | None = None


class DrawnParticlesSpec(_Strict):
    """Test particles drawn by rule: a, e and i uniform in their ranges, the node,
    argument of pericentre and mean anomaly uniform in 0-360 deg, from PCG64(seed)."""

    count: int
    seed: int = 0
    a: list[str]
    e: list[float] = [0.0, 0.0]
    i: list[str] = ["0 deg", "0 deg"]

    @field_validator("count")
    @classmethod
    def _count(cls, v):
        if not 1 <= v <= defaults.MAX_PARTICLES:
            raise ValueError(f"must be between 1 and {defaults.MAX_PARTICLES}")
        return v

    @field_validator("a", "e", "i")
    @classmethod
    def _range(cls, v):
        if len(v) != 2:
            raise ValueError("must be a range of two values, [lowest, highest]")
        return v


class ParticlesSpec(_Strict):
    """Massless bodies that feel the star and the bodies and nothing else."""

    listed: list[ParticleSpec] | None = None
    drawn: DrawnParticlesSpec | None = None

    @model_validator(mode="after")
    def _some(self):
        if not self.listed and self.drawn is None:
            raise ValueError("lists no particles; add [[particles.listed]] tables or a "
                             "[particles.drawn] rule")
        return self


class JobSpec(_Strict):
    """A validated job spec (structure and types; see :func:`resolve` for meaning)."""

    name: str
    description: str = ""
    system: SystemSpec
    method: MethodSpec
    span: SpanSpec
    budget: BudgetSpec = BudgetSpec()
    stops: StopSpec = StopSpec()
    ensemble: EnsembleSpec | None = None
    member: int | None = None
    particles: ParticlesSpec | None = None

    @field_validator("name")
    @classmethod
    def _name(cls, v):
        if not _NAME_RE.match(v):
            raise ValueError("must be 1-100 letters, digits, spaces or ._+- and start "
                             "with a letter or digit")
        return v


# -- loading and errors ---------------------------------------------------------

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


# -- resolution to internal units ----------------------------------------------

@dataclass(frozen=True)
class Particles:
    """A job's test particles: names and heliocentric states (k, 3) in au and au/d."""

    names: tuple
    x: object
    v: object


@dataclass(frozen=True)
class Plan:
    """A spec resolved to internal units: what the worker needs."""

    system: System
    method: str
    dt: float                 # days, negative for backward runs
    corrector: int
    relativity: bool
    total_steps: int
    chunk_steps: int
    output_steps: int
    stops: StopConditions
    energy_budget: float
    angmom_budget: float | None
    on_exceed: str
    indicator: str = "none"
    particles: "Particles | None" = None
    tolerance: float | None = None
    encounters: str = "stop"
    switch_back: float = 5.0

    def make_integrator(self, system=None):
        """A fresh integrator at the start of the run (or from another system)."""
        sysm = system if system is not None else self.system
        if self.method == "wisdom_holman" and self.encounters == "switch":
            from orbitledger.integrators.gauss_radau import DEFAULT_TOLERANCE

            return METHODS["switching"](sysm, self.dt, corrector=self.corrector,
                                        gr=self.relativity, stops=self.stops,
                                        back_at=self.switch_back,
                                        tolerance=self.tolerance or DEFAULT_TOLERANCE)
        if self.method == "wisdom_holman":
            return METHODS[self.method](sysm, self.dt, corrector=self.corrector,
                                        gr=self.relativity, stops=self.stops,
                                        indicator=None if self.indicator == "none"
                                        else self.indicator,
                                        particles=None if self.particles is None
                                        else (self.particles.x, self.particles.v))
        if self.method == "gauss_radau":
            from orbitledger.integrators.gauss_radau import DEFAULT_TOLERANCE

            return METHODS[self.method](sysm, self.dt, stops=self.stops, gr=self.relativity,
                                        tolerance=self.tolerance or DEFAULT_TOLERANCE)
        return METHODS[self.method](sysm, self.dt, stops=self.stops)


def _steps(key, value, dt, default=None):
    if value is None:
        return default
    m = _STEPS_RE.match(value)
    if m:
        n = int(m.group(1))
    else:
        t = parse_quantity(key, value, "time")
        if t <= 0:
            raise SpecError(f"`{key}` must be positive, got {value!r}; give a positive time or \"N steps\".")
        n = round(t / abs(dt))
        if abs(t / abs(dt) - n) > 1e-6 * max(1, n):
            raise SpecError(f"`{key}` must be a whole number of steps, got {value!r} = "
                            f"{t / abs(dt):.6g} steps of `method.step`; round it.")
    if n < 1:
        raise SpecError(f"`{key}` must be at least one step, got {value!r}; lengthen it.")
    return n


def _body_state(key, body, mu):
    from orbitledger.integrators import elements as el

    has_el = body.a is not None or body.e is not None
    has_xv = body.position is not None or body.velocity is not None
    if has_el and has_xv:
        raise SpecError(f"`{key}` gives both orbital elements and a state vector; keep one.")
    if has_xv:
        if body.position is None or body.velocity is None or len(body.position) != 3 \
                or len(body.velocity) != 3:
            raise SpecError(f"`{key}.position` and `{key}.velocity` must both be lists of "
                            'three quantities such as ["1 au", "0 au", "0 au"].')
        x = [parse_quantity(f"{key}.position[{k}]", q, "length") for k, q in enumerate(body.position)]
        v = [parse_quantity(f"{key}.velocity[{k}]", q, "speed") for k, q in enumerate(body.velocity)]
        return x, v
    if body.a is None or body.e is None:
        missing = "a" if body.a is None else "e"
        raise SpecError(f"`{key}.{missing}` is required but missing; give a and e (and angles), "
                        "or position and velocity.")
    a = parse_quantity(f"{key}.a", body.a, "length")
    e = body.e
    if e < 0:
        raise SpecError(f"`{key}.e` must be >= 0, got {e}; give an eccentricity of 0 or more.")
    if a > 0 and e >= 1:
        raise SpecError(f"`{key}.e` must be below 1 for an elliptic orbit (a > 0), got {e}; "
                        "for a hyperbolic orbit give e > 1 and a negative a.")
    if a < 0 and e <= 1:
        raise SpecError(f"`{key}.e` must exceed 1 for a hyperbolic orbit (a < 0), got {e}; "
                        "for an ellipse give a positive a.")
    if a == 0:
        raise SpecError(f"`{key}.a` must be non-zero, got {body.a!r}; give the semi-major axis.")
    inc = parse_quantity(f"{key}.i", body.i, "angle")
    if not 0.0 <= inc <= 180.0:
        raise SpecError(f"`{key}.i` must be between 0 and 180 deg, got {body.i!r}; an "
                        "inclination i outside that range is the orbit with 360 deg - i "
                        "(or -i) and the node turned by 180 deg.")
    ang = [parse_quantity(f"{key}.{n}", getattr(body, n), "angle") * math.pi / 180.0
           for n in ("i", "node", "peri", "mean_anomaly")]
    return el.to_state(mu, a, e, *ang)


def _mass(key, value):
    m = parse_quantity(key, value, "mass")
    if m < 0:
        raise SpecError(f"`{key}` must be >= 0, got {value!r}; give a mass of 0 or more.")
    return m


def build_system(sysspec, ensemble=None, member=None):
    """The initial System (barycentric frame) of a validated spec.

    With an ensemble rule and a member index, that member's perturbation is
    applied (see :mod:`runner.inputs.ensemble`).
    """
    from orbitledger.integrators.system import inertial_from_jacobi, jacobi_mu

    if len(sysspec.bodies) < 1:
        raise SpecError("`system.bodies` must list at least one body; add a [[system.bodies]] table.")
    if len(sysspec.bodies) + 1 > defaults.MAX_BODIES:
        raise SpecError(f"`system.bodies` lists {len(sysspec.bodies)} bodies; at most "
                        f"{defaults.MAX_BODIES - 1} are allowed.")
    names = [sysspec.star.name] + [b.name for b in sysspec.bodies]
    seen = set()
    for k, nm in enumerate(names):
        if nm in seen:
            key = "system.star.name" if k == 0 else f"system.bodies[{k - 1}].name"
            raise SpecError(f"`{key}` repeats the name {nm!r}; body names must be unique.")
        seen.add(nm)
    m0 = _mass("system.star.mass", sysspec.star.mass)
    if m0 <= 0:
        raise SpecError(f"`system.star.mass` must be positive, got {sysspec.star.mass!r}; "
                        "give the star's mass, e.g. \"1 Msun\".")
    masses = [m0] + [_mass(f"system.bodies[{k}].mass", b.mass) for k, b in enumerate(sysspec.bodies)]
    radii = [0.0 if b.radius is None else parse_quantity(f"{key}.radius", b.radius, "length")
             for key, b in [("system.star", sysspec.star)]
             + [(f"system.bodies[{k}]", b) for k, b in enumerate(sysspec.bodies)]]
    gm = [G * m for m in masses]
    n = len(gm)
    rel_x = [[0.0] * 3 for _ in range(n)]
    rel_v = [[0.0] * 3 for _ in range(n)]
    import numpy as np

    gm_arr = np.array(gm)
    mu = jacobi_mu(gm_arr) if sysspec.frame == "jacobi" else gm_arr[0] + gm_arr
    target, offset, cells = None, 0.0, {}
    if ensemble is not None and ensemble.grid is not None:
        from orbitledger.runner.inputs.ensemble import grid_cell

        cells = grid_cell(sysspec, ensemble, member)
    elif ensemble is not None:
        from orbitledger.runner.inputs.ensemble import member_offset

        target, offset = member_offset(sysspec, ensemble, member)
    for k, b in enumerate(sysspec.bodies):
        if k in cells:
            b = _grid_elements(f"system.bodies[{k}]", b, cells[k])
        if k == target and ensemble.perturb.quantity in ("a", "e", "i", "mean_anomaly"):
            b = _perturbed_elements(f"system.bodies[{k}]", b, ensemble.perturb, offset)
        x, v = _body_state(f"system.bodies[{k}]", b, float(mu[k + 1]))
        x, v = list(x), list(v)
        if k == target and ensemble.perturb.quantity in ("x", "y", "z"):
            x["xyz".index(ensemble.perturb.quantity)] += offset
        rel_x[k + 1], rel_v[k + 1] = x, v
    rel_x, rel_v = np.array(rel_x, dtype=float), np.array(rel_v, dtype=float)
    if sysspec.frame == "jacobi":
        rel_x = inertial_from_jacobi(gm_arr, rel_x)
        rel_v = inertial_from_jacobi(gm_arr, rel_v)
    for k in range(1, n):
        if not np.any(rel_x[k] != rel_x[0]):
            raise SpecError(f"`system.bodies[{k - 1}]` sits on the star; give it a distance.")
    return System(names, gm_arr, rel_x, rel_v, 0.0, np.array(radii)).to_barycentric_frame()


def _grid_elements(key, body, values):
    """A copy of a body spec with elements set to a grid cell's values (au, 1, degrees)."""
    if body.a is None:
        raise SpecError(f"`ensemble.grid` sets orbital elements, so `{key}` must be given by "
                        "orbital elements (a, e, ...), not a position and velocity.")
    update = {}
    for quantity, value in values.items():
        update[quantity] = (value if quantity == "e" else
                            f"{value!r} au" if quantity == "a" else f"{value!r} deg")
    return body.model_copy(update=update)


def _perturbed_elements(key, body, rule, offset):
    """A copy of a body spec with one element shifted by offset (internal units)."""
    if body.a is None:
        raise SpecError(f"`ensemble.perturb.quantity` {rule.quantity!r} needs `{key}` to be "
                        "given by orbital elements; perturb x, y or z instead.")
    if rule.quantity == "a":
        a = parse_quantity(f"{key}.a", body.a, "length")
        return body.model_copy(update={"a": f"{a + offset!r} au"})
    if rule.quantity == "e":
        return body.model_copy(update={"e": body.e + offset})
    ang = parse_quantity(f"{key}.{rule.quantity}", getattr(body, rule.quantity), "angle")
    return body.model_copy(update={rule.quantity: f"{ang + offset!r} deg"})


def _range(key, values, kind, low, high, fix):
    """Two values of a drawn range, in internal units, checked against [low, high)."""
    vals = []
    for k, q in enumerate(values):
        if kind is None:
            if isinstance(q, str):
                raise SpecError(f"`{key}[{k}]` is a plain number, got {q!r}; write e.g. 0.1.")
            vals.append(float(q))
        else:
            vals.append(parse_quantity(f"{key}[{k}]", q, kind))
    lo, hi = vals
    if not (low <= lo <= hi) or not (hi < high or (high == 180.0 and hi == high)):
        raise SpecError(f"`{key}` must be a range [lowest, highest] {fix}, got {values!r}; "
                        "correct it.")
    return lo, hi


def build_particles(spec, system):
    """A spec's test particles (heliocentric states about the star, mu = G m0), or None.

    Drawn particles take a, e and i uniform in their ranges and the node, the
    argument of pericentre and the mean anomaly uniform in [0, 360) deg, in
    that order per particle, from numpy's PCG64(seed): the same spec always
    gives the same particles, bit for bit.
    """
    ps = spec.particles
    if ps is None:
        return None
    import numpy as np

    from orbitledger.integrators import elements as el

    mu = float(system.gm[0])
    names, xs, vs = [], [], []
    for k, p in enumerate(ps.listed or []):
        x, v = _body_state(f"particles.listed[{k}]", p, mu)
        names.append(p.name if p.name is not None else f"p{k:05d}")
        xs.append(list(x))
        vs.append(list(v))
    if ps.drawn is not None:
        d = ps.drawn
        a = _range("particles.drawn.a", d.a, "length", 1e-300, math.inf,
                   "of positive lengths, lowest first")
        e = _range("particles.drawn.e", d.e, None, 0.0, 1.0, "with 0 <= e < 1, lowest first")
        inc = _range("particles.drawn.i", d.i, "angle", 0.0, 180.0,
                     "within 0-180 deg, lowest first")
        u = np.random.Generator(np.random.PCG64(d.seed)).random((d.count, 6))
        rad = math.pi / 180.0
        for k in range(d.count):
            row = u[k]
            x, v = el.to_state(mu, a[0] + (a[1] - a[0]) * row[0], e[0] + (e[1] - e[0]) * row[1],
                               (inc[0] + (inc[1] - inc[0]) * row[2]) * rad,
                               360.0 * row[3] * rad, 360.0 * row[4] * rad, 360.0 * row[5] * rad)
            names.append(f"d{k:05d}")
            xs.append(list(x))
            vs.append(list(v))
    if len(names) > defaults.MAX_PARTICLES:
        raise SpecError(f"`particles` gives {len(names)} particles; at most "
                        f"{defaults.MAX_PARTICLES} are allowed in one job.")
    seen = set()
    for k, nm in enumerate(names):
        if nm in seen:
            raise SpecError(f"`particles.listed[{k}].name` repeats the name {nm!r}; particle "
                            "names must be unique.")
        seen.add(nm)
    return Particles(tuple(names), np.array(xs, dtype=float).reshape(-1, 3),
                     np.array(vs, dtype=float).reshape(-1, 3))


def resolve(spec):
    """Resolve a validated spec to a :class:`Plan` (raises SpecError)."""
    if spec.member is not None and spec.ensemble is None:
        raise SpecError(f"`member` is {spec.member} but the spec has no [ensemble] section; "
                        "remove `member` or add the ensemble rule.")
    system = build_system(spec.system, spec.ensemble,
                          spec.member if spec.ensemble is not None else None)
    step = parse_quantity("method.step", spec.method.step, "time")
    if not step > 0:
        raise SpecError(f"`method.step` must be positive, got {spec.method.step!r}; "
                        "give the step size and use `span.direction` for backward runs.")
    dt = step if spec.span.direction == "forward" else -step
    if spec.method.name != "wisdom_holman" and spec.method.corrector:
        raise SpecError(f"`method.corrector` needs method 'wisdom_holman', got method "
                        f"{spec.method.name!r}; remove it.")
    if spec.method.name == "leapfrog" and spec.method.relativity:
        raise SpecError("`method.relativity` needs method 'wisdom_holman' or 'gauss_radau', got "
                        "method 'leapfrog'; remove it.")
    switching = spec.method.encounters == "switch"
    if spec.method.name != "gauss_radau" and spec.method.tolerance is not None and not switching:
        raise SpecError(f"`method.tolerance` is for method 'gauss_radau' (or `encounters = "
                        f"\"switch\"`), got method {spec.method.name!r}; remove it (a map's "
                        "accuracy is set by its step).")
    if switching and spec.method.name != "wisdom_holman":
        raise SpecError(f"`method.encounters` = \"switch\" needs method 'wisdom_holman', got "
                        f"{spec.method.name!r}; remove it.")
    if spec.method.switch_back is not None and not switching:
        raise SpecError("`method.switch_back` needs `method.encounters = \"switch\"`; remove "
                        "it or add that.")
    if switching and spec.method.indicator != "none":
        raise SpecError("`method.encounters` = \"switch\" cannot carry a chaos indicator "
                        "(its tangent would cross a change of method); remove one of them.")
    if switching and spec.span.direction == "backward":
        raise SpecError("`method.encounters` = \"switch\" runs forward only; remove it or set "
                        "`span.direction = \"forward\"`.")
    if spec.method.name != "wisdom_holman" and spec.method.indicator != "none":
        raise SpecError(f"`method.indicator` = {spec.method.indicator!r} needs method "
                        f"'wisdom_holman', got method {spec.method.name!r}; remove it.")
    length = parse_quantity("span.length", spec.span.length, "time")
    if not length > 0:
        raise SpecError(f"`span.length` must be positive, got {spec.span.length!r}; "
                        "use `span.direction` for backward runs.")
    total = round(length / step)
    if total < 1:
        raise SpecError(f"`span.length` is shorter than one step ({spec.span.length!r} < "
                        f"{spec.method.step!r}); lengthen it.")
    if total > 2**62:
        raise SpecError(f"`span.length` needs {total:.3g} steps, more than 2^62; lengthen the step.")
    output = _steps("span.output", spec.span.output, dt, defaults.DEFAULT_OUTPUT_STEPS)
    chunk = _steps("span.chunk", spec.span.chunk, dt, output * defaults.DEFAULT_CHUNK_OUTPUTS)
    if chunk % output:
        raise SpecError(f"`span.chunk` must be a whole number of outputs, got {spec.span.chunk!r}"
                        f" = {chunk / output:.6g} outputs of `span.output`; make it a multiple.")
    st = spec.stops
    length = lambda key, v: parse_quantity(f"stops.{key}", v, "length")  # noqa: E731
    stops = StopConditions(
        hill=st.hill,
        eject_distance=(length("escape_distance", st.escape_distance)
                        if st.escape_distance is not None else 0.0),
        unbound=st.unbound_escape_distance is not None,
        unbound_distance=(length("unbound_escape_distance", st.unbound_escape_distance)
                          if st.unbound_escape_distance is not None else 0.0),
        star_radius=(length("star_contact_distance", st.star_contact_distance)
                     if st.star_contact_distance is not None else float(system.radii[0])),
        max_ecc=st.max_ecc,
    )
    if stops.eject_distance < 0 or stops.star_radius < 0 or stops.unbound_distance < 0:
        raise SpecError("`stops` distances must be >= 0; give 0 to turn a condition off.")
    if switching and not st.hill > 0:
        raise SpecError("`method.encounters` = \"switch\" needs `stops.hill` > 0: the close "
                        "encounter at which Gauss-Radau takes over; add e.g. hill = 3.")
    back = 5.0 if spec.method.switch_back is None else spec.method.switch_back
    if switching and not back >= st.hill:
        raise SpecError(f"`method.switch_back` = {back} must be at least `stops.hill` = "
                        f"{st.hill} (the map takes over again only farther out than where it "
                        "handed over); raise it.")
    particles = build_particles(spec, system)
    if particles is not None and (spec.method.name != "wisdom_holman" or switching
                                  or spec.method.indicator != "none"):
        raise SpecError("`particles` need method 'wisdom_holman' without a chaos indicator, got "
                        f"method {spec.method.name!r} with indicator "
                        f"{spec.method.indicator!r}; remove the particles or the indicator.")
    plan = Plan(system, spec.method.name, dt, spec.method.corrector, spec.method.relativity,
                int(total), int(chunk), int(output), stops, spec.budget.energy,
                spec.budget.angular_momentum, spec.budget.on_exceed, spec.method.indicator,
                particles, spec.method.tolerance, spec.method.encounters, back)
    from orbitledger.runner.inputs.sanity import check

    check(plan, spec)
    return plan


from orbitledger.runner.inputs.text import body_names_from_json  # noqa: E402,F401
