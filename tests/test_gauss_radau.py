"""Gauss-Radau 15 (Everhart 1985): its nodes, a very eccentric Kepler orbit against the
analytic solution, the Pythagorean three-body problem, and exact resumption."""

import math

import numpy as np
import pytest

from orbitledger.integrators import GaussRadau, Integrator, System
from orbitledger.integrators.gauss_radau import NODES, root7

G = 0.01720209895 ** 2  # Gaussian constant squared (IAU 1976)


def test_nodes_are_the_radau_roots():
    # The interior Gauss-Radau nodes on [0, 1] are the roots other than x = -1 of
    # P7(x) + P8(x), mapped by tau = (x + 1) / 2 (Abramowitz & Stegun 1964, 25.4.31;
    # Everhart 1985). All eight roots of that polynomial found here by mpmath at
    # 40 digits from its coefficients (no starting guesses from the nodes).
    mpmath = pytest.importorskip("mpmath")
    from fractions import Fraction

    # Legendre polynomials' exact coefficients (lowest power first) by Bonnet's
    # recursion, (n + 1) P_{n+1} = (2n + 1) x P_n - n P_{n-1}.
    p = [[Fraction(1)], [Fraction(0), Fraction(1)]]
    for n in range(1, 8):
        xp = [Fraction(0)] + p[n]
        prev = p[n - 1] + [Fraction(0)] * (len(xp) - len(p[n - 1]))
        p.append([((2 * n + 1) * a - n * b) / (n + 1) for a, b in zip(xp, prev)])
    coeffs = [a + b for a, b in zip(p[7] + [Fraction(0)], p[8])]
    with mpmath.workdps(40):
        c = [mpmath.mpf(a.numerator) / a.denominator for a in coeffs]
        import inspect  # newer mpmath takes the lowest power first when asked (asc)

        asc = "asc" in inspect.signature(mpmath.polyroots).parameters
        roots = sorted(mpmath.re(r) for r in mpmath.polyroots(
            c if asc else c[::-1], maxsteps=200, extraprec=200, **({"asc": True} if asc else {})))
        assert abs(roots[0] + 1) < mpmath.mpf(10) ** -30  # x = -1, the left end
        tau = [float((r + 1) / 2) for r in roots[1:]]
    assert len(tau) == 7 and min(np.diff(tau)) > 0.05  # seven distinct nodes in (0, 1)
    assert 0.0 < tau[0] and tau[-1] < 1.0
    assert np.allclose(NODES[1:], tau, rtol=0, atol=2e-16)


def test_seventh_root_on_basic_arithmetic():
    # Against mpmath's root at 40 digits (x ** (1/7) itself is off by about ln(x) ulp).
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 40
    for x in (1e-30, 3.7e-12, 0.5, 1.0, 2.0, 1e9, 7.3e250):
        assert root7(x) == pytest.approx(float(mpmath.root(x, 7)), rel=4e-16)


def kepler_position(mu, a, e, t):
    """Heliocentric position of an orbit with pericentre on +x at t = 0: Kepler's
    equation M = E - e sin E solved by Newton's method (Murray & Dermott 1999, eq. 2.52),
    x = a (cos E - e), y = a sqrt(1 - e^2) sin E (eq. 2.41), written again here."""
    n = math.sqrt(mu / a ** 3)
    m = math.fmod(n * t, 2 * math.pi)
    ecc_an = math.pi if e > 0.8 else m
    for _ in range(100):
        step = (ecc_an - e * math.sin(ecc_an) - m) / (1 - e * math.cos(ecc_an))
        ecc_an -= step
        if abs(step) < 1e-16:
            break
    return np.array([a * (math.cos(ecc_an) - e), a * math.sqrt(1 - e * e) * math.sin(ecc_an), 0])


def eccentric_pair(e=0.99):
    m0, m1, a = 1.0, 1e-3, 1.0
    mu = G * (m0 + m1)
    rp = a * (1 - e)
    vp = math.sqrt(mu * (1 + e) / rp)
    s = System(["Pellar", "Pellar b"], np.array([G * m0, G * m1]),
               np.array([[0.0, 0, 0], [rp, 0, 0]]), np.array([[0.0, 0, 0], [0, vp, 0]]), 0.0,
               np.zeros(2)).to_barycentric_frame()
    return s, mu, a, 2 * math.pi * math.sqrt(a ** 3 / mu)


def test_an_orbit_of_e_099_over_1000_orbits_keeps_energy_and_phase():
    # Energy at round-off level: 2.8e5 substeps, each adding relative rounding of
    # ~1e-16 to a pericentre kinetic energy 199 times |E|, would random-walk to
    # ~1e-11; compensated summation keeps it lower. Position against the analytic
    # Kepler solution at several times.
    # The energy is computed again here (energy_g1, in units of G).
    s, mu, a, period = eccentric_pair()
    gr = GaussRadau(s, period / 8)
    e0 = energy_g1(*gr._synchronized_state(), gr.gm)
    worst = 0.0
    for k in range(8 * 1000):
        gr.advance(1)
        if k % 997 == 0 or k == 7999:
            x, _ = gr._synchronized_state()
            want = kepler_position(mu, a, 0.99, gr.time)
            worst = max(worst, float(np.linalg.norm((x[1] - x[0]) - want)))
    assert abs(energy_g1(*gr._synchronized_state(), gr.gm) - e0) / abs(e0) < 1e-12
    # 1000 orbits: a relative period error of 1e-12 puts the planet 5e-8 au along its
    # track at pericentre (v 0.24 au/d); the map-free reference allows 1e-7 au.
    assert worst < 1e-7, worst
    taken, rejected = gr.substeps
    assert taken < 400 * 1000 and rejected < taken / 100


def pythagorean(tol=1e-8):
    # Burrau's problem: masses 3, 4 and 5 at rest at the vertices of a 3-4-5 right
    # triangle, G = 1 (Burrau 1913; Szebehely & Peters 1967): (1, 3), (-2, -1), (1, -1).
    gm = np.array([3.0, 4.0, 5.0])
    x = np.array([[1.0, 3.0, 0.0], [-2.0, -1.0, 0.0], [1.0, -1.0, 0.0]])
    return GaussRadau(System(["three", "four", "five"], gm, x, np.zeros((3, 3)), 0.0,
                             np.zeros(3)), 0.1, tolerance=tol)


def energy_g1(x, v, gm):
    """Total energy with G = 1, written again here (in other units: G times it)."""
    e = 0.5 * float((gm[:, None] * v * v).sum())
    for i in range(len(gm)):
        for j in range(i + 1, len(gm)):
            e -= gm[i] * gm[j] / float(np.linalg.norm(x[i] - x[j]))
    return e


def test_the_pythagorean_problem_ends_with_a_binary_and_an_escape():
    gr = pythagorean()
    x0, v0 = gr._synchronized_state()
    e0 = energy_g1(x0, v0, gr.gm)
    gr.advance(700)  # t = 70
    x, v = gr._synchronized_state()
    assert abs(energy_g1(x, v, gr.gm) - e0) / abs(e0) < 1e-10
    # Szebehely & Peters (1967), from memory: after a sequence of close approaches
    # the lightest body (mass 3) escapes near t = 60 and masses 4 and 5 form a binary.
    d45 = float(np.linalg.norm(x[1] - x[2]))
    cm = (4 * x[1] + 5 * x[2]) / 9
    vcm = (4 * v[1] + 5 * v[2]) / 9
    r3 = float(np.linalg.norm(x[0] - cm))
    assert d45 < 2.0 and r3 > 10.0
    # Its two-body energy about the binary (total mass 12, reduced mass 27/12) is positive.
    rel_v = v[0] - vcm
    assert 0.5 * float(rel_v @ rel_v) - 12.0 / r3 > 0
    assert float((x[0] - cm) @ rel_v) > 0  # moving away
    # ...and the binary is bound.
    dv = v[1] - v[2]
    assert 0.5 * float(dv @ dv) - 9.0 / d45 < 0


def test_resumed_runs_and_the_plain_python_path_are_bit_identical():
    # Reproducibility, not correctness: a run stopped at frame 337 (state through its
    # arrays) and resumed equals the uninterrupted run byte for byte, and the compiled
    # kernel equals its .py_func path.
    ref = pythagorean()
    ref.advance(500)
    part = pythagorean()
    part.advance(337)
    arrays = {k: np.array(v) for k, v in part.state_arrays().items()}
    again = Integrator.from_state_arrays(arrays)
    again.advance(163)
    a, b = ref.state_arrays(), again.state_arrays()
    assert sorted(a) == sorted(b)
    for k in a:
        assert np.asarray(a[k]).tobytes() == np.asarray(b[k]).tobytes(), k
    # The same frames through the Python path of the step loop.
    from orbitledger.integrators import gauss_radau as M

    py = pythagorean()
    compiled = pythagorean()
    compiled.advance(40)
    g, bp, a0, an, xn, xo, vo, cxo, cvo = py._scratch
    M.radau_frames.py_func(py.x, py.v, py.gm, 0.0, py.dt, 40, py.tolerance, py.ctl, py.b, g, a0,
                           an, xn, xo, vo, bp, M._R, M._C, M._D, M._BINOM, py._stop_pairs,
                           py._stop_params, py._mu, py._hx, py._hv, py._rh, py.comp[0],
                           py.comp[1], cxo, cvo, py._contact)
    assert py.x.tobytes() == compiled.x.tobytes() and py.v.tobytes() == compiled.v.tobytes()


def test_a_bad_tolerance_is_refused():
    s, *_ = eccentric_pair()
    for bad in (0.0, -1e-9, float("nan")):
        with pytest.raises(ValueError, match="tolerance"):
            GaussRadau(s, 1.0, tolerance=bad)


# -- in jobs ------------------------------------------------------------------------------

RADAU_SPEC = """
name = "pellar-radau"
[system]
star = {{ name = "Pellar", mass = "1 Msun" }}
[[system.bodies]]
name = "Pellar b"
mass = "1 jupiterMass"
a = "1 au"
e = 0.95
[[system.bodies]]
name = "Pellar c"
mass = "0.3 jupiterMass"
a = "6 au"
e = 0.1
i = "3 deg"
[method]
name = "gauss_radau"
step = "100 d"
{extra}
[span]
length = "{length}"
output = "10 steps"
chunk = "300 steps"
"""


def test_a_radau_job_killed_at_random_moments_resumes_bit_for_bit(tmp_path):
    # Real worker processes killed by SIGKILL (at named failpoints and at random times):
    # the substep sizes, the predictor and the compensation terms are state, so the run
    # equals an uninterrupted one byte for byte, and verify passes. An invented star,
    # Pellar, with a planet on an e = 0.95 orbit (the map's weak case).
    import random

    from helpers import final_state, run_with_kills, samples_bytes
    from orbitledger.runner.analysis.integrity import verify
    from orbitledger.runner.execution.worker import Worker
    from orbitledger.runner.inputs import spec as S
    from orbitledger.runner.ledger.operations import Ledger
    from orbitledger.runner.ledger.workspace import init

    text = RADAU_SPEC.format(extra="", length="6000 yr")
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref-store")
    ref_id = ref.submit(S.load_text(text))
    Worker(ref).run()
    ws, led = init(tmp_path / "ws")
    jid = led.submit(S.load_text(text))
    kills = run_with_kills(ws, led, jid, ["mid_store_write:1", "in_commit:1", "first_step:1"],
                           random.Random(5), random_kills=6)
    assert led.job(jid)["status"] == "done"
    assert kills >= 3, kills
    assert final_state(led, jid) == final_state(ref, ref_id)
    assert samples_bytes(led, jid) == samples_bytes(ref, ref_id)
    rep = verify(led, jid)
    assert rep.ok, rep.problem
    # Energy at round-off level over 6000 yr of an e = 0.95 orbit.
    assert led.job(jid)["max_energy_error"] < 1e-12
    led.close()
    ref.close()


@pytest.mark.parametrize("extra, words", [
    ("corrector = 3", "`method.corrector` needs method 'wisdom_holman'"),
    ("tolerance = 1e-12", "`method.tolerance` must be between 1e-9 and 1e-3"),
    ('indicator = "megno"', "`method.indicator`"),
])
def test_radau_settings_that_mean_nothing_are_refused(extra, words):
    from orbitledger.runner.errors import SpecError
    from orbitledger.runner.inputs import spec as S

    with pytest.raises(SpecError) as err:
        S.load_text(RADAU_SPEC.format(extra=extra, length="100 yr"))
    assert words in str(err.value) and "\n" not in str(err.value)
    with pytest.raises(SpecError, match="`method.tolerance` is for method 'gauss_radau'"):
        S.load_text(RADAU_SPEC.format(extra="tolerance = 1e-8", length="100 yr").replace(
            'name = "gauss_radau"', 'name = "wisdom_holman"').replace("e = 0.95", "e = 0.5"))


def test_recheck_finds_the_maps_error_falling_as_the_step_squared(tmp_path):
    # A well-resolved, regular job (the invented Orrin planets, no corrector) checked over
    # its first checkpoint against Gauss-Radau: the map's position error over the stretch
    # falls as dt^2 (second-order map: Wisdom & Holman 1991) when the step halves, and
    # the reference's own energy change is at round-off, far below the map's.
    import json

    from helpers import cli, small_spec_text

    ws = tmp_path / "ws"
    assert cli("init", "--workspace", ws).returncode == 0
    for name, step, chunk, out in (("o10", "10 d", "18260 steps", "1826 steps"),
                                   ("o5", "5 d", "36520 steps", "3652 steps")):
        spec = tmp_path / f"{name}.toml"
        spec.write_text(small_spec_text(name=name, step=step, corrector=0, length="500 yr",
                                        chunk=chunk, output=out))
        assert cli("submit", spec, "--workspace", ws).returncode == 0
    assert cli("work", "--workspace", ws, "--quiet").returncode == 0
    recs = []
    for jid in (1, 2):
        res = cli("recheck", str(jid), "--workspace", ws, "--from", "0", "--to", "1", "--json")
        assert res.returncode == 0, res.stderr
        recs.append(json.loads(res.stdout))
    for name in recs[0]["bodies"]:
        coarse, fine = recs[0]["bodies"][name], recs[1]["bodies"][name]
        ratio = coarse["position_au"] / fine["position_au"]
        assert 3.5 < ratio < 4.5, (name, ratio)
        assert coarse["position_au"] < 1e-4
    for r in recs:
        assert abs(r["reference_energy_change"]) < 1e-14
        assert abs(r["reference_energy_change"]) < 1e-3 * abs(r["map_energy_change"])
    table = cli("recheck", "1", "--workspace", ws)
    assert table.returncode == 0 and "against Gauss-Radau 15" in table.stdout
    bad = cli("recheck", "1", "--workspace", ws, "--from", "1", "--to", "1")
    assert bad.returncode != 0 and "start < end" in bad.stderr
