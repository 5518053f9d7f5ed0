"""Backward runs from a forward job's checkpoint, and the reversibility residual."""

import os

import pytest
from typer.testing import CliRunner

from orbitledger.runner.inputs import spec as S
from orbitledger.runner.cli import app
from orbitledger.runner.analysis.divergence import reversibility
from orbitledger.runner.errors import LedgerError
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.execution.worker import Worker
from helpers import ROOT, small_spec


@pytest.fixture
def led(tmp_path):
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    yield led
    led.close()


def tight(years):
    """The invented tightly packed Ilvar system (no stop conditions), one run."""
    text = open(os.path.join(ROOT, "jobs", "ilvar-ensemble.toml")).read()
    text = text[:text.index("[ensemble]")].replace("hill = 1.0", "hill = 0")
    return S.load_text(text.replace('length = "3000 yr"', f'length = "{years} yr"'))


def test_regular_system_returns_to_its_start_near_round_off(led):
    j = led.submit(small_spec(length="2000 yr"))
    Worker(led).run()
    b = led.submit_backward(j)
    row = led.job(b)
    assert row["dt"] < 0 and row["parent_job_id"] == j and row["total_steps"] == 73050
    Worker(led).run()
    r = reversibility(led, b)
    # 73050 steps out and back; round-off of ~1e-16 per step, amplified only
    # linearly in a regular system (common practice, no source).
    assert r["max_dx_rel"] < 1e-9 and r["max_dv_rel"] < 1e-9
    assert r["time"] == pytest.approx(2000 * 365.25, rel=1e-9)


def test_backward_from_a_middle_checkpoint(led):
    j = led.submit(small_spec(length="2000 yr"))
    Worker(led).run()
    b = led.submit_backward(j, checkpoint=5)
    assert led.job(b)["total_steps"] == 5 * 5000 and led.job(b)["parent_checkpoint"] == 5
    Worker(led).run()
    assert reversibility(led, b)["max_dx_rel"] < 1e-10
    with pytest.raises(LedgerError, match="is at the start"):
        led.submit_backward(j, checkpoint=0)


def test_chaotic_system_does_not_return_and_the_residual_grows_with_span(led):
    res = []
    for years in (30, 100):
        j = led.submit(tight(years))
        Worker(led).run()
        b = led.submit_backward(j)
        Worker(led).run()
        res.append(reversibility(led, b)["max_dx_rel"])
    assert res[1] > 1e-6            # far above round-off
    assert res[1] > 30 * res[0]     # and growing fast with span


def test_cli_backward_and_reversibility(tmp_path):
    from orbitledger.runner.ledger.workspace import init

    ws, led = init(tmp_path / "ws")
    led.submit(small_spec(length="500 yr"))
    Worker(led).run()
    led.close()
    runner = CliRunner()
    r = runner.invoke(app, ["backward", "1", "--workspace", str(ws)])
    assert r.exit_code == 0 and r.output.strip() == "2"
    assert runner.invoke(app, ["work", "--workspace", str(ws), "--quiet"]).exit_code == 0
    r = runner.invoke(app, ["reversibility", "2", "--workspace", str(ws)])
    assert r.exit_code == 0 and "Orrin b" in r.output
    r = runner.invoke(app, ["reversibility", "1", "--workspace", str(ws)])
    assert r.exit_code == 2 and "not a backward run" in r.stderr


def test_a_reversed_integrator_samples_on_its_parents_grid():
    import numpy as np

    integ = S.resolve(small_spec()).make_integrator()
    integ.advance(1234)
    back = integ.reversed()
    out_g, out_el = np.empty((20, 5)), np.empty((20, 3, 6))
    _, rows = back.advance_sampled(1234, 100, out_g, out_el, 0)
    steps = out_g[:rows, 0].astype(int)
    # Backward step k is forward step 1234 - k: samples at forward 1200, 1100, ..., 0.
    assert list(1234 - steps) == list(range(1200, -1, -100))
    again = type(back).from_state_arrays(back.state_arrays())
    assert again.sample_offset == back.sample_offset == -1234


def test_backward_from_an_interrupted_checkpoint_shares_the_forward_sample_times(led):
    import numpy as np

    from helpers import samples_bytes

    j = led.submit(small_spec(length="200 yr"))  # 10 d steps, a sample every 500
    w = Worker(led, max_steps_per_call=1234, slice_seconds=None)
    w.progress = lambda *a: setattr(w, "stop_requested", "test")
    w.run()  # stops after the second kernel call: a checkpoint off the output grid
    S_ = led.last_checkpoint(j)["step"]
    assert S_ == 2468 and S_ % 500
    fwd = led.store.read_samples(j, led.job(j)["n_samples"])
    b1, b2 = led.submit_backward(j), led.submit_backward(j)
    w = Worker(led, job_id=b1, max_steps_per_call=1000, slice_seconds=None)
    w.progress = lambda *a: setattr(w, "stop_requested", "test")
    w.run()  # interrupted once, then resumed
    Worker(led, job_id=b1).run()
    Worker(led, job_id=b2).run()
    assert samples_bytes(led, b1) == samples_bytes(led, b2)
    back = led.store.read_samples(b1, led.job(b1)["n_samples"])
    k = back["step"][1:]  # row 0 is the start itself
    assert list(S_ - k) == list(range(2000, -1, -500))
    # Same times as the forward samples, and (a regular system) the same orbits.
    order = np.argsort(S_ - k)
    assert np.allclose(back["time"][1:][order], fwd["time"][fwd["step"] <= S_],
                       rtol=0, atol=1e-9 * abs(fwd["time"]).max())
    eb, ef = back["elements"][1:][order], fwd["elements"][fwd["step"] <= S_]
    assert np.allclose(eb[..., :3], ef[..., :3], rtol=1e-9, atol=1e-9)
    # Angles compared on the circle: Orrin d's orbit is in the reference plane
    # (i = 0), so its pericentre argument sits at the 0/360 degree seam.
    turn = (eb[..., 3:] - ef[..., 3:] + 180.0) % 360.0 - 180.0
    assert np.abs(turn).max() < 1e-8
