"""Physical sense of a resolved spec: what `submit` refuses before anything is written.

Each check raises SpecError with one line naming the key, the value and the
fix. They catch specs that would run but mean nothing: coincident bodies (the
forces are infinite; the kernel would only produce non-finite numbers), a
body inside the star, an ejection distance that a body's own orbit already
crosses (an ensemble would count an instant "ejection" as instability), a
step longer than the shortest orbit, a chunk whose samples would not fit a
worker's memory bound, and an output plan whose store would outgrow a limit
the user can raise.
"""

import math

import numpy as np

from orbitledger.runner.errors import SpecError

# Bytes of one sample row besides the elements: time, step, energy and
# angular-momentum errors (8 bytes each).
_ROW_BYTES = 4 * 8


def projected_samples(plan):
    """Samples a job will store at most: the start, one per output, one at an off-grid end."""
    return plan.total_steps // plan.output_steps + 2


def _particle_count(plan):
    return 0 if plan.particles is None else len(plan.particles.names)


def bytes_per_sample(plan):
    """Bytes one stored sample takes: the series, the bodies' elements and, with test
    particles, their elements and the count still integrated."""
    n_bodies = len(plan.system.gm) - 1
    k = _particle_count(plan)
    return _ROW_BYTES + n_bodies * 6 * 8 + (k * 6 * 8 + 8 if k else 0)


def projected_store_bytes(plan):
    """Bytes the job's samples will take: bytes per sample x samples (elements included)."""
    return bytes_per_sample(plan) * projected_samples(plan)


def check(plan, spec):
    """Raise SpecError if the plan is physically meaningless or too large to store."""
    sysm = plan.system
    names = sysm.names
    key = lambda k: "system.star" if k == 0 else f"system.bodies[{k - 1}]"  # noqa: E731
    x = np.asarray(sysm.x)
    # Coincident bodies: any pair at exactly the same place.
    order = np.lexsort(x.T[::-1])
    same = np.all(x[order[1:]] == x[order[:-1]], axis=1)
    if same.any():
        i, j = sorted((int(order[np.argmax(same)]), int(order[np.argmax(same) + 1])))
        raise SpecError(f"`{key(j)}` ({names[j]}) starts at the same place as `{key(i)}` "
                        f"({names[i]}); the force between them is infinite; move one of them.")
    if not (np.asarray(sysm.gm[1:]) > 0).any():
        raise SpecError("`system.bodies` are all massless, so the system's energy and angular "
                        "momentum about the star are zero and their errors mean nothing; give "
                        "a body a mass, or list massless bodies under [particles].")
    xh = x[1:] - x[0]
    r = np.linalg.norm(xh, axis=1)
    st = plan.stops
    if st.star_radius > 0:
        inside = np.nonzero(r <= st.star_radius)[0]
        if len(inside):
            k = int(inside[0]) + 1
            raise SpecError(f"`{key(k)}` ({names[k]}) starts {r[k - 1]:.6g} au from the star, "
                            f"inside its radius (`stops.star_contact_distance` = {st.star_radius:.6g} au); "
                            "move it out or give a smaller radius.")
    if st.eject_distance > 0:
        far = _farthest(plan)
        k, dist = max(far, key=lambda kd: kd[1])
        if dist >= st.eject_distance:
            raise SpecError(f"`stops.escape_distance` = {st.eject_distance:.6g} au is inside the "
                            f"orbit of {names[k]} (it reaches {dist:.6g} au from the star): it "
                            "would count as ejected at once; give a distance beyond every "
                            "starting orbit.")
    if plan.particles is not None:
        _check_particles(plan)
    _check_step(plan, spec)
    _check_chunk_memory(plan, spec)
    size = projected_store_bytes(plan)
    limit = spec.span.max_store_gb * 1e9
    if size > limit:
        raise SpecError(f"the samples of this plan would take {size / 1e9:.3g} GB, above "
                        f"`span.max_store_gb` = {spec.span.max_store_gb:g}; sample less often "
                        "(`span.output`) or raise `span.max_store_gb`.")


def chunk_memory_bytes(plan):
    """Bytes of memory a worker holds for one chunk's samples before writing them.

    A row in memory: the stored series, the compiled loop's five diagnostics
    and the elements (8 bytes each).
    """
    return (_chunk_rows(plan) + 1) * (bytes_per_sample(plan) + 8 + 5 * 8)


def _chunk_rows(plan):
    return min(plan.chunk_steps, plan.total_steps) // plan.output_steps


def _check_chunk_memory(plan, spec):
    """A chunk's samples wait in a worker's memory until its checkpoint: bound them."""
    from orbitledger.runner import defaults
    from orbitledger.runner.inputs.text import format_time

    size = chunk_memory_bytes(plan)
    limit = defaults.MAX_CHUNK_SAMPLE_BYTES
    if size > limit:
        per_row = size / (_chunk_rows(plan) + 1)
        rows = max(1, int(limit // per_row) - 1)
        most = rows * plan.output_steps
        raise SpecError(
            f"`span.chunk` = {spec.span.chunk!r} holds {_chunk_rows(plan)} "
            f"samples ({size / 1e6:.3g} MB in a worker's memory until its checkpoint), above "
            f"the {limit / 1e6:.0f} MB a chunk may hold; make `span.chunk` at most "
            f"{format_time(most * abs(plan.dt))} ({most} steps) or sample less often "
            "(`span.output`).")


def _check_particles(plan):
    """Test particles that would be removed at their first step: inside the star, or on
    an orbit that already reaches the escape distance."""
    from orbitledger.integrators.particles import particle_elements

    ps = plan.particles
    st = plan.stops
    r = np.linalg.norm(ps.x, axis=1)
    if st.star_radius > 0 and (r <= st.star_radius).any():
        k = int(np.argmax(r <= st.star_radius))
        raise SpecError(f"test particle {ps.names[k]} starts {r[k]:.6g} au from the star, inside "
                        f"its radius (`stops.star_contact_distance` = {st.star_radius:.6g} au); "
                        "move it out or give a smaller radius.")
    if st.eject_distance > 0:
        el = particle_elements(ps.x, ps.v, float(plan.system.gm[0]), np.empty((len(r), 6)))
        a, ecc = el[:, 0], el[:, 1]
        bound = (a > 0) & np.isfinite(a) & (ecc < 1)
        far = np.where(bound, a * (1 + ecc), r)
        if (far >= st.eject_distance).any():
            k = int(np.argmax(far >= st.eject_distance))
            raise SpecError(f"`stops.escape_distance` = {st.eject_distance:.6g} au is inside the "
                            f"orbit of test particle {ps.names[k]} (it reaches {far[k]:.6g} au "
                            "from the star): it would count as ejected at once; give a distance "
                            "beyond every starting orbit.")


def _farthest(plan):
    """(body index, largest distance from the star its starting orbit reaches)."""
    from orbitledger.integrators.elements import from_state

    sysm = plan.system
    out = []
    for k in range(1, len(sysm.gm)):
        xh = sysm.x[k] - sysm.x[0]
        vh = sysm.v[k] - sysm.v[0]
        a, ecc = from_state(sysm.gm[0] + sysm.gm[k], xh, vh)[:2]
        r = float(np.linalg.norm(xh))
        out.append((k, a * (1 + ecc) if 0 < a < math.inf and ecc < 1 else r))
    return out


def _check_step(plan, spec):
    from orbitledger.runner.inputs.stepcheck import resolution

    res = resolution(plan)
    if not res or spec.method.allow_long_step or plan.method == "gauss_radau":
        return  # Gauss-Radau's step is a frame of adaptive substeps
    worst = min(res, key=lambda r: r.period)
    if abs(plan.dt) > worst.period:
        raise SpecError(f"`method.step` = {abs(plan.dt):.6g} d is longer than the orbit of "
                        f"{worst.body} ({worst.period:.6g} d); shorten the step (tens of steps "
                        "per orbit is common practice) or set `method.allow_long_step = true`.")
