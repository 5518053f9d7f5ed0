"""The tangent map and MEGNO: checked against finite differences, known limits and a
shadow-orbit estimate written here without the project's variational code."""

import math

import numpy as np
import pytest

from orbitledger.integrators import Integrator, System, WisdomHolman
from orbitledger.integrators.kepler import drift_state
from orbitledger.integrators.variational import drift_state_tangent, ln_ieee, megno_update

# The Gaussian gravitational constant (the IAU 1976 system's value), for the
# velocity weight of the tangent vector's length, written again here.
K_GAUSS = 0.01720209895
YEAR = 365.25


def two_planets(a2, m, e):
    return System.from_elements(["Cadmus", "Cadmus b", "Cadmus c"], [1.0, m, m],
                                [(1.0, e, 0.0, 0.0, 0.0, 0.0), (a2, e, 1.0, 0.0, 120.0, 200.0)])


def length(dx, dv):
    """The tangent vector's length: velocities weighted by the time unit 1/k."""
    return math.sqrt(float((dx[1:] ** 2).sum() + ((dv[1:] / K_GAUSS) ** 2).sum()))


# -- the drift's derivative ------------------------------------------------------

@pytest.mark.parametrize("orbit", ["elliptic", "eccentric", "hyperbolic", "near-parabolic"])
@pytest.mark.parametrize("span", [0.01, 0.4, 3.7, -0.6])
def test_drift_tangent_is_the_derivative_of_the_drift(orbit, span):
    # Central differences of drift_state itself (the state part must be
    # drift_state's bits exactly); their error falls as eps^2 (the expected
    # order) until rounding takes over.
    rng = np.random.default_rng(hash((orbit, span)) % 2**32)
    mu = 3e-4
    for _ in range(5):
        x = rng.standard_normal(3)
        x *= rng.uniform(0.5, 3.0) / np.linalg.norm(x)
        r = np.linalg.norm(x)
        fac = {"elliptic": rng.uniform(0.8, 1.2), "eccentric": rng.uniform(0.05, 0.3),
               "hyperbolic": rng.uniform(1.6, 3.0), "near-parabolic": 1.414}[orbit]
        v = rng.standard_normal(3)
        v *= fac * math.sqrt(mu / r) / np.linalg.norm(v)
        dt = span * 2 * math.pi * math.sqrt(r ** 3 / mu)
        w = np.r_[np.full(3, 1.0), np.full(3, math.sqrt(mu / r) / r)]  # natural scales
        d = rng.standard_normal(6) * w
        out = drift_state_tangent(*x, *v, *d, mu, dt)
        assert out[:6] == drift_state(*x, *v, mu, dt)
        tan = np.array(out[6:])
        errs = []
        for eps in (2e-4, 5e-5):
            h = eps * r
            minus = np.array(drift_state(*(np.r_[x, v] - h * d), mu, dt))
            plus = np.array(drift_state(*(np.r_[x, v] + h * d), mu, dt))
            errs.append(np.abs((plus - minus) / (2 * h) - tan).max() / np.abs(tan).max())
        best = min(errs)
        assert best < 2e-4, (orbit, span, errs)
        if errs[1] > 1e-8:  # truncation, not rounding, dominates: the order shows
            assert 6.0 < errs[0] / errs[1] < 40.0, errs


# -- the tangent of the whole map -------------------------------------------------

def test_tangent_map_matches_two_nearby_runs():
    # After 200 steps the tangent vector times its accumulated growth equals
    # the difference of two runs started eps apart, divided by eps (central
    # difference, so to O(eps^2)).
    s = two_planets(1.4, 1e-3, 0.05)
    dt = YEAR / 40
    w = WisdomHolman(s, dt, corrector=5, gr=True, indicator="megno", tangent_seed=3)
    d0x, d0v = w.tangent[0].copy(), w.tangent[1].copy()
    runs = {}
    for sign in (+1, -1):
        for eps in (1e-6, 2.5e-7):
            z = WisdomHolman(s, dt, corrector=5, gr=True)
            z.xj += sign * eps * d0x
            z.vj += sign * eps * d0v
            z.advance(200)
            runs[sign, eps] = (z.xj.copy(), z.vj.copy())
    w.advance(200)
    growth = math.exp(w.tangent[2][3])
    want = np.r_[w.tangent[0][1:].ravel(), w.tangent[1][1:].ravel() / K_GAUSS] * growth
    errs = []
    for eps in (1e-6, 2.5e-7):
        fx = (runs[1, eps][0] - runs[-1, eps][0]) / (2 * eps)
        fv = (runs[1, eps][1] - runs[-1, eps][1]) / (2 * eps)
        got = np.r_[fx[1:].ravel(), fv[1:].ravel() / K_GAUSS]
        errs.append(np.abs(got - want).max() / np.abs(want).max())
    assert min(errs) < 1e-6, errs
    assert w.tangent[2][0] == 200


def test_the_indicator_leaves_the_trajectory_alone():
    s = two_planets(1.3, 1e-3, 0.05)
    a = WisdomHolman(s, YEAR / 40, corrector=5)
    b = WisdomHolman(s, YEAR / 40, corrector=5, indicator="megno")
    a.advance(3000)
    b.advance(3000)
    assert np.array_equal(a.xj, b.xj) and np.array_equal(a.vj, b.vj)


# -- MEGNO's limits -------------------------------------------------------------------

def megno_direct(lengths):
    """Cincotta, Giordano & Simo (2003), the map form, summed term by term:
    Y(N) = 2/N sum_k k ln(d_k/d_(k-1)), <Y>(N) = 1/N sum_m Y(m)."""
    y = []
    for n in range(1, len(lengths)):
        y.append(2.0 / n * sum(k * math.log(lengths[k] / lengths[k - 1])
                               for k in range(1, n + 1)))
    return sum(y) / len(y)


@pytest.mark.parametrize("growth, limit", [
    ("bounded", 0.0),      # isochronous periodic orbit (harmonic oscillator)
    ("linear", 2.0),       # quasi-periodic
    ("exponential", None),  # chaotic: <Y> ~ lambda t / 2
])
def test_megno_sums_reach_the_limits_of_cincotta_and_simo(growth, limit):
    # Tangent vectors of exactly known growth fed step by step to the kernel's
    # accumulator; the limits are those of Cincotta & Simo (2000, sec. 2).
    n_steps, lam = 2000, 0.01
    dx = np.zeros((2, 3))
    dv = np.zeros((2, 3))
    sums = np.zeros(4)
    lengths = [1.0]
    for k in range(1, n_steps + 1):
        size = {"bounded": 1.0 + 0.5 * math.sin(0.3 * k),
                "linear": 1.0 + 0.7 * k,
                "exponential": math.exp(lam * k)}[growth]
        prev = lengths[-1]
        lengths.append(size)
        dx[1, 0] = size / prev  # the vector was scaled to 1 after the last step
        dv[1, 0] = 0.0
        megno_update(dx, dv, sums)
    ybar = sums[2] / sums[0]
    if growth == "exponential":
        assert ybar == pytest.approx(lam * (n_steps + 1) / 2, rel=2e-3)
        assert sums[3] / sums[0] == pytest.approx(lam, rel=1e-12)
    elif growth == "bounded":
        assert abs(ybar) < 0.02
    else:
        # Approached from below like (ln N) / N: 1.975 after 2000 steps.
        assert ybar == pytest.approx(limit, abs=0.03)
    # The running sums are the direct formula (first 300 steps, recomputed).
    sums2 = np.zeros(4)
    for k in range(1, 301):
        dx[1, 0] = lengths[k] / lengths[k - 1]
        megno_update(dx, dv, sums2)
    assert sums2[2] / sums2[0] == pytest.approx(megno_direct(lengths[:301]), rel=1e-12, abs=1e-12)


def test_logarithm_is_the_library_logarithm_to_an_ulp():
    xs = np.exp(np.random.default_rng(5).uniform(-700.0, 700.0, 5000))
    for x in xs:
        assert abs(ln_ieee(x) - math.log(x)) <= 2 * np.spacing(abs(math.log(x))) + 1e-300


def test_quasi_periodic_two_planets_have_megno_two():
    # Well separated planets (beyond 2 sqrt 3 mutual Hill radii; Gladman 1993):
    # quasi-periodic, <Y> -> 2 (Cincotta & Simo 2000).
    w = WisdomHolman(two_planets(1.35, 1e-3, 0.0), YEAR / 50, indicator="megno")
    w.advance(200_000)
    assert w.megno() == pytest.approx(2.0, abs=0.03)


def test_a_periodic_orbit_along_its_symmetry_has_megno_zero():
    # One planet: an exactly periodic Kepler orbit. A tangent vector along the
    # rotation of the orbit in its plane maps to the rotated orbit, which has
    # the same period, so it stays bounded: <Y> -> 0 (Cincotta & Simo 2000).
    s = System.from_elements(["Cadmus", "Cadmus b"], [1.0, 1e-3], [(1.0, 0.3, 0.0, 0, 0, 0)])
    w = WisdomHolman(s, YEAR / 50, indicator="megno")
    axis = np.array([0.0, 0.0, 1.0])
    dx = np.cross(axis, w.xj)
    dv = np.cross(axis, w.vj)
    dx[0] = dv[0] = 0.0
    size = length(dx, dv)
    w.tangent[0][:] = dx / size
    w.tangent[1][:] = dv / size
    w.advance(100_000)
    assert abs(w.megno()) < 0.02
    # Any other direction changes the period: linear growth, <Y> -> 2.
    v = WisdomHolman(s, YEAR / 50, indicator="megno", tangent_seed=8)
    v.advance(100_000)
    assert v.megno() == pytest.approx(2.0, abs=0.05)


def shadow_exponent(system, dt, steps, every, d0x, d0v, eps=1e-9):
    """Largest Lyapunov exponent per step from a shadow orbit renormalised every
    `every` steps (Benettin et al. 1980), from two runs of the map."""
    main = WisdomHolman(system, dt)
    shadow = WisdomHolman(system, dt)
    shadow.xj += eps * d0x
    shadow.vj += eps * d0v
    total = 0.0
    for _ in range(steps // every):
        main.advance(every)
        shadow.advance(every)
        dx = shadow.xj - main.xj
        dv = shadow.vj - main.vj
        size = length(dx, dv)
        total += math.log(size / eps)
        shadow.xj = main.xj + dx * (eps / size)
        shadow.vj = main.vj + dv * (eps / size)
    return total / steps


def test_chaotic_pair_exponent_agrees_with_a_shadow_orbit_and_megno_grows_like_it():
    s = two_planets(1.15, 1e-4, 0.05)
    dt = YEAR / 50
    steps = 40_000
    w = WisdomHolman(s, dt, indicator="megno", tangent_seed=1)
    d0x, d0v = w.tangent[0].copy(), w.tangent[1].copy()
    w.advance(steps // 2)
    y_half = w.megno()
    w.advance(steps // 2)
    lam = w.tangent[2][3] / w.tangent[2][0]
    ref = shadow_exponent(s, dt, steps, 5, d0x, d0v)
    assert lam > 0.0005  # per step: clearly chaotic (Lyapunov time under 40 yr)
    assert lam == pytest.approx(ref, rel=1e-3)  # they agree to about 3e-5
    # <Y> grows about like lambda t / 2 (Cincotta & Simo 2000): its slope over
    # the second half against lambda / 2 per step, within 30 % (the
    # finite-time exponent of an intermittent orbit varies along it).
    slope = (w.megno() - y_half) / (steps // 2)
    assert 0.7 < slope / (lam / 2) < 1.3, (slope, lam)  # 0.85 measured


def test_tangent_state_round_trips_and_resumes_bit_for_bit():
    s = two_planets(1.15, 1e-4, 0.05)
    a = WisdomHolman(s, YEAR / 50, indicator="megno")
    a.advance(1234)
    b = Integrator.from_state_arrays(a.state_arrays())
    a.advance(2000)
    b.advance(2000)
    for k, v in a.state_arrays().items():
        assert np.array_equal(v, b.state_arrays()[k]), k
    assert b.indicator == "megno" and a.megno() == b.megno()
    # Without the indicator the state has no tangent arrays at all.
    assert "tangent_x" not in WisdomHolman(s, YEAR / 50).state_arrays()


# -- jobs that carry the indicator ------------------------------------------------

def megno_spec_text(**kw):
    from helpers import small_spec_text

    return small_spec_text(**kw).replace("corrector = 3", 'corrector = 3\nindicator = "megno"')


def test_a_job_with_megno_killed_at_random_moments_resumes_bit_for_bit(tmp_path):
    # Real worker processes killed by SIGKILL (at named failpoints and at
    # random times); the tangent vector and the sums are part of the state, so
    # the result equals an uninterrupted run byte for byte, and verify passes.
    import random

    from helpers import final_state, run_with_kills, samples_bytes
    from orbitledger.runner.analysis.integrity import verify
    from orbitledger.runner.execution.worker import Worker
    from orbitledger.runner.inputs import spec as S
    from orbitledger.runner.ledger.operations import Ledger
    from orbitledger.runner.ledger.workspace import init

    text = megno_spec_text(length="150000 yr", chunk="60000 steps", output="3000 steps")
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref-store")
    ref_id = ref.submit(S.load_text(text))
    Worker(ref).run()
    ws, led = init(tmp_path / "ws")
    jid = led.submit(S.load_text(text))
    points = ["mid_store_write:1", "in_commit:1", "first_step:1", None, None, None]
    kills = run_with_kills(ws, led, jid, points, random.Random(7), random_kills=8)
    assert led.job(jid)["status"] == "done"
    assert kills >= 4, kills
    assert final_state(led, jid) == final_state(ref, ref_id)
    got = samples_bytes(led, jid)
    assert "megno" in got and "lyapunov" in got
    assert got == samples_bytes(ref, ref_id)
    rep = verify(led, jid)
    assert rep.ok, rep.problem
    # The Orrin planets are well separated: quasi-periodic, <Y> near 2.
    last = led.store.read_samples(jid, led.job(jid)["n_samples"])["megno"][-1]
    assert last == pytest.approx(2.0, abs=0.05)
    led.close()
    ref.close()


def test_audit_plot_and_report_show_the_indicator(tmp_path):
    from helpers import cli

    spec = tmp_path / "m.toml"
    spec.write_text(megno_spec_text(length="3000 yr", chunk="50000 steps", output="500 steps"))
    ws = tmp_path / "ws"
    assert cli("init", "--workspace", ws).returncode == 0
    assert cli("submit", spec, "--workspace", ws).returncode == 0
    assert cli("work", "--workspace", ws, "--quiet").returncode == 0
    res = cli("audit", "1", "--workspace", ws)
    assert res.returncode == 0 and "MEGNO <Y> = " in res.stdout, res.stdout
    assert "quasi-periodic so far" in res.stdout
    assert cli("plot", "1", "--workspace", ws, "--kind", "megno",
               "--to", tmp_path / "m.png").returncode == 0
    assert (tmp_path / "m.png").stat().st_size > 10_000
    assert cli("report", "1", "--workspace", ws, "--to", tmp_path / "r.html").returncode == 0
    page = (tmp_path / "r.html").read_text()
    assert "Chaos indicator" in page and "alt='megno'" in page
    assert "Frequencies" in page and "sin(i/2)" in page
    # A job without the indicator: a clear refusal for the plot, no section.
    plain = tmp_path / "p.toml"
    plain.write_text(megno_spec_text(name="plain", length="300 yr").replace(
        'indicator = "megno"', ""))
    assert cli("submit", plain, "--workspace", ws).returncode == 0
    assert cli("work", "--workspace", ws, "--quiet").returncode == 0
    res = cli("plot", "2", "--workspace", ws, "--kind", "megno", "--to", tmp_path / "x.png")
    assert res.returncode != 0 and "carries no chaos indicator" in res.stderr + res.stdout
    assert "MEGNO" not in cli("audit", "2", "--workspace", ws).stdout
