"""Fault injection: many SIGKILLs of 2-4 worker processes across several jobs,
on both backends. Every job must end bit for bit equal to its uninterrupted
reference, no stretch may be committed twice, and no lease may outlive its
expiry. A summary line per backend is printed (recorded in docs/reliability.md).
"""

import random
import signal
import time

import pytest

from orbitledger.runner.inputs import spec as S
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.ledger.workspace import init
from helpers import (assert_no_double_commit, final_state, samples_bytes, small_spec_text,
                     spawn_work)

POINTS = ["mid_store_write", "in_commit", "before_commit", "before_store_write",
          "after_store_write", "after_commit", "first_step"]
LEASE = 3.0


def job_texts():
    return [small_spec_text(name=f"fault-{k}", length="250000 yr", chunk="100000 steps",
                            output="5000 steps", corrector=(3, 5, 0, 7)[k]) for k in range(4)]


@pytest.fixture(scope="module")
def references(tmp_path_factory):
    d = tmp_path_factory.mktemp("ref")
    led = Ledger(f"sqlite:///{d}/ref.sqlite", d / "store")
    ids = [led.submit(S.load_text(t)) for t in job_texts()]
    Worker(led).run()
    out = [(final_state(led, j), samples_bytes(led, j)) for j in ids]
    led.close()
    return out


@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_random_sigkills_lose_nothing(backend, references, tmp_path, request):
    db = None
    if backend == "postgresql":
        from conftest import new_pg_database

        db = new_pg_database(request.getfixturevalue("pg_server"))
    ws, led = init(tmp_path / "ws", db)
    ids = [led.submit(S.load_text(t)) for t in job_texts()]
    rng = random.Random(hash(backend) & 0xFFFF)
    kills, rounds, points, armed = 0, 0, set(), 0
    while kills < 32 and rounds < 40:
        rounds += 1
        procs = []
        for _ in range(rng.randint(2, 4)):
            fp = None
            if rng.random() < 0.5:
                fp = POINTS[armed % len(POINTS)]  # cycle: every point gets its turn
                armed += 1
                procs.append((spawn_work(ws, db, f"{fp}:1", lease=LEASE), fp))
            else:
                procs.append((spawn_work(ws, db, lease=LEASE), None))
        time.sleep(rng.uniform(1.2, 2.2))
        # Kill every worker still alive, at staggered moments.
        for p, _ in procs:
            if p.poll() is None:
                p.send_signal(signal.SIGKILL)
                time.sleep(rng.uniform(0.0, 0.3))
        for p, fp in procs:
            rc = p.wait(timeout=120)
            if rc == -signal.SIGKILL:
                kills += 1
                if fp:
                    points.add(fp)
            else:
                assert rc in (0, 3), p.stderr.read().decode()
        now = time.time()
        for j in ids:
            row = led.job(j)
            assert_no_double_commit(led, j)
            if row["status"] == "running":
                assert row["lease_expires"] <= now + LEASE + 1.0
        if all(led.job(j)["status"] == "done" for j in ids):
            break
    final = spawn_work(ws, db, lease=LEASE)
    assert final.wait(timeout=600) == 0, final.stderr.read().decode()
    assert kills >= 30, (kills, rounds)
    assert {"mid_store_write", "in_commit", "before_commit"} <= points, points
    compared = 0
    for j, (state, samples) in zip(ids, references):
        row = led.job(j)
        assert row["status"] == "done" and row["owner"] is None and row["lease_expires"] is None
        assert_no_double_commit(led, j)
        assert final_state(led, j) == state
        assert samples_bytes(led, j) == samples
        compared += len(state) + sum(len(v) for v in samples.values())
    segments = sum(len(led.segments(j)) for j in ids)
    print(f"\n[faults] backend={backend} kills={kills} rounds={rounds} jobs={len(ids)} "
          f"segments={segments} failpoints={sorted(points)} bytes_compared={compared} "
          f"duplicate_commits=0")
    led.close()
