"""Frequency analysis of sampled orbits: the numerical frequency analysis of Laskar.

A complex signal f(t) sampled at equal steps over a span T is written as a
sum of terms A_j exp(i nu_j t), found one at a time (Laskar 1990, 1993):

1. the data are weighted by the Hanning window chi(tau) = 1 + cos(2 pi tau / T),
   tau the time from the middle of the span; <f, g> = (1/T) int f conj(g) chi dtau;
2. the frequency of the next term maximises |<f, exp(i nu tau)>|: the peak of
   a zero-padded FFT, then refined as the root of d|phi|^2/dnu between the
   neighbouring bins (Brent's method), to the precision of the arithmetic;
3. exp(i nu tau) is made orthonormal to the terms already found (Gram-Schmidt
   in the windowed inner product), its coefficient taken and the term
   subtracted from the signal; the next search runs on what is left.

With the window the frequency of a term of a quasi-periodic signal is found
with an error falling like 1/T^4 (Laskar 1993), against 1/T for the peak of a
plain Fourier transform. The drift of the leading frequency between the two
halves of a run is Laskar's (1993) indicator of chaotic diffusion.

Signals of a job's samples, per planet: z = e exp(i varpi) (varpi = node +
argument of pericentre) and zeta = sin(i/2) exp(i node), in the system's own
reference frame or in the invariable plane of the bodies (normal to their
total angular momentum). Frequencies are reported in arcseconds per year
(secular theory's unit) and as periods.
"""

import math
from dataclasses import dataclass

import numpy as np

from orbitledger.runner.inputs.ephemeris import invariable_rotation  # noqa: F401 - part of this API

# Arcseconds per radian, and days per Julian year.
ARCSEC = 180.0 * 3600.0 / math.pi
YEAR_D = 365.25


@dataclass(frozen=True)
class Term:
    """One term A exp(i nu t) of a signal: frequency (rad per unit time of the
    samples), amplitude |A| and phase arg A at the first sample (rad)."""

    frequency: float
    amplitude: float
    phase: float


def naff(signal, step, n_terms=5, pad=8):
    """The leading terms of a complex signal sampled every `step` (any time unit).

    Returns a list of :class:`Term`, largest first as found. Frequencies are
    angular (rad per time unit) and may be negative.
    """
    f = np.asarray(signal, dtype=np.complex128).copy()
    n = f.size
    if n < 16:
        raise ValueError(f"frequency analysis needs at least 16 samples, got {n}.")
    span = (n - 1) * step
    tau = (np.arange(n) - 0.5 * (n - 1)) * step
    chi = 1.0 + np.cos(2.0 * np.pi * tau / span)
    # Trapezoid weights (chi vanishes at both ends), normalised so <1, 1> = 1.
    w = chi / chi.sum()

    def inner(a, b):
        return np.sum(a * np.conj(b) * w)

    basis_e = []    # exp(i nu_j tau)
    basis_u = []    # orthonormal
    coef_b = []     # u_m = sum_j B[m][j] e_j
    found_nu = []
    amps_u = []
    for _ in range(n_terms):
        nu = _peak(f, w, tau, step, pad)
        if nu is None:
            break
        e = np.exp(1j * nu * tau)
        v = e.copy()
        row = np.zeros(len(basis_e) + 1, dtype=np.complex128)
        row[-1] = 1.0
        for j, u in enumerate(basis_u):
            c = inner(e, u)
            v = v - c * u
            row[:j + 1] -= c * np.asarray(coef_b[j])
        norm = math.sqrt(max(inner(v, v).real, 0.0))
        if norm < 1e-10:
            break  # the same frequency again: nothing independent is left
        u = v / norm
        row /= norm
        a = inner(f, u)
        f = f - a * u
        basis_e.append(e)
        basis_u.append(u)
        coef_b.append(row)
        found_nu.append(nu)
        amps_u.append(a)
    # Amplitudes of the exponentials: f = sum_m a_m u_m = sum_j (sum_m a_m B[m][j]) e_j.
    k = len(found_nu)
    amps = np.zeros(k, dtype=np.complex128)
    for m in range(k):
        amps[:m + 1] += amps_u[m] * coef_b[m]
    t_first = tau[0]
    return [Term(float(nu), float(abs(a)), float(np.angle(a * np.exp(1j * nu * t_first))))
            for nu, a in zip(found_nu, amps)]


def _peak(f, w, tau, step, pad):
    """The frequency maximising |<f, exp(i nu tau)>|, or None for a zero signal."""
    n = f.size
    m = 1 << int(math.ceil(math.log2(n * pad)))
    spec = np.fft.fft(f * w, m)
    k = int(np.argmax(np.abs(spec)))
    if not np.abs(spec[k]) > 0.0:
        return None
    nus = 2.0 * np.pi * np.fft.fftfreq(m, d=step)
    nu0 = nus[k]
    d = 2.0 * np.pi / (m * step)
    # fft uses exp(-i 2 pi k j / m) with j counting from the first sample; our
    # inner product uses tau from the middle: the modulus is the same.

    def slope(nu):
        ph = np.exp(-1j * nu * tau)
        phi = np.sum(f * w * ph)
        dphi = np.sum(f * w * ph * (-1j * tau))
        return (np.conj(phi) * dphi).real

    lo, hi = nu0 - d, nu0 + d
    s_lo, s_hi = slope(lo), slope(hi)
    grow = 0
    while s_lo * s_hi > 0.0 and grow < 8:
        lo, hi = lo - d, hi + d
        s_lo, s_hi = slope(lo), slope(hi)
        grow += 1
    if s_lo * s_hi > 0.0:
        return float(nu0)
    from scipy.optimize import brentq

    return float(brentq(slope, lo, hi, xtol=1e-15 * max(abs(nu0), d), rtol=1e-15,
                        maxiter=200))


# -- signals of a job's samples ------------------------------------------------------

def _vectors(inc, node, peri):
    """Unit pericentre vectors P and orbit normals n (arrays (..., 3)), angles in radians."""
    ci, si = np.cos(inc), np.sin(inc)
    cO, sO = np.cos(node), np.sin(node)
    cw, sw = np.cos(peri), np.sin(peri)
    p = np.stack([cO * cw - sO * sw * ci, sO * cw + cO * sw * ci, sw * si], axis=-1)
    nrm = np.stack([sO * si, -cO * si, ci], axis=-1)
    return p, nrm


def signals(elements, rotation=None):
    """z = e exp(i varpi) and zeta = sin(i/2) exp(i node) per body from sampled
    heliocentric elements (samples, bodies, 6) in degrees, optionally rotated."""
    el = np.asarray(elements, dtype=float)
    e = el[..., 1]
    inc, node, peri = (np.radians(el[..., k]) for k in (2, 3, 4))
    if rotation is not None:
        p, nrm = _vectors(inc, node, peri)
        p = p @ np.asarray(rotation).T
        nrm = nrm @ np.asarray(rotation).T
        inc = np.arccos(np.clip(nrm[..., 2], -1.0, 1.0))
        node = np.arctan2(nrm[..., 0], -nrm[..., 1])
        nvec = np.stack([np.cos(node), np.sin(node), np.zeros_like(node)], axis=-1)
        peri = np.arctan2(np.sum(p * np.cross(nrm, nvec), axis=-1), np.sum(p * nvec, axis=-1))
    varpi = node + peri
    return e * np.exp(1j * varpi), np.sin(0.5 * inc) * np.exp(1j * node)


def analyse_job(ledger, job_id, start=None, end=None, frame="invariable", n_terms=5):
    """Frequency analysis of a job's committed samples between two times (days).

    Returns a dict: span (yr), samples, frame, and per body the leading terms
    of z and zeta (frequency in arcsec/yr, period in yr, amplitude, phase in
    degrees) and the relative drift of each leading frequency between the
    two halves of the stretch.
    """
    import json

    row = ledger.job(job_id)
    s = ledger.store.read_samples(job_id, row["n_samples"])
    t = np.asarray(s["time"], dtype=float)
    keep = np.ones(t.size, dtype=bool)
    if start is not None:
        keep &= t >= start
    if end is not None:
        keep &= t <= end
    t = t[keep]
    els = np.asarray(s["elements"])[keep]
    # A backward run's samples go back in time: analyse them in time order, so
    # frequencies keep their sign.
    order = np.argsort(t, kind="stable")
    t, els = t[order], els[order]
    if t.size < 32:
        raise ValueError(f"job {job_id} has {t.size} samples in that stretch; frequency "
                         "analysis needs at least 32 (sample more often or take a longer one).")
    steps = np.diff(t)
    if not np.allclose(steps, steps[0], rtol=1e-9, atol=0.0):
        raise ValueError(f"job {job_id}'s samples in that stretch are not equally spaced.")
    step_yr = abs(steps[0]) / YEAR_D
    rot = invariable_rotation(json.loads(row["angmom0"])) if frame == "invariable" else None
    z, zeta = signals(els, rot)
    names = list(ledger.store.body_names(job_id))[1:]
    out = {"job_id": int(job_id), "frame": frame, "samples": int(t.size),
           "span_yr": float(abs(t[-1] - t[0]) / YEAR_D), "bodies": {}}
    half = t.size // 2
    for b, name in enumerate(names):
        entry = {}
        for label, sig in (("z", z[:, b]), ("zeta", zeta[:, b])):
            terms = naff(sig, step_yr, n_terms)
            first = naff(sig[:half], step_yr, 1)
            second = naff(sig[half:], step_yr, 1)
            lead = terms[0].frequency if terms else float("nan")
            drift = (abs(second[0].frequency - first[0].frequency) / abs(lead)
                     if first and second and lead else float("nan"))
            entry[label] = {"terms": [_term_record(x) for x in terms], "drift": drift}
        out["bodies"][name] = entry
    return out


def _term_record(term):
    nu = term.frequency  # rad/yr
    return {"frequency_arcsec_per_yr": nu * ARCSEC,
            "period_yr": (2.0 * math.pi / abs(nu)) if nu else float("inf"),
            "amplitude": term.amplitude, "phase_deg": math.degrees(term.phase)}
