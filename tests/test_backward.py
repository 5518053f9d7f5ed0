"""Backward runs from a forward job's checkpoint, and the reversibility residual."""

import os

import pytest
from typer.testing import CliRunner

from runner import spec as S
from runner.cli import app
from runner.compare import reversibility
from runner.errors import LedgerError
from runner.ledger import Ledger
from runner.worker import Worker
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
    from runner.workspace import init

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
