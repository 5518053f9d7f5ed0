"""The analysis API: a campaign's ledger and store read from Python (a notebook).

::

    import orbitledger as ol

    ws = ol.open_workspace("ledger")            # read-only unless writable=True
    ws.jobs()                                   # pandas DataFrame, one row per job
    ds = ws.job(3).samples()                    # xarray Dataset of committed samples
    out = ws.ensemble(1).outcomes()             # members, survival curve, fraction
    ws.ensemble(2).map()                        # a grid ensemble's stability map

Everything here only reads: a workspace opened read-only uses a database
connection that cannot write (SQLite opened ``mode=ro``; PostgreSQL with
``default_transaction_read_only``), so analysis in a notebook can never
disturb the workers committing beside it. Needs pandas and xarray (the
``analysis`` extra: ``pip install 'orbitledger[analysis]'``).

The cautions of the trade hold for everything this returns: in a chaotic
system each member's trajectory is one sample of what the system may do, not
a prediction; an energy error that stays bounded says the map is working,
not that the phases are right; and a symplectic map is not accurate through
close encounters (members that meet one are stopped or switched, as their
specs say).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from orbitledger.runner import defaults
from orbitledger.runner.errors import NotFoundError, OrbitLedgerError

YEAR_D = 365.25

# Columns of Workspace.jobs(), in order.
JOB_COLUMNS = ("id", "name", "state", "progress", "time_reached_yr", "span_yr",
               "last_energy_error", "max_energy_error", "outcome", "outcome_time_yr",
               "ensemble", "rate_myr_per_hour")


def open_workspace(path_or_url: str | Path | None = None, *, store: str | Path | None = None,
                   writable: bool = False) -> "Workspace":
    """Open a workspace (a folder made by ``orbitledger init``) or a database URL.

    Parameters
    ----------
    path_or_url
        The workspace folder (default: ``$ORBITLEDGER_WORKSPACE`` or ``./ledger``),
        or a database URL (``sqlite:///...`` or ``postgresql+psycopg://...``),
        which then needs ``store``.
    store
        The store folder, with a database URL (a workspace has its own).
    writable
        Open the ledger for writing too (the :attr:`Workspace.ledger` then
        accepts submits, holds and the like). Read-only by default.
    """
    from orbitledger.runner.ledger.operations import Ledger
    from orbitledger.runner.ledger.workspace import check_workspace, db_url

    text = None if path_or_url is None else str(path_or_url)
    if text is not None and "://" in text:
        if store is None:
            raise OrbitLedgerError(f"open_workspace({text!r}): a database URL needs the store "
                                   "folder too; pass store='path/to/store'.")
        url, root = text, Path(store)
        if not root.is_dir():
            raise NotFoundError(f"open_workspace: no store folder at {root}.")
    else:
        ws = check_workspace(text)
        url, root = db_url(ws), Path(store) if store is not None else ws / defaults.STORE_NAME
    return Workspace(Ledger(url, root, read_only=not writable))


class Workspace:
    """A campaign's ledger and store, for analysis. Use :func:`open_workspace`."""

    def __init__(self, ledger):
        self.ledger = ledger

    def close(self) -> None:
        """Release the database connections."""
        self.ledger.close()

    def __enter__(self) -> "Workspace":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        mode = "read-only" if self.ledger.read_only else "writable"
        return f"<orbitledger workspace, {self.ledger.n_jobs()} jobs, {mode}>"

    def jobs(self, state: str | None = None, ensemble: int | None = None):
        """Every job (or those in one state, or of one ensemble) as a pandas DataFrame
        indexed by job id; columns :data:`JOB_COLUMNS` (times in years, rates in Myr of
        simulated time per wall-clock hour, energy errors relative)."""
        import pandas as pd

        rows = self.ledger.jobs(status=state, ensemble_id=ensemble)
        out = [_job_entry(r) for r in rows]
        frame = pd.DataFrame(out, columns=list(JOB_COLUMNS))
        return frame.set_index("id", drop=False)

    def job(self, job_id: int) -> "Job":
        """One job (NotFoundError if there is none)."""
        self.ledger.job(int(job_id))  # raises NotFoundError in one line
        return Job(self, int(job_id))

    def ensemble(self, ensemble_id: int) -> "Ensemble":
        """One ensemble (NotFoundError if there is none)."""
        self.ledger.ensemble(int(ensemble_id))
        return Ensemble(self, int(ensemble_id))

    def ensembles(self):
        """Every ensemble as a pandas DataFrame (id, name, members)."""
        import pandas as pd

        rows = self.ledger.ensembles()
        return pd.DataFrame([{k: r[k] for k in ("id", "name", "members")} for r in rows],
                            columns=["id", "name", "members"])


def _job_entry(r):
    dt = abs(r["dt"])
    rate = r.get("rate")
    return {
        "id": r["id"], "name": r["name"], "state": r["status"],
        "progress": r["steps_done"] / r["total_steps"] if r["total_steps"] else 1.0,
        "time_reached_yr": r["steps_done"] * dt / YEAR_D,
        "span_yr": r["total_steps"] * dt / YEAR_D,
        "last_energy_error": r["last_energy_error"], "max_energy_error": r["max_energy_error"],
        "outcome": r["outcome"],
        "outcome_time_yr": None if r["outcome_time"] is None else abs(r["outcome_time"]) / YEAR_D,
        "ensemble": r["ensemble_id"],
        # rate: simulated days per wall-clock second.
        "rate_myr_per_hour": None if rate is None else rate * 3600.0 / YEAR_D / 1e6,
    }


@dataclass(frozen=True)
class Job:
    """One job of a workspace."""

    workspace: Workspace
    id: int

    @property
    def row(self) -> dict:
        """The job's ledger row, as it stands now."""
        return self.workspace.ledger.job(self.id)

    def samples(self):
        """The committed samples as an xarray Dataset (time, step, energy and
        angular-momentum errors, elements by body and element; MEGNO and the
        Lyapunov exponent or test particles where the job has them), exactly the
        rows the ledger says are committed."""
        import xarray as xr

        n = int(self.row["n_samples"])
        path = self.workspace.ledger.store.job_path(self.id) / "samples"
        ds = xr.open_zarr(str(path), consolidated=False)
        return ds.isel(sample=slice(0, n))

    def tree(self):
        """The job's whole store as an xarray DataTree: the samples (committed rows
        only) and the committed checkpoints' packed states."""
        import xarray as xr

        led = self.workspace.ledger
        tree = xr.open_datatree(str(led.store.job_path(self.id)), engine="zarr",
                                consolidated=False)
        keep = [f"{c['idx']:08d}-{c['fence']}" for c in led.checkpoints(self.id)]
        # Each checkpoint is one packed array; arrays of commits that were
        # refused (or not yet made) are left out.
        cks = tree["checkpoints"].to_dataset(inherit=False)
        return xr.DataTree.from_dict({"/": tree.to_dataset(inherit=False),
                                      "/samples": self.samples(),
                                      "/checkpoints": cks[[k for k in keep if k in cks]]})

    def audit(self):
        """The energy and angular-momentum budgets: a list of verdicts (growth law
        t^alpha, projection to the end of the span, verdict)."""
        from orbitledger.runner.analysis.budgets import audit_job

        return audit_job(self.workspace.ledger, self.id)

    def verify(self):
        """Check every committed checkpoint and sample against its recorded hash;
        a report whose ``ok`` is True when nothing is damaged."""
        from orbitledger.runner.analysis.integrity import verify

        return verify(self.workspace.ledger, self.id)

    def frequencies(self, start_yr: float | None = None, end_yr: float | None = None,
                    frame: str = "invariable", terms: int = 3) -> dict:
        """Fundamental frequencies of the samples (Laskar's frequency analysis) over
        a stretch given in years from the job's start (default: all of it)."""
        from orbitledger.runner.analysis.frequency import analyse_job

        sign = 1.0 if self.row["dt"] > 0 else -1.0
        lo = None if start_yr is None else sign * start_yr * YEAR_D
        hi = None if end_yr is None else sign * end_yr * YEAR_D
        if sign < 0:
            lo, hi = hi, lo
        return analyse_job(self.workspace.ledger, self.id, lo, hi, frame, terms)


@dataclass(frozen=True)
class Outcomes:
    """An ensemble's outcomes (see :meth:`Ensemble.outcomes`)."""

    members: object          # pandas DataFrame, one row per member
    survival: object         # pandas DataFrame: time_yr, survival, low, high (Kaplan-Meier)
    n: int                   # members
    unstable: int            # members that met an instability
    fraction: float          # instability fraction
    fraction_interval: tuple  # 95 % Wilson interval
    median_yr: float | None  # median time to instability (None: not reached)


@dataclass(frozen=True)
class Ensemble:
    """One ensemble of a workspace."""

    workspace: Workspace
    id: int

    def outcomes(self, confidence: float = 0.95) -> Outcomes:
        """The members' outcomes, the survival curve with its pointwise band
        (Kaplan-Meier, unfinished members censored) and the instability fraction
        with its Wilson interval."""
        import pandas as pd

        from orbitledger.runner.analysis.outcomes import summarise
        from orbitledger.runner.inputs.text import body_names_from_json

        led = self.workspace.ledger
        names = body_names_from_json(led.ensemble(self.id)["spec_json"])
        s = summarise(led.member_outcomes(self.id), confidence=confidence, names=names)
        members = pd.DataFrame([{"id": r["id"], "state": r["status"], "outcome": r["label"],
                                 "time_yr": t, "unstable": bool(e)}
                                for r, t, e in zip(s.rows, s.times, s.events)],
                               columns=["id", "state", "outcome", "time_yr", "unstable"])
        survival = pd.DataFrame({"time_yr": s.km_t, "survival": s.km_s, "low": s.km_lo,
                                 "high": s.km_hi})
        return Outcomes(members, survival, s.n, s.unstable, s.fraction,
                        (float(s.ci[0]), float(s.ci[1])), s.median)

    def map(self):
        """A grid ensemble's stability map as an xarray Dataset (the grid's axes as
        dimensions; MEGNO, Lyapunov time and survival time per point)."""
        from orbitledger.runner.analysis.stability_map import stability_map

        return stability_map(self.workspace.ledger, self.id)

    def jobs(self):
        """The members as :meth:`Workspace.jobs` lists them."""
        return self.workspace.jobs(ensemble=self.id)
