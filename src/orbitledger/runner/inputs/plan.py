"""A validated job spec resolved to internal units: the initial system (with an
ensemble member's perturbation or grid point), the step, chunking and cadence
in steps, the stop conditions and the test particles, as a :class:`Plan` the
worker runs. Errors name the key, the bad value and the fix in one sentence.
"""

from dataclasses import dataclass
import math

from orbitledger.integrators import METHODS, StopConditions, System
from orbitledger.integrators.constants import G

from orbitledger.runner import defaults
from orbitledger.runner.errors import SpecError
from orbitledger.runner.inputs.units import parse_quantity

from orbitledger.runner.inputs.schema import _STEPS_RE


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
