"""The HTML report opens in headless Chromium and renders its plots."""

import subprocess

import numpy as np
from typer.testing import CliRunner

from orbitledger.runner.cli import app
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.ledger.workspace import init
from helpers import small_spec


def test_report_renders_in_headless_chromium(tmp_path, chromium):
    ws, led = init(tmp_path / "ws")
    # 20000 steps: a whole number of outputs, so the backward run samples the
    # same times as the forward one.
    led.submit(small_spec(length="200000 d").model_copy(
        update={"description": "An invented three-planet system around Orrin"}))
    Worker(led).run()
    led.submit_backward(1)
    Worker(led).run()
    led.close()
    page = tmp_path / "report.html"
    r = CliRunner().invoke(app, ["report", "1", "--to", str(page), "--compare", "2",
                                 "--workspace", str(ws)])
    assert r.exit_code == 0, r.output
    html = page.read_text()
    assert html.count("data:image/png;base64,") == 3  # self-contained: no external files
    for word in ("Provenance", "Audit", "Divergence from job 2", "numba",
                 # the inputs: description, bodies as given, settings with the stops
                 "Inputs", "An invented three-planet system", "System as specified", "Orrin c",
                 "0.04", "stop: escape", "energy budget", "Initial conditions",
                 "store check (verify)", "checkpoints: hash chain"):
        assert word in html, word
    assert "<th scope='col'></th>" not in html  # no empty header cells
    assert "break-word" not in html  # words never break inside a cell
    shot = tmp_path / "shot.png"
    subprocess.run([chromium, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                    "--no-first-run", "--disable-background-networking",
                    "--disable-component-update", "--disable-sync",
                    f"--user-data-dir={tmp_path / 'profile'}", "--hide-scrollbars",
                    "--window-size=1200,3200", f"--screenshot={shot}", page.as_uri()],
                   capture_output=True, timeout=120, check=True)
    import matplotlib.image as mpimg

    img = mpimg.imread(str(shot))[..., :3]
    assert img.shape[0] >= 3000 and img.shape[1] >= 1000
    non_white = (img.sum(axis=2) < 2.9).mean()
    assert non_white > 0.03  # not blank
    # Plot lines in matplotlib's default blue (#1f77b4) are on the page: the
    # images were decoded and drawn, not just the tables.
    blue = (img[..., 2] > 0.55) & (img[..., 0] < 0.3) & (img[..., 1] > 0.3)
    assert blue.sum() > 2000, blue.sum()


def test_plots_as_png_and_svg(tmp_path):
    ws, led = init(tmp_path / "ws")
    led.submit(small_spec())
    Worker(led).run()
    led.close()
    for kind in ("energy", "elements"):
        for ext in ("png", "svg"):
            f = tmp_path / f"{kind}.{ext}"
            r = CliRunner().invoke(app, ["plot", "1", "--kind", kind, "--to", str(f),
                                         "--workspace", str(ws)])
            assert r.exit_code == 0, r.output
            head = f.read_bytes()[:8]
            assert head.startswith(b"\x89PNG") if ext == "png" else b"<?xml" in head


def test_time_axes_read_in_one_unit_without_an_offset():
    import matplotlib

    matplotlib.use("Agg")
    from orbitledger.runner.presentation import plots

    n = 50
    samples = {"time": np.linspace(0.0, 2.5e7 * 365.25, n),
               "elements": np.ones((n, 2, 6))}
    fig = plots.elements_figure(samples, ["Orrin b", "Orrin c"], "t")
    fig.canvas.draw()
    ax = fig.axes[-1]
    assert ax.get_xlabel() == "time (Myr)"
    assert ax.xaxis.get_offset_text().get_text() == ""  # no "1e7" beside the axis
    assert max(float(t.get_position()[0]) for t in ax.get_xticklabels()) <= 30
