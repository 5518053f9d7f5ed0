"""The database goes away (issue 28): a PostgreSQL server of the test's own is
restarted while a real worker process commits, its connections are cut
mid-transaction again and again, and it stays down longer than the worker
waits. The worker rides out the first two (retrying with growing pauses) and
stops with one line on the third; every time nothing is committed twice,
nothing is lost, and the job ends with the bytes of an uninterrupted run.
"""

import os
import random
import socket
import subprocess
import tempfile
import time

import pytest
import sqlalchemy as sa

from orbitledger.runner.analysis.integrity import verify
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.ledger.operations import Ledger

from conftest import SERVICES
from helpers import assert_no_double_commit, cli, final_state, samples_bytes, small_spec, \
    small_spec_text, spawn_work

SPAN = dict(length="60000 yr", chunk="20000 steps", output="2000 steps")


class OwnServer:
    """A PostgreSQL server for one test, which the test may stop and start."""

    def __init__(self):
        self.dir = tempfile.mkdtemp(prefix="orbitledger-pg-own-")
        os.chmod(self.dir, 0o755)
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            self.port = s.getsockname()[1]
        self.admin = self._run("start")

    def _run(self, cmd):
        out = subprocess.run(["bash", os.path.join(SERVICES, "pg.sh"), cmd, self.dir + "/pg",
                              str(self.port)], capture_output=True, text=True, timeout=300)
        if out.returncode != 0:
            pytest.fail(f"pg.sh {cmd} failed: {out.stderr.strip()[-400:]}")
        return out.stdout.strip().splitlines()[-1] if out.stdout.strip() else None

    def stop(self):
        self._run("stop")

    def start(self):
        self._run("start")

    def database(self):
        name = f"outage_{random.randrange(1 << 30)}"
        eng = sa.create_engine(self.admin, isolation_level="AUTOCOMMIT")
        with eng.connect() as conn:
            conn.exec_driver_sql(f'CREATE DATABASE "{name}"')
        eng.dispose()
        return self.admin.rsplit("/", 1)[0] + "/" + name

    def cut(self, db):
        """Terminate every connection to database db (mid-transaction or not)."""
        eng = sa.create_engine(self.admin, isolation_level="AUTOCOMMIT")
        try:
            with eng.connect() as conn:
                return conn.exec_driver_sql(
                    "SELECT count(pg_terminate_backend(pid)) FROM pg_stat_activity "
                    "WHERE datname = %s AND pid <> pg_backend_pid()", (db,)).scalar()
        finally:
            eng.dispose()


@pytest.fixture
def own_pg():
    server = OwnServer()
    yield server
    server.stop()


@pytest.fixture
def reference(tmp_path):
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref-store")
    rj = ref.submit(small_spec(**SPAN))
    Worker(ref).run()
    yield ref, rj
    ref.close()


def workspace(tmp_path, url):
    ws = tmp_path / "ws"
    assert cli("init", "--workspace", ws, "--db", url).returncode == 0
    (tmp_path / "job.toml").write_text(small_spec_text(**SPAN))
    assert cli("submit", tmp_path / "job.toml", "--workspace", ws, "--db", url).returncode == 0
    return ws


def steps_done(url):
    """The job's committed steps, read on a fresh connection (None if unreachable)."""
    eng = sa.create_engine(url)
    try:
        with eng.connect() as conn:
            return conn.exec_driver_sql("SELECT steps_done FROM jobs WHERE id = 1").scalar()
    except sa.exc.OperationalError:
        return None
    finally:
        eng.dispose()


def wait_for_progress(url, proc, at_least=1, timeout=120):
    end = time.time() + timeout
    while time.time() < end:
        assert proc.poll() is None, proc.stderr.read()
        done = steps_done(url)
        if done is not None and done >= at_least:
            return done
        time.sleep(0.1)
    raise AssertionError("the worker made no progress")


def same_as_reference(url, ws, reference):
    ref, rj = reference
    led = Ledger(url, ws / "store")
    try:
        row = led.job(1)
        assert row["status"] == "done" and row["owner"] is None
        assert_no_double_commit(led, 1)
        assert final_state(led, 1) == final_state(ref, rj)
        assert samples_bytes(led, 1) == samples_bytes(ref, rj)
        assert verify(led, 1).ok
    finally:
        led.close()


def test_a_server_restart_while_a_worker_commits_loses_nothing(tmp_path, own_pg, reference):
    url = own_pg.database()
    ws = workspace(tmp_path, url)
    proc = spawn_work(ws, db=url, lease=60, extra=("--db-wait", "120"))
    before = wait_for_progress(url, proc)
    own_pg.stop()  # fast shutdown: every connection cut, the server gone
    time.sleep(3.0)
    own_pg.start()
    rc = proc.wait(timeout=600)
    err = proc.stderr.read().decode()
    assert rc == 0, err
    assert "ledger database unavailable" in err  # it waited, and said so
    assert before < steps_done(url)
    same_as_reference(url, ws, reference)


def test_connections_cut_again_and_again_lose_nothing(tmp_path, own_pg, reference):
    url = own_pg.database()
    db = url.rsplit("/", 1)[1]
    ws = workspace(tmp_path, url)
    proc = spawn_work(ws, db=url, lease=60, extra=("--db-wait", "120"))
    wait_for_progress(url, proc)
    rng = random.Random(28)
    cuts = 0
    while proc.poll() is None:
        cuts += own_pg.cut(db) or 0
        time.sleep(rng.uniform(0.05, 0.4))
    err = proc.stderr.read().decode()
    assert proc.returncode == 0, err
    assert cuts >= 5, cuts
    same_as_reference(url, ws, reference)


def test_a_server_down_longer_than_the_wait_stops_the_worker_in_one_line(tmp_path, own_pg,
                                                                          reference):
    url = own_pg.database()
    ws = workspace(tmp_path, url)
    proc = spawn_work(ws, db=url, lease=60, extra=("--db-wait", "3", "--log-level", "warning"))
    wait_for_progress(url, proc)
    own_pg.stop()
    t0 = time.time()
    rc = proc.wait(timeout=120)
    waited = time.time() - t0
    lines = proc.stderr.read().decode().strip().splitlines()
    errors = [ln for ln in lines if ln.startswith("error:")]
    assert rc == 2 and errors == lines[-1:], lines  # one line, last (the waits are warnings)
    assert "did not come back within 3 s" in errors[0] and "--db-wait" in errors[0]
    assert "Traceback" not in "\n".join(lines)
    assert waited < 60, waited  # bounded: the wait, not a hang
    own_pg.start()
    # Its lease is a dead process's of this host: the next worker takes it at once.
    res = cli("work", "--workspace", ws, "--db", url, "--quiet", "--log-level", "warning")
    assert res.returncode == 0, res.stderr
    same_as_reference(url, ws, reference)
