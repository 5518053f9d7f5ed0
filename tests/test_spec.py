"""Job specs: validation, units, canonical identity, and a corpus of bad input.

Every malformed spec gives one line naming the key, the value and the fix,
a non-zero exit, and writes nothing to the ledger.
"""

import math
import sqlite3

import numpy as np
import pytest
from typer.testing import CliRunner

from orbitledger.runner.inputs import spec as S
from orbitledger.runner.cli import app
from orbitledger.runner.errors import SpecError
from helpers import small_spec_text

GOOD = small_spec_text()


def mutate(old, new, text=GOOD):
    assert old in text, old
    return text.replace(old, new, 1)


# (spec text, key the message must name, value or phrase it must show)
CORPUS = [
    (mutate('step = "10 d"\n', ""), "method.step", "required"),
    (mutate('step = "10 d"', 'step = "10 au"'), "method.step", "'10 au'"),
    (mutate('step = "10 d"', 'step = "-4 d"'), "method.step", "'-4 d'"),
    (mutate('step = "10 d"', 'step = "10"'), "method.step", "needs a unit"),
    (mutate('step = "10 d"', "step = 10"), "method.step", "got 10"),
    (mutate("[method]", '[method]\nname = "magic"'), "method.name", "'magic'"),
    (mutate("e = 0.07", "e = nan"), "system.bodies[0].e", "nan"),
    (mutate("e = 0.07", "e = 1.2"), "system.bodies[0].e", "1.2"),
    (mutate("e = 0.07", "e = -0.1"), "system.bodies[0].e", "-0.1"),
    (mutate('a = "2.9 au"', 'a = "2.9 kg"'), "system.bodies[0].a", "'2.9 kg'"),
    (mutate('mass = "0.0007 Msun"', 'mass = "-0.0007 Msun"'), "system.bodies[0].mass", "-0.0007"),
    (mutate('mass = "0.88 Msun"', 'mass = "0 Msun"'), "system.star.mass", "'0 Msun'"),
    (mutate('name = "Orrin c"', 'name = "Orrin b"'), "system.bodies[1].name", "'Orrin b'"),
    (mutate("corrector = 3", "corrector = 4"), "method.corrector", "4"),
    (mutate('length = "2000 yr"', 'length = "0 yr"'), "span.length", "'0 yr'"),
    (mutate('chunk = "5000 steps"', 'chunk = "5250 steps"'), "span.chunk", "5250"),
    (mutate('output = "500 steps"', 'output = "1.5 d"'), "span.output", "'1.5 d'"),
    (mutate("[span]", '[span]\ndirection = "sideways"'), "span.direction", "'sideways'"),
    (mutate("[span]", "[span]\nlenght = 3"), "span.lenght", "not a known key"),
    (mutate("energy = 1e-06", "energy = -1.0"), "budget.energy", "-1.0"),
    (mutate("[budget]", '[stops]\nhill = -2.0\n[budget]'), "stops.hill", "-2.0"),
    (mutate('a = "2.9 au"', 'a = "2.9 au"\nposition = ["1 au", "0 au", "0 au"]'),
     "system.bodies[0]", "both orbital elements and a state vector"),
    (mutate('name = "orrin"', 'name = "../../etc"'), "name", "'../../etc'"),
    ("this is = not toml [", "spec", "not valid TOML"),
    (mutate('on_exceed = "hold"', 'on_exceed = "explode"'), "budget.on_exceed", "'explode'"),
]


def test_good_spec_resolves_to_internal_units():
    spec = S.load_text(GOOD)
    plan = S.resolve(spec)
    assert plan.dt == 10.0 and plan.total_steps == round(2000 * 365.25 / 10)
    assert plan.chunk_steps == 5000 and plan.output_steps == 500
    # Julian year, 365.25 d (IAU; astropy's definition of "yr").
    assert S.resolve(S.load_text(mutate('step = "10 d"', 'step = "0.5 yr"'))).dt == 182.625
    els = plan.system.elements()
    np.testing.assert_allclose(els[:, 0], [2.9, 6.1, 11.4], rtol=1e-12)


def test_canonical_json_identifies_inputs():
    a = S.load_text(GOOD)
    b = S.load_text(GOOD.replace("[method]", "# a comment\n[method]"))
    assert S.spec_sha256(a) == S.spec_sha256(b)
    c = S.load_text(GOOD.replace("e = 0.07", "e = 0.0700001"))
    assert S.spec_sha256(a) != S.spec_sha256(c)
    assert S.spec_sha256(S.from_json(S.canonical_json(a))) == S.spec_sha256(a)


def test_backward_direction_negates_step():
    plan = S.resolve(S.load_text(mutate("[span]", '[span]\ndirection = "backward"')))
    assert plan.dt == -10.0


@pytest.mark.parametrize("text,key,shown", CORPUS, ids=[c[1] + ":" + c[2][:12] for c in CORPUS])
def test_bad_spec_message_names_key_value_and_fix(text, key, shown):
    with pytest.raises(SpecError) as info:
        S.load_text(text)
    msg = str(info.value)
    assert "\n" not in msg
    assert f"`{key}" in msg or key in msg
    assert shown in msg
    assert ";" in msg or "add it" in msg or "give" in msg  # a fix follows


def test_bad_specs_through_the_cli_write_nothing(tmp_path):
    assert len(CORPUS) >= 15
    runner = CliRunner()
    ws = tmp_path / "ws"
    assert runner.invoke(app, ["init", "--workspace", str(ws)]).exit_code == 0
    for k, (text, key, shown) in enumerate(CORPUS):
        f = tmp_path / f"bad{k}.toml"
        f.write_text(text)
        res = runner.invoke(app, ["submit", str(f), "--workspace", str(ws)])
        assert res.exit_code == 2, (key, res.output)
        lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
        assert len(lines) == 1 and lines[0].startswith("error: "), res.stderr
        assert shown in lines[0]
    con = sqlite3.connect(ws / "ledger.sqlite")
    assert con.execute("select count(*) from jobs").fetchone()[0] == 0
    assert con.execute("select count(*) from checkpoints").fetchone()[0] == 0
    con.close()
    assert list((ws / "store").iterdir()) == []


def test_oversized_spec_is_refused():
    with pytest.raises(SpecError, match="larger than"):
        S.load_text(GOOD + "#" * 1_000_001)


def test_state_vector_bodies():
    text = mutate('a = "2.9 au"\ne = 0.07\ni = "1.1 deg"\nnode = "20 deg"\npeem', "")  \
        if False else GOOD.replace(
            'a = "2.9 au"\ne = 0.07\ni = "1.1 deg"\nnode = "20 deg"\nperi = "75 deg"\n'
            'mean_anomaly = "10 deg"',
            'position = ["2.9 au", "0 au", "0 au"]\nvelocity = ["0 au/d", "0.0096 au/d", "0 km/s"]')
    plan = S.resolve(S.load_text(text))
    xh, vh = plan.system.heliocentric()
    assert xh[1][0] == pytest.approx(2.9) and vh[1][1] == pytest.approx(0.0096)
    assert math.isfinite(plan.system.elements()[0][1])


def test_stop_keys_of_earlier_versions_are_read_with_a_note(tmp_path):
    from orbitledger.runner.inputs import spec as S
    from helpers import cli, small_spec_text
    from orbitledger.runner.ledger.workspace import init

    old = small_spec_text() + ('[stops]\neject_distance = "50 au"\nstar_radius = "0.01 au"\n'
                               'unbound = true\nunbound_distance = "30 au"\n')
    new = small_spec_text() + ('[stops]\nescape_distance = "50 au"\n'
                               'star_contact_distance = "0.01 au"\n'
                               'unbound_escape_distance = "30 au"\n')
    notes = []
    a, b = S.load_text(old, notes=notes), S.load_text(new)
    assert S.canonical_json(a) == S.canonical_json(b)
    st = S.resolve(a).stops
    assert (st.eject_distance, st.star_radius, st.unbound, st.unbound_distance) == \
        (50.0, 0.01, True, 30.0)
    assert any("`stops.eject_distance` is now called `stops.escape_distance`" in n for n in notes)
    with pytest.raises(S.SpecError, match="same setting under its old and new name"):
        S.load_text(old.replace('star_radius = "0.01 au"',
                                'star_radius = "0.01 au"\nstar_contact_distance = "0.01 au"'))
    ws, led = init(tmp_path / "ws")
    led.close()
    (tmp_path / "old.toml").write_text(old)
    res = cli("submit", tmp_path / "old.toml", "--workspace", ws)
    assert res.returncode == 0 and "now called `stops.escape_distance`" in res.stderr
