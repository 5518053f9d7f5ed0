"""Initial conditions from a solar-system ephemeris, at a user's request.

States come from astropy's solar-system ephemeris: the built-in one (ERFA's
epv00 for the Earth and the Sun's barycentric motion, plan94 for the planets;
Simon et al. 1994; nothing is downloaded), or a local JPL ephemeris file the
user already has (read by astropy through jplephem; never downloaded here).
Masses are the IAU 2009 system's Sun/planet mass ratios (Luzum et al. 2011,
Table 1), each overridable. Planets the user leaves out may have their masses
added to the Sun's (a common practice, so the star pulls the listed planets
with the whole inner mass). The reference plane is the ecliptic of J2000
(astropy's mean ecliptic of J2000, barycentric) or the invariable plane of
the bodies included (normal to their total angular momentum).
"""

import numpy as np

from orbitledger.runner.errors import SpecError

# Sun/planet mass ratios, IAU 2009 system (Luzum et al. 2011, CMDA 110, 293,
# Table 1). "earth" is the Earth-Moon barycentre with the Earth+Moon mass.
MASS_RATIOS = {"mercury": 6023600.0, "venus": 408523.719, "earth": 328900.5596,
               "mars": 3098703.59, "jupiter": 1047.348644, "saturn": 3497.9018,
               "uranus": 22902.98, "neptune": 19412.26}
PLANETS = tuple(MASS_RATIOS)
MASS_SOURCE = "IAU 2009 system, Sun/planet mass ratio (Luzum et al. 2011, Table 1)"
_ASTROPY_NAME = {"earth": "earth-moon-barycenter"}


def ecliptic_rotation():
    """The rotation from ICRS axes to those of the mean ecliptic and equinox of J2000,
    as astropy transforms them (frame bias, precession to J2000, obliquity)."""
    import astropy.units as u
    from astropy.coordinates import ICRS, BarycentricMeanEcliptic, CartesianRepresentation

    rows = []
    for axis in np.eye(3):
        c = ICRS(CartesianRepresentation(*(axis * u.au)))
        e = c.transform_to(BarycentricMeanEcliptic(equinox="J2000"))
        rows.append(e.cartesian.xyz.to_value(u.au))
    return np.array(rows).T  # columns: images of the ICRS axes


def barycentric_states(bodies, epoch, scale="tdb", source="builtin"):
    """ICRS barycentric positions (au) and velocities (au/d) of the Sun and `bodies`."""
    import astropy.units as u
    from astropy.coordinates import get_body_barycentric_posvel
    from astropy.time import Time

    try:
        t = Time(epoch, scale=scale)
    except (ValueError, TypeError) as err:
        raise SpecError(f"`system.ephemeris.epoch` could not be read as a time ({err}); write "
                        "it as e.g. \"2000-01-01T12:00:00\" with `scale` = \"tdb\".") from None
    source = _local_source(source)
    x, v = [], []
    for name in ("sun",) + tuple(bodies):
        try:
            p, vel = get_body_barycentric_posvel(_ASTROPY_NAME.get(name, name), t,
                                                 ephemeris=source)
        except Exception as err:  # noqa: BLE001 - astropy raises many kinds here
            raise SpecError(f"`system.ephemeris.source` = {source!r} could not give {name!r} at "
                            f"{epoch} ({type(err).__name__}: {err}); use \"builtin\" or a local "
                            "JPL ephemeris file that covers the epoch.") from None
        x.append(p.xyz.to_value(u.au))
        v.append(vel.xyz.to_value(u.au / u.d))
    return t, np.array(x), np.array(v)


def _local_source(source):
    """Either "builtin" or the path of a local ephemeris file that jplephem can read.

    Anything else is refused before astropy sees it: astropy would take a
    name such as "de440", "jpl" or a URL as a request to download a kernel,
    and a job's initial conditions are never downloaded here.
    """
    if source == "builtin":
        return source
    import os

    if not os.path.isfile(source):
        raise SpecError(f"`system.ephemeris.source` = {source!r} is not a file on this machine; "
                        "give the path of a local JPL ephemeris file (.bsp) you have, or "
                        "\"builtin\" (nothing is downloaded).")
    try:
        import jplephem  # noqa: F401 - astropy reads the file through it
    except ImportError:
        raise SpecError(f"`system.ephemeris.source` = {source!r} needs the jplephem package to "
                        "read a JPL file; pip install jplephem, or use \"builtin\".") from None
    return os.path.abspath(source)


def file_sha256(path):
    """SHA-256 of a file's bytes (the identity of a local ephemeris in the provenance)."""
    import hashlib

    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def invariable_rotation(angmom):
    """The rotation taking the total angular momentum to +z, x along the ascending node
    of the new plane on the old one."""
    lz = np.asarray(angmom, dtype=float)
    lz = lz / np.linalg.norm(lz)
    node = np.cross([0.0, 0.0, 1.0], lz)
    if np.linalg.norm(node) < 1e-15:
        return np.eye(3) if lz[2] > 0 else np.diag([1.0, -1.0, -1.0])
    ex = node / np.linalg.norm(node)
    return np.stack([ex, np.cross(lz, ex), lz])


def ephemeris_system(eph):
    """(names, masses in Msun, heliocentric x au, v au/d, notes) from a validated
    ``[system.ephemeris]`` section; notes say where every number came from."""
    from orbitledger.runner.inputs.units import parse_quantity

    bodies = [b.lower() for b in eph.bodies]
    unknown = [b for b in bodies if b not in MASS_RATIOS]
    if unknown or not bodies:
        raise SpecError(f"`system.ephemeris.bodies` must list planets among {list(PLANETS)}, "
                        f"got {eph.bodies!r}.")
    if len(set(bodies)) != len(bodies):
        raise SpecError(f"`system.ephemeris.bodies` repeats a planet: {eph.bodies!r}.")
    bodies = [b for b in PLANETS if b in bodies]  # from the Sun outwards
    overrides = {k.lower(): val for k, val in (eph.masses or {}).items()}
    for k in overrides:
        if k not in bodies and k != "sun":
            raise SpecError(f"`system.ephemeris.masses` names {k!r}, which is not among the "
                            f"bodies {bodies} (or \"sun\").")
    notes = []
    masses = []
    for b in bodies:
        if b in overrides:
            masses.append(parse_quantity(f"system.ephemeris.masses.{b}", overrides[b], "mass"))
            notes.append((b, f"mass {masses[-1]:.10g} Msun", "given in the spec"))
        else:
            masses.append(1.0 / MASS_RATIOS[b])
            notes.append((b, f"mass 1/{MASS_RATIOS[b]:.10g} Msun", MASS_SOURCE))
    left_out = [b for b in PLANETS if b not in bodies]
    if "sun" in overrides:
        sun = parse_quantity("system.ephemeris.masses.sun", overrides["sun"], "mass")
        notes.insert(0, ("sun", f"mass {sun:.10g} Msun", "given in the spec"))
    else:
        sun = 1.0
        folded = [b for b in left_out if eph.fold_unlisted]
        sun += sum(1.0 / MASS_RATIOS[b] for b in folded)
        notes.insert(0, ("sun", f"mass {sun:.12g} Msun",
                         "1 Msun" + (f" plus the planets left out ({', '.join(folded)}; "
                                     f"{MASS_SOURCE})" if folded else "")))
    t, bx, bv = barycentric_states(bodies, eph.epoch, eph.scale, eph.source)
    rot = ecliptic_rotation()
    x = (bx - bx[0]) @ rot.T
    v = (bv - bv[0]) @ rot.T
    if eph.source == "builtin":
        kind = " (ERFA epv00 and plan94, Simon et al. 1994)"
    else:
        import jplephem

        kind = (f" (local JPL file read by jplephem {jplephem.__version__}, SHA-256 "
                f"{file_sha256(eph.source)})")
    where = (f"astropy {_astropy_version()} {eph.source!r} ephemeris" + kind
             + f", at {t.isot} {t.scale.upper()}, heliocentric, ecliptic of J2000")
    for k, b in enumerate(bodies):
        notes.append((b, "position and velocity", where))
    if eph.plane == "invariable":
        m = np.array([sun] + masses)
        xb = x - (m[:, None] * x).sum(0) / m.sum()
        vb = v - (m[:, None] * v).sum(0) / m.sum()
        rot2 = invariable_rotation((m[:, None] * np.cross(xb, vb)).sum(0))
        x, v = x @ rot2.T, v @ rot2.T
        notes.append(("frame", "invariable plane", "normal to the total angular momentum of "
                      "the Sun and the bodies listed, x along its ascending node on the "
                      "ecliptic of J2000"))
    names = ["Sun"] + [b.capitalize() if b != "earth" else "Earth-Moon" for b in bodies]
    return names, [sun] + masses, x, v, notes


def _astropy_version():
    import astropy

    return astropy.__version__
