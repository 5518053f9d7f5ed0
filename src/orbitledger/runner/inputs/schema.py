"""The job spec's schema: pydantic models of every table and key of a job file
(system, method, span, budget, stops, ensemble, particles), with the checks
that need no other key. Parsing, canonical JSON and hashing are in
:mod:`runner.inputs.spec`; resolution to internal units in :mod:`runner.inputs.plan`.
"""

import re
from typing import Literal

from pydantic import BaseModel, ConfigDict, field_validator, model_validator

from orbitledger.integrators import CORRECTOR_ORDERS

from orbitledger.runner import defaults


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
