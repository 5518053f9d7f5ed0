"""Test particles in jobs: the spec's [particles] section, their samples in the store, the
worker's kill-and-resume, and the `particles` command's statistics (Kaplan-Meier survival
and the surviving fraction by initial a), checked against estimators written again here."""

import math
import statistics

import numpy as np
import pytest

from helpers import small_spec_text

G = 0.01720209895 ** 2  # Gaussian constant squared, au^3 / (Msun d^2) (IAU 1976)
YEAR = 365.25

PARTICLES = """
[stops]
hill = 1.0
escape_distance = "300 au"
[particles]
[[particles.listed]]
name = "inner"
a = "1.2 au"
e = 0.01
[particles.drawn]
count = 40
seed = 11
a = ["3.3 au", "5.8 au"]
e = [0.0, 0.15]
i = ["0 deg", "4 deg"]
"""


def particle_spec_text(**kw):
    return small_spec_text(**kw) + PARTICLES


def load(text):
    from orbitledger.runner.inputs import spec as S

    return S.load_text(text)


# -- the spec ---------------------------------------------------------------------------

def elements_here(mu, x, v):
    """a, e, i and mean anomaly (rad) of a bound state, written again here: the vis-viva
    a, the eccentricity vector, i from the angular momentum, and the eccentric
    anomaly from e cos E = 1 - r / a, e sin E = x.v / sqrt(mu a) (Murray & Dermott
    1999, eqs. 2.134-2.140)."""
    x, v = np.asarray(x, float), np.asarray(v, float)
    r = float(np.linalg.norm(x))
    a = 1.0 / (2.0 / r - float(v @ v) / mu)
    h = np.cross(x, v)
    e = float(np.linalg.norm(np.cross(v, h) / mu - x / r))
    inc = math.acos(h[2] / float(np.linalg.norm(h)))
    big_e = math.atan2(float(x @ v) / math.sqrt(mu * a), 1.0 - r / a)
    return a, e, inc, (big_e - e * math.sin(big_e)) % (2 * math.pi)


def test_drawn_particles_follow_their_rule_and_are_the_same_every_time():
    from orbitledger.runner.inputs.spec import resolve

    a, b = resolve(load(particle_spec_text())), resolve(load(particle_spec_text()))
    ps = a.particles
    assert len(ps.names) == 41 and ps.names[0] == "inner" and ps.names[1] == "d00000"
    assert ps.x.tobytes() == b.particles.x.tobytes() and ps.v.tobytes() == b.particles.v.tobytes()
    # The rule, drawn again here: u = PCG64(11).random((40, 6)); a, e, i uniform in their
    # ranges, node, peri and mean anomaly uniform in 0-360 deg.
    u = np.random.Generator(np.random.PCG64(11)).random((40, 6))
    mu = G * 0.88
    for k in range(40):
        a, e, inc, mean = elements_here(mu, ps.x[k + 1], ps.v[k + 1])
        assert a == pytest.approx(3.3 + 2.5 * u[k, 0], rel=1e-12)
        assert e == pytest.approx(0.15 * u[k, 1], abs=1e-12)
        assert math.degrees(inc) == pytest.approx(4.0 * u[k, 2], abs=1e-9)
        m_want = 360.0 * u[k, 5]
        assert math.degrees(mean) == pytest.approx(m_want, abs=1e-7) or \
            abs(math.degrees(mean) - m_want) > 359.9999  # 0 and 360 deg are one angle
    # Another seed, other particles.
    other = resolve(load(particle_spec_text().replace("seed = 11", "seed = 12"))).particles
    assert other.x[1:].tobytes() != ps.x[1:].tobytes()


def test_a_spec_without_particles_keeps_its_canonical_text():
    from orbitledger.runner.inputs.spec import canonical_json

    assert "particles" not in canonical_json(load(small_spec_text()))
    assert '"particles":{' in canonical_json(load(particle_spec_text()))


@pytest.mark.parametrize("change, words", [
    (("e = [0.0, 0.15]", "e = [0.0, 1.2]"), "`particles.drawn.e` must be a range"),
    (('a = ["3.3 au", "5.8 au"]', 'a = ["5.8 au", "3.3 au"]'), "`particles.drawn.a` must be"),
    (('a = ["3.3 au", "5.8 au"]', 'a = ["3.3 au"]'), "`particles.drawn.a` must be a range of two"),
    (("count = 40", "count = 0"), "`particles.drawn.count` must be between 1 and"),
    (('a = "1.2 au"', 'a = "299 au"'), "inside the orbit of test particle inner"),
    (("[stops]", '[stops]\nstar_contact_distance = "1.5 au"'), "test particle inner starts"),
    (('name = "inner"', 'name = "d00003"'), "repeats the name 'd00003'"),
    (("corrector = 3", 'corrector = 3\nindicator = "megno"'), "`particles` need method"),
])
def test_bad_particles_are_refused_with_one_line_and_nothing_written(tmp_path, change, words):
    from helpers import cli

    spec = tmp_path / "p.toml"
    text = particle_spec_text()
    assert change[0] in text
    spec.write_text(text.replace(change[0], change[1], 1))
    ws = tmp_path / "ws"
    assert cli("init", "--workspace", ws).returncode == 0
    res = cli("submit", spec, "--workspace", ws)
    assert res.returncode != 0
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and words in lines[0], res.stderr
    assert not any((ws / "store").iterdir())


def test_an_empty_particles_section_is_refused():
    from orbitledger.runner.errors import SpecError

    with pytest.raises(SpecError, match="lists no particles"):
        load(small_spec_text() + "[particles]\n")


# -- samples and removals ---------------------------------------------------------------

def kepler_spec(extra):
    # An invented star, Quillon, whose only planet is far away and 1e-12 of its mass:
    # every particle moves on a Kepler orbit (perturbed at the 1e-12 level).
    return f"""
name = "quillon"
[system]
star = {{ name = "Quillon", mass = "1.3 Msun" }}
[[system.bodies]]
name = "Quillon b"
mass = "1.3e-12 Msun"
a = "40 au"
e = 0.0
[method]
step = "5 d"
[span]
length = "300 yr"
output = "730 steps"
chunk = "7300 steps"
[stops]
escape_distance = "60 au"
{extra}
"""


def test_sampled_particles_follow_keplers_third_law_and_an_escape_is_timed(tmp_path):
    from orbitledger.runner.analysis.integrity import verify
    from orbitledger.runner.execution.worker import Worker
    from orbitledger.runner.ledger.operations import Ledger

    text = kepler_spec("""
[[particles.listed]]
name = "round"
a = "2.5 au"
e = 0.3
mean_anomaly = "40 deg"
[[particles.listed]]
name = "leaving"
a = "-4 au"
e = 1.6
mean_anomaly = "0 deg"
""")
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    jid = led.submit(load(text))
    Worker(led).run()
    assert led.job(jid)["status"] == "done"
    s = led.store.read_samples(jid, led.job(jid)["n_samples"])
    t = s["time"]
    el = s["particle_elements"]
    assert el.shape == (len(t), 2, 6)
    # Kepler's third law, n = sqrt(G M / a^3) (Murray & Dermott 1999, eq. 2.26), for a
    # massless particle about the star: M(t) = M0 + n t. The map is exact for a lone
    # Kepler orbit, so the mean anomaly follows to round-off.
    n = math.sqrt(G * 1.3 / 2.5 ** 3) * 180.0 / math.pi
    want = (40.0 + n * t) % 360.0
    diff = (el[:, 0, 5] - want + 180.0) % 360.0 - 180.0
    assert np.abs(diff).max() < 1e-7
    assert np.allclose(el[:, 0, 0], 2.5, rtol=1e-11) and np.allclose(el[:, 0, 1], 0.3, atol=1e-11)
    # The hyperbolic particle leaves: r = a (1 - e cosh F), M = e sinh F - F (the
    # hyperbolic Kepler equation, Murray & Dermott 1999, ch. 2), n = sqrt(G M / |a|^3).
    # It crosses 60 au at F with 4 (1.6 cosh F - 1) = 60; it is removed on the first
    # step whose mid-step position (at (step - 1/2) dt) is beyond it.
    F = math.acosh((60.0 / 4.0 + 1.0) / 1.6)
    t_out = (1.6 * math.sinh(F) - F) / math.sqrt(G * 1.3 / 4.0 ** 3)
    integ, _ = led.load_integrator(jid)
    ev = integ.particle_events()
    assert ev[0, 0] == -1 and ev[1, 1] == 2  # still there; removed by the escape distance
    assert 0.0 < (ev[1, 0] - 0.5) * 5.0 - t_out <= 5.0
    gone = t >= ev[1, 0] * 5.0
    assert np.isnan(el[gone, 1]).all() and np.isfinite(el[~gone, 1]).all()
    assert list(s["particles_left"]) == [1 if g else 2 for g in gone]
    rep = verify(led, jid)
    assert rep.ok, rep.problem
    # The samples open with xarray, with a labelled particle dimension.
    import xarray as xr

    ds = xr.open_zarr(str(led.store.job_path(jid) / "samples"), consolidated=False)
    assert list(ds["particle"].values) == ["round", "leaving"]
    assert ds["particle_elements"].dims == ("sample", "particle", "element")
    led.close()


def test_a_job_with_particles_killed_at_random_moments_resumes_bit_for_bit(tmp_path):
    # Real worker processes killed by SIGKILL (at named failpoints and at random times):
    # particles, their removals and their sampled elements equal an uninterrupted run
    # byte for byte, and verify passes.
    import random

    from helpers import final_state, run_with_kills, samples_bytes
    from orbitledger.runner.analysis.integrity import verify
    from orbitledger.runner.execution.worker import Worker
    from orbitledger.runner.ledger.operations import Ledger
    from orbitledger.runner.ledger.workspace import init

    text = particle_spec_text(length="40000 yr", chunk="60000 steps", output="3000 steps")
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref-store")
    ref_id = ref.submit(load(text))
    Worker(ref).run()
    ws, led = init(tmp_path / "ws")
    jid = led.submit(load(text))
    points = ["mid_store_write:1", "in_commit:1", "first_step:1", None, None, None]
    kills = run_with_kills(ws, led, jid, points, random.Random(17), random_kills=8)
    assert led.job(jid)["status"] == "done"
    assert kills >= 4, kills
    assert final_state(led, jid) == final_state(ref, ref_id)
    got = samples_bytes(led, jid)
    assert "particle_elements" in got and "particles_left" in got
    assert got == samples_bytes(ref, ref_id)
    rep = verify(led, jid)
    assert rep.ok, rep.problem
    # Some of the drawn particles, between Orrin b and c, were removed on the way.
    integ, _ = led.load_integrator(jid)
    removed = int((integ.particle_events()[:, 0] >= 0).sum())
    assert 0 < removed < 41
    led.close()
    ref.close()


# -- the statistics ---------------------------------------------------------------------

def product_limit(times, removed):
    """Kaplan-Meier product-limit estimate (Kaplan & Meier 1958, eq. 2), written again:
    S(t_j) = prod (1 - d_j / n_j) over the distinct removal times."""
    times = np.asarray(times)
    removed = np.asarray(removed, dtype=bool)
    out_t, out_s, s = [], [], 1.0
    for tj in np.unique(times[removed]):
        d = int(((times == tj) & removed).sum())
        at_risk = int((times >= tj).sum())
        s *= 1.0 - d / at_risk
        out_t.append(tj)
        out_s.append(s)
    return np.array(out_t), np.array(out_s)


def wilson_interval(k, n, conf=0.95):
    """Wilson's score interval (Wilson 1927), written again with the normal quantile."""
    z = statistics.NormalDist().inv_cdf(0.5 + conf / 2)
    p = k / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    return centre - half, centre + half


def test_particles_command_counts_survival_and_fraction_by_initial_a(tmp_path):
    import json

    from helpers import cli

    spec = tmp_path / "p.toml"
    spec.write_text(particle_spec_text(length="6000 yr", chunk="100000 steps",
                                       output="2000 steps"))
    ws = tmp_path / "ws"
    assert cli("init", "--workspace", ws).returncode == 0
    assert cli("submit", spec, "--workspace", ws).returncode == 0
    assert cli("work", "--workspace", ws, "--quiet").returncode == 0
    res = cli("particles", "1", "--workspace", ws, "--bins", "5", "--plot", tmp_path / "p.png")
    assert res.returncode == 0, res.stderr
    assert "Surviving fraction by initial a" in res.stdout and "still integrated" in res.stdout
    assert (tmp_path / "p.png").stat().st_size > 20_000
    rec = json.loads(cli("particles", "1", "--workspace", ws, "--bins", "5", "--json").stdout)
    each = rec["each"]
    assert len(each) == 41 and rec["particles"] == 41
    removed = np.array([p["removed"] for p in each])
    assert 0 < removed.sum() < 41 and rec["left"] == 41 - removed.sum()
    reached = rec["time_reached_yr"]
    assert reached == pytest.approx(6000.0, abs=0.05)
    times = np.array([p["time_yr"] if p["removed"] else reached for p in each])
    t, s = product_limit(times, removed)
    assert np.allclose(rec["kaplan_meier"]["time_yr"], t, rtol=1e-12)
    assert np.allclose(rec["kaplan_meier"]["survival"], s, rtol=1e-12)
    # Every particle starts at t = 0 and the survivors are censored at one time, so the
    # curve ends at the fraction left.
    assert s[-1] == pytest.approx(rec["left"] / 41, rel=1e-12)
    # Bins of initial a: counts by numpy's histogram, intervals by Wilson's formula.
    a0 = np.array([p["initial_a_au"] for p in each])
    edges = np.array(rec["by_initial_a"]["edges_au"])
    assert edges[0] == a0.min() and edges[-1] == a0.max()
    n, _ = np.histogram(a0, bins=edges)
    k, _ = np.histogram(a0[~removed], bins=edges)
    assert list(n) == rec["by_initial_a"]["particles"]
    assert list(k) == rec["by_initial_a"]["surviving"]
    for j in range(5):
        if n[j]:
            lo, hi = wilson_interval(int(k[j]), int(n[j]))
            assert rec["by_initial_a"]["wilson_95_low"][j] == pytest.approx(lo, abs=1e-9)
            assert rec["by_initial_a"]["wilson_95_high"][j] == pytest.approx(hi, abs=1e-9)
    # A removal's kind names the planet the particle met.
    kinds = {p["kind"] for p in each if p["removed"]}
    assert kinds <= {"close_encounter (Orrin b)", "close_encounter (Orrin c)", "ejection",
                     "numerical_failure"}, kinds
    # The job's report has a section on them.
    assert cli("report", "1", "--workspace", ws, "--to", tmp_path / "r.html").returncode == 0
    page = (tmp_path / "r.html").read_text()
    assert "Test particles" in page and "alt='test particles'" in page
    # A job without particles: one clear line.
    plain = tmp_path / "q.toml"
    plain.write_text(small_spec_text(name="plain", length="100 yr"))
    assert cli("submit", plain, "--workspace", ws).returncode == 0
    res = cli("particles", "2", "--workspace", ws)
    assert res.returncode != 0 and "carries no test particles" in res.stderr


def test_a_backward_run_keeps_earlier_removals_apart_and_times_its_own(tmp_path):
    from orbitledger.runner.analysis.particles import particle_summary
    from orbitledger.runner.execution.worker import Worker
    from orbitledger.runner.ledger.operations import Ledger

    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    fwd = led.submit(load(particle_spec_text(length="20000 yr", chunk="100000 steps",
                                             output="1000 steps")))
    Worker(led).run()
    back = led.submit_backward(fwd)
    Worker(led).run()
    assert led.job(back)["status"] == "done"
    f_ev = led.load_integrator(fwd)[0].particle_events()
    b_ev = led.load_integrator(back)[0].particle_events()
    gone = f_ev[:, 0] >= 0
    assert gone.any()
    # Removed going forward: still removed, marked as before the backward job's start.
    assert (b_ev[gone, 0] == 0).all() and (b_ev[gone, 1:] == f_ev[gone, 1:]).all()
    s = particle_summary(led, back)
    assert s.at_risk == 41 - gone.sum()
    assert all(k.startswith("before this job's start") for k, g in zip(s.kinds, gone) if g)
    # Its own removals carry its own step: the particle's sampled elements turn to NaN
    # at the first sample at or after that step.
    row = led.job(back)
    samples = led.store.read_samples(back, row["n_samples"])
    own = np.nonzero(b_ev[:, 0] > 0)[0]
    assert len(own)
    for k in own:
        nan = np.isnan(samples["particle_elements"][:, k, 0])
        first = int(np.argmax(nan))
        assert nan[first:].all() and not nan[:first].any()
        assert samples["step"][first] >= b_ev[k, 0] > (samples["step"][first - 1])
    led.close()
