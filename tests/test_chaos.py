"""Chaos: several `orbitledger work` processes (pools and single workers) on
one ledger, killed with SIGKILL, SIGTERM and SIGINT at random moments and
restarted until every job ends, on SQLite and on PostgreSQL.

The jobs are of several kinds: a long job extended while it runs, one with
relativity, a plain one, and an ensemble whose members stop early (ejections)
and change hands after every chunk, worked in batches by the batched kernel
(the reference works every member alone). Afterwards every job is compared byte for
byte with an uninterrupted single-worker reference: the final state, the
state of EVERY committed checkpoint (a checkpoint taken mid-chunk by an
interrupted worker is compared with the reference advanced to the same step),
and every sample; the sample steps have no gaps or duplicates; `verify` is
clean on every job; no lease is left held.

The seed of each run is printed; set ORBITLEDGER_CHAOS_SEED to replay one.
"""

import os
import random
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from orbitledger.integrators import Integrator
from orbitledger.runner.inputs import spec as S
from orbitledger.runner.analysis.integrity import verify
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.store.zarr_store import state_sha256, to_storable
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.ledger.workspace import init
from helpers import ROOT, assert_no_double_commit, ejecting_ensemble_text, small_spec_text

LEASE = 2.0
ROUNDS = 12
SHORT, LONG = "12000 yr", "24000 yr"


def ensemble_text():
    return ejecting_ensemble_text("chaos-ens")


def job_texts():
    plain = small_spec_text(name="chaos-plain", length="15000 yr", chunk="25000 steps",
                            output="1000 steps", corrector=5)
    gr = small_spec_text(name="chaos-gr", length="15000 yr", chunk="30000 steps",
                         output="3000 steps").replace("corrector = 3",
                                                      "corrector = 3\nrelativity = true")
    long_ = small_spec_text(name="chaos-long", length=SHORT, chunk="20000 steps",
                            output="2000 steps")
    return [long_, gr, plain, ensemble_text()]


def submit_all(led):
    ids = []
    for text in job_texts():
        spec = S.load_text(text)
        if spec.ensemble is not None:
            ids += led.submit_ensemble(spec)[1]
        else:
            ids.append(led.submit(spec))
    return ids


def long_total(led):
    return S.resolve(S.load_text(small_spec_text(length=LONG))).total_steps


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    d = tmp_path_factory.mktemp("chaos-ref")
    led = Ledger(f"sqlite:///{d}/ref.sqlite", d / "store")
    ids = submit_all(led)
    led.extend(ids[0], long_total(led))
    Worker(led, lanes=1).run()  # the reference: every member alone (scalar kernel)
    yield led, ids
    led.close()


def _spawn(ws, db, pool):
    argv = [sys.executable, "-c", "from orbitledger.runner.entry import main; main()", "work",
            "--workspace", str(ws), "--quiet", "--lease", str(LEASE)]
    if pool:
        argv += ["--workers", "2"]
    if db:
        argv += ["--db", db]
    env = {k: v for k, v in os.environ.items() if k != "ORBITLEDGER_FAILPOINTS"}
    return subprocess.Popen(argv, cwd=ROOT, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, start_new_session=True)


SIGNALS = [signal.SIGKILL, signal.SIGTERM, signal.SIGINT]


@pytest.mark.slow
@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_chaos_loses_nothing(backend, reference, tmp_path, request):
    ref, ref_ids = reference
    db = None
    if backend == "postgresql":
        from conftest import new_pg_database

        db = new_pg_database(request.getfixturevalue("pg_server"))
    ws, led = init(tmp_path / "ws", db)
    ids = submit_all(led)
    seed = int(os.environ.get("ORBITLEDGER_CHAOS_SEED", random.randrange(1 << 30)))
    print(f"\n[chaos] backend={backend} seed={seed} (ORBITLEDGER_CHAOS_SEED={seed} replays it)")
    rng = random.Random(seed)
    sent = {s.name: 0 for s in SIGNALS}
    extended = False
    for rnd in range(ROUNDS):
        procs = [_spawn(ws, db, pool=rng.random() < 0.5) for _ in range(rng.randint(1, 3))]
        time.sleep(rng.uniform(0.2, 2.5))
        if rnd == 2:
            led.extend(ids[0], long_total(led))  # while it runs (or after it is done)
            extended = True
        for p in procs:
            if p.poll() is None:
                sig = rng.choice(SIGNALS)
                p.send_signal(sig)
                sent[sig.name] += 1
                time.sleep(rng.uniform(0.0, 0.4))
        for p in procs:
            rc = p.wait(timeout=180)
            assert rc in (0, 3, -signal.SIGKILL), (rc, p.stderr.read().decode())
        for j in ids:
            assert_no_double_commit(led, j)
        if all(led.job(j)["status"] in ("done", "stopped") for j in ids):
            break
    assert extended
    final = _spawn(ws, db, pool=True)
    assert final.wait(timeout=900) == 0, final.stderr.read().decode()

    checked = 0
    for j, r in zip(ids, ref_ids):
        row, want = led.job(j), ref.job(r)
        assert (row["status"], row["outcome"], row["outcome_step"]) == \
            (want["status"], want["outcome"], want["outcome_step"]), (j, row["status"])
        assert row["owner"] is None and row["lease_expires"] is None
        assert row["steps_done"] == want["steps_done"]
        assert_no_double_commit(led, j)
        rep = verify(led, j)
        assert rep.ok, (j, rep.first_bad, rep.problem)
        checked += _same_checkpoints(led, j, ref, r)
        _same_samples(led, j, ref, r)
    stopped = sum(led.job(j)["status"] == "stopped" for j in ids)
    assert stopped >= 2  # the ensemble's eccentric members were ejected
    # The ensemble's members were worked in batches (the reference ran them
    # alone), so the comparison above covers the batched path under kills.
    batched = sum('"kernel": "batched' in (s["versions"] or "") for j in ids
                  for s in led.segments(j))
    assert batched > 0
    print(f"[chaos] backend={backend} seed={seed} rounds={rnd + 1} signals={sent} "
          f"jobs={len(ids)} stopped={stopped} batched_segments={batched} "
          f"checkpoints_compared={checked} "
          f"segments={sum(len(led.segments(j)) for j in ids)}")
    led.close()


def _same_checkpoints(led, j, ref, r):
    """Every committed checkpoint equals the reference state at the same step."""
    ref_cks = ref.checkpoints(r)
    n = 0
    for ck in led.checkpoints(j):
        base = max((c for c in ref_cks if c["step"] <= ck["step"]), key=lambda c: c["step"])
        if base["step"] == ck["step"]:
            assert ck["state_sha256"] == base["state_sha256"], (j, ck["idx"])
        else:
            integ, _ = ref.load_integrator(r, base["idx"])
            integ.advance(ck["step"] - integ.step)
            assert state_sha256(to_storable(integ.state_arrays())) == ck["state_sha256"], \
                (j, ck["idx"], ck["step"])
        stored = led.store.read_checkpoint(j, ck["idx"], ck["fence"], ck["state_sha256"])
        assert state_sha256(to_storable(stored)) == ck["state_sha256"]
        n += 1
    return n


def _same_samples(led, j, ref, r):
    got = led.store.read_samples(j, led.job(j)["n_samples"])
    want = ref.store.read_samples(r, ref.job(r)["n_samples"])
    for key in want:
        assert got[key].tobytes() == want[key].tobytes(), (j, key)
    steps = got["step"]
    stride = int(led.job(j)["output_steps"])
    gaps = np.diff(steps)
    # On the output grid throughout; only the very last sample may fall off
    # it (an end or a stop between outputs).
    assert np.all(gaps[:-1] == stride) and 0 < gaps[-1] <= stride, (j, np.unique(gaps))
