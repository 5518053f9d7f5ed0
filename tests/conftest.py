"""Shared fixtures: published solar-system data for checks (tests only)."""

import os
import sys

import numpy as np
import pytest

sys.path.insert(0, os.path.dirname(__file__))

from orbitledger.integrators import System

# Standish & Williams, "Keplerian Elements for Approximate Positions of the
# Major Planets", Table 1 (J2000, 1800-2050): a (au), e, I, L, long.peri,
# long.node (deg). Values as in ../shared/CHECKS.md.
STANDISH = {
    "Mercury": (0.38709927, 0.20563593, 7.00497902, 252.25032350, 77.45779628, 48.33076593),
    "Jupiter": (5.20288700, 0.04838624, 1.30439695, 34.39644051, 14.72847983, 100.47390909),
    "Saturn": (9.53667594, 0.05386179, 2.48599187, 49.95424423, 92.59887831, 113.66242448),
}
# Sun/planet mass ratios, IAU 2009 system.
MASS_RATIO = {"Mercury": 6023600.0, "Jupiter": 1047.348644, "Saturn": 3497.9018}


def standish_elements(name):
    """(a, e, i, node, arg. of pericentre, mean anomaly) in degrees from Table 1."""
    a, e, inc, lon, lperi, node = STANDISH[name]
    return [a, e, inc, node, lperi - node, lon - lperi]


def solar_subset(names, mass_scale=1.0):
    """The Sun and the named planets from the published elements."""
    masses = [1.0] + [mass_scale / MASS_RATIO[n] for n in names]
    return System.from_elements(["Sun"] + list(names), masses,
                                [standish_elements(n) for n in names])


@pytest.fixture
def jupiter_saturn():
    return solar_subset(["Jupiter", "Saturn"])


def state_bytes(integrator):
    """All state arrays concatenated as bytes, for bit-for-bit comparisons."""
    arrs = integrator.state_arrays()
    return b"".join(k.encode() + np.ascontiguousarray(arrs[k]).tobytes() for k in sorted(arrs))


# -- ledger backends ------------------------------------------------------------
# SQLite files in tmp_path, and a real PostgreSQL server on loopback started
# once per test session by tests/services/pg.sh (or the server named by
# $ORBITLEDGER_TEST_PG_URL). Each test gets a database of its own.
import shutil
import socket
import subprocess
import tempfile
import uuid

SERVICES = os.path.join(os.path.dirname(__file__), "services")


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


# The suite runs on several processes (pytest-xdist, the README's command);
# one PostgreSQL server serves them all. The first process that needs it
# starts it under a file lock in a directory the controlling process made
# (ORBITLEDGER_TEST_SHARED, inherited by the workers) and writes its URL
# there; the others read the URL; the controlling process stops the server
# when the run ends.
SHARED_ENV = "ORBITLEDGER_TEST_SHARED"


def pytest_configure(config):
    if hasattr(config, "workerinput") or os.environ.get(SHARED_ENV):
        return  # a worker, or a run inside a run: use the controller's directory
    shared = tempfile.mkdtemp(prefix="orbitledger-tests-")
    os.chmod(shared, 0o755)
    os.environ[SHARED_ENV] = shared
    config._orbitledger_shared = shared


def pytest_unconfigure(config):
    shared = getattr(config, "_orbitledger_shared", None)
    if shared is None:
        return
    if os.path.exists(os.path.join(shared, "pg.url")):
        subprocess.run(["bash", os.path.join(SERVICES, "pg.sh"), "stop", shared + "/pg"],
                       capture_output=True, timeout=120)
    os.environ.pop(SHARED_ENV, None)
    shutil.rmtree(shared, ignore_errors=True)


def shared_service(name, start):
    """The address of a service all test processes of this run share: read
    from the shared directory, or made by start(directory) -> str under a lock."""
    import fcntl

    shared = os.environ[SHARED_ENV]
    with open(os.path.join(shared, name + ".lock"), "w") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        path = os.path.join(shared, name + ".url")
        if not os.path.exists(path):
            address = start(shared)
            with open(path + ".tmp", "w") as f:
                f.write(address)
            os.replace(path + ".tmp", path)
        with open(path) as f:
            return f.read()


def _start_pg(shared):
    out = subprocess.run(["bash", os.path.join(SERVICES, "pg.sh"), "start", shared + "/pg",
                          str(_free_port())], capture_output=True, text=True, timeout=300)
    if out.returncode != 0:
        pytest.fail(f"could not start PostgreSQL for the tests: {out.stderr.strip()}")
    return out.stdout.strip().splitlines()[-1]


@pytest.fixture(scope="session")
def pg_server():
    """Admin URL of a running PostgreSQL server, shared by the run's processes."""
    return os.environ.get("ORBITLEDGER_TEST_PG_URL") or shared_service("pg", _start_pg)


def new_pg_database(admin_url):
    """Create an empty database on the server; returns its URL."""
    import sqlalchemy as sa

    name = "t_" + uuid.uuid4().hex[:16]
    eng = sa.create_engine(admin_url, isolation_level="AUTOCOMMIT")
    with eng.connect() as conn:
        conn.exec_driver_sql(f'CREATE DATABASE "{name}"')
    eng.dispose()
    return admin_url.rsplit("/", 1)[0] + "/" + name


@pytest.fixture(params=["sqlite", "postgresql"])
def ledger_url(request):
    """A function tmp_path -> database URL, once per backend."""
    if request.param == "sqlite":
        return lambda tmp_path: f"sqlite:///{tmp_path}/ledger.sqlite"
    admin = request.getfixturevalue("pg_server")
    return lambda tmp_path: new_pg_database(admin)


# -- every ledger a test opened is verified when the test ends -------------------
# A silent loss (samples or checkpoints that no longer match the hashes the
# ledger recorded) fails the test that caused it, whatever that test checks.
# Tests that damage a store on purpose are marked `damages_store`.
@pytest.fixture(autouse=True)
def verify_every_job(request, monkeypatch):
    from orbitledger.runner.ledger.operations import Ledger

    opened = []
    init = Ledger.__init__

    def recording_init(self, url, store_root, *args, **kwargs):
        init(self, url, store_root, *args, **kwargs)
        if (url, str(store_root)) not in opened:
            opened.append((url, str(store_root)))

    monkeypatch.setattr(Ledger, "__init__", recording_init)
    yield
    monkeypatch.setattr(Ledger, "__init__", init)
    if request.node.get_closest_marker("damages_store") or _failed(request):
        return
    from orbitledger.runner.analysis.integrity import verify

    bad = []
    for url, root in opened:
        try:
            led = Ledger(url, root)
        except Exception:  # noqa: BLE001 - the ledger was removed by the test itself
            continue
        with led:
            for row in led.jobs():
                rep = verify(led, row["id"])
                if not rep.ok:
                    bad.append(f"job {row['id']}: checkpoint {rep.first_bad}: {rep.problem}")
    assert not bad, "verify failed after the test: " + "; ".join(bad)


def _failed(request):
    rep = getattr(request.node, "rep_call", None)
    return rep is not None and rep.failed


@pytest.hookimpl(wrapper=True, tryfirst=True)
def pytest_runtest_makereport(item, call):
    rep = yield
    if rep.when == "call":
        item.rep_call = rep
    return rep


# -- a browser and a read-only workspace, for the tests that need them ------------
@pytest.fixture(scope="session")
def chromium():
    out = subprocess.run(["bash", os.path.join(SERVICES, "chromium.sh")], capture_output=True,
                         text=True, timeout=900)
    if out.returncode != 0 or not shutil.which("chromium"):
        pytest.fail(f"could not install Chromium for the browser tests: {out.stderr[-400:]}")
    return shutil.which("chromium")


@pytest.fixture
def read_only_workspace(tmp_path):
    """A workspace with one finished job, seen through a read-only bind mount."""
    from helpers import small_spec
    from orbitledger.runner.execution.worker import Worker
    from orbitledger.runner.ledger.workspace import init

    ws, led = init(tmp_path / "ws")
    led.submit(small_spec(length="100 yr"))
    Worker(led).run()
    led.close()
    ro = tmp_path / "ro"
    ro.mkdir()
    for cmd in (["mount", "--bind", str(ws), str(ro)],
                ["mount", "-o", "remount,ro,bind", str(ro)]):
        out = subprocess.run(cmd, capture_output=True, text=True)
        if out.returncode != 0:
            subprocess.run(["umount", str(ro)], capture_output=True)
            pytest.fail(f"a read-only bind mount is needed (run the tests as root): "
                        f"{out.stderr.strip()}")
    yield ro
    subprocess.run(["umount", str(ro)], capture_output=True)
