"""The live page (`orbitledger serve`): a real server process, real workers
committing, headless Chromium loading the page. What the page shows (read
from the DOM the browser built) must equal what `status --json` and the
analysis API say; the refusals (no token, other paths, writes) are checked on
the real server too.
"""

import http.client
import json
import os
import signal
import socket
import subprocess
import sys
import time
from html.parser import HTMLParser

import pytest

import orbitledger as ol
from orbitledger.runner.inputs import spec as S
from orbitledger.runner.ledger.workspace import init

from helpers import ROOT, cli, ejecting_ensemble_text, small_spec, small_spec_text, spawn_work

GRID = """
[[ensemble.grid]]
body = "Orrin d"
quantity = "a"
first = "10 au"
last = "12 au"
count = 2
[[ensemble.grid]]
body = "Orrin d"
quantity = "e"
first = 0.0
last = 0.1
count = 2
"""


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_serve(ws, *extra):
    """A real `orbitledger serve` process on a free port, answering."""
    port = _free_port()
    proc = subprocess.Popen([sys.executable, "-m", "orbitledger.runner.cli", "serve",
                             "--workspace", str(ws), "--port", str(port), "--poll", "0.5",
                             *extra], cwd=ROOT, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    end = time.time() + 60
    while time.time() < end:
        assert proc.poll() is None, proc.stderr.read()
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=1):
                return proc, port
        except OSError:
            time.sleep(0.2)
    proc.kill()
    raise AssertionError("serve did not answer within 60 s")


def stop(proc):
    proc.send_signal(signal.SIGINT)
    try:
        proc.wait(timeout=20)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()


def request(port, path, method="GET", headers=None):
    """(status, headers, body) of one request; the path is sent exactly as given."""
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
    try:
        conn.request(method, path, headers=headers or {})
        r = conn.getresponse()
        return r.status, dict(r.getheaders()), r.read()
    finally:
        conn.close()


class Page(HTMLParser):
    """What the browser drew: per job and per ensemble, each cell's text and raw
    value (data-value), and the plot containers that hold a drawn plot."""

    def __init__(self, dom):
        super().__init__()
        self.jobs, self.ensembles, self.drawn, self.lines = {}, {}, set(), {}
        self._job = self._ens = self._field = self._plot = None
        self._depth = 0
        self.feed(dom)

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if self._plot is not None and tag == "div":
            self._depth += 1
        if tag == "tr" and "data-job" in a:
            self._job = int(a["data-job"])
            self.jobs[self._job] = {}
        elif tag == "section" and "data-ensemble" in a:
            self._ens = int(a["data-ensemble"])
            self.ensembles[self._ens] = {}
        elif tag in ("td", "span") and a.get("class"):
            target = (self.jobs.get(self._job) if tag == "td" and self._job is not None
                      else self.ensembles.get(self._ens) if tag == "span" else None)
            if target is not None:
                target[a["class"]] = [a.get("data-value"), ""]
                self._field = target[a["class"]]
        elif tag == "div" and a.get("id", "").startswith(("survival-", "map-", "energy")):
            self._plot, self._depth = a["id"], 1
        elif self._plot is not None and tag == "svg" and "main-svg" in a.get("class", ""):
            self.drawn.add(self._plot)
        elif self._plot is not None and tag == "path" and "js-line" in a.get("class", ""):
            self.lines.setdefault(self._plot, []).append(a.get("d", ""))

    def handle_endtag(self, tag):
        if tag == "tr":
            self._job = None
        elif tag == "section":
            self._ens = None
        elif tag in ("td", "span"):
            self._field = None
        elif tag == "div" and self._plot is not None:
            self._depth -= 1
            if self._depth == 0:
                self._plot = None

    def handle_data(self, data):
        if self._field is not None:
            self._field[1] += data

    def value(self, kind, key, field):
        raw = (self.jobs if kind == "job" else self.ensembles)[key][field][0]
        return None if raw in (None, "null") else float(raw)


def load(chromium, url, tmp_path, shot=None):
    """The DOM after the page's script ran (virtual time lets it fetch and draw)."""
    argv = [chromium, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
            "--no-first-run", "--disable-background-networking", "--disable-component-update",
            "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}",
            "--virtual-time-budget=6000", "--window-size=1200,2600"]
    argv += [f"--screenshot={shot}", url] if shot else ["--dump-dom", url]
    out = subprocess.run(argv, capture_output=True, text=True, timeout=180)
    assert out.returncode == 0, out.stderr[-800:]
    return out.stdout


def status_json(ws):
    res = cli("status", "--json", "--workspace", ws)
    assert res.returncode == 0, res.stderr
    return {j["id"]: j for j in json.loads(res.stdout)["jobs"]}


def assert_page_matches_status(page, status):
    assert set(page.jobs) == set(status)
    for jid, rec in status.items():
        row = page.jobs[jid]
        assert row["state"][1] == rec["status"], jid
        assert page.value("job", jid, "progress") == rec["progress_fraction"], jid
        assert page.value("job", jid, "reached") == rec["time_done_yr"], jid
        assert page.value("job", jid, "energy") == rec["max_energy_error"], jid
        assert page.value("job", jid, "rate") == rec["rate_myr_per_hour"], jid
        assert row["outcome"][1] == (rec["outcome"] or ""), jid


def stopped(pid):
    with open(f"/proc/{pid}/stat") as f:
        return f.read().rsplit(")", 1)[1].split()[0] == "T"


def test_the_page_follows_a_campaign_in_a_real_browser(tmp_path, chromium):
    ws, led = init(tmp_path / "ws")
    led.submit(small_spec(length="2000 yr"))
    ens, _ = led.submit_ensemble(S.load_text(ejecting_ensemble_text("live")))
    grid_text = small_spec_text(name="live-grid", length="200 yr").replace(
        "corrector = 3", 'corrector = 3\nindicator = "megno"') + GRID
    grid, _ = led.submit_ensemble(S.load_text(grid_text))
    led.close()
    serve, port = start_serve(ws)  # before any worker opened the ledger
    url = f"http://127.0.0.1:{port}/"
    try:
        before = Page(load(chromium, url, tmp_path))
        assert_page_matches_status(before, status_json(ws))
        assert all(before.value("job", j, "progress") == 0.0 for j in before.jobs)
        # A real worker stops itself (SIGSTOP) at its fifth store write: the page
        # shows the work committed so far, as `status --json` does.
        work = spawn_work(ws, failpoints="before_store_write:5:pause", lease=120)
        end = time.time() + 120
        while not stopped(work.pid):
            assert work.poll() is None and time.time() < end, "the worker did not pause"
            time.sleep(0.1)
        during = Page(load(chromium, url, tmp_path))
        assert_page_matches_status(during, status_json(ws))
        done = sum(during.value("job", j, "progress") for j in during.jobs)
        assert 0.0 < done < len(during.jobs)
        os.kill(work.pid, signal.SIGCONT)
        assert work.wait(timeout=300) == 0, work.stderr.read()
        after = Page(load(chromium, url, tmp_path))
        status = status_json(ws)
        assert_page_matches_status(after, status)
        assert sum(after.value("job", j, "progress") for j in after.jobs) > done
        with ol.open_workspace(ws) as api:
            out = api.ensemble(ens).outcomes()
        assert out.unstable > 0  # members were ejected: the curve steps down
        assert after.value("ensemble", ens, "unstable") == out.unstable
        assert after.value("ensemble", ens, "fraction") == out.fraction
        assert after.value("ensemble", ens, "median") == out.median_yr
        assert after.ensembles[ens]["fraction"][1].startswith(f"{out.fraction:.3f} [")
        assert {f"survival-{ens}", f"survival-{grid}", f"map-{grid}", "energy"} <= after.drawn
        # The survival curve's line has a step per instability (plus its ends).
        curve = max(after.lines[f"survival-{ens}"], key=len)
        assert curve.count("H") + curve.count("V") >= 2 * out.unstable
        load(chromium, url, tmp_path, shot=tmp_path / "page.png")  # looked at by eye once
        assert (tmp_path / "page.png").stat().st_size > 50_000
    finally:
        stop(serve)
    assert serve.returncode == 0, serve.stderr.read()


def test_refusals_token_paths_and_writes(tmp_path):
    from test_api import SQLITE_COORDINATION, tree_digest

    ws, led = init(tmp_path / "ws")
    led.submit(small_spec(length="100 yr"))
    led.close()
    assert cli("work", "--workspace", ws, "--quiet").returncode == 0
    before = tree_digest(ws, skip=SQLITE_COORDINATION)
    # Off loopback without a token: one line, nothing started.
    res = cli("serve", "--workspace", ws, "--host", "0.0.0.0", timeout=60)
    assert res.returncode == 2 and len(res.stderr.strip().splitlines()) == 1, res.stderr
    assert "--token" in res.stderr and "0.0.0.0" in res.stderr
    serve, port = start_serve(ws, "--token", "s3cret-Token")
    try:
        code, _, body = request(port, "/")
        assert code == 401 and b"needs its token" in body
        assert request(port, "/api/state")[0] == 401
        assert request(port, "/api/state", headers={"Authorization": "Bearer wrong"})[0] == 401
        code, _, body = request(port, "/api/state",
                                headers={"Authorization": "Bearer s3cret-Token"})
        assert code == 200 and json.loads(body)["jobs"][0]["status"] == "done"
        code, headers, _ = request(port, "/?token=s3cret-Token")
        assert code == 303 and "ol_token=s3cret-Token" in headers["set-cookie"]
        assert "HttpOnly" in headers["set-cookie"]
        auth = {"Cookie": "ol_token=s3cret-Token"}
        code, _, body = request(port, "/", headers=auth)
        assert code == 200 and b"/api/state" in body
        code, _, body = request(port, "/static/plotly.min.js", headers=auth)
        assert code == 200 and len(body) > 1_000_000
        # Nothing but the routes: traversal in any spelling is not found.
        for path in ("/static/../../../../etc/passwd", "/static/%2e%2e/%2e%2e/etc/passwd",
                     "/static/..%2f..%2f..%2fetc%2fpasswd", "/static/plotly.min.js/../../x",
                     "/ledger.sqlite", "/store/1/zarr.json", "/api/jobs/1/../../../etc/passwd",
                     "//etc/passwd"):
            code, _, body = request(port, path, headers=auth)
            assert code == 404 and b"root:" not in body, path
        # No writes: every other method is refused, and the workspace is unchanged.
        for method in ("POST", "PUT", "DELETE", "PATCH"):
            for path in ("/", "/api/state", "/api/jobs/1/energy"):
                assert request(port, path, method, headers=auth)[0] == 405, (method, path)
        assert request(port, "/api/jobs/99/energy", headers=auth)[0] == 404
    finally:
        stop(serve)
    assert tree_digest(ws, skip=SQLITE_COORDINATION) == before


def test_the_page_reads_a_read_only_workspace(read_only_workspace):
    serve, port = start_serve(read_only_workspace)
    try:
        code, _, body = request(port, "/api/state")
        assert code == 200 and json.loads(body)["jobs"][0]["status"] == "done"
        code, _, body = request(port, "/api/jobs/1/energy")
        series = json.loads(body)
        assert code == 200 and len(series["time_yr"]) == len(series["energy_error"]) > 1
    finally:
        stop(serve)


def test_the_page_reads_postgresql(tmp_path, pg_server):
    from conftest import new_pg_database

    url = new_pg_database(pg_server)
    ws = tmp_path / "ws"
    assert cli("init", "--workspace", ws, "--db", url).returncode == 0
    (tmp_path / "job.toml").write_text(small_spec_text(length="100 yr"))
    assert cli("submit", tmp_path / "job.toml", "--workspace", ws, "--db", url).returncode == 0
    assert cli("work", "--workspace", ws, "--db", url, "--quiet").returncode == 0
    serve, port = start_serve(ws, "--db", url)
    try:
        code, _, body = request(port, "/api/state")
        assert code == 200
        page = {j["id"]: j for j in json.loads(body)["jobs"]}
        res = cli("status", "--json", "--workspace", ws, "--db", url)
        status = {j["id"]: j for j in json.loads(res.stdout)["jobs"]}
        for jid, rec in status.items():
            for key in ("status", "progress_fraction", "max_energy_error", "time_done_yr"):
                assert page[jid][key] == rec[key]
    finally:
        stop(serve)


@pytest.mark.parametrize("args,word", [(["--port", "0"], "--port"),
                                       (["--poll", "0"], "--poll")])
def test_bad_options_are_one_line(tmp_path, args, word):
    ws, led = init(tmp_path / "ws")
    led.close()
    res = cli("serve", "--workspace", ws, *args, timeout=60)
    assert res.returncode == 2 and len(res.stderr.strip().splitlines()) == 1, res.stderr
    assert word in res.stderr
