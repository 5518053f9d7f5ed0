"""Machine-readable records for `--json` and `export`: stable keys, units in the key
names, times as ISO 8601 in UTC, lists as lists, no JSON nested in strings."""

from datetime import datetime, timezone
import json
import math

import numpy as np

from orbitledger.runner.inputs.text import body_list, body_names_from_json

YEAR_D = 365.25


def iso(epoch):
    """An epoch-seconds time as ISO 8601 UTC, or None."""
    if epoch is None:
        return None
    return datetime.fromtimestamp(float(epoch), tz=timezone.utc).isoformat()


def plain(value):
    """Numbers and containers as JSON can hold them (NaN and infinities become null)."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [plain(v) for v in value]
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        return v if math.isfinite(v) else None
    if hasattr(value, "value") and hasattr(value, "name"):  # an Enum
        return value.value
    return value


def job_record(row, names=None):
    """One job row with units in its keys."""
    dt = row["dt"]
    if names is None:
        names = body_names_from_json(row["spec_json"])
    return plain({
        "id": row["id"], "name": row["name"], "status": row["status"],
        "reason": row["reason"], "requested": row["requested"], "method": row["method"],
        "bodies": row["n_bodies"], "step_days": abs(dt),
        "direction": "backward" if dt < 0 else "forward",
        "steps_done": row["steps_done"], "total_steps": row["total_steps"],
        "progress_fraction": row["steps_done"] / row["total_steps"] if row["total_steps"] else 1.0,
        "time_done_yr": abs(row["steps_done"] * dt) / YEAR_D,
        "span_yr": abs(row["total_steps"] * dt) / YEAR_D,
        "chunk_steps": row["chunk_steps"], "output_steps": row["output_steps"],
        "checkpoints": row["n_checkpoints"] + 1, "samples": row["n_samples"],
        "energy0_au2_per_day2": row["energy0"],
        "angular_momentum0_au2_per_day": json.loads(row["angmom0"]),
        "last_energy_error": row["last_energy_error"], "max_energy_error": row["max_energy_error"],
        "last_angmom_error": row["last_angmom_error"], "max_angmom_error": row["max_angmom_error"],
        "outcome": row["outcome"],
        "outcome_time_yr": None if row["outcome_time"] is None else abs(row["outcome_time"]) / YEAR_D,
        "outcome_bodies": body_list(row["outcome_bodies"], names),
        "owner": row["owner"], "lease_expires_utc": iso(row["lease_expires"]),
        "fencing_token": row["fence"], "priority": row["priority"],
        "ensemble_id": row["ensemble_id"], "parent_job_id": row["parent_job_id"],
        "parent_checkpoint": row["parent_checkpoint"], "wall_seconds": row["wall_seconds"],
        "rate_myr_per_hour": None if row["rate"] is None else row["rate"] * 3600 / YEAR_D / 1e6,
        "created_utc": iso(row["created_at"]), "updated_utc": iso(row["updated_at"]),
        "spec_sha256": row["spec_sha256"],
    })


def checkpoint_record(ck):
    return plain({
        "index": ck["idx"], "step": ck["step"], "time_days": ck["time"],
        "fencing_token": ck["fence"], "state_sha256": ck["state_sha256"],
        "chain_sha256": ck["chain_sha256"], "samples_sha256": ck["samples_sha256"],
        "samples": ck["n_samples"], "energy_error": ck["energy_error"],
        "angmom_error": ck["angmom_error"], "segment_id": ck["segment_id"],
        "created_utc": iso(ck["created_at"]),
    })


def segment_record(seg):
    return plain({
        "id": seg["id"], "fencing_token": seg["fence"], "worker": seg["worker"],
        "host": seg["host"], "pid": seg["pid"], "user": seg["user"], "argv": seg["argv"],
        "versions": json.loads(seg["versions"] or "{}"), "platform": seg["platform"],
        "cpu": seg["cpu"], "start_step": seg["start_step"], "end_step": seg["end_step"],
        "started_utc": iso(seg["started_at"]), "ended_utc": iso(seg["ended_at"]),
        "end_reason": seg["end_reason"],
    })


def event_record(ev, names=None):
    return plain({
        "id": ev["id"], "kind": ev["kind"], "step": ev["step"], "time_days": ev["time"],
        "bodies": body_list(ev["bodies"], names),
        "detail": json.loads(ev["detail"]) if ev["detail"] else None,
        "created_utc": iso(ev["created_at"]),
    })


def full_record(ledger, job_id):
    """Everything about a job: the job, its spec, checkpoints, segments and events."""
    row = ledger.job(job_id)
    try:
        names = ledger.store.body_names(job_id)
    except Exception:  # noqa: BLE001 - a damaged store still exports the ledger's record
        names = None
    return {
        "job": job_record(row, names),
        "spec": json.loads(row["spec_json"]),
        "body_names": names,
        "checkpoints": [checkpoint_record(c) for c in ledger.checkpoints(job_id)],
        "segments": [segment_record(s) for s in ledger.segments(job_id)],
        "events": [event_record(e, names) for e in ledger.events(job_id)],
    }


def audit_record(job_id, verdicts):
    return plain({"job": job_id, "budgets": [{
        "quantity": v.quantity, "max_error": v.max_error, "budget": v.budget,
        "growth_alpha": None if v.fit is None else v.fit.alpha,
        "growth_alpha_err": None if v.fit is None else v.fit.alpha_err,
        "projected_at_end": v.projected, "verdict": v.verdict} for v in verdicts]})


def outcomes_record(ensemble_id, name, s):
    from orbitledger.runner.analysis.outcomes import counts_by_body

    return plain({
        "ensemble": ensemble_id, "name": name, "members": s.n, "counts": s.counts,
        "counts_by_body": counts_by_body(s),
        "unstable": s.unstable, "instability_fraction": s.fraction,
        "wilson_95_low": s.ci[0], "wilson_95_high": s.ci[1],
        "median_time_to_instability_yr": s.median,
        "kaplan_meier": {"time_yr": s.km_t, "survival": s.km_s, "band_95_low": s.km_lo,
                         "band_95_high": s.km_hi},
    })


def particles_record(s):
    """A job's test-particle outcomes (see analysis.particles.ParticleSummary)."""
    return plain({
        "job": s.job_id, "particles": s.n, "at_risk": s.at_risk, "left": s.left,
        "time_reached_yr": s.reached,
        "counts": s.counts, "median_time_to_removal_yr": s.median,
        "kaplan_meier": {"time_yr": s.km_t, "survival": s.km_s, "band_95_low": s.km_lo,
                         "band_95_high": s.km_hi},
        "by_initial_a": {"edges_au": s.edges, "particles": s.bin_n, "surviving": s.bin_left,
                         "wilson_95_low": s.bin_lo, "wilson_95_high": s.bin_hi},
        "each": [{"name": nm, "initial_a_au": a, "removed": bool(ev), "kind": kind or None,
                  "time_yr": t if ev else None}
                 for nm, a, ev, kind, t in zip(s.names, s.a0, s.events, s.kinds, s.times)],
    })


def compare_record(job_a, job_b, t, d, fit, names, ranges_a, ranges_b):
    keys = {0: "a_au", 1: "e", 2: "i_deg"}
    return plain({
        "jobs": [job_a, job_b], "kind": fit["kind"], "power": fit["power"],
        "saturated": fit["saturated"], "window_yr": fit["window"],
        "lyapunov_time_yr": fit.get("lyapunov_time"),
        "lyapunov_time_err_yr": fit.get("lyapunov_time_err"),
        "exponent_per_yr": fit.get("exponent_per_yr"),
        "exponent_err_per_yr": fit.get("exponent_err_per_yr"),
        "lyapunov_span_yr": fit.get("lyapunov_span_yr"),
        "lyapunov_time_full_yr": fit.get("lyapunov_time_full"),
        "lyapunov_time_err_full_yr": fit.get("lyapunov_time_err_full"),
        "divergence": {"time_yr": t, "distance": d},
        "element_ranges": {name: {keys[k]: {"job_a": ranges_a[k][b], "job_b": ranges_b[k][b]}
                                  for k in keys} for b, name in enumerate(names)},
    })
