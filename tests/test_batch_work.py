"""Workers run ensemble members as batches: every committed byte equals a run of
each member alone, on SQLite and PostgreSQL; members leave a batch at their own
stop; a pool's workers split the members.

Reproducibility checks (the batched path against the project's scalar path);
kills at random moments with members changing hands run in test_chaos and
test_ensemble, whose references are worked one member at a time.
"""

import os
import subprocess
import sys

import numpy as np
import pytest

from orbitledger.runner.analysis.integrity import verify
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.inputs import spec as S
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.ledger.workspace import init
from orbitledger.runner.store.zarr_store import state_sha256, to_storable

from helpers import ROOT, ejecting_ensemble_text, final_state, samples_bytes

ILVAR = os.path.join(ROOT, "jobs", "ilvar-ensemble.toml")


def ilvar_text(members=8, length="600 yr"):
    return open(ILVAR).read().replace("members = 16", f"members = {members}").replace(
        'length = "3000 yr"', f'length = "{length}"').replace(
        'chunk = "200000 steps"', 'chunk = "100000 steps"')


def checkpoint_rows(led, job_id):
    return [(c["idx"], c["step"], c["state_sha256"], c["samples_sha256"], c["chain_sha256"],
             c["n_samples"]) for c in led.checkpoints(job_id)]


def same_checkpoint_states(ref, a, led, b):
    """Every checkpoint of job b equals job a's state at the same step (an extra
    checkpoint, as at a hold, is compared with job a advanced to its step)."""
    ref_cks = ref.checkpoints(a)
    for ck in led.checkpoints(b):
        base = max((c for c in ref_cks if c["step"] <= ck["step"]), key=lambda c: c["step"])
        integ, _ = ref.load_integrator(a, base["idx"])
        integ.advance(ck["step"] - integ.step)
        assert state_sha256(to_storable(integ.state_arrays())) == ck["state_sha256"], \
            (b, ck["idx"], ck["step"])


def assert_same_jobs(ref, ref_ids, led, ids, same_rows=True):
    for a, b in zip(ref_ids, ids):
        ja, jb = ref.job(a), led.job(b)
        assert (ja["status"], ja["outcome"], ja["outcome_step"], ja["outcome_bodies"]) == \
            (jb["status"], jb["outcome"], jb["outcome_step"], jb["outcome_bodies"])
        if same_rows:
            assert checkpoint_rows(ref, a) == checkpoint_rows(led, b)
        else:
            same_checkpoint_states(ref, a, led, b)
        assert final_state(ref, a) == final_state(led, b)
        assert samples_bytes(ref, a) == samples_bytes(led, b)
        assert verify(led, b).ok


def megno_text():
    return ilvar_text(members=6, length="300 yr").replace('corrector = 3',
                                                          'corrector = 3\nindicator = "megno"')


@pytest.mark.parametrize("text", [ilvar_text(), ejecting_ensemble_text("batch-eject"),
                                  megno_text()], ids=["ilvar", "ejecting", "megno"])
def test_batched_members_commit_what_they_commit_alone(tmp_path, text, ledger_url):
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref")
    _, ref_ids = ref.submit_ensemble(S.load_text(text))
    Worker(ref, lanes=1).run()
    led = Ledger(ledger_url(tmp_path), tmp_path / "store")
    _, ids = led.submit_ensemble(S.load_text(text))
    # Several kernel calls per chunk (a member's stop falls inside one), and
    # batches of 4: members change batches between chunks.
    w = Worker(led, lanes=4, max_steps_per_call=7_000, slice_seconds=None)
    assert w.run() == 0
    assert_same_jobs(ref, ref_ids, led, ids)
    if "eject" in text:
        assert {led.job(j)["outcome"] for j in ids} >= {"ejection"}
    if "megno" in text:
        # The indicator was carried and sampled (samples compared above).
        megno = led.store.read_samples(ids[-1], led.job(ids[-1])["n_samples"])["megno"]
        assert len(megno) > 10 and np.isfinite(megno[1:]).all() and float(megno[-1]) > 1.0
    # Every segment was worked by this worker, several members per batch, and
    # says so in its provenance.
    segs = [s for j in ids for s in led.segments(j)]
    assert all(s["end_reason"] in ("queued", "done", "stopped") for s in segs)
    assert any('"kernel": "batched, 4 members"' in s["versions"] for s in segs)
    ref.close()
    led.close()


def test_a_member_asked_to_hold_leaves_the_batch_at_its_step(tmp_path):
    text = ilvar_text(members=4, length="300 yr")
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref")
    _, ref_ids = ref.submit_ensemble(S.load_text(text))
    Worker(ref, lanes=1).run()
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    _, ids = led.submit_ensemble(S.load_text(text))
    calls = []

    def progress(row, step, rate):
        # The first member is asked to hold during the batch's first chunk.
        calls.append(row["id"])
        if len(calls) == 3:
            led.hold(ids[0])

    w = Worker(led, lanes=4, max_steps_per_call=5_000, slice_seconds=None, progress=progress,
               heartbeat_seconds=0.0)
    w.run()
    held = led.job(ids[0])
    assert held["status"] == "held" and 0 < held["steps_done"] < held["total_steps"]
    led.release(ids[0])
    Worker(led, lanes=4).run()
    # The hold added a checkpoint at its step; every checkpoint, the samples
    # and the end are still the members' own.
    assert_same_jobs(ref, ref_ids, led, ids, same_rows=False)
    ref.close()
    led.close()


def test_members_of_a_killed_batch_are_resumed_together(tmp_path):
    # A worker killed during its batch leaves every member's lease held by a
    # dead process; the next worker takes them back as one batch (not one by
    # one on the scalar kernel), to the bytes of members run alone.
    text = ilvar_text(members=4, length="300 yr")
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref")
    _, ref_ids = ref.submit_ensemble(S.load_text(text))
    Worker(ref, lanes=1).run()
    ws, led = init(tmp_path / "ws")
    _, ids = led.submit_ensemble(S.load_text(text))
    out = subprocess.run([sys.executable, "-m", "orbitledger.runner.cli", "work", "--workspace",
                          str(ws), "--lanes", "4", "--quiet"], cwd=ROOT, capture_output=True,
                         text=True, timeout=600,
                         env=dict(os.environ, ORBITLEDGER_FAILPOINTS="first_step:1"))
    assert out.returncode != 0
    assert [led.job(j)["status"] for j in ids] == ["running"] * 4  # held by the dead worker
    Worker(led, lanes=4).run()
    for j in ids:
        segs = led.segments(j)
        assert len(segs) >= 2 and segs[0]["end_reason"] != "done"
        assert all('"kernel": "batched, 4 members"' in g["versions"] for g in segs[1:])
    assert_same_jobs(ref, ref_ids, led, ids)
    ref.close()
    led.close()


def test_batched_work_is_split_between_a_pools_workers(tmp_path):
    ws, led = init(tmp_path / "ws")
    _, ids = led.submit_ensemble(S.load_text(ilvar_text(members=8, length="300 yr")))
    log = tmp_path / "work.log"
    out = subprocess.run([sys.executable, "-m", "orbitledger.runner.cli", "work", "--workspace",
                          str(ws), "--workers", "2", "--quiet", "--log-file", str(log)],
                         cwd=ROOT, capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr
    text = log.read_text()
    assert "batch of 4 members" in text
    pids = {s["pid"] for j in ids for s in led.segments(j)}
    assert len(pids) == 2
    assert all(led.job(j)["status"] in ("done", "stopped") for j in ids)
    assert all(verify(led, j).ok for j in ids)
    shown = subprocess.run([sys.executable, "-m", "orbitledger.runner.cli", "show", str(ids[0]),
                            "--workspace", str(ws)], cwd=ROOT, capture_output=True, text=True,
                           env=dict(os.environ, COLUMNS="250"))
    assert "batched, 4 members" in shown.stdout  # (the table may wrap after "kernel")
    led.close()


def test_members_extended_during_their_last_chunk_go_on_in_the_batch(tmp_path):
    # An extension made while the batch runs its members' last chunk turns
    # their "done" into "continue": they go on (as a member alone does), and
    # end on the bytes of members run alone and extended the same way.
    text = ilvar_text(members=4, length="300 yr")

    def worked(lanes, name):
        led = Ledger(f"sqlite:///{tmp_path}/{name}.sqlite", tmp_path / name)
        _, ids = led.submit_ensemble(S.load_text(text))
        total = led.job(ids[0])["total_steps"]
        extended = []

        def progress(row, step, rate):
            if not extended and step > total - 30_000:
                for j in ids:
                    led.extend(j, total + 40_000)
                extended.append(row["id"])

        w = Worker(led, lanes=lanes, max_steps_per_call=5_000, slice_seconds=None,
                   progress=progress)
        assert w.run() == 0
        assert extended
        return led, ids

    ref, ref_ids = worked(1, "ref")
    led, ids = worked(4, "batched")
    assert all(led.job(j)["steps_done"] == ref.job(r)["steps_done"] > 0
               for j, r in zip(ids, ref_ids))
    assert_same_jobs(ref, ref_ids, led, ids, same_rows=False)
    ref.close()
    led.close()


def test_an_error_in_a_batch_hands_every_claim_back(tmp_path, monkeypatch):
    from orbitledger.runner.store import sampling

    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    _, ids = led.submit_ensemble(S.load_text(ilvar_text(members=4, length="300 yr")))

    def broken(*args, **kwargs):
        raise MemoryError("planted")

    monkeypatch.setattr(sampling, "advance_members", broken)
    from orbitledger.runner.execution import batches

    monkeypatch.setattr(batches, "advance_members", broken)
    with pytest.raises(MemoryError, match="planted"):
        Worker(led, lanes=4).run()
    for j in ids:
        row = led.job(j)
        assert row["status"] == "queued" and row["owner"] is None, row["status"]
        assert all(s["ended_at"] is not None for s in led.segments(j))
    led.close()


def test_a_batchs_members_are_claimed_in_one_transaction(tmp_path, ledger_url):
    from sqlalchemy import event

    from orbitledger.runner.execution import batches
    from orbitledger.runner.ledger import provenance

    led = Ledger(ledger_url(tmp_path), tmp_path / "store")
    _, ids = led.submit_ensemble(S.load_text(ejecting_ensemble_text("one-tx", members=8)))
    other = led.claim("elsewhere:1", job_id=ids[5], provenance=provenance.collect())
    w = Worker(led, lanes=8)
    first = led.claim(w.owner, provenance=provenance.collect())
    commits = []
    listener = lambda conn: commits.append(conn)  # noqa: E731
    event.listen(led.engine, "commit", listener)
    try:
        mates = batches.claim_mates(w, first)
    finally:
        event.remove(led.engine, "commit", listener)
    assert len(commits) == 1  # six members claimed in one transaction (was one each)
    got = sorted(c.job_id for c in mates)
    assert got == sorted(set(ids) - {first.job_id, other.job_id})  # the taken one left out
    for c in mates:
        row = led.job(c.job_id)
        assert (row["status"], row["owner"], row["fence"]) == ("running", w.owner, c.fence)
        assert c.segment_id is not None and c.fence == 1
    assert led.job(other.job_id)["owner"] == "elsewhere:1"
    # Nothing is claimed twice: a second worker asking now gets none of them.
    assert led.claim_each("late:2", ids) == []
    for c in mates + [first, other]:
        led.give_back(c)
    led.close()
