"""Step resolution: steps per orbit and per pericentre passage, and the warning."""

import math

import pytest
from typer.testing import CliRunner

from orbitledger.runner.inputs import spec as S
from orbitledger.runner.cli import app
from orbitledger.runner.inputs.stepcheck import MIN_STEPS_PER_PASSAGE, advice, resolution, summary
from helpers import small_spec, small_spec_text

ONE_PLANET = """
name = "tovin"
[system]
star = {{ name = "Tovin", mass = "1 Msun" }}
[[system.bodies]]
name = "Tovin b"
mass = "1e-12 Msun"
a = "1 au"
e = {e}
mean_anomaly = "33 deg"
[method]
step = "{step}"
[span]
length = "100 yr"
"""


def one_planet(e=0.0, step="4 d"):
    return S.resolve(S.load_text(ONE_PLANET.format(e=e, step=step)))


def test_period_of_a_one_au_orbit_is_the_gaussian_year():
    # Gauss (1809): with k = 0.01720209895, a massless body at a = 1 au about
    # 1 Msun has the period 2 pi / k = 365.2568983 d.
    (r,) = resolution(one_planet())
    assert r.period == pytest.approx(365.2568983, rel=1e-9)
    assert r.steps_per_orbit == pytest.approx(365.2568983 / 4, rel=1e-9)
    assert r.passage == pytest.approx(r.period, rel=1e-12)  # circular: the same


def test_an_eccentric_orbit_needs_more_steps_per_pericentre_passage():
    # 2 pi sqrt(q^3 / (mu (1 + e))) over the period 2 pi sqrt(a^3 / mu) is
    # sqrt((1 - e)^3 / (1 + e)); for e = 0.5 that is sqrt(0.125 / 1.5).
    (r,) = resolution(one_planet(e=0.5))
    assert r.passage / r.period == pytest.approx(math.sqrt(0.125 / 1.5), rel=1e-9)
    assert r.steps_per_passage < r.steps_per_orbit


def test_a_coarse_step_is_named_with_its_value_and_a_fix():
    assert advice(one_planet(step="10 d")) == []
    # e = 0.6: sqrt(0.064 / 1.6) = 0.2 of the period, 73.05 d; 10 d gives 7.3 steps.
    (line,) = advice(one_planet(e=0.6, step="10 d"))
    assert "`method.step` = 10 d" in line and "Tovin b" in line and "7.31 steps" in line
    limit = 0.2 * 365.2568983 / MIN_STEPS_PER_PASSAGE
    assert f"at most {limit:.4g} d" in line
    assert "least resolved" in summary(one_planet(e=0.6, step="10 d"))


def test_submit_warns_on_stderr_and_show_reports_the_resolution(tmp_path):
    spec_file = tmp_path / "coarse.toml"
    spec_file.write_text(small_spec_text(step="200 d", length="400 yr", chunk="100 steps",
                                         output="10 steps"))
    runner = CliRunner()
    ws = ["--workspace", str(tmp_path / "ws")]
    assert runner.invoke(app, ["init", *ws]).exit_code == 0
    res = runner.invoke(app, ["submit", str(spec_file), *ws])
    assert res.exit_code == 0, res.output
    assert res.stdout.strip() == "1"
    assert "warning: `method.step` = 200 d" in res.stderr and "Orrin b" in res.stderr
    shown = runner.invoke(app, ["show", "1", *ws])
    assert "step resolution" in shown.stdout and "Orrin b" in shown.stdout
    fine = tmp_path / "fine.toml"
    fine.write_text(small_spec_text())
    res = runner.invoke(app, ["submit", str(fine), *ws])
    assert res.exit_code == 0 and "warning" not in res.stderr


def test_the_example_jobs_resolve_their_orbits():
    for name in ("veyra-giants", "veyra-full", "ilvar-ensemble", "cadmus-map", "tessaly-belt"):
        import os

        from helpers import ROOT

        plan = S.resolve(S.load(os.path.join(ROOT, "jobs", f"{name}.toml")))
        assert advice(plan) == [], name
    assert advice(S.resolve(small_spec())) == []
