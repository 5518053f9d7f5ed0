"""Ensembles: many perturbed clones of one system, and the statistics of their outcomes.

A spec with an ``[ensemble]`` section describes its members: member k is the
same spec with ``member = k``, and resolving it shifts one quantity of one
body by the member's offset. The rule is deterministic (a step, or draws
from numpy's PCG64 generator with the given seed), so the same spec always
creates the same members, bit for bit.

Offsets, for member k = 0 .. members-1 and size s (internal units, or
relative to the unperturbed value when ``relative = true``):

- ``step``:    k * s (member 0 is the unperturbed system)
- ``normal``:  s * z_k, z the k-th standard normal draw of PCG64(seed)
- ``uniform``: s * u_k, u_k uniform on [-1, 1) from PCG64(seed)
"""

import functools

import numpy as np

from orbitledger.runner.errors import SpecError
from orbitledger.runner.inputs.units import parse_quantity

# Unit kind of the perturbation size, by quantity.
_KIND = {"a": "length", "i": "angle", "mean_anomaly": "angle", "x": "length", "y": "length",
         "z": "length", "e": None}


def _size(rule, base):
    """The perturbation size in internal units (au or degrees), or relative * base."""
    key = "ensemble.perturb.size"
    if rule.relative:
        if isinstance(rule.size, str):
            raise SpecError(f"`{key}` must be a plain number when `relative = true`, got "
                            f"{rule.size!r}; write e.g. size = 1e-12.")
        if base is None:
            raise SpecError(f"`ensemble.perturb.relative` cannot be used with quantity "
                            f"{rule.quantity!r}; give an absolute size with a unit.")
        return float(rule.size) * base
    kind = _KIND[rule.quantity]
    if kind is None:
        if isinstance(rule.size, str):
            raise SpecError(f"`{key}` for the eccentricity is a plain number, got {rule.size!r}.")
        return float(rule.size)
    if not isinstance(rule.size, str):
        raise SpecError(f"`{key}` needs a unit for quantity {rule.quantity!r}, got {rule.size!r};"
                        f" write e.g. \"1 cm\" or \"1e-9 deg\", or set relative = true.")
    return parse_quantity(key, rule.size, kind)  # au or degrees


@functools.lru_cache(maxsize=4)
def draws(rule_kind, seed, members):
    """The unit offsets of all members (deterministic; read-only, drawn once per
    submit rather than once per member)."""
    if rule_kind == "step":
        out = np.arange(members, dtype=np.float64)
    else:
        rng = np.random.Generator(np.random.PCG64(seed))
        out = rng.standard_normal(members) if rule_kind == "normal" else \
            rng.uniform(-1.0, 1.0, members)
    out.setflags(write=False)
    return out


def member_offset(sysspec, ens, member):
    """(index of the perturbed body among sysspec.bodies, offset in internal units)."""
    rule = ens.perturb
    names = [b.name for b in sysspec.bodies]
    if rule.body not in names:
        raise SpecError(f"`ensemble.perturb.body` names {rule.body!r}, which is not one of the "
                        f"bodies {names}; use one of those names.")
    k = names.index(rule.body)
    if member is not None and not 0 <= member < ens.members:
        raise SpecError(f"`member` must be in 0..{ens.members - 1}, got {member}; "
                        "members are numbered from 0.")
    body = sysspec.bodies[k]
    base = None
    if rule.quantity == "a" and body.a is not None:
        base = parse_quantity(f"system.bodies[{k}].a", body.a, "length")
    elif rule.quantity == "e" and body.e is not None:
        base = body.e
    elif rule.quantity in ("i", "mean_anomaly"):
        base = parse_quantity(f"system.bodies[{k}].{rule.quantity}", getattr(body, rule.quantity),
                              "angle")
    size = _size(rule, base)  # checked even for the ensemble's own spec
    if member is None:
        return None, 0.0
    return k, float(size * draws(rule.rule, ens.seed, ens.members)[member])


_GRID_KIND = {"a": "length", "e": None, "i": "angle", "mean_anomaly": "angle"}
GRID_UNITS = {"a": "au", "e": "1", "i": "deg", "mean_anomaly": "deg"}
GRID_NAMES = {"a": "semi-major axis", "e": "eccentricity", "i": "inclination",
              "mean_anomaly": "mean anomaly"}


def grid_axes(ens):
    """[(body, quantity, values)] of a grid ensemble, values in au, 1 or degrees."""
    out = []
    for n, axis in enumerate(ens.grid):
        vals = []
        for end in ("first", "last"):
            key = f"ensemble.grid[{n}].{end}"
            v = getattr(axis, end)
            kind = _GRID_KIND[axis.quantity]
            if kind is None:
                if isinstance(v, str):
                    raise SpecError(f"`{key}` for the eccentricity is a plain number, got {v!r}.")
                vals.append(float(v))
            else:
                if not isinstance(v, str):
                    raise SpecError(f"`{key}` needs a unit for quantity {axis.quantity!r}, got "
                                    f"{v!r}; write e.g. \"{v} {GRID_UNITS[axis.quantity]}\".")
                vals.append(parse_quantity(key, v, kind))
        lo, hi = vals
        if axis.count == 1:
            values = np.array([lo])
        else:
            values = lo + (hi - lo) * (np.arange(axis.count) / (axis.count - 1))
        out.append((axis.body, axis.quantity, values))
    return out


def grid_index(ens, member):
    """The cell (i0[, i1]) of member k: row-major, the first axis slowest."""
    counts = [axis.count for axis in ens.grid]
    return tuple(int(i) for i in np.unravel_index(member, counts))


def grid_cell(sysspec, ens, member):
    """{body index: {quantity: value}} of member k of a grid ensemble (checked for any k)."""
    names = [b.name for b in sysspec.bodies]
    axes = grid_axes(ens)
    seen = set()
    for n, (body, quantity, values) in enumerate(axes):
        if body not in names:
            raise SpecError(f"`ensemble.grid[{n}].body` names {body!r}, which is not one of the "
                            f"bodies {names}; use one of those names.")
        if (body, quantity) in seen:
            raise SpecError(f"`ensemble.grid[{n}]` repeats {quantity!r} of {body!r}; "
                            "give each axis its own quantity.")
        seen.add((body, quantity))
        if quantity == "e" and not (values.min() >= 0.0 and values.max() < 1.0):
            raise SpecError(f"`ensemble.grid[{n}]` eccentricities must lie in [0, 1), got "
                            f"{values.min():g} to {values.max():g}.")
        if quantity == "a" and not values.min() > 0.0:
            raise SpecError(f"`ensemble.grid[{n}]` semi-major axes must be positive.")
    if member is None:
        return {}
    if not 0 <= member < ens.members:
        raise SpecError(f"`member` must be in 0..{ens.members - 1}, got {member}; "
                        "members are numbered from 0.")
    out = {}
    for (body, quantity, values), i in zip(axes, grid_index(ens, member)):
        out.setdefault(names.index(body), {})[quantity] = float(values[i])
    return out


def member_spec(spec, k):
    """The spec of member k of an ensemble spec."""
    return spec.model_copy(update={"member": k, "name": f"{spec.name}-m{k:04d}"})
