"""Scale of the ledger: a 100 000-member ensemble's submit, status, outcomes and claims.

1. A real `submit` of an ensemble of --submit-members members (store groups
   and first checkpoints written): seconds per member.
2. The ledger is then grown to --members rows by cloning those members' rows
   in SQL (job, checkpoint 0; their stores are not copied: what is measured
   from here on is the database). A quarter of the clones are marked done
   and a tenth stopped by an ejection, so summaries have something to count.
3. `orbitledger status` and `orbitledger outcomes` as a user runs them
   (new processes, start-up included), best of three.
4. Claims per second: --procs processes each claim a job and give it back
   as fast as they can for --seconds (no integration), breadth-first order.

Run:  .venv/bin/python tests/benchmarks/bench_scale.py [--members 100000]
      [--db postgresql+psycopg://...] [--procs 2]
Reports; asserts nothing.
"""

import argparse
import multiprocessing as mp
import os
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
sys.path.insert(0, os.path.join(ROOT, "tests"))


def spec_text(members):
    from helpers import small_spec_text

    return small_spec_text(name="scale", length="200 yr") + f"""
[ensemble]
members = {members}
[ensemble.perturb]
body = "Orrin d"
quantity = "a"
rule = "step"
size = "1e-12 au"
"""


def grow(url, target):
    """Clone member rows until the ledger has `target` jobs (SQL only)."""
    from sqlalchemy import func, insert, select, update

    from orbitledger.runner.ledger.db import checkpoints, jobs, make_engine

    eng = make_engine(url)
    with eng.begin() as conn:
        base = [dict(r) for r in conn.execute(select(jobs).order_by(jobs.c.id)).mappings()]
        cks = {r["job_id"]: dict(r) for r in conn.execute(select(checkpoints)).mappings()}
        have = conn.execute(select(func.count()).select_from(jobs)).scalar()
        next_id = conn.execute(select(func.max(jobs.c.id))).scalar() + 1
        rows, ck_rows = [], []
        k = 0
        while have + len(rows) < target:
            src = base[k % len(base)]
            k += 1
            row = dict(src, id=next_id, name=f"{src['name']}-c{next_id}")
            ck = dict(cks[src["id"]], job_id=next_id)
            ck.pop("id", None)
            rows.append(row)
            ck_rows.append(ck)
            next_id += 1
        for i in range(0, len(rows), 5000):
            conn.execute(insert(jobs), rows[i:i + 5000])
            conn.execute(insert(checkpoints), ck_rows[i:i + 5000])
        n = have + len(rows)
        conn.execute(update(jobs).where(jobs.c.id % 4 == 0).values(
            status="done", outcome="survived", steps_done=jobs.c.total_steps))
        conn.execute(update(jobs).where(jobs.c.id % 10 == 1).values(
            status="stopped", outcome="ejection", outcome_bodies="3",
            outcome_time=1000.0, steps_done=100))
    eng.dispose()
    return n


def timed(argv, reps=3):
    best = None
    for _ in range(reps):
        t0 = time.perf_counter()
        out = subprocess.run(argv, capture_output=True, text=True)
        dt = time.perf_counter() - t0
        if out.returncode != 0:
            return f"failed: {out.stderr.strip()[-200:]}"
        best = dt if best is None else min(best, dt)
    return f"{best:.2f} s"


def _claimer(args):
    url, store, seconds, k = args
    from orbitledger.runner.ledger.operations import Ledger

    led = Ledger(url, store)
    n = 0
    t_end = time.time() + seconds
    while time.time() < t_end:
        c = led.claim(f"bench:{os.getpid()}:{k}")
        if c is None:
            break
        led.give_back(c)
        n += 1
    led.close()
    return n


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--members", type=int, default=100_000)
    ap.add_argument("--submit-members", type=int, default=1000)
    ap.add_argument("--db", default=None, help="database URL (default: a SQLite workspace)")
    ap.add_argument("--procs", type=int, default=2)
    ap.add_argument("--seconds", type=float, default=10.0)
    args = ap.parse_args()
    exe = [sys.executable, "-m", "orbitledger.runner.cli"]
    with tempfile.TemporaryDirectory() as tmp:
        ws = os.path.join(tmp, "ws")
        db = ["--db", args.db] if args.db else []
        subprocess.run(exe + ["init", "--workspace", ws] + db, check=True, capture_output=True)
        path = os.path.join(tmp, "ens.toml")
        with open(path, "w", encoding="utf-8") as fh:
            fh.write(spec_text(args.submit_members))
        t0 = time.perf_counter()
        subprocess.run(exe + ["submit", path, "--workspace", ws] + db, check=True,
                       capture_output=True)
        t_sub = time.perf_counter() - t0
        print(f"submit of {args.submit_members} members: {t_sub:.1f} s "
              f"({1000 * t_sub / args.submit_members:.1f} ms per member; "
              f"{t_sub / args.submit_members * 1e5 / 60:.0f} min projected for 100 000)")
        url = args.db or f"sqlite:///{os.path.join(ws, 'ledger.sqlite')}"
        t0 = time.perf_counter()
        n = grow(url, args.members)
        print(f"grown to {n} jobs by SQL in {time.perf_counter() - t0:.1f} s")
        print(f"`status`: {timed(exe + ['status', '--workspace', ws] + db)}")
        print(f"`status --ensemble 1 --json`: "
              f"{timed(exe + ['status', '--ensemble', '1', '--json', '--workspace', ws] + db, 1)}")
        print(f"`outcomes 1`: {timed(exe + ['outcomes', '1', '--workspace', ws] + db)}")
        print(f"`outcomes 1 --json`: {timed(exe + ['outcomes', '1', '--json', '--workspace', ws] + db)}")
        store = os.path.join(ws, "store")
        with mp.get_context("spawn").Pool(args.procs) as pool:
            counts = pool.map(_claimer, [(url, store, args.seconds, k)
                                         for k in range(args.procs)])
        print(f"claims with {args.procs} processes: {sum(counts) / args.seconds:.0f} per s "
              f"(claim + give back, {counts})")


if __name__ == "__main__":
    main()
