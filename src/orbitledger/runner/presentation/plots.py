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


def survival_figure(summary, title, ax=None, what="members"):
    """The Kaplan-Meier survival curve with its confidence band and censored members
    (or test particles: ``what="particles"``)."""
    plt = _figure()
    if ax is None:
        fig, ax = plt.subplots(figsize=(7, 4.2), dpi=110)
    else:
        fig = ax.figure
    t_end = float(summary.times.max()) if summary.n else 1.0
    if len(summary.km_t):
        t = np.concatenate([[0.0], summary.km_t, [t_end]])
        s = np.concatenate([[1.0], summary.km_s, [summary.km_s[-1]]])
        lo = np.concatenate([[1.0], summary.km_lo, [summary.km_lo[-1]]])
        hi = np.concatenate([[1.0], summary.km_hi, [summary.km_hi[-1]]])
        ax.fill_between(t, lo, hi, step="post", alpha=0.25, label="95% confidence band")
        ax.step(t, s, where="post", lw=2, label="Kaplan-Meier survival")
    else:
        ax.step([0.0, t_end], [1.0, 1.0], where="post", lw=2,
                label="no instability so far" if what == "members" else "none removed so far")
    cens = summary.times[~summary.events]
    if len(cens):
        # Survival just after each censoring time: the last step at or before it.
        idx = np.searchsorted(summary.km_t, cens, side="right") - 1
        at = np.where(idx >= 0, summary.km_s[np.clip(idx, 0, None)] if len(summary.km_s)
                      else 1.0, 1.0)
        ax.plot(cens, at, "|", ms=12, color="k", label="censored (survived so far)")
    _years_axis(ax, t_end)
    ax.set_ylabel("fraction still stable" if what == "members" else "fraction of particles left")
    ax.set_ylim(-0.02, 1.05)
    ax.set_title(title)
    ax.legend(loc="lower left", fontsize=8)
    fig.tight_layout()
    return fig


def particles_figure(summary, title):
    """Test particles: their Kaplan-Meier survival curve, and the fraction surviving by
    initial semi-major axis (bars, with Wilson intervals)."""
    plt = _figure()
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(11, 4.2), dpi=110)
    survival_figure(summary, "survival of the particles", ax=a1, what="particles")
    e = summary.edges
    frac = np.where(summary.bin_n > 0, summary.bin_left / np.maximum(summary.bin_n, 1), np.nan)
    mid = 0.5 * (e[1:] + e[:-1])
    a2.bar(mid, np.nan_to_num(frac), width=np.diff(e), align="center", alpha=0.6,
           edgecolor="k", label="surviving fraction")
    ok = summary.bin_n > 0
    a2.errorbar(mid[ok], frac[ok], yerr=[frac[ok] - summary.bin_lo[ok],
                                         summary.bin_hi[ok] - frac[ok]],
                fmt="none", ecolor="k", capsize=3, label="95% Wilson interval")
    for x, n in zip(mid, summary.bin_n):
        a2.annotate(str(int(n)), (x, 1.02), ha="center", fontsize=7)
    a2.set_xlabel("initial semi-major axis (au)")
    a2.set_ylabel("fraction surviving")
    a2.set_ylim(0, 1.1)
    a2.set_title("by initial a (particles per bin above)")
    a2.legend(loc="lower right", fontsize=8)
    fig.suptitle(title)
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


_CSS = ("body{font-family:sans-serif;max-width:64em;margin:2em auto;padding:0 1em;color:#222;"
        "line-height:1.4}h1{font-size:1.6em}h2{margin-top:1.6em;border-bottom:1px solid #ccc}"
        "table{border-collapse:collapse;margin:.8em 0}"
        "td,th{border:1px solid #bbb;padding:.25em .6em;text-align:left;vertical-align:top;"
        "word-break:normal;overflow-wrap:normal;hyphens:none}"
        "th{background:#eee;white-space:nowrap}th[scope=row]{font-weight:normal;"
        "background:#f6f6f6}td.long{overflow-wrap:anywhere;max-width:40em}"
        "pre{background:#f6f6f6;padding:.6em;overflow-x:auto;font-size:.85em}"
        "img{max-width:100%}.sub{color:#666}")


def _cell(c):
    text = html.escape(str(c))
    # Only long unbroken strings (hashes, paths) may wrap anywhere; words never break.
    long_ = max((len(w) for w in str(c).split()), default=0) > 32
    return f"<td class='long'>{text}</td>" if long_ else f"<td>{text}</td>"


def table_html(headers, rows):
    """An HTML table with a header row, cells escaped."""
    out = ["<table><tr>" + "".join(f"<th scope='col'>{html.escape(str(h))}</th>"
                                   for h in headers) + "</tr>"]
    for r in rows:
        out.append("<tr>" + "".join(_cell(c) for c in r) + "</tr>")
    return "".join(out) + "</table>"


def kv_html(pairs):
    """A two-column key/value table without a header row (keys as row headers)."""
    return "<table>" + "".join(f"<tr><th scope='row'>{html.escape(str(k))}</th>{_cell(v)}</tr>"
                               for k, v in pairs) + "</table>"


def page(title, sections, subtitle=None):
    """A self-contained HTML page from (heading, html) sections."""
    body = "".join(f"<h2>{html.escape(h)}</h2>{content}" for h, content in sections)
    sub = f"<p class='sub'>{html.escape(subtitle)}</p>" if subtitle else ""
    return (f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            f"<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>"
            f"<h1>{html.escape(title)}</h1>{sub}{body}</body></html>")


def _time_axis(days):
    """Times (days from the start) in one readable unit: (values, axis label)."""
    from orbitledger.runner.inputs.text import time_unit

    days = np.asarray(days, dtype=float)
    name, scale = time_unit(float(np.abs(days).max()) if days.size else 0.0)
    return days / scale, f"time ({name})"


def _years_axis(ax, max_years):
    """Label a linear x axis that holds years in one readable unit ("time (Myr)")."""
    from matplotlib.ticker import FuncFormatter

    from orbitledger.runner.inputs.text import time_unit

    name, scale = time_unit(max_years * 365.25)
    per = scale / 365.25
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v / per:g}"))
    ax.set_xlabel(f"time ({name})")


def _plain_ticks(ax):
    """Tick labels as plain numbers: no offset or "1e7" multiplier on the axis."""
    ax.ticklabel_format(axis="x", style="plain", useOffset=False)


def _marks(axes, marks, scale=1.0):
    """Vertical lines at events: marks are (days since the start, label), drawn at
    days / scale."""
    done = set()
    for t, label in marks or ():
        for ax in axes:
            ax.axvline(t / scale, color="crimson", lw=0.8, ls=":",
                       label=label if label not in done and ax is axes[0] else None)
        done.add(label)


def energy_figure(samples, title, marks=None):
    """|dE/E| against time on log-log axes, with a t^(1/2) reference line and the
    events (mergers, ejections) marked."""
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
    _marks([ax], [(tm, lab) for tm, lab in (marks or ()) if tm > 0], 365.25)
    ax.set_xlabel("time (yr)")
    ax.set_ylabel("relative energy error")
    ax.set_title(title)
    ax.legend(fontsize=8)
    fig.tight_layout()
    return fig


def elements_figure(samples, names, title, marks=None):
    """Semi-major axis, eccentricity and inclination of every body against time (a
    removed or merged body's curve ends there), events marked."""
    from orbitledger.runner.inputs.text import time_unit

    plt = _figure()
    fig, axes = plt.subplots(3, 1, figsize=(7, 7), dpi=110, sharex=True)
    days = samples["time"] - samples["time"][0]
    t, xlabel = _time_axis(days)
    _marks(list(axes), marks, time_unit(float(np.abs(days).max()) if days.size else 0.0)[1])
    for b, name in enumerate(names):
        for ax, k in zip(axes, (0, 1, 2)):
            ax.plot(t, samples["elements"][:, b, k], lw=0.8, label=name)
    for ax, lab in zip(axes, ("a (au)", "e", "i (deg)")):
        ax.set_ylabel(lab)
    fig.suptitle(title)
    # The legend sits between the title and the plots, never over a curve.
    handles, labels = axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="upper center", bbox_to_anchor=(0.5, 0.955),
               ncol=min(4, max(1, len(labels))), fontsize=7, frameon=False)
    rows = (len(labels) + 3) // 4
    for ax in axes:
        _plain_ticks(ax)
        ax.ticklabel_format(axis="y", useOffset=False)
    axes[-1].set_xlabel(xlabel)
    fig.tight_layout(rect=(0, 0, 1, 0.95 - 0.025 * rows))
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
    _years_axis(ax, float(np.max(np.abs(t))) if len(t) else 0.0)
    ax.set_ylabel("distance")
    ax.set_title(title + f" ({fit['kind']} growth)")
    ax.legend(fontsize=8)
    fig.tight_layout()
    return fig


def stability_map_figure(ds, show="megno"):
    """A stability map: a heat map of one cell variable over a one- or two-axis grid.

    show: "megno" (<Y>, colour range 0-8 by convention, 2 marked),
    "lyapunov_time" (yr, log scale) or "survival_time" (yr, log scale).
    Cells that stopped (unstable) are drawn in black in every view.
    """
    plt = _figure()
    from matplotlib.colors import LogNorm, Normalize

    var = ds[show]
    values = np.array(var.values, dtype=float)
    stopped = ds["stopped"].values.astype(bool)
    label = {"megno": "MEGNO <Y>  (2: quasi-periodic)",
             "lyapunov_time": "Lyapunov time (yr)",
             "survival_time": "survival time (yr)"}[show]
    if show == "megno":
        norm = Normalize(vmin=0.0, vmax=8.0)
    else:
        finite = values[np.isfinite(values) & (values > 0)]
        lo, hi = (finite.min(), finite.max()) if finite.size else (1.0, 10.0)
        norm = LogNorm(vmin=lo, vmax=max(hi, lo * 10))
    masked = np.ma.masked_where(stopped | ~np.isfinite(values), values)
    cmap = plt.get_cmap("viridis").copy()
    cmap.set_bad("black")
    fig, ax = plt.subplots(figsize=(7, 4.8), dpi=110)
    dims = var.dims

    def axis_label(d):
        c = ds[d]
        return f"{c.attrs.get('long_name', d)} ({c.attrs.get('units', '')})"

    if len(dims) == 2:
        x = ds[dims[1]].values
        y = ds[dims[0]].values
        mesh = ax.pcolormesh(_edges(x), _edges(y), masked, cmap=cmap, norm=norm,
                             shading="flat")
        ax.set_xlabel(axis_label(dims[1]))
        ax.set_ylabel(axis_label(dims[0]))
    else:
        x = ds[dims[0]].values
        mesh = ax.pcolormesh(_edges(x), [0.0, 1.0], masked[None, :], cmap=cmap, norm=norm,
                             shading="flat")
        ax.set_yticks([])
        ax.set_xlabel(axis_label(dims[0]))
    bar = fig.colorbar(mesh, ax=ax)
    bar.set_label(label)
    if show == "megno":
        bar.ax.axhline(2.0, color="white", lw=1)
    from orbitledger.runner.inputs.text import format_time

    reached = ds["time_reached"].values[~stopped]
    span = format_time(float(reached.min()) * 365.25) if reached.size else "-"
    ax.set_title(f"{ds.attrs.get('ensemble_name', '')}: {show.replace('_', ' ')} "
                 f"(black: stopped; the others run to at least {span})", fontsize=9)
    fig.tight_layout()
    return fig


def _edges(centres):
    """Cell edges around evenly spaced centres (one cell: +-0.5 of its value or 0.5)."""
    c = np.asarray(centres, dtype=float)
    if c.size == 1:
        h = 0.5 * abs(c[0]) or 0.5
        return np.array([c[0] - h, c[0] + h])
    mid = 0.5 * (c[1:] + c[:-1])
    return np.concatenate([[c[0] - (mid[0] - c[0])], mid, [c[-1] + (c[-1] - mid[-1])]])


def megno_figure(samples, title):
    """MEGNO <Y> and the finite-time Lyapunov exponent against time (linear axes)."""
    plt = _figure()
    t, tlabel = _time_axis(samples["time"])
    y = np.asarray(samples["megno"], dtype=float)
    lam = np.asarray(samples["lyapunov"], dtype=float) * 365.25
    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(7, 5.2), dpi=110, sharex=True)
    ax1.plot(t, y, lw=1.2, label="MEGNO <Y>")
    ax1.axhline(2.0, color="k", lw=0.8, ls="--", label="2: quasi-periodic")
    ax1.set_ylabel("<Y>")
    ax1.legend(loc="upper left", fontsize=8)
    ax2.plot(t, lam, lw=1.2, color="C1")
    ax2.set_ylabel("Lyapunov exponent (1/yr)")
    ax2.set_xlabel(tlabel)
    _plain_ticks(ax2)
    ax1.set_title(title)
    fig.tight_layout()
    return fig
