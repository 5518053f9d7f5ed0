"""Grid ensembles and stability maps: the spec, the map's dataset and picture, and the
Hill-stability boundary of two planets (Gladman 1993) found on a map."""

import math

import numpy as np
import pytest
import xarray as xr

from orbitledger.runner.analysis.stability_map import classes, stability_map
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.inputs import spec as S
from orbitledger.runner.inputs.ensemble import member_spec
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.ledger.workspace import init
from helpers import cli, small_spec_text

GRID = """
[[ensemble.grid]]
body = "Orrin d"
quantity = "a"
first = "10 au"
last = "12 au"
count = 3
[[ensemble.grid]]
body = "Orrin d"
quantity = "e"
first = 0.0
last = 0.2
count = 2
"""


def test_grid_members_are_the_cells_row_major():
    spec = S.load_text(small_spec_text() + GRID)
    assert spec.ensemble.members == 6
    got = []
    for k in range(6):
        els = S.resolve(member_spec(spec, k)).system.elements()
        got.append((round(float(els[2][0]), 12), round(float(els[2][1]), 12)))
    assert got == [(10.0, 0.0), (10.0, 0.2), (11.0, 0.0), (11.0, 0.2), (12.0, 0.0), (12.0, 0.2)]


@pytest.mark.parametrize("change, key", [
    (lambda t: t.replace("count = 2", "count = 0"), "ensemble.grid[1].count"),
    (lambda t: t.replace("first = 0.0", 'first = "0 deg"'), "ensemble.grid[1].first"),
    (lambda t: t.replace('first = "10 au"', "first = 10"), "ensemble.grid[0].first"),
    (lambda t: t.replace('quantity = "e"', 'quantity = "a"'), "ensemble.grid[1]"),
    (lambda t: t.replace("last = 0.2", "last = 1.2"), "ensemble.grid[1]"),
    (lambda t: t.replace('body = "Orrin d"\nquantity = "e"', 'body = "Orrin x"\nquantity = "e"'),
     "ensemble.grid[1].body"),
    (lambda t: t.replace("[[ensemble.grid]]", "[ensemble]\nmembers = 5\n[[ensemble.grid]]", 1),
     "ensemble"),
    (lambda t: t + '[ensemble.perturb]\nbody = "Orrin d"\nquantity = "a"\nsize = "1 cm"\n',
     "ensemble"),
])
def test_bad_grids_are_refused_naming_the_key(change, key):
    with pytest.raises(S.SpecError) as err:
        S.load_text(change(small_spec_text() + GRID))
    assert f"`{key}" in str(err.value), str(err.value)


# Two planets of 1e-3 Msun on circular coplanar orbits round a 1 Msun star
# (the inner at 1 au), the outer's semi-major axis on a grid.
PAIR = """
name = "cadmus-pair"
[system]
star = {{ name = "Cadmus", mass = "1 Msun" }}
[[system.bodies]]
name = "Cadmus b"
mass = "0.001 Msun"
a = "1 au"
e = 0.0
[[system.bodies]]
name = "Cadmus c"
mass = "0.001 Msun"
a = "1.5 au"
e = 0.0
mean_anomaly = "180 deg"
[method]
step = "9.13125 d"
corrector = 5
indicator = "megno"
[span]
length = "{length}"
chunk = "20000 steps"
output = "4000 steps"
[budget]
on_exceed = "continue"
[stops]
hill = 1.0
[[ensemble.grid]]
body = "Cadmus c"
quantity = "a"
first = "{first!r} au"
last = "{last!r} au"
count = {count}
"""


def mutual_hill_separation(a1, a2, m1, m2, m0=1.0):
    """(a2 - a1) in mutual Hill radii R_H = ((m1 + m2) / (3 m0))^(1/3) (a1 + a2) / 2
    (Gladman 1993, eq. for the mutual Hill radius), written here from the definition."""
    return (a2 - a1) / (((m1 + m2) / (3.0 * m0)) ** (1.0 / 3.0) * 0.5 * (a1 + a2))


def outer_a(delta, m=1e-3):
    """The outer a (inner at 1 au) that puts the pair delta mutual Hill radii apart."""
    x = delta * (2.0 * m / 3.0) ** (1.0 / 3.0)
    return (1.0 + x / 2.0) / (1.0 - x / 2.0)


def test_the_map_of_two_planets_finds_gladmans_boundary(tmp_path):
    # Gladman (1993): two planets on initially circular coplanar orbits can
    # never have a close encounter if they start more than 2 sqrt(3) ~ 3.46
    # mutual Hill radii apart (Hill stability; to lowest order in the
    # masses). It is a sufficient condition: just inside it encounters become
    # possible but need not come at once, so over a finite span the last
    # unstable or chaotic cell lies at or somewhat inside 2 sqrt(3). Tolerance
    # (common practice, no source): the boundary within 20 % inside 2 sqrt(3)
    # plus one grid step outside it, and every cell beyond that regular
    # (<Y> within 0.5 of 2, no stop) over 2000 inner orbits.
    critical = 2.0 * math.sqrt(3.0)
    lo, hi, count = outer_a(2.4), outer_a(4.6), 12
    text = PAIR.format(length="2000 yr", first=lo, last=hi, count=count)
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    ens, _ = led.submit_ensemble(S.load_text(text))
    Worker(led).run()
    ds = stability_map(led, ens)
    a = ds["a"].values
    delta = np.array([mutual_hill_separation(1.0, x, 1e-3, 1e-3) for x in a])
    step = delta[1] - delta[0]
    names = classes(ds)
    assert names[0] == "unstable"  # 2.4 R_H: an encounter within the span
    bad = delta[names != "regular"]
    edge = bad.max()
    assert 0.8 * critical <= edge <= critical + step, (list(zip(delta.round(2), names)))
    beyond = delta > critical + step
    assert beyond.any() and (names[beyond] == "regular").all()
    assert np.all(np.abs(ds["megno"].values[beyond] - 2.0) < 0.5)
    assert (ds["time_reached"].values[beyond] == pytest.approx(2000.0, rel=1e-6))
    led.close()


def test_map_command_writes_a_picture_and_a_dataset(tmp_path):
    ws, led = init(tmp_path / "ws")
    text = PAIR.format(length="50 yr", first=outer_a(2.6), last=outer_a(4.0), count=4)
    spec = tmp_path / "pair.toml"
    spec.write_text(text + """
[[ensemble.grid]]
body = "Cadmus c"
quantity = "e"
first = 0.0
last = 0.1
count = 2
""")
    assert cli("submit", spec, "--workspace", ws).returncode == 0
    assert cli("work", "--workspace", ws, "--quiet").returncode == 0
    res = cli("map", "1", "--workspace", ws, "--plot", tmp_path / "m.png",
              "--dataset", tmp_path / "m.zarr", "--html", tmp_path / "m.html")
    assert res.returncode == 0, res.stderr
    assert "4 Cadmus c: semi-major axis (au) x 2 Cadmus c: eccentricity (1)" in res.stdout
    assert (tmp_path / "m.png").stat().st_size > 10_000
    page = (tmp_path / "m.html").read_text()
    assert page.count("<img") == 3 and "a convention" in page
    ds = xr.open_zarr(str(tmp_path / "m.zarr"), consolidated=False)
    assert ds["megno"].dims == ("a", "e")
    assert ds["a"].attrs["units"] == "au" and ds["e"].sizes["e"] == 2
    assert ds["cell_class"].attrs["flag_meanings"] == "regular chaotic unstable survived"
    # A clone ensemble has no grid: one clear line, non-zero exit.
    clones = tmp_path / "clones.toml"
    clones.write_text(small_spec_text(length="100 yr") + """
[ensemble]
members = 2
[ensemble.perturb]
body = "Orrin d"
quantity = "a"
size = "1 cm"
""")
    assert cli("submit", clones, "--workspace", ws).returncode == 0
    res = cli("map", "2", "--workspace", ws)
    assert res.returncode != 0 and "grid ensemble" in res.stderr + res.stdout
    res = cli("map", "1", "--workspace", ws, "--show", "colour")
    assert res.returncode != 0 and "--show must be one of" in res.stderr + res.stdout
    led.close()


def test_a_map_taken_early_covers_the_whole_grid_at_an_earlier_time(tmp_path):
    # Breadth first, every cell advances together: stopped part-way, the map
    # already has every cell, none more than a chunk ahead of another.
    from helpers import stepping_clock

    text = PAIR.format(length="2000 yr", first=outer_a(3.2), last=outer_a(4.4), count=6)
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    ens, _ = led.submit_ensemble(S.load_text(text))
    clock = stepping_clock(1.0)
    Worker(led, clock=clock, deadline=70.0, max_steps_per_call=20000, slice_seconds=None).run()
    ds = stability_map(led, ens)
    reached = ds["time_reached"].values
    chunk_yr = 20000 * 9.13125 / 365.25
    assert 0 < reached.min() < 2000.0                 # stopped part-way
    assert reached.max() - reached.min() <= chunk_yr + 1e-9
    assert np.isfinite(ds["megno"].values).all()     # every cell has a value already
    # The rest of the run sharpens the same map.
    Worker(led).run()
    assert (stability_map(led, ens)["time_reached"].values == pytest.approx(2000.0))
    led.close()
