"""Numbers in human units: times in a sensible unit, rates in one unit per column,
bodies by name in status, show, outcomes and their JSON."""

import json
import re

import pytest
from typer.testing import CliRunner

from orbitledger.runner.cli import app
from orbitledger.runner.inputs.units import format_time, time_unit
from helpers import ejecting_ensemble_text, small_spec_text

runner = CliRunner()
YEAR = 365.25  # Julian year in days (IAU)


@pytest.mark.parametrize("days, text", [
    (0.0, "0 yr"), (8.0, "8 d"), (0.5 * YEAR, "0.5 yr"), (0.25 * YEAR, "0.25 yr"),
    (50.0, "50 d"), (37.2 * YEAR, "37.2 yr"), (5e5 * YEAR, "500 kyr"),
    (9.95e6 * YEAR, "9.95 Myr"), (2e9 * YEAR, "2 Gyr"), (-3e6 * YEAR, "-3 Myr")])
def test_times_read_in_a_sensible_unit(days, text):
    assert format_time(days) == text


def test_one_unit_for_a_column_is_chosen_by_its_largest_value():
    assert time_unit(0.0) == ("yr", YEAR)
    assert time_unit(999 * YEAR) == ("yr", YEAR)
    assert time_unit(2.6e9 * YEAR) == ("Gyr", YEAR * 1e9)
    assert time_unit(20e3 * YEAR) == ("kyr", YEAR * 1e3)


def _invoke(*args):
    res = runner.invoke(app, [str(a) for a in args])
    assert res.exit_code == 0, res.output
    return res.output


def _ensemble_text():
    return ejecting_ensemble_text("units-ens")


def test_status_show_extend_and_outcomes_speak_in_time_and_names(tmp_path):
    ws = tmp_path / "ws"
    _invoke("init", "--workspace", ws)
    one = tmp_path / "one.toml"
    one.write_text(small_spec_text(name="single", step="0.025 yr", length="300 yr"))
    ens = tmp_path / "ens.toml"
    ens.write_text(_ensemble_text())
    _invoke("submit", one, "--workspace", ws)
    _invoke("submit", ens, "--workspace", ws)

    # Nothing run yet: "0 yr of 300 yr", no rate.
    text = _invoke("status", "--workspace", ws)
    assert "0 yr of 300 yr" in text
    _invoke("work", "--workspace", ws, "--quiet")

    text = _invoke("extend", "1", "--to", "20 kyr", "--workspace", ws)
    assert "job 1 now runs to 20 kyr" in text and "step 0" not in text
    res = runner.invoke(app, ["extend", "1", "--to", "10 kyr", "--workspace", str(ws)])
    assert res.exit_code != 0 and "already runs to 20 kyr" in res.output

    text = _invoke("show", "1", "--workspace", ws)
    assert "step 0.025 yr (9.13125 d)" in text
    assert re.search(r"every \S+ yr \(\d+ steps\)", text), text

    text = _invoke("status", "--workspace", ws)
    header = next(line for line in text.splitlines() if "progress" in line)
    units = re.findall(r"\b(yr|kyr|Myr|Gyr)/h\b", header)
    assert len(units) == 1, header  # one rate unit for the whole column
    assert "of 20 kyr" in text
    stopped = json.loads(_invoke("status", "--json", "--workspace", ws))["jobs"]
    ejected = [j for j in stopped if j["outcome"] == "ejection"]
    assert ejected, [j["outcome"] for j in stopped]
    assert all(j["outcome_bodies"] == ["Orrin d"] for j in ejected)
    assert "(Orrin d)" in text  # the status table names the body too

    text = _invoke("show", str(ejected[0]["id"]), "--workspace", ws)
    assert re.search(r"ejection at [\d.]+ kyr \(Orrin d\)", text), text

    text = _invoke("outcomes", "1", "--workspace", ws)
    assert "times (kyr)" in text and "ejection: Orrin d" in text, text
    rec = json.loads(_invoke("outcomes", "1", "--json", "--workspace", ws))
    assert rec["counts_by_body"] == {"ejection": {"Orrin d": len(ejected)}}
    assert rec["counts"]["ejection"] == len(ejected)


def test_a_large_ledger_is_summarised_by_ensemble(tmp_path):
    from orbitledger.runner import defaults

    ws = tmp_path / "ws"
    _invoke("init", "--workspace", ws)
    ens = tmp_path / "ens.toml"
    members = defaults.STATUS_LIST_MAX + 5
    ens.write_text(ejecting_ensemble_text("units-ens", members=members, escape="20 au"))
    one = tmp_path / "one.toml"
    one.write_text(small_spec_text(name="single", length="300 yr"))
    _invoke("submit", ens, "--workspace", ws)
    _invoke("submit", one, "--workspace", ws)
    text = _invoke("status", "--workspace", ws)
    assert "Ensembles" in text and f"{members} queued" in text, text
    assert "single" in text  # jobs outside ensembles are still listed
    assert "units-ens-m0003" not in text  # members are summarised, not listed
    assert f"{members} members of 1 ensemble(s) summarised" in text
    text = _invoke("status", "--all", "--workspace", ws)
    assert "units-ens-m0003" in text and "Ensembles" not in text
    rows = json.loads(_invoke("status", "--json", "--workspace", ws))["jobs"]
    assert len(rows) == members + 1
