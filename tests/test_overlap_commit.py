"""Commits behind the kernel: a chunk's store write and ledger commit run on the
worker's helper thread while the kernel goes on with the next chunk (or, for an
ensemble member handed back, the next member).

What must hold: the same bytes as commits made one after the other; a kill at
any point of a commit that runs behind the kernel loses nothing; a hold applied
at such a commit discards the chunk computed meanwhile; a lease lost meanwhile
discards it too and never lets the old worker write after the new one.
"""

import logging
import random
import signal
import time

import pytest

from orbitledger.runner import defaults
from orbitledger.runner.analysis.integrity import verify
from orbitledger.runner.inputs import spec as S
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.ledger.status import JobStatus
from orbitledger.runner.ledger.workspace import init
from orbitledger.runner.execution.worker import Worker
from helpers import (assert_no_double_commit, ejecting_ensemble_text, final_state,
                     samples_bytes, small_spec_text, spawn_work)

CHUNK = 2000


def job_text():
    # 1000 yr of 10-day steps: 37 chunks of 2000 steps; a sample every 100 steps.
    return small_spec_text(name="behind", length="2000 yr", chunk=f"{CHUNK} steps",
                           output="100 steps")


def ensemble_text():
    return ejecting_ensemble_text("behind-ens", members=3)


def submit(led):
    ids = [led.submit(S.load_text(job_text()))]
    _, members = led.submit_ensemble(S.load_text(ensemble_text()))
    return ids + list(members)


def ledger_bytes(led, j):
    """Everything committed of job j that a reader sees, as comparable values."""
    cks = [(c["idx"], c["step"], c["state_sha256"], c["samples_sha256"], c["n_samples"])
           for c in led.checkpoints(j)]
    row = led.job(j)
    return (final_state(led, j), samples_bytes(led, j), cks,
            (row["status"], row["outcome"], row["outcome_step"], row["steps_done"]))


@pytest.fixture(scope="module")
def serial(tmp_path_factory):
    """The reference: every commit made before the kernel goes on."""
    d = tmp_path_factory.mktemp("serial")
    led = Ledger(f"sqlite:///{d}/ref.sqlite", d / "store")
    ids = submit(led)
    saved = defaults.OVERLAP_COMMIT_BYTES
    defaults.OVERLAP_COMMIT_BYTES = -1  # nothing is small enough to go behind
    try:
        Worker(led, lanes=1).run()
    finally:
        defaults.OVERLAP_COMMIT_BYTES = saved
    out = [ledger_bytes(led, j) for j in ids]
    led.close()
    return out


def behind_lines(caplog):
    """Checkpoint log lines written by the helper thread (commits behind the kernel)."""
    return [r for r in caplog.records if r.name == "orbitledger.work"
            and "checkpoint" in r.getMessage() and r.threadName.startswith("store-helper")]


def test_commits_behind_the_kernel_write_what_serial_commits_write(tmp_path, serial, caplog,
                                                                    ledger_url):
    # Reproducibility of the write path (the code against itself): the same
    # checkpoints, hashes, states and samples whether commits wait or not.
    led = Ledger(ledger_url(tmp_path), tmp_path / "store")
    ids = submit(led)
    with caplog.at_level(logging.INFO, logger="orbitledger.work"):
        assert Worker(led, lanes=1).run() == 0
    behind = behind_lines(caplog)
    # All but the last chunk of the single job, and the members' hand-backs.
    assert len(behind) >= 36 + 3, len(behind)
    for j, ref in zip(ids, serial):
        assert ledger_bytes(led, j) == ref
        assert_no_double_commit(led, j)
        assert verify(led, j).ok, verify(led, j).problem
    led.close()


def test_a_hold_applied_behind_the_kernel_discards_the_chunk_computed_meanwhile(tmp_path,
                                                                                 serial):
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    ids = submit(led)
    jid = ids[0]
    seen = []

    def progress(row, step, rate):
        # During the first chunk: the hold is read by that chunk's commit,
        # which runs while the kernel computes the second chunk.
        if not seen:
            assert led.hold(jid) == "requested"
        seen.append(step)

    w = Worker(led, lanes=1, job_id=jid, progress=progress, max_steps_per_call=500,
               heartbeat_seconds=1e9)
    claim = led.claim(w.owner, job_id=jid)
    assert w.run_claim(claim) == JobStatus.HELD
    row = led.job(jid)
    assert row["status"] == "held" and row["steps_done"] == CHUNK and row["n_checkpoints"] == 1
    assert max(seen) >= 2 * CHUNK  # the second chunk was computed, then discarded
    assert verify(led, jid).ok
    led.release(jid)
    Worker(led, lanes=1, job_id=jid).run()
    assert ledger_bytes(led, jid) == serial[0]
    led.close()


def _extend_in_last_chunk(led, jid, old_total, new_total, extended):
    """A progress callback that extends job jid to new_total during its last
    chunk, once the chunk before it is committed (its commit also runs
    behind), so that only the last commit sees it; appends the step."""

    def progress(row, step, rate):
        if step > old_total - CHUNK // 2 and not extended:
            before_last = (old_total // CHUNK) * CHUNK
            deadline = time.time() + 60
            while led.job(jid)["steps_done"] < before_last and time.time() < deadline:
                time.sleep(0.005)
            led.extend(jid, new_total)
            extended.append(step)

    return progress


def test_a_job_extended_while_its_last_commit_runs_behind_is_gone_on_with(tmp_path):
    # The last chunk's commit ("done") runs behind the worker's next claim; an
    # extension made during that chunk turns it into "continue" in the ledger.
    # The worker has left the claim, so the job is handed back and claimed
    # again: it ends done at the new end, with the bytes of a run made
    # straight to the new end (the code against itself).
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    jid = led.submit(S.load_text(job_text()))
    old_total = led.job(jid)["total_steps"]
    new_total = old_total + 3 * CHUNK + 123
    extended = []
    progress = _extend_in_last_chunk(led, jid, old_total, new_total, extended)
    w = Worker(led, lanes=1, progress=progress, max_steps_per_call=200)
    assert w.run() == 0
    assert extended
    row = led.job(jid)
    assert row["status"] == "done" and row["steps_done"] == new_total
    assert [s for j, s in w.results if j == jid][-1] == JobStatus.DONE
    events = [e["kind"] for e in led.events(jid)]
    assert "lease_taken_over" not in events  # handed back, not left to lapse
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref")
    rid = ref.submit(S.load_text(job_text()))
    ref.extend(rid, new_total)
    Worker(ref).run()
    assert final_state(led, jid) == final_state(ref, rid)
    assert samples_bytes(led, jid) == samples_bytes(ref, rid)
    assert verify(led, jid).ok, verify(led, jid).problem
    led.close()
    ref.close()


def test_a_hold_asked_for_between_that_commit_and_the_hand_back_is_what_is_recorded(tmp_path):
    # As above, but a hold is asked for after the extended last commit lands
    # and before the worker hands the job back: the hand-back applies it, and
    # the worker's result and the segment's end say "held", not "queued".
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    jid = led.submit(S.load_text(job_text()))
    old_total = led.job(jid)["total_steps"]
    new_total = old_total + 3 * CHUNK
    extended = []
    commit = led.commit_checkpoint

    def commit_then_hold(claim, **fields):
        result = commit(claim, **fields)
        if fields["then"] == "done" and extended and result.status == JobStatus.RUNNING:
            led.hold(jid, reason="operator")
        return result

    led.commit_checkpoint = commit_then_hold
    progress = _extend_in_last_chunk(led, jid, old_total, new_total, extended)
    w = Worker(led, lanes=1, progress=progress, max_steps_per_call=200)
    assert w.run() == 0
    assert extended
    row = led.job(jid)
    assert row["status"] == "held" and row["steps_done"] == old_total
    assert [s for j, s in w.results if j == jid][-1] == JobStatus.HELD
    seg = led.segments(jid)[-1]
    assert seg["end_reason"] == "held" and seg["end_step"] == old_total
    assert verify(led, jid).ok, verify(led, jid).problem
    led.close()


def test_a_lease_lost_behind_the_kernel_discards_the_chunk(tmp_path, serial, ledger_url):
    # The lease is taken over while the first chunk's commit may still be
    # running behind the kernel: whichever lands first, the old worker writes
    # nothing after the new owner's claim and the result is the reference.
    led = Ledger(ledger_url(tmp_path), tmp_path / "store")
    jid = submit(led)[0]
    clock = [0.0]
    stolen = {}

    def progress(row, step, rate):
        if step > CHUNK and not stolen:
            clock[0] = 100.0
            stolen["claim"] = led.claim("thief", now=100.0)

    w = Worker(led, lanes=1, owner="victim", clock=lambda: clock[0], progress=progress,
               max_steps_per_call=200, heartbeat_seconds=1e9)
    claim = led.claim("victim", now=0.0, job_id=jid)
    assert w.run_claim(claim) == "fenced"
    row = led.job(jid)
    assert row["owner"] == "thief" and row["fence"] == 2 and row["steps_done"] in (0, CHUNK)
    thief = Worker(led, lanes=1, owner="thief")
    assert thief.run_claim(stolen["claim"]) == JobStatus.DONE
    assert ledger_bytes(led, jid) == serial[0]
    assert verify(led, jid).ok
    led.close()


# The points of a commit; with a count of 2 or more the commit killed runs
# behind the kernel (the first chunk's commit is already behind for the job).
POINTS = ["before_store_write", "mid_store_write", "after_store_write", "in_commit",
          "before_commit", "after_commit"]


@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_kills_inside_commits_behind_the_kernel_lose_nothing(backend, tmp_path, serial, request):
    db = None
    if backend == "postgresql":
        from conftest import new_pg_database

        db = new_pg_database(request.getfixturevalue("pg_server"))
    ws, led = init(tmp_path / "ws", db)
    ids = submit(led)
    rng = random.Random(20261203)
    kills = 0
    # Each point killed at a commit that runs behind the kernel (count 2-5),
    # one process at a time, then two processes at once so members change
    # hands between workers, until every job has ended.
    modes = [f"{p}:{rng.randint(2, 5)}" for p in POINTS]
    for mode in modes + [None] * 10:
        if all(led.job(j)["status"] in ("done", "stopped") for j in ids):
            break
        procs = [spawn_work(ws, db, mode)] if mode else [spawn_work(ws, db), spawn_work(ws, db)]
        for p in procs:
            rc = p.wait(timeout=300)
            kills += rc == -signal.SIGKILL
            assert rc in (0, 3, -signal.SIGKILL), p.stderr.read().decode()
    assert kills >= len(POINTS) - 1, kills  # a point may fall after the last commit
    for j, ref in zip(ids, serial):
        assert ledger_bytes(led, j) == ref
        assert_no_double_commit(led, j)
        assert verify(led, j).ok, verify(led, j).problem
        row = led.job(j)
        assert row["owner"] is None and row["lease_expires"] is None
    led.close()
