"""Ledger conformance: claims, leases, fencing, transitions, extend, hold, cancel.

Workers are driven synchronously in-process with an injected clock where
timing matters. The same class runs against every backend of the ledger_url fixture (conftest.py).
"""

import numpy as np
import pytest

from orbitledger.runner.errors import FencedError, LedgerError, TransitionError
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.ledger.status import TRANSITIONS, USER_OPS, WORKER_OPS, JobStatus, check_transition
from orbitledger.runner.execution.worker import Worker
from helpers import assert_no_double_commit, final_state, samples_bytes, small_spec


@pytest.fixture
def ledger(ledger_url, tmp_path):
    led = Ledger(ledger_url(tmp_path), tmp_path / "store", lease_seconds=30)
    yield led
    led.close()


class TestLedgerConformance:
    def test_submit_writes_checkpoint_zero_and_first_sample(self, ledger):
        jid = ledger.submit(small_spec())
        row = ledger.job(jid)
        assert row["status"] == "queued" and row["steps_done"] == 0 and row["n_samples"] == 1
        ck = ledger.last_checkpoint(jid)
        assert ck["idx"] == 0 and ck["step"] == 0
        integ, _ = ledger.load_integrator(jid)
        assert integ.step == 0

    def test_run_to_done_commits_every_chunk(self, ledger):
        jid = ledger.submit(small_spec())
        Worker(ledger).run()
        row = ledger.job(jid)
        assert row["status"] == "done" and row["outcome"] == "survived"
        assert row["steps_done"] == row["total_steps"] == 73050
        # 73050 steps in chunks of 5000: 15 chunks; samples every 500 steps plus t=0.
        assert row["n_checkpoints"] == 15
        assert row["n_samples"] == 73050 // 500 + 1
        assert_no_double_commit(ledger, jid)

    def test_claim_gives_new_fence_and_takeover_after_expiry(self, ledger):
        jid = ledger.submit(small_spec())
        a = ledger.claim("A", now=1000.0)
        assert a.fence == 1 and a.job_id == jid
        assert ledger.claim("B", now=1010.0) is None  # lease still held
        b = ledger.claim("B", now=1031.0)  # expired at 1030
        assert b.fence == 2 and b.job_id == jid
        with pytest.raises(FencedError):
            ledger.heartbeat(a, now=1032.0)
        assert ledger.heartbeat(b, now=1032.0) is None
        assert any(e["kind"] == "lease_taken_over" for e in ledger.events(jid))

    @pytest.mark.damages_store  # commits made-up hashes, with nothing in the store
    def test_worker_whose_lease_was_taken_over_cannot_commit(self, ledger):
        jid = ledger.submit(small_spec())
        a = ledger.claim("A", now=0.0)
        b = ledger.claim("B", now=31.0)
        kw = dict(idx=1, step=5000, time_=50000.0, state_hash="x" * 64, samples_hash="y" * 64,
                  n_samples=11, energy_error=0.0, angmom_error=0.0, max_energy_error=0.0,
                  max_angmom_error=0.0, then="continue")
        with pytest.raises(FencedError):
            ledger.commit_checkpoint(a, now=32.0, **kw)
        assert ledger.job(jid)["steps_done"] == 0
        ledger.commit_checkpoint(b, now=32.0, **kw)
        assert ledger.job(jid)["steps_done"] == 5000
        with pytest.raises(LedgerError, match="does not follow"):
            ledger.commit_checkpoint(b, now=33.0, **kw)  # the same stretch twice

    def test_fenced_worker_discards_its_chunk(self, ledger):
        # A real worker, driven with an injected clock that jumps past its
        # lease mid-chunk while another worker takes the job over.
        jid = ledger.submit(small_spec())
        clock = [0.0]
        stolen = {}

        def progress(row, step, rate):
            if not stolen:
                clock[0] = 100.0
                stolen["claim"] = ledger.claim("thief", now=100.0)

        w = Worker(ledger, owner="victim", clock=lambda: clock[0], progress=progress,
                   max_steps_per_call=500, heartbeat_seconds=1e9)
        claim = ledger.claim("victim", now=0.0)
        assert w.run_claim(claim) == "fenced"
        row = ledger.job(jid)
        assert row["steps_done"] == 0 and row["owner"] == "thief" and row["fence"] == 2

    def test_breadth_first_claims_least_advanced(self, ledger):
        j1 = ledger.submit(small_spec(name="one"))
        j2 = ledger.submit(small_spec(name="two"))
        w = Worker(ledger, job_id=j1)
        w.run()
        assert ledger.claim("x", order="breadth").job_id == j2

    def test_hold_release_cancel_and_transitions(self, ledger):
        jid = ledger.submit(small_spec())
        assert ledger.hold(jid) == "held"
        assert ledger.claim("w") is None
        ledger.release(jid)
        assert ledger.job(jid)["status"] == "queued"
        claim = ledger.claim("w")
        assert ledger.hold(jid) == "requested"  # running: applied at the next safe point
        w = Worker(ledger, heartbeat_seconds=0.0, max_steps_per_call=500)
        assert w.run_claim(claim) == JobStatus.HELD
        row = ledger.job(jid)
        assert row["status"] == "held" and 0 < row["steps_done"] < row["total_steps"]
        assert ledger.cancel(jid) == "cancelled"
        with pytest.raises(TransitionError, match="is cancelled, so it cannot be released"):
            ledger.release(jid)

    def test_extend_is_exact(self, ledger):
        # Run to T1, extend to T2 == a straight run to T2, bit for bit.
        short = ledger.submit(small_spec(name="short", length="1000 yr"))
        Worker(ledger).run()
        assert ledger.job(short)["status"] == "done"
        straight = ledger.submit(small_spec(name="straight", length="2000 yr"))
        ledger.extend(short, ledger.job(straight)["total_steps"])
        assert ledger.job(short)["status"] == "queued"
        Worker(ledger).run()
        assert ledger.job(short)["status"] == ledger.job(straight)["status"] == "done"
        assert final_state(ledger, short) == final_state(ledger, straight)
        assert samples_bytes(ledger, short) == samples_bytes(ledger, straight)
        with pytest.raises(LedgerError, match="must be later"):
            ledger.extend(short, 10)

    def test_over_budget_is_held_with_reason(self, ledger):
        jid = ledger.submit(small_spec(budget=1e-14, corrector=0))
        Worker(ledger).run()
        row = ledger.job(jid)
        assert row["status"] == "held"
        assert "exceeds the budget 1e-14" in row["reason"]

    def test_over_budget_stop(self, ledger):
        jid = ledger.submit(small_spec(budget=1e-14, corrector=0, on_exceed="stop"))
        Worker(ledger).run()
        row = ledger.job(jid)
        assert row["status"] == "stopped" and row["outcome"] == "over_budget"

    def test_deadline_checkpoints_and_reports_work_left(self, ledger):
        jid = ledger.submit(small_spec(length="20000 yr"))
        t = [0.0]

        def clock():
            t[0] += 0.01
            return t[0]

        w = Worker(ledger, deadline=0.5, clock=clock, max_steps_per_call=1000)
        assert w.run() == 3
        row = ledger.job(jid)
        assert row["status"] == "queued" and 0 < row["steps_done"] < row["total_steps"]
        assert row["owner"] is None and row["lease_expires"] is None

    def test_resume_in_process_equals_straight(self, ledger):
        a = ledger.submit(small_spec(name="a"))
        b = ledger.submit(small_spec(name="b"))
        Worker(ledger, job_id=a).run()
        t = [0.0]

        def clock():
            t[0] += 0.05
            return t[0]

        while ledger.job(b)["status"] != "done":
            Worker(ledger, job_id=b, deadline=t[0] + 1.0, clock=clock,
                   max_steps_per_call=777).run()
        assert len(ledger.segments(b)) > 3
        assert final_state(ledger, a) == final_state(ledger, b)
        assert samples_bytes(ledger, a) == samples_bytes(ledger, b)


def test_transition_table_is_closed_and_checked():
    ops = sorted(WORKER_OPS | USER_OPS)
    for old, news in TRANSITIONS.items():
        for new in JobStatus:
            for op in ops:
                if op in news.get(new, ()):
                    check_transition(1, old, new, op)
                else:
                    with pytest.raises(TransitionError):
                        check_transition(1, old, new, op)
    # Users never take a running job from its worker, nor re-queue a finished one.
    for op in USER_OPS:
        assert not any(op in allowed for allowed in TRANSITIONS[JobStatus.RUNNING].values())
    assert TRANSITIONS[JobStatus.DONE] == {JobStatus.QUEUED: {"extend"}}


def test_samples_are_readable_by_xarray(tmp_path):
    import xarray as xr

    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    jid = led.submit(small_spec())
    Worker(led).run()
    ds = xr.open_zarr(str(led.store.job_path(jid) / "samples"), consolidated=False)
    assert ds.sizes["sample"] == led.job(jid)["n_samples"]
    assert ds["elements"].dims == ("sample", "body", "element")
    assert np.all(np.abs(ds["energy_error"].values) < 1e-6)
    led.close()
