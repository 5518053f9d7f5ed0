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


# -- a local JPL file ---------------------------------------------------------------------

AU_KM = 149597870.7  # the astronomical unit in km (IAU 2012 Resolution B2)


def write_spk(path, segments, start, end):
    """A minimal SPK file, written from the DAF and SPK type 2 layouts (NAIF's "DAF
    Required Reading" and "SPK Required Reading"): one Chebyshev record per segment.

    segments: {(target, centre): (p0 km (3,), w km/s (3,))}, the motion p0 + w (t - mid)
    over [start, end] (seconds of TDB past J2000), as coefficients of degree 2.
    """
    import struct

    ftp = b"FTPSTR:\r:\n:\r\n:\r\x00:\x81:\x10\xce:ENDFTP"  # the DAF transfer test string
    deg = 2
    rsize = 2 + 3 * (deg + 1)
    mid, radius = 0.5 * (start + end), 0.5 * (end - start)
    data, summaries, names = [], [], []
    addr = 3 * 128 + 1  # data begin at record 4 (1-based double-word addresses)
    for (target, centre), (p0, w) in segments.items():
        rec = [mid, radius]
        for k in range(3):
            rec += [p0[k], w[k] * radius, 0.0]  # T0 and T1 coefficients of a line
        words = rec + [start, end - start, float(rsize), 1.0]  # INIT, INTLEN, RSIZE, N
        summaries.append(struct.pack("<2d6i", start, end, target, centre, 1, 2, addr,
                                     addr + len(words) - 1))
        names.append(f"segment {target} wrt {centre}".encode().ljust(40))
        data += words
        addr += len(words)
    head = struct.pack("<8sII60sIII8s", b"DAF/SPK ", 2, 6, b"orbitledger test kernel".ljust(60),
                       2, 2, addr, b"LTL-IEEE")
    file_record = head.ljust(699, b"\0") + ftp
    file_record = file_record.ljust(1024, b"\0")
    summary = struct.pack("<3d", 0.0, 0.0, float(len(summaries))) + b"".join(summaries)
    blob = (file_record + summary.ljust(1024, b"\0") + b"".join(names).ljust(1024, b" ")
            + struct.pack(f"<{len(data)}d", *data))
    path.write_bytes(blob.ljust(-(-len(blob) // 1024) * 1024, b"\0"))


def test_a_local_jpl_file_gives_the_states_it_holds(tmp_path):
    # An SPK file written here (type 2 Chebyshev segments of straight-line motion) is
    # read through astropy and jplephem. The heliocentric distance, speed and r.v of
    # each planet equal the file's numbers (rotation to the ecliptic keeps them), and
    # so does every component once the file's ICRS vectors are turned by ERFA's
    # ICRS-to-ecliptic matrix at J2000 (ecm06: frame bias, IAU 2006 precession and
    # obliquity), so a wrong frame rotation fails too.
    pytest.importorskip("jplephem")
    import erfa
    sun = (np.array([1.0e5, -2.0e5, 3.0e4]), np.array([0.010, 0.012, -0.001]))
    jup = (np.array([7.4e8, 1.0e8, -2.0e7]), np.array([-2.0, 12.5, 0.3]))
    sat = (np.array([1.3e9, 5.0e8, 1.0e7]), np.array([-3.5, 8.9, 0.1]))
    kernel = tmp_path / "made.bsp"
    write_spk(kernel, {(10, 0): sun, (5, 0): jup, (6, 0): sat}, -1e7, 1e7)
    spec = S.load_text(ephemeris_spec(["jupiter", "saturn"], extra=f'source = "{kernel}"'))
    eph = spec.system.ephemeris
    assert any("SHA-256" in line and "jplephem" in line for line in eph.sources)
    for body, (p0, w) in zip(spec.system.bodies, (jup, sat)):
        r = np.array([float(q.split()[0]) for q in body.position])
        v = np.array([float(q.split()[0]) for q in body.velocity])
        rk, vk = p0 - sun[0], w - sun[1]
        assert np.linalg.norm(r) == pytest.approx(np.linalg.norm(rk) / AU_KM, rel=1e-13)
        assert np.linalg.norm(v) == pytest.approx(np.linalg.norm(vk) * 86400 / AU_KM, rel=1e-12)
        assert r @ v == pytest.approx((rk @ vk) * 86400 / AU_KM ** 2, rel=1e-11)
        # The epoch is J2000 TDB, the segments' midpoint: the file's state is (p0, w).
        ecm = erfa.ecm06(2451545.0, 0.0)
        np.testing.assert_allclose(r, ecm @ rk / AU_KM, rtol=0, atol=1e-12 * np.linalg.norm(r))
        np.testing.assert_allclose(v, ecm @ vk * 86400 / AU_KM, rtol=0,
                                   atol=1e-11 * np.linalg.norm(v))


@pytest.mark.parametrize("source", ["de440", "jpl", "https://example.org/de440s.bsp",
                                    "/nowhere/de440.bsp"])
def test_an_ephemeris_that_is_not_a_local_file_is_refused_not_downloaded(source):
    from orbitledger.runner.errors import SpecError

    with pytest.raises(SpecError, match="is not a file on this machine") as err:
        S.load_text(ephemeris_spec(["jupiter"], extra=f'source = "{source}"'))
    assert "\n" not in str(err.value) and "nothing is downloaded" in str(err.value)
