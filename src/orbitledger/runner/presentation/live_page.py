"""The HTML of the live page (``orbitledger serve``) and of its token prompt.

The page is static; its script asks ``/api/state`` every __POLL_MS__ ms and
draws the tables with DOM calls (text only, never markup from the ledger) and
the plots with plotly.js. Elements carry data attributes with the raw numbers
(``data-value``) so that a test can read what the page shows.
"""

ASK_TOKEN = """<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>orbitledger: token needed</title></head>
<body style="font-family: sans-serif; margin: 3em">
<h1>This campaign page needs its token</h1>
<p>Give the token that was passed to <code>orbitledger serve --token</code>.</p>
<form method="get" action="/"><input id="token" name="token" type="password" autofocus>
<button type="submit">Open</button></form>
</body></html>
"""

PAGE = """<!doctype html>
<html lang="en"><head><meta charset="utf-8">
<title>orbitledger: campaign</title>
<script src="/static/plotly.min.js"></script>
<style>
 body { font-family: sans-serif; margin: 1.5em; color: #222; }
 table { border-collapse: collapse; margin: 0.5em 0 1.5em; font-size: 0.9em; }
 th, td { padding: 0.2em 0.7em; border-bottom: 1px solid #ddd; text-align: right; }
 th:nth-child(2), td:nth-child(2) { text-align: left; }
 tr.selected { background: #eef4ff; }
 tbody tr { cursor: pointer; }
 .plot { width: 720px; height: 330px; }
 .note { color: #666; font-size: 0.85em; max-width: 60em; }
 #error { color: #b00; }
</style></head>
<body>
<h1>Campaign</h1>
<p>Updated <span id="generated">-</span>; <span id="counts">-</span>. <span id="error"></span></p>
<p class="note">Read-only view of the ledger, refreshed every few seconds. A symplectic map
is not accurate through close encounters; a bounded energy error is not phase accuracy; in
a chaotic system each trajectory is one sample of what the system may do, not a
prediction.</p>

<h2>Jobs</h2>
<p class="note" id="jobs-note"></p>
<table id="jobs"><thead><tr><th>id</th><th>name</th><th>state</th><th>progress</th>
<th>time reached</th><th>of</th><th>rate (Myr/h)</th><th>time to finish</th>
<th>max |dE/E|</th><th>outcome</th></tr></thead><tbody></tbody></table>

<h2>Energy error</h2>
<p class="note">Relative energy error of job <span id="energy-job">-</span> against time
(click a job to choose).</p>
<div id="energy" class="plot"></div>

<h2>Ensembles</h2>
<div id="ensembles"></div>

<h2>Events</h2>
<table id="events"><thead><tr><th>job</th><th>kind</th><th>time (yr)</th><th>bodies</th>
<th>detail</th></tr></thead><tbody></tbody></table>

<script>
"use strict";
const POLL_MS = __POLL_MS__;
let chosen = null;

function fmt(x, digits) {
  if (x === null || x === undefined) return "-";
  if (x !== 0 && (Math.abs(x) >= 1e5 || Math.abs(x) < 1e-3)) return x.toExponential(2);
  return x.toFixed(digits === undefined ? 3 : digits);
}
function years(y) {
  if (y === null || y === undefined) return "-";
  if (y >= 1e6) return fmt(y / 1e6, 3) + " Myr";
  if (y >= 1e3) return fmt(y / 1e3, 3) + " kyr";
  return fmt(y, 2) + " yr";
}
function hours(h) {
  if (h === null || h === undefined) return "-";
  if (h >= 48) return fmt(h / 24, 1) + " d";
  if (h >= 1) return fmt(h, 1) + " h";
  return fmt(h * 60, 1) + " min";
}
function cell(tr, text, cls, value) {
  const td = document.createElement("td");
  td.textContent = text;
  if (cls) td.className = cls;
  if (value !== undefined && value !== null) td.dataset.value = String(value);
  tr.appendChild(td);
}
function fetchJson(url) {
  return fetch(url, {cache: "no-store"}).then(r => {
    if (!r.ok) throw new Error(url + ": " + r.status);
    return r.json();
  });
}

function drawJobs(s) {
  const body = document.querySelector("#jobs tbody");
  body.replaceChildren();
  document.getElementById("jobs-note").textContent = s.jobs_summarised
    ? "Many jobs: the members of ensembles are summarised below; the jobs outside them are listed."
    : "";
  for (const j of s.jobs) {
    const tr = document.createElement("tr");
    tr.dataset.job = String(j.id);
    if (j.id === chosen) tr.className = "selected";
    cell(tr, String(j.id), "id");
    cell(tr, j.name, "name");
    cell(tr, j.status, "state");
    cell(tr, fmt(100 * j.progress_fraction, 1) + " %", "progress", j.progress_fraction);
    cell(tr, years(j.time_done_yr), "reached", j.time_done_yr);
    cell(tr, years(j.span_yr), "span", j.span_yr);
    cell(tr, fmt(j.rate_myr_per_hour), "rate", j.rate_myr_per_hour);
    cell(tr, hours(j.hours_to_finish), "finish", j.hours_to_finish);
    cell(tr, fmt(j.max_energy_error), "energy", j.max_energy_error);
    cell(tr, j.outcome || "", "outcome");
    tr.addEventListener("click", () => { chosen = j.id; refresh(); });
    body.appendChild(tr);
  }
}

function drawEnergy(s) {
  if (chosen === null) {
    const outside = s.jobs.filter(j => j.ensemble_id === null);
    const pick = outside.length ? outside : s.jobs;
    if (!pick.length) return Promise.resolve();
    chosen = pick[0].id;
  }
  document.getElementById("energy-job").textContent = String(chosen);
  return fetchJson("/api/jobs/" + chosen + "/energy").then(e => {
    const keep = e.time_yr.map((t, k) => t > 0 && e.energy_error[k] > 0);
    Plotly.react("energy", [{x: e.time_yr.filter((_, k) => keep[k]),
                             y: e.energy_error.filter((_, k) => keep[k]),
                             mode: "lines", name: "|dE/E|"}],
      {xaxis: {type: "log", title: {text: "time (yr)"}},
       yaxis: {type: "log", title: {text: "relative energy error"}},
       margin: {t: 20}}, {displayModeBar: false});
  });
}

function ensembleSection(e) {
  let sec = document.querySelector('section[data-ensemble="' + e.id + '"]');
  if (!sec) {
    sec = document.createElement("section");
    sec.dataset.ensemble = String(e.id);
    const h = document.createElement("h3");
    const p = document.createElement("p");
    p.className = "summary";
    const surv = document.createElement("div");
    surv.id = "survival-" + e.id;
    surv.className = "plot survival";
    sec.append(h, p, surv);
    if (e.grid_axes === 2) {
      const m = document.createElement("div");
      m.id = "map-" + e.id;
      m.className = "plot map";
      sec.appendChild(m);
    }
    document.getElementById("ensembles").appendChild(sec);
  }
  sec.querySelector("h3").textContent = "Ensemble " + e.id + ": " + e.name;
  const p = sec.querySelector("p.summary");
  p.replaceChildren();
  const counts = Object.entries(e.counts).map(([k, v]) => v + " " + k).join(", ");
  const span = (cls, text, value) => {
    const x = document.createElement("span");
    x.className = cls;
    x.textContent = text;
    if (value !== undefined) x.dataset.value = String(value);
    return x;
  };
  p.append(e.members + " members (" + counts + "); progress ",
           span("progress", fmt(100 * e.progress_fraction, 1) + " %", e.progress_fraction),
           "; unstable ",
           span("unstable", String(e.unstable), e.unstable),
           ", instability fraction ",
           span("fraction", fmt(e.instability_fraction) + " [" + fmt(e.fraction_interval[0])
                + ", " + fmt(e.fraction_interval[1]) + "] (95 %, Wilson)", e.instability_fraction),
           "; median time to instability ", span("median", years(e.median_yr), e.median_yr),
           "; max |dE/E| " + fmt(e.max_energy_error) + ".");
  return sec;
}

function drawEnsembles(s) {
  const waits = [];
  for (const e of s.ensembles) {
    ensembleSection(e);
    const c = e.survival;
    Plotly.react("survival-" + e.id, [
      {x: c.time_yr, y: c.high, mode: "lines", line: {width: 0, shape: "hv"}, showlegend: false},
      {x: c.time_yr, y: c.low, mode: "lines", fill: "tonexty", line: {width: 0, shape: "hv"},
       fillcolor: "rgba(31,119,180,0.2)", name: "95 % band"},
      {x: c.time_yr, y: c.survival, mode: "lines", line: {shape: "hv"},
       name: "surviving fraction (Kaplan-Meier)"}],
      {xaxis: {title: {text: "time (yr)"}}, yaxis: {title: {text: "surviving"}, range: [0, 1.05]},
       margin: {t: 20}}, {displayModeBar: false});
    if (e.grid_axes === 2) {
      waits.push(fetchJson("/api/ensembles/" + e.id + "/map").then(m => {
        Plotly.react("map-" + e.id, [{x: m.x, y: m.y, z: m.megno, type: "heatmap",
                                      colorbar: {title: {text: "MEGNO"}}}],
          {xaxis: {title: {text: m.axes[0]}}, yaxis: {title: {text: m.axes[1]}}, margin: {t: 20}},
          {displayModeBar: false});
      }));
    }
  }
  return Promise.all(waits);
}

function drawEvents(s) {
  const body = document.querySelector("#events tbody");
  body.replaceChildren();
  for (const ev of s.events) {
    const tr = document.createElement("tr");
    cell(tr, String(ev.job_id), "job");
    cell(tr, ev.kind, "kind");
    cell(tr, fmt(ev.time_yr, 2), "time", ev.time_yr);
    cell(tr, ev.bodies.join(", "), "bodies");
    cell(tr, ev.detail, "detail");
    body.appendChild(tr);
  }
}

function refresh() {
  return fetchJson("/api/state").then(s => {
    document.getElementById("generated").textContent = s.generated_utc;
    document.getElementById("counts").textContent =
      Object.entries(s.counts).map(([k, v]) => v + " " + k).join(", ") || "no jobs";
    document.getElementById("error").textContent = "";
    drawJobs(s);
    drawEvents(s);
    return Promise.all([drawEnergy(s), drawEnsembles(s)]);
  }).catch(err => {
    document.getElementById("error").textContent = "could not update: " + err.message;
  }).then(() => { document.body.dataset.updated = String(Date.now()); });
}

refresh();
setInterval(refresh, POLL_MS);
</script>
</body></html>
"""
