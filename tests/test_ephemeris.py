"""Initial conditions from a solar-system ephemeris: checked against ERFA's own models,
a published table of mean elements and the published invariable plane."""

import math

import numpy as np
import pytest

from orbitledger.runner.inputs import spec as S
from orbitledger.runner.inputs.ephemeris import barycentric_states
from conftest import STANDISH

J2000 = "2000-01-01T12:00:00"


def ephemeris_spec(bodies, plane="ecliptic", extra=""):
    names = ", ".join(f'"{b}"' for b in bodies)
    return f"""
name = "solar-check"
[system.ephemeris]
epoch = "{J2000}"
bodies = [{names}]
plane = "{plane}"
{extra}
[method]
step = "20 d"
[span]
length = "200 yr"
"""


def test_states_are_ergas_own_models_to_round_off():
    # astropy's built-in ephemeris is ERFA's plan94 (planets, heliocentric;
    # Simon et al. 1994) on top of epv00 (the Sun's barycentric motion): read
    # here from pyerfa directly, at the same epoch.
    import erfa

    _, x, v = barycentric_states(["jupiter", "saturn", "earth"], J2000)
    h, b = erfa.epv00(2451545.0, 0.0)
    assert np.allclose(x[0], np.array(b[0]) - np.array(h[0]), rtol=0, atol=1e-15)
    for k, planet in ((1, 5), (2, 6), (3, 3)):
        pv = erfa.plan94(2451545.0, 0.0, planet)
        assert np.allclose(x[k] - x[0], pv[0], rtol=0, atol=1e-14)
        assert np.allclose(v[k] - v[0], pv[1], rtol=0, atol=1e-17)


def test_jupiter_and_saturn_elements_agree_with_the_published_mean_elements():
    # Standish & Williams, Table 1 (J2000 mean elements; ../shared/CHECKS.md
    # [read]). The table's elements are fitted means for positions over
    # 1800-2050; an osculating element at one instant differs by the periodic
    # perturbations (Saturn's a by about 0.2 % through the great
    # inequality): a within 0.5 %, e within 0.003 (common practice, no source).
    spec = S.load_text(ephemeris_spec(["jupiter", "saturn"]))
    els = S.resolve(spec).system.elements()
    for k, name in enumerate(("Jupiter", "Saturn")):
        a, e, inc = STANDISH[name][:3]
        assert els[k][0] == pytest.approx(a, rel=5e-3), name
        assert abs(els[k][1] - e) < 3e-3, name
        assert abs(els[k][2] - inc) < 0.01, name  # degrees, ecliptic of J2000


def test_the_invariable_plane_of_the_planets():
    # Souami & Souchay (2012, A&A 543, A133): the invariable plane is inclined
    # 1 deg 34' 43.3" = 1.57869 deg to the ecliptic of J2000, ascending node
    # 107 deg 34' 56" (from memory). Their plane includes Pluto and uses a JPL
    # ephemeris; Pluto's share of the angular momentum tilts it by under an
    # arcsecond and plan94's positions are good to arcseconds for the giants,
    # so 0.001 deg (3.6") for the inclination, 0.05 deg for the node.
    planets = ["mercury", "venus", "earth", "mars", "jupiter", "saturn", "uranus", "neptune"]
    sysm = S.resolve(S.load_text(ephemeris_spec(planets))).system
    L = (sysm.gm[:, None] * np.cross(sysm.x, sysm.v)).sum(0)
    L /= np.linalg.norm(L)
    assert math.degrees(math.acos(L[2])) == pytest.approx(1.57869, abs=1e-3)
    assert math.degrees(math.atan2(L[0], -L[1])) % 360 == pytest.approx(107.5822, abs=0.05)
    # In the invariable frame the total angular momentum is along +z to round-off.
    inv = S.resolve(S.load_text(ephemeris_spec(planets, plane="invariable"))).system
    L2 = (inv.gm[:, None] * np.cross(inv.x, inv.v)).sum(0)
    assert abs(L2[0]) < 1e-14 * abs(L2[2]) and abs(L2[1]) < 1e-14 * abs(L2[2])


def test_masses_sources_and_the_stored_spec(tmp_path):
    # IAU 2009 mass ratios (Luzum et al. 2011, Table 1; ../shared/CHECKS.md
    # [read]); planets left out are added to the Sun unless asked not to.
    from orbitledger.integrators import G

    spec = S.load_text(ephemeris_spec(["jupiter", "saturn"]))
    gm = S.resolve(spec).system.gm / G
    assert gm[1] == pytest.approx(1 / 1047.348644, rel=1e-15)
    assert gm[2] == pytest.approx(1 / 3497.9018, rel=1e-15)
    inner = 1 / 6023600 + 1 / 408523.719 + 1 / 328900.5596 + 1 / 3098703.59
    assert gm[0] == pytest.approx(1 + inner + 1 / 22902.98 + 1 / 19412.26, rel=1e-15)
    sources = "\n".join(spec.system.ephemeris.sources)
    assert "Luzum et al. 2011" in sources and "plan94" in sources and "TDB" in sources
    alone = S.load_text(ephemeris_spec(["jupiter"], extra="fold_unlisted = false\n"
                                                          'masses = { jupiter = "0.001 Msun" }'))
    gm = S.resolve(alone).system.gm / G
    assert gm[0] == pytest.approx(1.0, rel=1e-15) and gm[1] == pytest.approx(0.001, rel=1e-15)
    # The stored canonical spec carries the states written out: read back it
    # gives the same system without consulting the ephemeris.
    back = S.from_json(S.canonical_json(spec))
    a, b = S.resolve(spec).system, S.resolve(back).system
    assert np.array_equal(a.x, b.x) and np.array_equal(a.v, b.v) and np.array_equal(a.gm, b.gm)


@pytest.mark.parametrize("change, key", [
    (lambda t: t.replace('"jupiter"', '"vulcan"'), "system.ephemeris.bodies"),
    (lambda t: t.replace(f'epoch = "{J2000}"', 'epoch = "yesterday"'), "system.ephemeris.epoch"),
    (lambda t: t.replace('plane = "ecliptic"', 'plane = "galactic"'), "system.ephemeris.plane"),
    (lambda t: t + '\n[system.star]\nname = "Sun"\nmass = "1 Msun"\n', "system.ephemeris"),
])
def test_bad_ephemeris_sections_are_refused_naming_the_key(change, key):
    with pytest.raises(S.SpecError) as err:
        S.load_text(change(ephemeris_spec(["jupiter", "saturn"])))
    assert f"`{key}" in str(err.value), str(err.value)


def test_show_and_report_say_where_the_numbers_came_from(tmp_path):
    from helpers import cli

    spec = tmp_path / "solar.toml"
    spec.write_text(ephemeris_spec(["jupiter", "saturn"]))
    ws = tmp_path / "ws"
    assert cli("init", "--workspace", ws).returncode == 0
    assert cli("submit", spec, "--workspace", ws).returncode == 0
    res = cli("show", "1", "--workspace", ws)
    assert res.returncode == 0, res.stderr
    assert "where every number came from" in res.stdout
    assert "Luzum et al. 2011" in res.stdout and "plan94" in res.stdout
    assert cli("work", "--workspace", ws, "--quiet").returncode == 0
    assert cli("report", "1", "--workspace", ws, "--to", tmp_path / "r.html").returncode == 0
    assert "Where the initial conditions came from" in (tmp_path / "r.html").read_text()
