"""The CLI through typer's runner, and once end to end in a subprocess."""

import re

from typer.testing import CliRunner

from orbitledger.runner.cli import app
from helpers import cli, small_spec_text

runner = CliRunner()


def _ws(tmp_path):
    ws = tmp_path / "ws"
    res = runner.invoke(app, ["init", "--workspace", str(ws)])
    assert res.exit_code == 0, res.output
    return ws


def test_submit_work_status_show_extend(tmp_path):
    ws = _ws(tmp_path)
    spec = tmp_path / "j.toml"
    spec.write_text(small_spec_text(name="cli-job"))
    res = runner.invoke(app, ["submit", str(spec), "--workspace", str(ws)])
    assert res.exit_code == 0 and res.stdout.strip() == "1"
    res = runner.invoke(app, ["work", "--workspace", str(ws), "--quiet"])
    assert res.exit_code == 0, res.output
    res = runner.invoke(app, ["status", "--workspace", str(ws)])
    assert res.exit_code == 0
    assert re.search(r"1 .*cli-job .*done .*100\.0%", res.output), res.output
    res = runner.invoke(app, ["show", "1", "--workspace", str(ws)])
    assert res.exit_code == 0
    for word in ("spec sha256", "Provenance", "numba", "survived"):
        assert word in res.output, word
    res = runner.invoke(app, ["extend", "1", "--by", "1000 yr", "--workspace", str(ws)])
    assert res.exit_code == 0, res.output
    res = runner.invoke(app, ["status", "--workspace", str(ws)])
    assert "queued" in res.output


def test_hold_release_cancel(tmp_path):
    ws = _ws(tmp_path)
    spec = tmp_path / "j.toml"
    spec.write_text(small_spec_text())
    runner.invoke(app, ["submit", str(spec), "--workspace", str(ws)])
    assert runner.invoke(app, ["hold", "1", "--workspace", str(ws)]).exit_code == 0
    res = runner.invoke(app, ["work", "--workspace", str(ws), "--quiet"])
    assert res.exit_code == 0
    assert "held" in runner.invoke(app, ["status", "--workspace", str(ws)]).output
    assert runner.invoke(app, ["release", "1", "--workspace", str(ws)]).exit_code == 0
    assert runner.invoke(app, ["cancel", "1", "--workspace", str(ws)]).exit_code == 0
    res = runner.invoke(app, ["release", "1", "--workspace", str(ws)])
    assert res.exit_code == 2 and "is cancelled, so it cannot be released" in res.stderr


def test_errors_are_one_line(tmp_path):
    res = runner.invoke(app, ["status", "--workspace", str(tmp_path / "nowhere")])
    assert res.exit_code == 2
    assert res.stderr.count("\n") == 1 and "run `orbitledger init`" in res.stderr
    ws = _ws(tmp_path)
    res = runner.invoke(app, ["show", "7", "--workspace", str(ws)])
    assert res.exit_code == 2 and "no job 7" in res.stderr
    res = runner.invoke(app, ["work", "--workspace", str(ws), "--deadline", "soon"])
    assert res.exit_code == 2 and "--deadline" in res.stderr


def test_workspace_from_environment(tmp_path, monkeypatch):
    monkeypatch.setenv("ORBITLEDGER_WORKSPACE", str(tmp_path / "envws"))
    assert runner.invoke(app, ["init"]).exit_code == 0
    assert (tmp_path / "envws" / "ledger.sqlite").exists()
    assert runner.invoke(app, ["status"]).exit_code == 0


def test_end_to_end_in_a_subprocess(tmp_path):
    ws = tmp_path / "ws"
    spec = tmp_path / "j.toml"
    spec.write_text(small_spec_text(name="e2e"))
    assert cli("init", "--workspace", ws).returncode == 0
    sub = cli("submit", spec, "--workspace", ws)
    assert sub.returncode == 0 and sub.stdout.strip() == "1"
    work = cli("work", "--workspace", ws, "--workers", "2")
    assert work.returncode == 0, work.stderr
    st = cli("status", "--workspace", ws)
    assert st.returncode == 0 and "done" in st.stdout and "survived" in st.stdout
    bad = cli("submit", tmp_path / "missing.toml", "--workspace", ws)
    assert bad.returncode == 2 and bad.stderr.startswith("error: ")


def test_export_carries_provenance(tmp_path):
    import json

    ws = _ws(tmp_path)
    spec = tmp_path / "j.toml"
    spec.write_text(small_spec_text())
    runner.invoke(app, ["submit", str(spec), "--workspace", str(ws)])
    runner.invoke(app, ["work", "--workspace", str(ws), "--quiet"])
    res = runner.invoke(app, ["export", "1", "--to", str(tmp_path / "j.json"),
                              "--workspace", str(ws)])
    assert res.exit_code == 0, res.output
    rec = json.loads((tmp_path / "j.json").read_text())
    assert rec["job"]["spec_sha256"] and rec["spec"]["method"]["corrector"] == 3
    seg = rec["segments"][0]
    for key in ("host", "pid", "user", "argv", "platform", "cpu", "started_utc", "ended_utc"):
        assert seg[key] not in (None, ""), key
    for lib in ("python", "numpy", "numba", "zarr", "sqlalchemy", "orbitledger"):
        assert lib in seg["versions"], lib
    assert len(rec["checkpoints"]) == rec["job"]["checkpoints"]
    # ISO 8601 times with their zone, lists as lists, no JSON inside strings.
    from datetime import datetime

    assert datetime.fromisoformat(seg["started_utc"]).utcoffset().total_seconds() == 0
    assert isinstance(rec["job"]["angular_momentum0_au2_per_day"], list)
    assert rec["body_names"][0] == "Orrin" and rec["job"]["step_days"] == 10.0


def test_json_outputs_have_stable_keys_with_units(tmp_path):
    import json

    ws = _ws(tmp_path)
    spec = tmp_path / "e.toml"
    spec.write_text(small_spec_text(length="300 yr") + """
[ensemble]
members = 3
[ensemble.perturb]
body = "Orrin c"
quantity = "a"
size = 1e-10
relative = true
""")
    assert runner.invoke(app, ["submit", str(spec), "--workspace", str(ws)]).exit_code == 0
    assert runner.invoke(app, ["work", "--workspace", str(ws), "--quiet"]).exit_code == 0
    wsa = ["--workspace", str(ws), "--json"]
    st = json.loads(runner.invoke(app, ["status", *wsa]).stdout)
    assert [j["status"] for j in st["jobs"]] == ["done"] * 3
    assert st["jobs"][0]["span_yr"] == 300.0 or abs(st["jobs"][0]["span_yr"] - 300) < 0.02
    show = json.loads(runner.invoke(app, ["show", "1", *wsa]).stdout)
    assert show["job"]["outcome"] == "survived" and show["checkpoints"][0]["index"] == 0
    aud = json.loads(runner.invoke(app, ["audit", "1", *wsa]).stdout)
    assert {b["quantity"] for b in aud["budgets"]} >= {"energy"}
    out = json.loads(runner.invoke(app, ["outcomes", "1", *wsa]).stdout)
    assert out["members"] == 3 and out["unstable"] == 0 and out["wilson_95_high"] > 0
    cmp_ = json.loads(runner.invoke(app, ["compare", "1", "2", *wsa]).stdout)
    assert cmp_["kind"] == "regular" and "Orrin b" in cmp_["element_ranges"]
    assert len(cmp_["divergence"]["time_yr"]) == len(cmp_["divergence"]["distance"])


def test_version_completion_and_plain_flags(tmp_path):
    res = runner.invoke(app, ["--version"])
    assert res.exit_code == 0 and res.stdout.startswith("orbitledger ")
    text = runner.invoke(app, ["--help"]).stdout
    assert "--install-completion" in text
    assert "<bool>" not in runner.invoke(app, ["work", "--help"]).stdout
