"""Through close encounters: the map handing over to Gauss-Radau and back, mergers and
ejections as events, and resumption bit for bit across switches."""

import numpy as np
import pytest

from orbitledger.integrators import StopConditions, Switching
from orbitledger.integrators.switching import EJECTION, EVENT_NAMES, MERGER, TO_MAP, TO_RADAU

# Two invented giants of Tor, 1.25 apart in a: well inside Gladman's 2 sqrt(3) mutual Hill
# radii, so they scatter, and with Jupiter-like radii they merge within a few hundred years.
SCATTER = """
name = "tor-scatter"
[system]
star = {{ name = "Tor", mass = "1 Msun", radius = "0.00465 au" }}
[[system.bodies]]
name = "Tor b"
mass = "0.001 Msun"
radius = "0.00048 au"
a = "1 au"
e = 0.0
[[system.bodies]]
name = "Tor c"
mass = "0.001 Msun"
radius = "0.00048 au"
a = "1.25 au"
e = 0.05
i = "0.5 deg"
mean_anomaly = "171.9 deg"
{extra_body}
[method]
step = "9.13125 d"
corrector = 3
encounters = "switch"
{method}
[span]
length = "{length}"
output = "400 steps"
chunk = "4000 steps"
[budget]
energy = 1e-3
[stops]
hill = 3.0
escape_distance = "50 au"
"""


def scatter_text(length="1500 yr", method="switch_back = 5.0", extra_body=""):
    return SCATTER.format(length=length, method=method, extra_body=extra_body)


def load(text):
    from orbitledger.runner.inputs import spec as S

    return S.load_text(text)


def momentum(integ):
    x, v = integ.inner._synchronized_state()
    return (integ.inner.gm[:, None] * v).sum(0), np.abs(integ.inner.gm[:, None] * v).sum()


def test_a_scattering_pair_switches_and_merges_conserving_momentum():
    from orbitledger.runner.inputs.spec import resolve

    integ = resolve(load(scatter_text())).make_integrator()
    assert isinstance(integ, Switching)
    p0, scale = momentum(integ)
    m_total = float(integ.gm.sum())
    integ.advance(60_000)
    kinds = [int(k) for k in integ.events[:, 1]]
    assert kinds.count(TO_RADAU) >= 1 and kinds.count(TO_RADAU) - kinds.count(TO_MAP) in (0, 1)
    assert MERGER in kinds
    # Momentum: the map in Jacobi coordinates and Gauss-Radau keep the total momentum
    # to round-off, and a merger at the centre of mass with the summed momentum keeps it
    # exactly up to rounding (conservation of momentum).
    p1, _ = momentum(integ)
    assert np.linalg.norm(p1 - p0) < 1e-13 * scale
    assert float(integ.inner.gm.sum()) == pytest.approx(m_total, rel=1e-15)
    assert list(integ.alive) == [0, 1] and len(integ.inner.gm) == 2
    # The energy the merger took is recorded; the rest of the run's error is the map's
    # and the switches' (state-dependent switching freezes the map's error at each one).
    merge = integ.events[kinds.index(MERGER)]
    assert 0 < merge[4] < 0.1
    assert abs(integ.energy() / integ.energy() - 1) == 0  # finite
    x, _ = integ._synchronized_state()
    assert np.isnan(x[2]).all() and np.isfinite(x[:2]).all()


def test_an_ejected_body_is_removed_and_the_run_goes_on():
    # A third body of Tor set on a hyperbolic orbit leaves through 50 au: removed with
    # its energy, the other two go on.
    from orbitledger.runner.inputs.spec import resolve

    extra = """
[[system.bodies]]
name = "Tor d"
mass = "1e-5 Msun"
a = "-3 au"
e = 1.5
mean_anomaly = "10 deg"
node = "200 deg"
"""
    integ = resolve(load(scatter_text(extra_body=extra).replace(
        'a = "1.25 au"', 'a = "1.6 au"'))).make_integrator()
    e0 = integ.energy()
    integ.advance(8000)
    kinds = [int(k) for k in integ.events[:, 1]]
    assert EJECTION in kinds
    row = integ.events[kinds.index(EJECTION)]
    assert int(row[2]) == 3 and 3 not in integ.alive
    # Energy with what the event removed added back: the map's own error only.
    assert abs(integ.energy() - e0) / abs(e0) < 1e-6


def test_a_switching_job_killed_inside_its_stretches_resumes_bit_for_bit(tmp_path):
    # Real worker processes killed by SIGKILL right after each of the first 25 commits
    # (so every checkpoint through the scattering is a resumption point; the one at step
    # 13200 falls inside a Gauss-Radau stretch), then at random moments: the run, its samples and
    # its switch and merger events in the ledger equal an uninterrupted run's, and
    # verify passes.
    import random

    from helpers import final_state, run_with_kills, samples_bytes
    from orbitledger.runner.analysis.integrity import verify
    from orbitledger.runner.execution.worker import Worker
    from orbitledger.runner.ledger.operations import Ledger
    from orbitledger.runner.ledger.workspace import init

    text = scatter_text(length="1000 yr").replace('chunk = "4000 steps"', 'chunk = "1200 steps"')
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref-store")
    ref_id = ref.submit(load(text))
    Worker(ref).run()
    ws, led = init(tmp_path / "ws")
    jid = led.submit(load(text))
    modes = ["after_commit:1"] * 25 + ["mid_store_write:2", "in_commit:3"]
    kills = run_with_kills(ws, led, jid, modes, random.Random(23), random_kills=30,
                           pause=(0.8, 1.6))
    assert led.job(jid)["status"] == "done"
    assert kills >= 25, kills
    # Some resumption started inside a Gauss-Radau stretch (method 1 in the state).
    modes = []
    for seg in led.segments(jid)[1:]:
        ck = next(c for c in led.checkpoints(jid) if c["step"] == seg["start_step"])
        modes.append(int(led.load_integrator(jid, ck["idx"])[0].mode))
    assert 1 in modes and 0 in modes, modes
    assert final_state(led, jid) == final_state(ref, ref_id)
    assert samples_bytes(led, jid) == samples_bytes(ref, ref_id)
    rep = verify(led, jid)
    assert rep.ok, rep.problem
    # Replay: every stretch from one checkpoint to the next, again from its state.
    from orbitledger.runner.analysis.integrity import replay

    assert all(ok for _, ok in replay(led, jid, indices=range(8, 16)))

    def story(ledger, job_id):
        return [(e["kind"], e["step"], e["bodies"]) for e in ledger.events(job_id)
                if e["kind"] in EVENT_NAMES.values()]

    got = story(led, jid)
    assert got == story(ref, ref_id)
    merges = [g for g in got if g[0] == "merger"]
    assert len(merges) == 1 and merges[0][2] == "1,2" and len(got) > 2
    # The merged body's elements are NaN in the samples after the merger.
    s = led.store.read_samples(jid, led.job(jid)["n_samples"])
    assert np.isnan(s["elements"][-1, 1]).all() and np.isfinite(s["elements"][-1, 0]).all()
    led.close()
    ref.close()


@pytest.mark.parametrize("change, words", [
    (("hill = 3.0", "hill = 0.0"), "needs `stops.hill` > 0"),
    (("switch_back = 5.0", "switch_back = 2.0"), "must be at least `stops.hill`"),
    (('encounters = "switch"', 'encounters = "switch"\nindicator = "megno"'),
     "cannot carry a chaos indicator"),
    (('encounters = "switch"', 'encounters = "stop"'), "`method.switch_back` needs"),
    (("[span]", '[span]\ndirection = "backward"'), "runs forward only"),
])
def test_switching_settings_that_mean_nothing_are_refused(change, words):
    from orbitledger.runner.errors import SpecError

    text = scatter_text()
    assert change[0] in text
    with pytest.raises(SpecError) as err:
        load(text.replace(change[0], change[1], 1))
    assert words in str(err.value) and "\n" not in str(err.value)


def test_stop_specs_keep_their_canonical_text():
    from helpers import small_spec_text
    from orbitledger.runner.inputs.spec import canonical_json

    text = canonical_json(load(small_spec_text()))
    assert "encounters" not in text and "switch_back" not in text and "tolerance" not in text


def test_the_switching_state_round_trips_inside_a_gauss_radau_stretch():
    # Reproducibility: stopped while Gauss-Radau runs and rebuilt from its arrays (as a
    # checkpoint would), the run goes on exactly as the uninterrupted one.
    from orbitledger.integrators import Integrator
    from orbitledger.runner.inputs.spec import resolve

    plan = resolve(load(scatter_text()))
    a = plan.make_integrator()
    k = 0
    while a.mode != 1:
        a.advance(1)
        k += 1
    b = plan.make_integrator()
    b.advance(k)
    b = Integrator.from_state_arrays({key: np.array(v) for key, v in b.state_arrays().items()})
    a.advance(20_000)
    b.advance(20_000)
    sa, sb = a.state_arrays(), b.state_arrays()
    assert sorted(sa) == sorted(sb)
    for key in sa:
        assert np.asarray(sa[key]).tobytes() == np.asarray(sb[key]).tobytes(), key
    assert StopConditions  # imported for readers: the stops that start a switch


def test_ensemble_outcomes_count_what_happened_to_the_members_bodies(tmp_path):
    import json

    from helpers import cli
    from orbitledger.runner.ledger.operations import Ledger

    spec = tmp_path / "e.toml"
    spec.write_text(scatter_text(length="600 yr") + """
[ensemble]
members = 4
seed = 4
[ensemble.perturb]
body = "Tor c"
quantity = "mean_anomaly"
rule = "uniform"
size = "20 deg"
""")
    ws = tmp_path / "ws"
    assert cli("init", "--workspace", ws).returncode == 0
    assert cli("submit", spec, "--workspace", ws).returncode == 0
    assert cli("work", "--workspace", ws, "--quiet", "--workers", "2").returncode == 0
    res = cli("outcomes", "1", "--workspace", ws, "--json")
    assert res.returncode == 0, res.stderr
    got = json.loads(res.stdout)["body_events"]
    # Counted again here from the ledger's event rows: members with a merger of b and c.
    led = Ledger(f"sqlite:///{ws}/ledger.sqlite", ws / "store")
    merged = {j for j in range(1, 5) for e in led.events(j)
              if e["kind"] == "merger" and e["bodies"] == "1,2"}
    led.close()
    assert merged and got["merger: Tor b, Tor c"] == len(merged)
    assert got["kept every body"] == 4 - len(merged)
    table = cli("outcomes", "1", "--workspace", ws)
    assert "merger: Tor b, Tor c" in table.stdout and "kept every body" in table.stdout
    # The members' plots mark the merger.
    assert cli("plot", str(min(merged)), "--workspace", ws, "--kind", "elements",
               "--to", tmp_path / "m.png").returncode == 0
    assert (tmp_path / "m.png").stat().st_size > 10_000


def test_a_switching_job_extended_equals_one_run_to_the_later_end(tmp_path):
    # Extended from 300 yr (inside the scattering) to 600 yr, the job ends in the same
    # state, with the same samples and events, as one run straight to 600 yr.
    from helpers import final_state, samples_bytes
    from orbitledger.runner.execution.worker import Worker
    from orbitledger.runner.ledger.operations import Ledger

    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    short = led.submit(load(scatter_text(length="300 yr")))
    whole = led.submit(load(scatter_text(length="600 yr")))
    Worker(led).run()
    led.extend(short, led.job(whole)["total_steps"])
    Worker(led).run()
    assert led.job(short)["status"] == led.job(whole)["status"] == "done"
    assert final_state(led, short) == final_state(led, whole)
    assert samples_bytes(led, short) == samples_bytes(led, whole)

    def story(job_id):
        return [(e["kind"], e["step"], e["bodies"]) for e in led.events(job_id)
                if e["kind"] in EVENT_NAMES.values()]

    assert story(short) == story(whole) and any(k == "merger" for k, _, _ in story(whole))
    led.close()
