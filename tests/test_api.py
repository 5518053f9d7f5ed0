"""The analysis API (`orbitledger.open_workspace`): what a notebook reads equals what
the ledger and the command line say, and a read-only workspace writes nothing.

The outcome statistics are checked against scipy (Kaplan-Meier through
scipy.stats.ecdf on censored data, the Wilson interval through
scipy.stats.binomtest), computed again here from the members' rows.
"""

import hashlib
import json
import os

import numpy as np
import pytest
from scipy import stats
from sqlalchemy.exc import DBAPIError

import orbitledger as ol
from orbitledger.runner.errors import OrbitLedgerError
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.inputs import spec as S
from orbitledger.runner.ledger.workspace import init

from helpers import ROOT, cli, ejecting_ensemble_text, small_spec, small_spec_text

GRID = """
[[ensemble.grid]]
body = "Orrin d"
quantity = "a"
first = "10 au"
last = "12 au"
count = 2
"""


@pytest.fixture(scope="module")
def campaign(tmp_path_factory):
    """A worked workspace: one job, an ensemble some of whose members are ejected,
    a small grid ensemble with MEGNO."""
    ws, led = init(tmp_path_factory.mktemp("api") / "ws")
    single = led.submit(small_spec(length="400 yr", output="100 steps"))
    ens, members = led.submit_ensemble(S.load_text(ejecting_ensemble_text("api-eject")))
    grid_text = small_spec_text(name="api-grid", length="200 yr").replace(
        "corrector = 3", 'corrector = 3\nindicator = "megno"') + GRID
    grid, cells = led.submit_ensemble(S.load_text(grid_text))
    Worker(led).run()
    led.close()
    return ws, single, ens, members, grid, cells


# A read-only SQLite connection makes these if they are missing (to see what
# writers commit while it is open); the database file itself is not written.
SQLITE_COORDINATION = ("ledger.sqlite-shm", "ledger.sqlite-wal")


def tree_digest(folder, skip=()):
    """SHA-256 over every file's path and bytes under a folder (but the names in skip)."""
    h = hashlib.sha256()
    for root, dirs, names in os.walk(folder):
        dirs.sort()
        for n in sorted(names):
            if n in skip:
                continue
            p = os.path.join(root, n)
            h.update(os.path.relpath(p, folder).encode())
            with open(p, "rb") as fh:
                h.update(fh.read())
    return h.hexdigest()


def test_jobs_match_the_status_command(campaign):
    ws_path, single, ens, members, grid, cells = campaign
    status = json.loads(cli("status", "--json", "--all", "--workspace", ws_path).stdout)
    with ol.open_workspace(ws_path) as ws:
        frame = ws.jobs()
        assert list(frame["id"]) == [j["id"] for j in status["jobs"]]
        for j in status["jobs"]:
            row = frame.loc[j["id"]]
            assert row["state"] == j["status"]
            assert row["progress"] == pytest.approx(j["progress_fraction"], rel=1e-12)
            assert row["time_reached_yr"] == pytest.approx(j["time_done_yr"], rel=1e-12)
            assert row["outcome"] == j["outcome"]
        assert set(ws.jobs(ensemble=ens)["id"]) == set(members)
        assert set(ws.jobs(state="stopped")["id"]) <= set(members)
        assert list(ws.ensembles()["id"]) == [ens, grid]


def test_samples_are_the_committed_rows(campaign):
    ws_path, single, *_ = campaign
    with ol.open_workspace(ws_path) as ws:
        ds = ws.job(single).samples()
        led = ws.ledger
        n = led.job(single)["n_samples"]
        raw = led.store.read_samples(single, n)
        assert ds.sizes["sample"] == n
        for key in ("time", "step", "energy_error", "angmom_error", "elements"):
            assert np.asarray(ds[key].values).tobytes() == np.asarray(raw[key]).tobytes()
        assert list(ds["body"].values) == ["Orrin b", "Orrin c", "Orrin d"]
        tree = ws.job(single).tree()
        assert tree["samples"].dataset.sizes["sample"] == n
        names = sorted(tree["checkpoints"].dataset.data_vars)
        assert names == [f"{c['idx']:08d}-{c['fence']}" for c in led.checkpoints(single)]


def test_outcomes_against_scipy(campaign):
    ws_path, _, ens, members, *_ = campaign
    with ol.open_workspace(ws_path) as ws:
        out = ws.ensemble(ens).outcomes()
        rows = [ws.ledger.job(j) for j in members]
    # The estimators computed again from the rows (scipy.stats.ecdf on censored
    # data: Kaplan & Meier 1958; the Wilson 1927 score interval).
    year = 365.25
    times = np.array([abs(r["outcome_time"]) / year if r["status"] == "stopped"
                      else abs(r["steps_done"] * r["dt"]) / year for r in rows])
    events = np.array([r["status"] == "stopped" for r in rows])
    assert 0 < events.sum() < len(rows), "the ensemble must have both kinds of member"
    km = stats.ecdf(stats.CensoredData(uncensored=times[events], right=times[~events])).sf
    want_t = np.unique(times[events])
    got = out.survival
    assert np.allclose(got["time_yr"], want_t, rtol=0, atol=0)
    assert np.allclose(got["survival"], km.evaluate(want_t), rtol=1e-14, atol=0)
    ci = stats.binomtest(int(events.sum()), len(rows)).proportion_ci(0.95, method="wilson")
    assert out.fraction_interval == pytest.approx((ci.low, ci.high), rel=1e-14)
    assert (out.n, out.unstable) == (len(rows), int(events.sum()))
    assert list(out.members["id"]) == members
    assert list(out.members["unstable"]) == list(events)


def test_map_audit_verify_frequencies(campaign):
    ws_path, single, _, _, grid, cells = campaign
    with ol.open_workspace(ws_path) as ws:
        m = ws.ensemble(grid).map()
        assert m["megno"].size == len(cells)
        assert np.isfinite(m["megno"].values).all()
        job = ws.job(single)
        assert job.verify().ok
        verdicts = job.audit()
        assert {v.quantity for v in verdicts} >= {"energy"}
        f = job.frequencies()
        assert f["samples"] == ws.ledger.job(single)["n_samples"]


def test_a_read_only_workspace_writes_nothing(campaign):
    ws_path, single, ens, _, grid, _ = campaign
    before = tree_digest(ws_path, skip=SQLITE_COORDINATION)
    with ol.open_workspace(ws_path) as ws:
        assert ws.ledger.read_only
        ws.jobs()
        ws.job(single).samples()
        ws.job(single).tree()
        ws.ensemble(ens).outcomes()
        ws.ensemble(grid).map()
        ws.job(single).verify()
        with pytest.raises(DBAPIError, match="read-?only"):
            ws.ledger.submit(small_spec(length="10 yr"))  # the connection cannot write
    assert tree_digest(ws_path, skip=SQLITE_COORDINATION) == before
    for name in SQLITE_COORDINATION:  # made by SQLite for a reader if missing, no more
        if (ws_path / name).exists() and name.endswith("-wal"):
            assert (ws_path / name).stat().st_size == 0


def test_a_read_only_workspace_sees_what_is_committed_while_it_is_open(tmp_path):
    # Opened while no worker had the ledger open (no -wal file), then a worker
    # commits: the open workspace sees the commits (an immutable open would
    # keep showing the old state, or read pages torn by the writer).
    ws_path, led = init(tmp_path / "ws")
    j = led.submit(small_spec(length="200 yr"))
    led.close()
    assert not (ws_path / "ledger.sqlite-wal").exists()
    with ol.open_workspace(ws_path) as ws:
        assert ws.jobs().loc[j, "state"] == "queued"
        from orbitledger.runner.ledger.workspace import open_ledger

        with open_ledger(ws_path) as writer:
            Worker(writer).run()
        assert ws.jobs().loc[j, "state"] == "done"
        assert ws.job(j).samples().sizes["sample"] > 1


def test_opening_needs_a_workspace_or_a_url_with_its_store(tmp_path, campaign):
    ws_path = campaign[0]
    with pytest.raises(OrbitLedgerError, match="no workspace at"):
        ol.open_workspace(tmp_path / "nothing")
    url = f"sqlite:///{ws_path}/ledger.sqlite"
    with pytest.raises(OrbitLedgerError, match="needs the store folder too"):
        ol.open_workspace(url)
    with ol.open_workspace(url, store=os.path.join(ws_path, "store")) as ws:
        assert len(ws.jobs()) == ws.ledger.n_jobs()
    with pytest.raises(OrbitLedgerError, match="no job 999"):
        ol.open_workspace(ws_path).job(999)


def test_read_only_on_postgresql(tmp_path, ledger_url):
    from orbitledger.runner.ledger.operations import Ledger

    url = ledger_url(tmp_path)
    store = tmp_path / "store"
    led = Ledger(url, store)
    j = led.submit(small_spec(length="100 yr"))
    Worker(led).run()
    led.close()
    with ol.open_workspace(url, store=store) as ws:
        assert ws.ledger.read_only
        assert ws.jobs().loc[j, "state"] == "done"
        assert ws.job(j).samples().sizes["sample"] > 1
        with pytest.raises(DBAPIError, match="read-?only"):
            ws.ledger.submit(small_spec(length="10 yr"))
    with ol.open_workspace(url, store=store, writable=True) as ws:
        assert not ws.ledger.read_only
        k = ws.ledger.submit(small_spec(length="10 yr"))
        assert ws.jobs().loc[k, "state"] == "queued"


def test_the_api_is_documented(campaign):
    text = open(os.path.join(ROOT, "docs", "api.md"), encoding="utf-8").read()
    for name in ("open_workspace", "jobs()", "samples()", "tree()", "outcomes()", "map()",
                 "audit()", "verify()", "frequencies("):
        assert name in text, name
