"""Plots (matplotlib, headless) and self-contained HTML reports."""

import base64
import html
import io

import numpy as np


def _figure():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def survival_figure(summary, title):
    """The Kaplan-Meier survival curve with its confidence band and censored members."""
    plt = _figure()
    fig, ax = plt.subplots(figsize=(7, 4.2), dpi=110)
    t_end = float(summary.times.max()) if summary.n else 1.0
    if len(summary.km_t):
        t = np.concatenate([[0.0], summary.km_t, [t_end]])
        s = np.concatenate([[1.0], summary.km_s, [summary.km_s[-1]]])
        lo = np.concatenate([[1.0], summary.km_lo, [summary.km_lo[-1]]])
        hi = np.concatenate([[1.0], summary.km_hi, [summary.km_hi[-1]]])
        ax.fill_between(t, lo, hi, step="post", alpha=0.25, label="95% confidence band")
        ax.step(t, s, where="post", lw=2, label="Kaplan-Meier survival")
    else:
        ax.step([0.0, t_end], [1.0, 1.0], where="post", lw=2, label="no instability so far")
    cens = summary.times[~summary.events]
    if len(cens):
        # Survival just after each censoring time: the last step at or before it.
        idx = np.searchsorted(summary.km_t, cens, side="right") - 1
        at = np.where(idx >= 0, summary.km_s[np.clip(idx, 0, None)] if len(summary.km_s)
                      else 1.0, 1.0)
        ax.plot(cens, at, "|", ms=12, color="k", label="censored (survived so far)")
    ax.set_xlabel("time (yr)")
    ax.set_ylabel("fraction still stable")
    ax.set_ylim(-0.02, 1.05)
    ax.set_title(title)
    ax.legend(loc="lower left", fontsize=8)
    fig.tight_layout()
    return fig


def save(fig, path):
    """Save a figure as PNG or SVG by the file's suffix."""
    fig.savefig(str(path))
    _figure().close(fig)


def png_data_uri(fig):
    """A figure as an inline PNG (for self-contained HTML)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    _figure().close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


_CSS = ("body{font-family:sans-serif;max-width:60em;margin:2em auto;color:#222}"
        "table{border-collapse:collapse;margin:1em 0}td,th{border:1px solid #bbb;padding:.25em .6em;"
        "text-align:left;word-break:break-word;max-width:22em}th{background:#eee}img{max-width:100%}")


def table_html(headers, rows):
    """An HTML table, cells escaped."""
    out = ["<table><tr>" + "".join(f"<th>{html.escape(str(h))}</th>" for h in headers) + "</tr>"]
    for r in rows:
        out.append("<tr>" + "".join(f"<td>{html.escape(str(c))}</td>" for c in r) + "</tr>")
    return "".join(out) + "</table>"


def page(title, sections):
    """A self-contained HTML page from (heading, html) sections."""
    body = "".join(f"<h2>{html.escape(h)}</h2>{content}" for h, content in sections)
    return (f"<!DOCTYPE html><html><head><meta charset='utf-8'><title>{html.escape(title)}"
            f"</title><style>{_CSS}</style></head><body><h1>{html.escape(title)}</h1>{body}"
            "</body></html>")


def energy_figure(samples, title):
    """|dE/E| against time on log-log axes, with a t^(1/2) reference line."""
    plt = _figure()
    fig, ax = plt.subplots(figsize=(7, 4.2), dpi=110)
    t = np.abs(samples["time"] - samples["time"][0]) / 365.25
    e = np.abs(samples["energy_error"])
    keep = (t > 0) & (e > 0)
    ax.loglog(t[keep], e[keep], lw=0.8, label="|dE/E|")
    if keep.sum() > 1:
        t0, e0 = t[keep][0], np.median(e[keep][: max(3, keep.sum() // 50)])
        ref = e0 * np.sqrt(t[keep] / t0)
        ax.loglog(t[keep], ref, "--", color="gray", label="t^1/2 (Brouwer 1937)")
    ax.set_xlabel("time (yr)")
    ax.set_ylabel("relative energy error")
    ax.set_title(title)
    ax.legend(fontsize=8)
    fig.tight_layout()
    return fig


def elements_figure(samples, names, title):
    """Semi-major axis, eccentricity and inclination of every body against time."""
    plt = _figure()
    fig, axes = plt.subplots(3, 1, figsize=(7, 7), dpi=110, sharex=True)
    t = (samples["time"] - samples["time"][0]) / 365.25
    for b, name in enumerate(names):
        for ax, k in zip(axes, (0, 1, 2)):
            ax.plot(t, samples["elements"][:, b, k], lw=0.8, label=name)
    for ax, lab in zip(axes, ("a (au)", "e", "i (deg)")):
        ax.set_ylabel(lab)
    axes[0].set_title(title)
    axes[0].legend(fontsize=7, ncol=4)
    axes[-1].set_xlabel("time (yr)")
    fig.tight_layout()
    return fig


def divergence_figure(t, d, fit, title):
    """Phase-space distance of two runs, with the fitted Lyapunov growth if exponential."""
    plt = _figure()
    fig, ax = plt.subplots(figsize=(7, 4.2), dpi=110)
    ax.semilogy(t, d, lw=1, label="scaled phase-space distance")
    if fit.get("lyapunov_time"):
        # The renormalised estimate's slope, drawn through the end of the
        # stretch before saturation (not fitted to this curve).
        n = fit["samples"]
        tt = np.asarray(t[:n])
        lam = 1.0 / fit["lyapunov_time"]
        c = max(float(d[n - 1]), 1e-300) * np.exp(-lam * tt[-1])
        ax.semilogy(tt, c * np.exp(lam * tt), "--",
                    label=f"exp(t / {fit['lyapunov_time']:.3g} yr), renormalised shadow")
    ax.set_xlabel("time (yr)")
    ax.set_ylabel("distance")
    ax.set_title(title + f" ({fit['kind']} growth)")
    ax.legend(fontsize=8)
    fig.tight_layout()
    return fig
