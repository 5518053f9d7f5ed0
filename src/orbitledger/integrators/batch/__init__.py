"""The Wisdom-Holman map for a batch of ensemble members at once.

Members of one ensemble share the masses, the step, the corrector, the GR
term and the stop conditions; only their states differ. Here B members
("lanes") advance together in one compiled call, with the lane index
innermost in memory (arrays shaped (body, coordinate, lane)), so that the
compiler can apply one vector instruction to several members.

Each lane's arithmetic is the scalar kernel's own, operation for operation,
so a member's trajectory, samples and stop step are the bytes
:func:`integrators.wisdom_holman.wh_steps` gives it alone. The pieces of the
drift (:mod:`integrators.kepler`: the drift's prelude, the starting guess,
the Stumpff series and doubling, the Kepler terms, one Halley iteration, the
Lagrange finish) are defined once and composed here with per-lane masks
instead of branches: the Kepler solver iterates while any lane is
unconverged, and a converged lane's values are frozen at the bits its scalar
solver returned. A lane that needs the solver's bracketed fallback (rare:
near-parabolic or extreme drifts) is solved by the scalar solver itself.
Stop conditions are screened for all lanes with the scalar conditions'
arithmetic, and a lane that meets one is checked again by the scalar
:func:`integrators.stops.check_stops`, so the stop and its bodies are the
scalar kernel's. Samples are taken per lane by the scalar diagnosis on a
copy. The call returns at the end of the first step in which any lane
stopped; the driver (:func:`advance_together`) hands that lane back and goes
on with the others.

The package: ``lanes`` (the scratch layout), ``drift`` (the lanes' Kepler
drift and its tangent), ``kick`` (the lanes' kick, its tangent, MEGNO sums,
the stop screen), ``steps`` (the compiled step loop, :func:`wh_steps_lanes`)
and here the driver (:func:`advance_together`, :func:`compatible`).
"""

import numpy as np

from ..variational import N_SUMS
from ..wisdom_holman import WisdomHolman
from .lanes import _PITCH, N_DRIFT_ROWS, N_STEP_ROWS
from .steps import wh_steps_lanes

__all__ = ["advance_together", "compatible", "wh_steps_lanes", "DEFAULT_LANES"]

# Members advanced together by default: measured (docs/benchmarks.md,
# "Batched members"), not guessed.
DEFAULT_LANES = 32
# Most bytes of samples held in the batch's own staging arrays at once.
_STAGING_BYTES = 4_000_000


def compatible(a, b):
    """True if two Wisdom-Holman integrators can share a batch: same masses, step,
    corrector, GR term, stop conditions and indicator (none or MEGNO), no test
    particles."""
    return (type(a) is WisdomHolman and type(b) is WisdomHolman
            and a.particles is None and b.particles is None
            and (a.tangent is None) == (b.tangent is None)
            and a.dt == b.dt and a.corrector == b.corrector and a.gr == b.gr
            and a.stops == b.stops and a.gm.shape == b.gm.shape
            and bool(np.all(a.gm == b.gm)))


class _Lanes:
    """Packed lane arrays of a batch of members and the kernel's scratch."""

    def __init__(self, members, lanes):
        first = members[0]
        n = len(first.gm)
        B = max(lanes, len(members))
        self.n, self.B = n, B
        self.xj = np.zeros((n, 3, B))
        self.vj = np.zeros((n, 3, B))
        self.pending = np.zeros(B, dtype=np.int64)
        self.xi = np.zeros((n, 3, B))
        self.acc = np.zeros((n, 3, B))
        self.rh = np.zeros((n, B))
        self.w = np.zeros(N_DRIFT_ROWS * _PITCH)
        self.c = np.zeros(N_STEP_ROWS * _PITCH)
        self.lane_x = np.zeros((n, 3))
        self.lane_v = np.zeros((n, 3))
        self.lane_xi = np.zeros((n, 3))
        self.lane_rh = np.zeros(n)
        self.diag = np.zeros((6, n, 3))
        self.codes = np.zeros(B, dtype=np.int64)
        self.bodies = np.zeros((B, 2), dtype=np.int64)
        self.tangent = first.tangent is not None
        # The tangent vectors, their sums and scratch; unused stand-ins without them.
        k = B if self.tangent else 1
        self.dx = np.zeros((n if self.tangent else 1, 3, k))
        self.dv = np.zeros_like(self.dx)
        self.dxi = np.zeros_like(self.dx)
        self.dacc = np.zeros_like(self.dx)
        self.sums = np.zeros((N_SUMS, k))
        self.load(members)

    def load(self, members):
        for m, integ in enumerate(members):
            self.xj[:, :, m] = integ.xj
            self.vj[:, :, m] = integ.vj
            self.pending[m] = int(integ.pending)
            if self.tangent:
                dx, dv, sums = integ.tangent
                self.dx[:, :, m] = dx
                self.dv[:, :, m] = dv
                self.sums[:, m] = sums
        self.nl = len(members)

    def store(self, m, integ):
        integ.xj = np.ascontiguousarray(self.xj[:, :, m])
        integ.vj = np.ascontiguousarray(self.vj[:, :, m])
        integ.pending = bool(self.pending[m])
        if self.tangent:
            integ.tangent = (np.ascontiguousarray(self.dx[:, :, m]),
                             np.ascontiguousarray(self.dv[:, :, m]),
                             np.ascontiguousarray(self.sums[:, m]))


def advance_together(members, n_steps, every=0, outputs=None, lanes=DEFAULT_LANES):
    """Advance Wisdom-Holman members of one ensemble by up to n_steps each, as a batch.

    Each member ends exactly as ``member.advance(n_steps)`` (or
    ``member.advance_sampled(n_steps, every, *outputs[k])``) would leave it
    alone, bit for bit: the same state, step counter, samples and stop.

    Parameters
    ----------
    members : list of WisdomHolman
        Mutually :func:`compatible` integrators (checked).
    n_steps : int
        Steps for each member; a member that meets a stop condition ends early.
    every : int
        Sample cadence in steps (with outputs).
    outputs : list of (out_g, out_el, row0) or (out_g, out_el, row0, out_ind), optional
        Per member, the arrays and first row of :meth:`Integrator.advance_sampled`
        (out_ind for members carrying MEGNO).
    lanes : int
        Members per compiled call (the batch size B); more members run in
        successive groups.

    Returns
    -------
    list of AdvanceResult, or of (AdvanceResult, next free row) with outputs.
    """
    members = list(members)
    n_steps = int(n_steps)
    if n_steps < 0:
        raise ValueError(f"n_steps must be >= 0, got {n_steps}.")
    for other in members[1:]:
        if not compatible(members[0], other):
            raise ValueError("members of one batch must be Wisdom-Holman integrators of one "
                             "system (same masses, step, corrector, GR, stops and indicator), "
                             "without particles; run the others alone.")
    if outputs is not None:
        outputs = list(outputs)
        if every < 1 or len(outputs) != len(members):
            raise ValueError("outputs need one (out_g, out_el, row0) per member and every >= 1.")
        for out in outputs:
            out_g, row0 = out[0], out[2]
            if len(out_g) < row0 + n_steps // every + 1:
                raise ValueError("sample arrays too small for the requested steps and cadence.")
    lanes = max(1, min(int(lanes), _PITCH))
    rows = [out[2] for out in outputs] if outputs is not None else [0] * len(members)
    codes = [(0, -1, -1)] * len(members)
    done = [0] * len(members)
    if n_steps:
        for g0 in range(0, len(members), lanes):
            group = list(range(g0, min(g0 + lanes, len(members))))
            _advance_group(members, group, n_steps, every if outputs is not None else 0,
                           outputs, rows, codes, done)
    results = [integ._result(done[k], *codes[k]) for k, integ in enumerate(members)]
    if outputs is None:
        return results
    return [(res, rows[k]) for k, res in enumerate(results)]


def _advance_group(members, group, n_steps, every, outputs, rows, codes, done):
    """Run the members listed in group as one batch until each has taken n_steps
    or stopped; fills rows, codes and done for them and leaves their state in them."""
    first = members[group[0]]
    n = len(first.gm)
    a_inv, c_inv = first._inv
    active = list(group)
    pack = _Lanes([members[k] for k in active], len(active))
    # Samples pass through stacked arrays of at most _STAGING_BYTES, in kernel
    # calls of at most `piece` steps (where a run is split changes no bit).
    piece = n_steps
    if every:
        per_row = 8 * (5 + 6 * (n - 1) + (2 if pack.tangent else 0))
        max_rows = max(1, _STAGING_BYTES // (pack.B * per_row))
        piece = min(n_steps, max_rows * every)
    cap = piece // every + 1 if every else 0
    out_g = np.zeros((pack.B, cap, 5))
    out_el = np.zeros((pack.B, cap, n - 1, 6))
    out_ind = np.zeros((pack.B if pack.tangent else 1, cap if pack.tangent else 1, 2))
    ev = np.full(pack.B, every, dtype=np.int64)
    lane_rows = np.zeros(pack.B, dtype=np.int64)
    while active:
        nl = len(active)
        # The members of a batch have taken the same steps.
        left = min(n_steps - done[active[0]], piece)
        step0 = np.zeros(pack.B, dtype=np.int64)
        for m, k in enumerate(active):
            step0[m] = members[k].step + members[k].sample_offset + done[k]
        lane_rows[:] = 0
        steps = wh_steps_lanes(pack.xj, pack.vj, first.gm, first.mu, first.mr, first.dt, left,
                               pack.pending, first.gr_coef, first._stop_pairs,
                               first._stop_params, nl, step0, ev, a_inv, c_inv, out_g, out_el,
                               lane_rows, pack.codes, pack.bodies, pack.xi, pack.acc, pack.rh,
                               pack.w, pack.c, pack.lane_x, pack.lane_v, pack.lane_xi,
                               pack.lane_rh, pack.diag, pack.tangent, pack.dx, pack.dv,
                               pack.sums, pack.dxi, pack.dacc, out_ind)
        stay = []
        for m, k in enumerate(active):
            done[k] += steps
            if outputs is not None and lane_rows[m]:
                og, oe = outputs[k][:2]
                r0, r = rows[k], int(lane_rows[m])
                og[r0:r0 + r] = out_g[m, :r]
                oe[r0:r0 + r] = out_el[m, :r]
                oi = outputs[k][3] if len(outputs[k]) > 3 else None
                if oi is not None:
                    oi[r0:r0 + r] = out_ind[m, :r]
                offset = members[k].sample_offset
                if offset:
                    og[r0:r0 + r, 0] -= offset  # as advance_sampled: the kernel counts from it
                rows[k] = r0 + r
            code = int(pack.codes[m])
            if code:
                codes[k] = (code, int(pack.bodies[m, 0]), int(pack.bodies[m, 1]))
            if code or done[k] == n_steps:
                pack.store(m, members[k])
            else:
                stay.append((m, k))
        if len(stay) == nl:
            continue
        # Members that stopped leave; the others are packed again (rare).
        for m, k in stay:
            pack.store(m, members[k])
        active = [k for _, k in stay]
        if active:
            pack.load([members[k] for k in active])
