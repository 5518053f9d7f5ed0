"""Nothing lost: jobs that change hands, status changes only by the table,
damaged metadata, lapsed leases and stop signals to a pool of workers.

Each test here reproduces a defect that once lost data or let a command
change a job it must not touch.
"""

import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import zarr

from orbitledger.runner.ledger import provenance
from orbitledger.runner.inputs import spec as S
from orbitledger.runner.analysis.integrity import verify
from orbitledger.runner.errors import TransitionError
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.ledger.status import JobStatus
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.ledger.workspace import init
from helpers import ROOT, cli, final_state, samples_bytes, small_spec, small_spec_text, stepping_clock
from test_ensemble import ensemble_text


def _ledgers(tmp_path, url_of, n):
    url = url_of(tmp_path)
    return [Ledger(url, tmp_path / "store") for _ in range(n)]


def test_members_changing_hands_keep_every_sample(tmp_path, ledger_url):
    # Two worker "processes" (two ledgers, two stores, two caches) take the
    # members of an ensemble in turns, so every chunk of every member is
    # written by a different store than the one before. Compared byte for
    # byte with one worker doing everything.
    a, b = _ledgers(tmp_path, ledger_url, 2)
    text = ensemble_text(members=3, length="1500 yr")
    _, ids = a.submit_ensemble(S.load_text(text))
    workers = [Worker(a, owner="host-a:1"), Worker(b, owner="host-b:2")]
    turn = 0
    while True:
        w = workers[turn % 2]
        claim = w.ledger.claim(w.owner)
        if claim is None:
            break
        w.run_claim(claim)
        turn += 1
    assert turn > 2 * len(ids)
    ref_dir = tmp_path / "ref"
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", ref_dir / "store")
    _, ref_ids = ref.submit_ensemble(S.load_text(text))
    Worker(ref).run()
    for j, r in zip(ids, ref_ids):
        assert verify(a, j).ok, verify(a, j).problem
        assert final_state(a, j) == final_state(ref, r)
        assert samples_bytes(a, j) == samples_bytes(ref, r)
    for led in (a, b, ref):
        led.close()


def test_release_of_a_done_job_is_refused(tmp_path):
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    jid = led.submit(small_spec(length="200 yr"))
    Worker(led).run()
    with pytest.raises(TransitionError, match="is done, so it cannot be released; you can "
                                              "extend it"):
        led.release(jid)
    assert led.job(jid)["status"] == "done"
    assert Worker(led).run() == 0  # nothing to claim: the done job was not re-queued
    led.close()


def test_release_of_a_running_job_leaves_it_with_its_worker(tmp_path, ledger_url):
    led = Ledger(ledger_url(tmp_path), tmp_path / "store")
    jid = led.submit(small_spec(length="400 yr"))
    claim = led.claim("host-w:7")
    with pytest.raises(TransitionError, match="is running, so it cannot be released"):
        led.release(jid)
    row = led.job(jid)
    assert row["status"] == "running" and row["owner"] == "host-w:7"
    assert led.claim("host-x:8") is None  # nobody else can take it
    assert led.hold(jid) == "requested"
    assert led.job(jid)["status"] == "running"  # the worker applies it at its next commit
    assert led.release(jid) == "hold request withdrawn"
    assert led.hold(jid) == "requested"
    assert Worker(led, owner="host-w:7").run_claim(claim) == JobStatus.HELD
    row = led.job(jid)
    assert row["status"] == "held" and row["owner"] is None and row["lease_expires"] is None
    led.close()


def test_release_and_cancel_of_final_jobs_are_one_line_errors(tmp_path):
    ws = tmp_path / "ws"
    assert cli("init", "--workspace", ws).returncode == 0
    spec = tmp_path / "s.toml"
    spec.write_text(small_spec_text(length="100 yr"))
    assert cli("submit", spec, "--workspace", ws).returncode == 0
    assert cli("work", "--workspace", ws, "--quiet").returncode == 0
    for verb in ("release", "cancel", "hold"):
        res = cli(verb, "1", "--workspace", ws)
        assert res.returncode == 2, res
        lines = res.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("error: job 1 is done"), res.stderr
    assert "done" in cli("status", "--workspace", ws).stdout


def test_lapsed_lease_closes_the_dead_workers_segment(tmp_path, ledger_url):
    led = Ledger(ledger_url(tmp_path), tmp_path / "store", lease_seconds=10)
    jid = led.submit(small_spec(length="400 yr"))
    first = led.claim("host-gone:1", now=100.0, provenance=provenance.collect())
    assert led.claim("host-new:2", now=105.0) is None  # lease still held
    second = led.claim("host-new:2", now=111.0, provenance=provenance.collect())
    assert second.job_id == jid and second.fence == first.fence + 1
    segs = led.segments(jid)
    old = next(s for s in segs if s["id"] == first.segment_id)
    assert old["end_reason"] == "lease_expired" and old["end_step"] == 0
    assert old["ended_at"] == 111.0
    new = next(s for s in segs if s["id"] == second.segment_id)
    assert new["ended_at"] is None
    led.close()


def test_a_pending_cancel_of_a_dead_workers_job_is_applied_at_lapse(tmp_path):
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store", lease_seconds=10)
    jid = led.submit(small_spec(length="400 yr"))
    led.claim("host-gone:1", now=100.0, provenance=provenance.collect())
    assert led.cancel(jid, now=101.0) == "requested"
    assert led.claim("host-new:2", now=120.0) is None  # applied, not claimed
    row = led.job(jid)
    assert row["status"] == "cancelled" and row["owner"] is None
    assert [s["end_reason"] for s in led.segments(jid)] == ["lease_expired"]
    led.close()


def test_cancelled_job_keeps_exactly_its_committed_rows(tmp_path):
    import xarray as xr

    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    jid = led.submit(small_spec(length="2000 yr"))
    Worker(led, deadline=0.6, clock=stepping_clock(), max_steps_per_call=1000).run()
    assert led.hold(jid) == "held"
    assert led.cancel(jid) == "cancelled"
    n = led.job(jid)["n_samples"]
    assert 1 < n < 1400
    ds = xr.open_zarr(str(led.store.job_path(jid) / "samples"), consolidated=False)
    assert ds.sizes["sample"] == n
    assert not np.isnan(ds["time"].values).any()
    led.close()


@pytest.mark.damages_store
@pytest.mark.parametrize("which", ["job", "samples/time", "samples/elements", "samples"])
def test_damaged_metadata_is_one_line_and_holds_the_job(tmp_path, which):
    ws, led = init(tmp_path / "ws")
    jid = led.submit(small_spec(length="3000 yr"))
    Worker(led, deadline=0.4, clock=stepping_clock(), max_steps_per_call=1000).run()
    assert led.job(jid)["status"] == "queued"
    base = led.store.job_path(jid)
    meta = (base if which == "job" else base / which) / "zarr.json"
    meta.write_text(meta.read_text()[:57])
    res = cli("verify", str(jid), "--workspace", ws)
    lines = res.stderr.strip().splitlines()
    assert res.returncode == 1 and len(lines) == 1, res.stderr
    assert f"job {jid}" in lines[0] and str(meta) in lines[0], lines[0]
    res = cli("work", "--workspace", ws, "--quiet")
    assert res.returncode == 0, res.stderr
    row = led.job(jid)
    assert row["status"] == "held", row
    assert str(meta) in row["reason"], row["reason"]
    led.close()


@pytest.mark.damages_store
def test_verify_names_the_first_checkpoint_of_a_truncated_chunk(tmp_path):
    from orbitledger.runner import defaults

    ws, led = init(tmp_path / "ws")
    # 1461 samples in 100-sample blocks: the second Zarr chunk starts at row 1024.
    jid = led.submit(small_spec(length="2000 yr", chunk="5000 steps", output="50 steps"))
    Worker(led).run()
    cks = led.checkpoints(jid)
    assert cks[-1]["n_samples"] > defaults.SAMPLE_CHUNK
    chunk = led.store.job_path(jid) / "samples" / "time" / "c" / "1"
    chunk.write_bytes(chunk.read_bytes()[:100])
    rep = verify(led, jid)
    first = next(c["idx"] for c in cks if c["n_samples"] > defaults.SAMPLE_CHUNK)
    assert rep.first_bad == first, rep.problems[:3]
    assert rep.bad_checkpoints == [c["idx"] for c in cks if c["idx"] >= first]
    res = cli("verify", str(jid), "--workspace", ws)
    assert f"checkpoint {first} is bad" in res.stderr
    assert f"{len(rep.bad_checkpoints)} of {len(cks)} checkpoints affected" in res.stderr
    led.close()


def _pool(ws, n=2):
    # The installed program's entry point, as a batch script runs it.
    return subprocess.Popen([sys.executable, "-c", "from orbitledger.runner.entry import main; main()",
                             "work", "--workspace", str(ws), "--workers", str(n), "--quiet"],
                            cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            start_new_session=True)


def _catches_sigterm(pid):
    """True once the process has a SIGTERM handler (its SigCgt mask in /proc)."""
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("SigCgt:"):
                    return bool(int(line.split()[1], 16) & (1 << (signal.SIGTERM - 1)))
    except FileNotFoundError:
        pass
    return False


def _workers_of(ws):
    out = subprocess.run(["pgrep", "-f", f"work --workers 1 .*--workspace {ws}"],
                         capture_output=True, text=True)
    return [int(p) for p in out.stdout.split()]


@pytest.mark.parametrize("delay", [0.0, 0.05, 0.3, 0.8, 1.5, 3.0])
@pytest.mark.parametrize("signame", ["SIGTERM", "SIGINT"])
def test_pool_stops_cleanly_at_any_moment_of_its_life(tmp_path, delay, signame):
    # Counted from the program's first line (its stop handler in place): the
    # interpreter's own start-up before it is the one window no program has.
    ws, led = init(tmp_path / "ws")
    ids = [led.submit(small_spec(name=f"p{k}", length="200000 yr")) for k in range(3)]
    pool = _pool(ws)
    deadline = time.time() + 30
    while not _catches_sigterm(pool.pid) and time.time() < deadline:
        time.sleep(0.002)
    time.sleep(delay)
    pool.send_signal(getattr(signal, signame))
    rc = pool.wait(timeout=120)
    assert rc == 3, (rc, pool.stderr.read().decode())
    assert _workers_of(ws) == []
    for j in ids:
        row = led.job(j)
        assert row["status"] == "queued" and row["owner"] is None, row
    led.close()


def test_killed_pool_takes_its_workers_with_it(tmp_path):
    ws, led = init(tmp_path / "ws")
    ids = [led.submit(small_spec(name=f"p{k}", length="200000 yr")) for k in range(2)]
    pool = _pool(ws)
    deadline = time.time() + 60
    while len(_workers_of(ws)) < 2 and time.time() < deadline:
        time.sleep(0.1)
    assert len(_workers_of(ws)) == 2
    pool.kill()  # SIGKILL: the pool cannot forward anything
    pool.wait()
    deadline = time.time() + 60
    while _workers_of(ws) and time.time() < deadline:
        time.sleep(0.1)
    assert _workers_of(ws) == []
    for j in ids:
        assert led.job(j)["owner"] is None  # each worker checkpointed and let go
    led.close()


def test_workers_keep_numpys_blas_to_one_thread_unless_the_user_chose(tmp_path):
    # A worker is one thread of compute: a BLAS thread spinning after a small
    # matrix operation would take CPU from the other workers' kernels. The
    # variables must be set before numpy is imported, in `work` itself and
    # in the pool's workers; a value the user set is kept.
    probe = ("import os, sys\n"
             "assert 'numpy' not in sys.modules\n"
             "sys.argv = ['orbitledger', 'work', '--help']\n"
             "from orbitledger.runner.entry import main\n"
             "try:\n    main()\nexcept SystemExit:\n    pass\n"
             "print(os.environ['OPENBLAS_NUM_THREADS'], os.environ['OMP_NUM_THREADS'])\n")
    env = {k: v for k, v in os.environ.items()
           if k not in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")}
    out = subprocess.run([sys.executable, "-c", probe], cwd=ROOT, env=env, capture_output=True,
                         text=True, check=True).stdout.split()
    assert out[-2:] == ["1", "1"]
    out = subprocess.run([sys.executable, "-c", probe], cwd=ROOT, capture_output=True, text=True,
                         env=dict(env, OPENBLAS_NUM_THREADS="3"), check=True).stdout.split()
    assert out[-2:] == ["3", "1"]
    ws, led = init(tmp_path / "ws")
    led.submit(small_spec(name="p", length="200000 yr"))
    pool = subprocess.Popen([sys.executable, "-m", "orbitledger.runner.cli", "work",
                             "--workspace", str(ws), "--workers", "2", "--quiet"],
                            cwd=ROOT, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, start_new_session=True)
    try:
        deadline = time.time() + 30
        while len(_workers_of(ws)) < 2 and time.time() < deadline:
            time.sleep(0.01)
        workers = _workers_of(ws)
        assert len(workers) == 2
        for pid in workers:
            with open(f"/proc/{pid}/environ", "rb") as fh:
                seen = dict(v.split(b"=", 1) for v in fh.read().split(b"\0") if b"=" in v)
            assert seen[b"OPENBLAS_NUM_THREADS"] == b"1" and seen[b"MKL_NUM_THREADS"] == b"1"
    finally:
        pool.send_signal(signal.SIGTERM)
        pool.wait(timeout=120)
    led.close()
