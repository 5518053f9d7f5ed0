"""The live page of a campaign (``orbitledger serve``): a read-only web app
over the ledger and store, made with Starlette and served by uvicorn.

Routes, all GET (any other method is refused with 405, any other path 404):

- ``/``: the page (``live_page.PAGE``); it asks ``/api/state`` every few
  seconds and draws with plotly.js in the browser.
- ``/api/state``: jobs (the records of ``status --json``), ensembles (counts,
  progress, instability fraction with its Wilson interval, the Kaplan-Meier
  survival curve with its band), the latest events.
- ``/api/jobs/{id}/energy``: a job's relative energy error against time from
  its committed samples (at most ``MAX_POINTS`` points).
- ``/api/ensembles/{id}/map``: a two-axis grid ensemble's MEGNO per cell.
- ``/static/plotly.min.js``: the one file served from disk, by a fixed path
  inside the installed plotly package (no path comes from the request).

With a token (needed for any address but loopback) every route needs it: an
``Authorization: Bearer`` header, the ``ol_token`` cookie, or ``?token=``
on the page, which then sets the cookie; without it the page asks for it and
the API answers 401. The ledger is opened read-only, so nothing here can
write, whatever the request.
"""

from __future__ import annotations

import hmac
import math
import time

import numpy as np

from orbitledger.runner import defaults
from orbitledger.runner.presentation.records import job_record

YEAR_D = 365.25
MAX_POINTS = 2000
EVENTS_SHOWN = 50
COOKIE = "ol_token"
LOOPBACK = ("127.0.0.1", "::1", "localhost")


def _finite(x):
    """x as a float for JSON, None when missing or not finite."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def ensemble_entries(ledger):
    """Per ensemble: counts, progress, outcome statistics and the survival curve."""
    from orbitledger.runner.analysis.outcomes import summarise
    from orbitledger.runner.inputs.spec import from_json
    from orbitledger.runner.inputs.text import body_names_from_json

    out = []
    for e in ledger.ensemble_summaries():
        ens = ledger.ensemble(e["id"])
        s = summarise(ledger.member_outcomes(e["id"]),
                      names=body_names_from_json(ens["spec_json"]))
        grid = from_json(ens["spec_json"]).ensemble.grid
        out.append({
            "id": e["id"], "name": e["name"], "members": e["members"], "counts": e["counts"],
            "outcomes": e["outcomes"],
            "progress_fraction": e["steps_done"] / e["total_steps"] if e["total_steps"] else 1.0,
            "max_energy_error": _finite(e["max_energy_error"]),
            "unstable": s.unstable, "instability_fraction": s.fraction,
            "fraction_interval": [float(s.ci[0]), float(s.ci[1])],
            "median_yr": _finite(s.median),
            "survival": survival_steps(s),
            "grid_axes": 0 if grid is None else len(grid),
        })
    return out


def survival_steps(s):
    """The Kaplan-Meier curve as steps from (0, 1) to the latest time any member
    reached (the estimator's own points are at the instability times only)."""
    end = float(np.max(s.times)) if len(s.times) else 0.0
    t = [0.0] + [float(v) for v in s.km_t]
    curve = {"time_yr": t, "survival": [1.0] + [_finite(v) for v in s.km_s],
             "low": [1.0] + [_finite(v) for v in s.km_lo],  # None where undefined
             "high": [1.0] + [_finite(v) for v in s.km_hi]}
    if end > t[-1]:
        for key in curve:
            curve[key].append(end if key == "time_yr" else curve[key][-1])
    return curve


def _finish_hours(rec):
    """Hours to the end of the span at the job's last rate (None if unknown)."""
    rate = rec.get("rate_myr_per_hour")
    if rec["status"] not in ("queued", "running") or not rate:
        return None
    return (rec["span_yr"] - rec["time_done_yr"]) / 1e6 / rate


def live_state(ledger):
    """What the page shows, as one JSON-ready dict."""
    from orbitledger.runner.inputs.text import body_list, body_names_from_json

    summarise_jobs = ledger.n_jobs() > defaults.STATUS_LIST_MAX
    rows = (ledger.jobs_outside_ensembles(limit=defaults.STATUS_LIST_MAX) if summarise_jobs
            else ledger.jobs())
    jobs = []
    names = {}
    for r in rows:
        rec = job_record(r)
        rec["hours_to_finish"] = _finish_hours(rec)
        names[r["id"]] = body_names_from_json(r["spec_json"])
        jobs.append(rec)
    events = []
    for ev in ledger.recent_events(EVENTS_SHOWN):
        if ev["job_id"] not in names:
            names[ev["job_id"]] = body_names_from_json(ledger.job(ev["job_id"])["spec_json"])
        events.append({"job_id": ev["job_id"], "kind": ev["kind"],
                       "time_yr": None if ev["time"] is None else abs(ev["time"]) / YEAR_D,
                       "bodies": body_list(ev["bodies"], names[ev["job_id"]]),
                       "detail": ev["detail"] or ""})
    return {"generated_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "counts": ledger.counts(), "jobs_summarised": summarise_jobs, "jobs": jobs,
            "ensembles": ensemble_entries(ledger), "events": events}


def energy_series(ledger, job_id):
    """A job's committed |dE/E| against time (yr), thinned to MAX_POINTS."""
    row = ledger.job(job_id)
    n = row["n_samples"]
    if not n:
        return {"job_id": job_id, "time_yr": [], "energy_error": []}
    s = ledger.store.read_samples(job_id, n)
    keep = np.unique(np.linspace(0, n - 1, min(n, MAX_POINTS)).astype(int))
    t = np.abs(s["time"][keep] - s["time"][0]) / YEAR_D
    e = np.abs(s["energy_error"][keep])
    return {"job_id": job_id, "time_yr": [float(x) for x in t],
            "energy_error": [_finite(x) for x in e]}


def map_cells(ledger, ensemble_id):
    """A two-axis grid ensemble's MEGNO per cell (None where not known)."""
    from orbitledger.runner.analysis.stability_map import stability_map

    ds = stability_map(ledger, ensemble_id)
    dims = list(ds["megno"].dims)
    if len(dims) != 2:
        return {"ensemble_id": ensemble_id, "axes": dims, "x": [], "y": [], "megno": []}
    m = ds["megno"].transpose(dims[1], dims[0]).values  # rows: the second axis
    return {"ensemble_id": ensemble_id, "axes": dims,
            "x": [float(v) for v in ds[dims[0]].values],
            "y": [float(v) for v in ds[dims[1]].values],
            "megno": [[_finite(v) for v in row] for row in m]}


def plotly_path():
    """The plotly.js file inside the installed plotly package."""
    from importlib.resources import files

    return files("plotly") / "package_data" / "plotly.min.js"


def make_app(ledger, token=None, poll_seconds=2.0):
    """The Starlette app of the live page over an open (read-only) ledger."""
    from starlette.applications import Starlette
    from starlette.middleware import Middleware
    from starlette.middleware.base import BaseHTTPMiddleware
    from starlette.responses import (FileResponse, HTMLResponse, JSONResponse,
                                     RedirectResponse)
    from starlette.routing import Route

    from orbitledger.runner.errors import OrbitLedgerError
    from orbitledger.runner.presentation.live_page import ASK_TOKEN, PAGE

    def offered(request):
        auth = request.headers.get("authorization", "")
        if auth.startswith("Bearer "):
            return auth[7:]
        return request.cookies.get(COOKIE) or request.query_params.get("token")

    class TokenCheck(BaseHTTPMiddleware):
        async def dispatch(self, request, call_next):
            given = offered(request)
            if given is not None and hmac.compare_digest(given.encode(), token.encode()):
                if request.url.path == "/" and "token" in request.query_params:
                    resp = RedirectResponse("/", status_code=303)
                    resp.set_cookie(COOKIE, token, httponly=True, samesite="strict")
                    return resp
                return await call_next(request)
            if request.url.path == "/":
                return HTMLResponse(ASK_TOKEN, status_code=401)
            return JSONResponse({"error": "this page needs the token given to "
                                          "`orbitledger serve --token`"}, status_code=401)

    def answer(fn, *args):
        try:
            return JSONResponse(fn(ledger, *args))
        except OrbitLedgerError as err:
            return JSONResponse({"error": str(err)}, status_code=404)

    # Handlers are async and do their (short) reads on the event loop's one
    # thread: the ledger's connections are never shared between threads.
    async def page(request):
        return HTMLResponse(PAGE.replace("__POLL_MS__", str(int(poll_seconds * 1000))))

    async def state(request):
        return answer(live_state)

    async def energy(request):
        return answer(energy_series, request.path_params["job_id"])

    async def grid_map(request):
        return answer(map_cells, request.path_params["ensemble_id"])

    async def plotly_js(request):
        return FileResponse(str(plotly_path()), media_type="text/javascript")

    routes = [Route("/", page), Route("/api/state", state),
              Route("/api/jobs/{job_id:int}/energy", energy),
              Route("/api/ensembles/{ensemble_id:int}/map", grid_map),
              Route("/static/plotly.min.js", plotly_js)]
    middleware = [Middleware(TokenCheck)] if token else []
    return Starlette(routes=routes, middleware=middleware)
