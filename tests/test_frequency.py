"""Frequency analysis (Laskar's numerical frequency analysis): synthetic quasi-periodic
signals of known terms, and the secular frequencies of the giant planets."""


import numpy as np
import pytest

from orbitledger.runner.analysis.frequency import (ARCSEC, invariable_rotation, naff,
                                                   signals)

NUS = (1.0, -0.37, 2.3)
AMPS = (1.0 * np.exp(0.3j), 0.4 * np.exp(-1.1j), 0.1 * np.exp(2.0j))


def synthetic(span, step=0.05):
    t = np.arange(0.0, span + step / 2, step)
    return sum(a * np.exp(1j * nu * t) for a, nu in zip(AMPS, NUS)), step


def test_terms_of_a_known_signal_are_found_with_amplitudes_and_phases():
    f, h = synthetic(400.0)
    terms = naff(f, h, 3)
    for term, nu, a in zip(terms, NUS, AMPS):
        assert term.frequency == pytest.approx(nu, abs=1e-8)
        assert term.amplitude == pytest.approx(abs(a), rel=1e-7)
        assert term.phase == pytest.approx(np.angle(a), abs=1e-6)


def test_frequency_error_falls_much_faster_than_a_plain_fourier_transform():
    # Laskar (1993): with the Hanning window the frequency error of a
    # quasi-periodic signal falls like 1/T^4 (2p + 2 for a window of order
    # p = 1); the peak of a plain FFT is only good to its bin, ~1/T.
    spans = (100.0, 200.0, 400.0, 800.0)
    err, fft_err = [], []
    for span in spans:
        f, h = synthetic(span)
        err.append(abs(naff(f, h, 1)[0].frequency - NUS[0]))
        spec = np.fft.fft(f)
        k = int(np.argmax(np.abs(spec)))
        fft_err.append(abs(2 * np.pi * np.fft.fftfreq(f.size, h)[k] - NUS[0]))
    slope = -np.polyfit(np.log(spans), np.log(err), 1)[0]
    fft_slope = -np.polyfit(np.log(spans), np.log(fft_err), 1)[0]
    assert slope > 3.0, (err, slope)      # 4.4 measured (the error oscillates about T^-4)
    assert fft_slope < 1.5, fft_err
    assert all(e < 1e-4 * fe for e, fe in zip(err[1:], fft_err[1:]))


def test_a_term_in_the_invariable_plane_frame_is_the_same_frequency():
    # Rotating the frame changes which plane the angles are measured from,
    # not the frequency of a precessing orbit normal.
    t = np.arange(4000) * 10.0
    inc = np.radians(1.0) + 0.0 * t
    node = 1e-3 * t
    els = np.zeros((t.size, 1, 6))
    els[:, 0, 1] = 0.05
    els[:, 0, 2] = np.degrees(inc)
    els[:, 0, 3] = np.degrees(node)
    els[:, 0, 4] = np.degrees(2e-3 * t)
    _, zeta = signals(els)
    assert naff(zeta[:, 0], 10.0, 1)[0].frequency == pytest.approx(1e-3, rel=1e-9)
    rot = invariable_rotation([0.0, 0.0, 1.0])
    z2, zeta2 = signals(els, rot)
    assert naff(zeta2[:, 0], 10.0, 1)[0].frequency == pytest.approx(1e-3, rel=1e-9)
    assert naff(z2[:, 0], 10.0, 1)[0].frequency == pytest.approx(3e-3, rel=1e-9)


def test_a_tilted_frame_is_rotated_to_its_invariable_plane():
    # An orbit whose normal precesses uniformly (rate nu) at i0 = 3 deg about an
    # axis k tilted 20 deg from z, its pericentre advancing at mu: in the frame
    # of k (invariable_rotation(k)) zeta = sin(i0/2) exp(i(Omega0 + nu t) + i alpha)
    # and z = e exp(i(Omega0 + omega0 + (nu + mu) t) + i alpha), one term each,
    # alpha the angle between the frame's x axis and the one used to build the
    # orbit (here chosen on purpose as not the node of the tilted plane). The
    # elements in the original frame come from the orbit normal and pericentre
    # vectors by the usual conversion (Murray & Dermott 1999, sec. 2.8).
    tilt, phi, alpha = np.radians(20.0), np.radians(35.0), np.radians(50.0)
    i0, e0, nu, mu = np.radians(3.0), 0.05, 1e-3, 2e-3
    t = np.arange(4000) * 10.0
    big_o, small_o = 0.4 + nu * t, 1.1 + mu * t
    k = np.array([np.sin(tilt) * np.cos(phi), np.sin(tilt) * np.sin(phi), np.cos(tilt)])
    node_line = np.cross([0.0, 0.0, 1.0], k)
    node_line /= np.linalg.norm(node_line)
    ex = np.cos(alpha) * node_line + np.sin(alpha) * np.cross(k, node_line)
    ey = np.cross(k, ex)
    # Orbit normal and pericentre direction in the basis (ex, ey, k).
    n_loc = np.stack([np.sin(i0) * np.sin(big_o), -np.sin(i0) * np.cos(big_o),
                      np.full_like(t, np.cos(i0))], axis=-1)
    asc = np.stack([np.cos(big_o), np.sin(big_o), 0.0 * t], axis=-1)
    p_loc = (np.cos(small_o)[:, None] * asc
             + np.sin(small_o)[:, None] * np.cross(n_loc, asc))
    basis = np.stack([ex, ey, k])  # rows: the local axes in the original frame
    n, p = n_loc @ basis, p_loc @ basis
    inc = np.arccos(n[:, 2])
    node = np.arctan2(n[:, 0], -n[:, 1])
    nvec = np.stack([np.cos(node), np.sin(node), 0.0 * t], axis=-1)
    peri = np.arctan2(np.sum(p * np.cross(n, nvec), axis=-1), np.sum(p * nvec, axis=-1))
    els = np.zeros((t.size, 1, 6))
    els[:, 0, 1] = e0
    els[:, 0, 2], els[:, 0, 3], els[:, 0, 4] = (np.degrees(x) for x in (inc, node, peri))
    assert np.ptp(np.degrees(inc)) > 5.9  # 17 to 23 deg to z: the tilt is real
    z2, zeta2 = signals(els, invariable_rotation(k))
    tz, tzeta = naff(z2[:, 0], 10.0, 2), naff(zeta2[:, 0], 10.0, 2)
    assert tzeta[0].frequency == pytest.approx(nu, rel=1e-9)
    assert tzeta[0].amplitude == pytest.approx(np.sin(i0 / 2), rel=1e-9)
    assert tzeta[1].amplitude < 1e-9 * tzeta[0].amplitude  # one term only
    assert np.angle(np.exp(1j * (tzeta[0].phase - 0.4 - alpha))) == pytest.approx(0, abs=1e-8)
    assert tz[0].frequency == pytest.approx(nu + mu, rel=1e-9)
    assert tz[0].amplitude == pytest.approx(e0, rel=1e-9)
    assert np.angle(np.exp(1j * (tz[0].phase - 1.5 - alpha))) == pytest.approx(0, abs=1e-8)
    # Without the rotation the same orbit is not one term of amplitude sin(i0/2).
    _, zeta_raw = signals(els)
    assert abs(naff(zeta_raw[:, 0], 10.0, 1)[0].amplitude - np.sin(i0 / 2)) > 0.1


# Secular frequencies of the outer solar system, arcsec per year: Laskar et
# al. (2004, A&A 428, 261), Table 3 (from memory).
LASKAR_2004 = {"g5": 4.257482, "g6": 28.245343, "g7": 3.087946, "g8": 0.673019,
               "s6": -26.347841, "s7": -2.992530, "s8": -0.691739}
# Sun/planet mass ratios, IAU 2009 system (../shared/CHECKS.md) [read].
RATIO = {5: 1047.348644, 6: 3497.9018, 7: 22902.98, 8: 19412.26}
INNER = (1 / 6023600.0 + 1 / 408523.719 + 1 / 328900.5596 + 1 / 3098703.59)


def test_giant_planets_secular_frequencies_agree_with_a_published_table():
    # The four giants at J2000 from ERFA's plan94 (Simon et al. 1994, pyerfa;
    # the inner planets' masses added to the Sun's, a common practice), 10
    # Myr with the map (0.5 yr, corrector 5), a sample every 500 yr, then the
    # leading frequency of z = e exp(i varpi) and zeta = sin(i/2) exp(i node)
    # in the invariable plane.
    #
    # Tolerances: 1.5 % for g5, g8, s6, s7, s8 (measured -0.5, -1.1, +1.2,
    # -0.7, 0.0 %): the table comes from a full solar-system model, and 10
    # Myr holds only five periods of g8. g6 and g7 sit next to near
    # mean-motion resonances (Jupiter-Saturn 5:2, Uranus-Neptune 2:1) and
    # move with the planets' period ratios: the same run from the published
    # mean elements of Jupiter and Saturn (Standish & Williams, Table 1)
    # instead of plan94 gives g6 = 26.05 against 26.90; they are held to 6 %
    # (measured -4.7 % and -3.2 %; common practice, no source).
    import erfa

    from orbitledger.integrators import G, System, WisdomHolman

    gm = G * np.array([1.0 + INNER] + [1.0 / RATIO[p] for p in (5, 6, 7, 8)])
    x, v = [np.zeros(3)], [np.zeros(3)]
    for p in (5, 6, 7, 8):
        pv = erfa.plan94(2451545.0, 0.0, p)
        x.append(np.array(pv[0]))
        v.append(np.array(pv[1]))
    s = System(["Sun", "Jupiter", "Saturn", "Uranus", "Neptune"], gm, np.array(x),
               np.array(v), 0.0).to_barycentric_frame()
    every, span = 500, 10_000_000
    wh = WisdomHolman(s, 0.5 * 365.25, corrector=5)
    els = np.empty((span // every, 4, 6))
    for k in range(len(els)):
        wh.advance(2 * every)
        wh.diagnose_into(els[k])
    total = (s.gm[:, None] * np.cross(s.x, s.v)).sum(0)
    z, zeta = signals(els, invariable_rotation(total))

    def lead(sig, n=1, pick=None):
        terms = naff(sig, float(every), 3)
        if pick is not None:  # the term nearest a given frequency among the first three
            return min((t.frequency * ARCSEC for t in terms), key=lambda f: abs(f - pick))
        return terms[0].frequency * ARCSEC

    got = {"g5": lead(z[:, 0]), "g6": lead(z[:, 1]), "g8": lead(z[:, 3]),
           "g7": lead(z[:, 2], pick=3.0), "s6": lead(zeta[:, 0]), "s7": lead(zeta[:, 2]),
           "s8": lead(zeta[:, 3])}
    for key, ref in LASKAR_2004.items():
        tol = 0.06 if key in ("g6", "g7") else 0.015
        assert got[key] == pytest.approx(ref, rel=tol), (key, got[key], ref)


def test_frequencies_command_on_a_job_and_a_stretch(tmp_path):
    import json

    from helpers import cli, small_spec_text

    spec = tmp_path / "orrin.toml"
    spec.write_text(small_spec_text(step="30 d", length="60 kyr", chunk="90000 steps",
                                    output="300 steps"))
    ws = tmp_path / "ws"
    assert cli("init", "--workspace", ws).returncode == 0
    assert cli("submit", spec, "--workspace", ws).returncode == 0
    assert cli("work", "--workspace", ws, "--quiet").returncode == 0
    res = cli("frequencies", "1", "--workspace", ws, "--json", "--terms", "2")
    assert res.returncode == 0, res.stderr
    rec = json.loads(res.stdout)
    assert set(rec["bodies"]) == {"Orrin b", "Orrin c", "Orrin d"}
    assert rec["span_yr"] == pytest.approx(60000.0, rel=1e-3)
    z = rec["bodies"]["Orrin b"]["z"]
    assert len(z["terms"]) == 2 and z["terms"][0]["amplitude"] > 0
    part = json.loads(cli("frequencies", "1", "--workspace", ws, "--json", "--from", "20 kyr",
                          "--to", "40 kyr").stdout)
    assert part["span_yr"] == pytest.approx(20000.0, rel=0.01)
    res = cli("frequencies", "1", "--workspace", ws, "--frame", "galactic")
    assert res.returncode != 0 and "--frame must be" in res.stderr + res.stdout
    res = cli("frequencies", "1", "--workspace", ws, "--from", "59.9 kyr")
    assert res.returncode != 0 and "needs at least 32" in res.stderr + res.stdout
    assert "Orrin b" in cli("frequencies", "1", "--workspace", ws).stdout
    # The backward run from the end retraces the same stretch: the same
    # frequencies, with the same signs (its samples are analysed in time order).
    assert cli("backward", "1", "--workspace", ws).returncode == 0
    assert cli("work", "--workspace", ws, "--quiet").returncode == 0
    back = json.loads(cli("frequencies", "2", "--workspace", ws, "--json", "--terms",
                          "2").stdout)
    for label in ("z", "zeta"):
        f1 = rec["bodies"]["Orrin b"][label]["terms"][0]["frequency_arcsec_per_yr"]
        f2 = back["bodies"]["Orrin b"][label]["terms"][0]["frequency_arcsec_per_yr"]
        assert f2 == pytest.approx(f1, rel=1e-6), label
