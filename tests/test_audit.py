"""Audit: hash chain and store verification, replay of real checkpoints."""

import os

import pytest

from typer.testing import CliRunner

from orbitledger.runner.analysis.integrity import replay, verify
from orbitledger.runner.cli import app
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.ledger.workspace import init
from helpers import small_spec


def _job(tmp_path):
    ws, led = init(tmp_path / "ws")
    j = led.submit(small_spec())
    Worker(led).run()
    return ws, led, j


def test_intact_job_verifies_and_replays(tmp_path):
    ws, led, j = _job(tmp_path)
    rep = verify(led, j)
    assert rep.ok and rep.checked == led.job(j)["n_checkpoints"] + 1
    res = replay(led, j)
    assert len(res) == led.job(j)["n_checkpoints"] and all(ok for _, ok in res)
    assert [k for k, _ in replay(led, j, sample=3, seed=1)] != []
    r = CliRunner().invoke(app, ["replay", "1", "--workspace", str(ws), "--checkpoint", "4"])
    assert r.exit_code == 0 and "checkpoint 4 -> 5: reproduced bit for bit" in r.output
    led.close()


@pytest.mark.damages_store
def test_flipped_bit_is_named_by_verify(tmp_path):
    ws, led, j = _job(tmp_path)
    ck = led.checkpoints(j)[6]
    d = led.store.job_path(j) / "checkpoints" / f"{ck['idx']:08d}-{ck['fence']}" / "c"
    path = [os.path.join(r, f) for r, _, fs in os.walk(d) for f in fs][0]
    data = bytearray(open(path, "rb").read())
    data[40] ^= 0x10
    open(path, "wb").write(bytes(data))
    rep = verify(led, j)
    assert rep.first_bad == 6 and "does not match its recorded hash" in rep.problem
    r = CliRunner().invoke(app, ["verify", "1", "--workspace", str(ws)])
    assert r.exit_code == 1 and "checkpoint 6 is bad" in r.stderr
    led.close()


@pytest.mark.damages_store
def test_truncated_sample_chunk_is_named(tmp_path):
    ws, led, j = _job(tmp_path)
    d = led.store.job_path(j) / "samples" / "energy_error" / "c"
    path = [os.path.join(r, f) for r, _, fs in os.walk(d) for f in fs][0]
    open(path, "r+b").truncate(100)
    rep = verify(led, j)
    assert not rep.ok and rep.first_bad is not None
    assert "samples" in rep.problem or "could not" in rep.problem or "damaged" in rep.problem
    led.close()


@pytest.mark.damages_store
def test_tampered_chain_is_named(tmp_path):
    ws, led, j = _job(tmp_path)
    from orbitledger.runner.ledger.db import checkpoints

    with led.engine.begin() as conn:
        conn.execute(checkpoints.update().where(
            (checkpoints.c.job_id == j) & (checkpoints.c.idx == 3)).values(
                chain_sha256="0" * 64))
    rep = verify(led, j)
    assert rep.first_bad == 3 and "chain" in rep.problem
    led.close()


def test_audit_command_reports_verdicts(tmp_path):
    ws, led, j = _job(tmp_path)
    led.close()
    r = CliRunner().invoke(app, ["audit", "1", "--workspace", str(ws)])
    assert r.exit_code == 0, r.output
    assert "energy" in r.output and "within budget" in r.output
