"""The batched member kernel gives every member the scalar kernel's bytes.

These are reproducibility checks (the batch against the project's own scalar
kernel, run alone), not checks of correctness: the scalar kernel's own
correctness is checked against external references elsewhere
(test_wisdom_holman, test_kepler_exact, test_c_reference, test_gr).
"""

import os

import numpy as np
import pytest

from orbitledger.integrators import Integrator, StopKind, System, WisdomHolman
from orbitledger.integrators.batch import advance_together, compatible
from orbitledger.integrators.elements import to_state
from orbitledger.integrators.stops import StopConditions
from orbitledger.runner.inputs import spec as spec_mod
from orbitledger.runner.inputs.ensemble import member_spec

from helpers import ROOT

K2 = 0.01720209895 ** 2  # G in au^3 / (Msun d^2), Gaussian constant (IAU 1976)


def clone(integ):
    return Integrator.from_state_arrays({k: np.array(v) for k, v in integ.state_arrays().items()})


def state_bytes(integ):
    arrays = integ.state_arrays()
    return b"".join(np.ascontiguousarray(arrays[k]).tobytes() for k in sorted(arrays))


def assert_same(batch, alone):
    for b, a in zip(batch, alone):
        assert b.step == a.step
        assert state_bytes(b) == state_bytes(a)


def run_alone(members, n, every=0, rows=None):
    out = []
    for k, integ in enumerate(members):
        if every:
            out_g, out_el, row0 = rows[k]
            res, r = integ.advance_sampled(n, every, out_g, out_el, row0)
            out.append((res, r))
        else:
            out.append(integ.advance(n))
    return out


def sample_arrays(integ, rows):
    return np.zeros((rows, 5)), np.zeros((rows, len(integ.gm) - 1, 6)), 0


def ensemble_members(name, count):
    spec = spec_mod.load(os.path.join(ROOT, "jobs", name))
    return [spec_mod.resolve(member_spec(spec, k)).make_integrator() for k in range(count)]


def invented_system(eccs, incs=None, masses=None, a0=1.3, spacing=1.9):
    """An invented star of 0.93 Msun with planets on the given eccentricities."""
    n = len(eccs)
    masses = masses or [3e-6 * (k + 1) for k in range(n)]
    gm = np.array([0.93 * K2] + [m * K2 for m in masses])
    x = np.zeros((n + 1, 3))
    v = np.zeros((n + 1, 3))
    incs = incs or [0.02 * k for k in range(n)]
    for k, e in enumerate(eccs):
        a = a0 * spacing ** k
        xs, vs = to_state(gm[0] + gm[k + 1], a, e, incs[k], 0.3 * k, 1.1 * k, 0.7 + 2.1 * k)
        x[k + 1] = xs
        v[k + 1] = vs
    return System([f"p{k}" for k in range(n + 1)], gm, x, v)


@pytest.mark.parametrize("name,count,steps,every", [
    ("ilvar-ensemble.toml", 16, 3000, 700),   # corrector 3, Hill stops, 16 members
    ("veyra-giants.toml", 5, 1500, 400),
    ("veyra-full.toml", 3, 1200, 250),        # eight planets, corrector 5
])
def test_shipped_examples_member_by_member(name, count, steps, every):
    members = ensemble_members(name, count) if "ensemble" in name else \
        [spec_mod.resolve(spec_mod.load(os.path.join(ROOT, "jobs", name))).make_integrator()
         for _ in range(count)]
    if "ensemble" not in name:
        # Clones one part in 1e12 apart, as an ensemble rule would make them.
        for k, integ in enumerate(members):
            integ.xj[1, 0] *= 1.0 + 1e-12 * k
    alone = [clone(m) for m in members]
    rows_b = [sample_arrays(m, steps // every + 2) for m in members]
    rows_a = [sample_arrays(m, steps // every + 2) for m in members]
    got = advance_together(members, steps, every, rows_b, lanes=8)
    want = run_alone(alone, steps, every, rows_a)
    assert_same(members, alone)
    for (rb, nb), (ra, na), sb, sa in zip(got, want, rows_b, rows_a):
        assert (rb.steps, rb.kind, rb.bodies, nb) == (ra.steps, ra.kind, ra.bodies, na)
        assert sb[0].tobytes() == sa[0].tobytes() and sb[1].tobytes() == sa[1].tobytes()


@pytest.mark.parametrize("corrector,gr", [(0, False), (5, True), (17, False)])
def test_eccentric_and_near_parabolic_members_in_one_batch(corrector, gr):
    # Lanes whose Kepler solutions need different numbers of Halley
    # iterations, argument quarterings and the bracketed fallback, side by side.
    systems = [invented_system([0.0, 0.3]), invented_system([0.9, 0.05]),
               invented_system([0.995, 0.2]), invented_system([0.999999, 0.1]),
               invented_system([0.6, 0.7]), invented_system([0.2, 0.95])]
    gm = systems[0].gm
    systems = [System(s.names, gm.copy(), s.x, s.v) for s in systems]
    # Long steps (a large part of the inner orbit): many quarterings.
    for dt in (3.0, 170.0):
        members = [WisdomHolman(s, dt, corrector=corrector, gr=gr) for s in systems]
        alone = [clone(m) for m in members]
        advance_together(members, 400, lanes=4)
        run_alone(alone, 400)
        assert_same(members, alone)


def test_hyperbolic_member_beside_bound_ones():
    s = invented_system([0.1, 0.2])
    v = s.v.copy()
    v[2] *= 1.6  # unbound outer planet
    systems = [s, System(s.names, s.gm, s.x, v)]
    members = [WisdomHolman(q, 20.0) for q in systems]
    alone = [clone(m) for m in members]
    advance_together(members, 600)
    run_alone(alone, 600)
    assert_same(members, alone)


@pytest.mark.parametrize("turn", [0, 1, 2, 3])
def test_members_stop_at_their_own_step_and_the_batch_goes_on(turn):
    # Eccentricity and ejection limits met by some members at different steps.
    stops = StopConditions(max_ecc=0.5, eject_distance=40.0, hill=1.0, star_radius=0.01)
    systems = [invented_system([0.1, 0.2]), invented_system([0.45, 0.2]),
               invented_system([0.2, 0.49]), invented_system([0.05, 0.1])]
    gm = systems[0].gm
    v = systems[3].v.copy()
    v[2] *= 1.5  # outer planet leaves: ejection
    systems[3] = System(systems[3].names, gm, systems[3].x, v)
    systems = [System(s.names, gm, s.x, s.v) for s in systems]
    systems = systems[turn:] + systems[:turn]  # every member in every lane
    members = [WisdomHolman(s, 5.0, stops=stops) for s in systems]
    alone = [clone(m) for m in members]
    rows_b = [sample_arrays(m, 60) for m in members]
    rows_a = [sample_arrays(m, 60) for m in members]
    got = advance_together(members, 20000, 500, rows_b)
    want = run_alone(alone, 20000, 500, rows_a)
    kinds = [r.kind for r, _ in got]
    assert StopKind.DONE in kinds and len(set(kinds)) >= 2, kinds  # the test exercises stops
    for (rb, nb), (ra, na) in zip(got, want):
        assert (rb.steps, rb.kind, rb.bodies, nb) == (ra.steps, ra.kind, ra.bodies, na)
    assert_same(members, alone)
    for sb, sa in zip(rows_b, rows_a):
        assert sb[0].tobytes() == sa[0].tobytes() and sb[1].tobytes() == sa[1].tobytes()


def test_a_member_whose_state_breaks_leaves_with_a_numerical_failure():
    s = invented_system([0.1, 0.2])
    members = [WisdomHolman(s, 5.0) for _ in range(3)]
    members[1].xj[2, 1] = np.inf  # a state no longer finite (as after an overflow)
    alone = [clone(m) for m in members]
    got = advance_together(members, 50)
    want = run_alone(alone, 50)
    assert got[1].kind is StopKind.NUMERICAL_FAILURE
    assert [(r.steps, r.kind, r.bodies) for r in got] == [(r.steps, r.kind, r.bodies)
                                                          for r in want]
    assert state_bytes(members[0]) == state_bytes(alone[0])


def test_members_leave_join_and_change_batches_with_the_same_bytes():
    members = ensemble_members("ilvar-ensemble.toml", 10)
    alone = [clone(m) for m in members]
    run_alone(alone, 2100)
    # 700 steps in one batch; then members regrouped, some alone, one moved
    # through its state arrays (a checkpoint), with odd lane counts.
    advance_together(members, 700, lanes=16)
    members[3] = clone(members[3])
    advance_together(members[:4], 700, lanes=3)
    advance_together(members[4:], 350, lanes=16)
    members[5].advance(350)
    advance_together(members[4:5] + members[6:], 350)
    advance_together([members[2], members[7], members[0]], 700)
    advance_together([m for k, m in enumerate(members) if k not in (0, 2, 7)], 700)
    assert_same(members, alone)


def test_members_at_different_steps_and_sample_phases():
    # Members picked up mid-run: different step counters, pending half-drifts,
    # sample offsets (a backward run keeps its parent's grid).
    members = ensemble_members("ilvar-ensemble.toml", 4)
    members[1].advance(37)
    members[2].advance(1)
    members[3] = members[3].reversed()
    members[3].advance(11)
    members[3] = members[3].reversed()
    assert members[3].sample_offset != 0
    alone = [clone(m) for m in members]
    rows_b = [sample_arrays(m, 40) for m in members]
    rows_a = [sample_arrays(m, 40) for m in members]
    got = advance_together(members, 2000, 97, rows_b)
    want = run_alone(alone, 2000, 97, rows_a)
    assert [r for r, _ in got] == [r for r, _ in want]
    assert [n for _, n in got] == [n for _, n in want]
    assert_same(members, alone)
    for sb, sa in zip(rows_b, rows_a):
        assert sb[0].tobytes() == sa[0].tobytes() and sb[1].tobytes() == sa[1].tobytes()


def test_members_of_different_systems_or_settings_are_refused():
    a = WisdomHolman(invented_system([0.1, 0.2]), 5.0)
    b = WisdomHolman(invented_system([0.1, 0.2]), 5.0, corrector=3)
    c = WisdomHolman(invented_system([0.1, 0.2]), 5.0, indicator="megno")
    assert compatible(a, clone(a)) and not compatible(a, b) and not compatible(a, c)
    assert compatible(c, clone(c)) and not compatible(c, a)
    with pytest.raises(ValueError, match="indicator"):
        advance_together([a, c], 10)
    with pytest.raises(ValueError, match="same masses, step, corrector"):
        advance_together([a, b], 10)
    with pytest.raises(ValueError, match="n_steps must be >= 0"):
        advance_together([a], -1)
    assert advance_together([a], 0)[0].steps == 0


def test_samples_staged_in_pieces_are_the_same(monkeypatch):
    # The batch stages samples in bounded arrays, in kernel calls of a few
    # samples each here: the split changes no byte and keeps memory bounded.
    from orbitledger.integrators import batch

    monkeypatch.setattr(batch, "_STAGING_BYTES", 3000)
    members = ensemble_members("ilvar-ensemble.toml", 5)
    alone = [clone(m) for m in members]
    rows_b = [sample_arrays(m, 400) for m in members]
    rows_a = [sample_arrays(m, 400) for m in members]
    got = advance_together(members, 700, 2, rows_b)
    want = run_alone(alone, 700, 2, rows_a)
    assert [n for _, n in got] == [n for _, n in want] == [350] * 5
    assert_same(members, alone)
    for sb, sa in zip(rows_b, rows_a):
        assert sb[0].tobytes() == sa[0].tobytes() and sb[1].tobytes() == sa[1].tobytes()


def megno_rows(integ, rows):
    return np.zeros((rows, 5)), np.zeros((rows, len(integ.gm) - 1, 6)), 0, np.zeros((rows, 2))


@pytest.mark.parametrize("corrector,gr,dt", [(0, False, 3.0), (5, True, 3.0), (0, False, 170.0),
                                             (17, True, 170.0)])
def test_megno_members_carry_the_scalar_tangent_and_sums(corrector, gr, dt):
    # The tangent vector and MEGNO sums of each member, and its <Y> samples, are
    # the bytes of the scalar kernel run alone: eccentric, near-parabolic and
    # long-step lanes (quarterings, the bracketed fallback) side by side, lanes
    # with and without a pending half-drift, in odd groups.
    systems = [invented_system([0.0, 0.3]), invented_system([0.9, 0.05]),
               invented_system([0.995, 0.2]), invented_system([0.999999, 0.1]),
               invented_system([0.6, 0.7]), invented_system([0.2, 0.95])]
    gm = systems[0].gm
    systems = [System(s.names, gm.copy(), s.x, s.v) for s in systems]
    members = [WisdomHolman(s, dt, corrector=corrector, gr=gr, indicator="megno",
                            tangent_seed=k) for k, s in enumerate(systems)]
    members[2].advance(3)
    alone = [clone(m) for m in members]
    steps, every = 400, 37
    rows_b = [megno_rows(m, steps // every + 2) for m in members]
    rows_a = [megno_rows(m, steps // every + 2) for m in members]
    got = advance_together(members[:2], steps, every, rows_b[:2], lanes=4) + \
        advance_together(members[2:], steps, every, rows_b[2:], lanes=3)
    want = [m.advance_sampled(steps, every, *r) for m, r in zip(alone, rows_a)]
    assert [(r.steps, r.kind, n) for r, n in got] == [(r.steps, r.kind, n) for r, n in want]
    assert_same(members, alone)
    assert all("megno_sums" in m.state_arrays() for m in members)
    for sb, sa in zip(rows_b, rows_a):
        for b, a in zip(sb, sa):
            assert np.asarray(b).tobytes() == np.asarray(a).tobytes()
    # The indicator is live, not a constant: the members' <Y> differ.
    assert len({m.megno() for m in members}) == len(members)


def test_megno_members_stop_and_break_at_their_own_step():
    # A member meeting a stop condition leaves with its sums as the scalar
    # kernel leaves them (the step's growth counted); one whose state breaks
    # leaves before its sums take the step.
    stops = StopConditions(max_ecc=0.5, eject_distance=40.0)
    systems = [invented_system([0.1, 0.2]), invented_system([0.45, 0.2]),
               invented_system([0.2, 0.49]), invented_system([0.05, 0.1]),
               invented_system([0.05, 0.1])]
    gm = systems[0].gm
    v = systems[3].v.copy()
    v[2] *= 1.5  # outer planet leaves: ejection
    systems[3] = System(systems[3].names, gm, systems[3].x, v)
    systems = [System(s.names, gm, s.x, s.v) for s in systems]
    members = [WisdomHolman(s, 5.0, stops=stops, indicator="megno", tangent_seed=k)
               for k, s in enumerate(systems)]
    members[4].xj[2, 1] = np.inf
    alone = [clone(m) for m in members]
    got = advance_together(members, 20000)
    want = run_alone(alone, 20000)
    kinds = {r.kind for r in got}
    assert StopKind.DONE in kinds and StopKind.NUMERICAL_FAILURE in kinds and len(kinds) >= 3
    assert [(r.steps, r.kind, r.bodies) for r in got] == [(r.steps, r.kind, r.bodies)
                                                          for r in want]
    for b, a in zip(members[:4], alone[:4]):
        assert state_bytes(b) == state_bytes(a)
    assert members[4].tangent[2].tobytes() == alone[4].tangent[2].tobytes()


def test_megno_members_move_between_batches_through_checkpoints():
    members = [WisdomHolman(invented_system([0.1 + 0.05 * k, 0.2]), 4.0, corrector=3,
                            indicator="megno", tangent_seed=k) for k in range(5)]
    gm = members[0].gm
    members = [WisdomHolman(System(m.names, gm, *m._synchronized_state()), 4.0, corrector=3,
                            indicator="megno", tangent_seed=k) for k, m in enumerate(members)]
    alone = [clone(m) for m in members]
    run_alone(alone, 900)
    advance_together(members, 300, lanes=2)
    members = [clone(m) for m in members]  # a checkpoint: state arrays and back
    members[1].advance(300)
    advance_together(members[:1] + members[2:], 300)
    advance_together(members, 300, lanes=5)
    assert_same(members, alone)
