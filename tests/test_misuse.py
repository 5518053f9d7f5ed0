"""A corpus of bad inputs and misuses of the CLI: each gives a non-zero exit
code, one line on stderr (typer's own usage errors keep typer's format), no
traceback, and leaves the ledger and the store exactly as they were; every
job still verifies afterwards.
"""

import hashlib
import os

import pytest
from typer.testing import CliRunner

from orbitledger.runner.cli import app
from orbitledger.runner.ledger.workspace import init
from orbitledger.runner.execution.worker import Worker
from helpers import small_spec, small_spec_text

runner = CliRunner()


class _Spec(str):
    """A spec file to write before the command runs: the path, with its text."""

    def __new__(cls, name, text):
        obj = super().__new__(cls, "{tmp}/" + name)
        obj.text = text
        return obj


def _cases(tmp="{tmp}"):
    good = small_spec_text(length="100 yr")
    bodies_c = ('a = "6.1 au"\ne = 0.04\ni = "2.0 deg"\nnode = "140 deg"\nperi = "300 deg"\n'
                'mean_anomaly = "190 deg"')
    same_as_b = ('a = "2.9 au"\ne = 0.07\ni = "1.1 deg"\nnode = "20 deg"\nperi = "75 deg"\n'
                 'mean_anomaly = "10 deg"')
    spec = lambda name, text: ["submit", _Spec(name, text)]  # noqa: E731
    return [
        ("missing spec file", ["submit", tmp + "/nope.toml"]),
        ("not TOML", spec("a.toml", "name = [unclosed")),
        ("missing name", spec("b.toml", good.replace('name = "orrin"', ""))),
        ("unknown key", spec("c.toml", good.replace("[method]", "[method]\nspeed = 3"))),
        ("negative step", spec("d.toml", good.replace('step = "10 d"', 'step = "-10 d"'))),
        ("massless star", spec("e.toml", good.replace('mass = "0.88 Msun"', 'mass = "0 Msun"'))),
        ("elliptic e >= 1", spec("f.toml", good.replace("e = 0.07", "e = 1.2"))),
        ("hyperbolic e < 1", spec("g.toml", good.replace('a = "2.9 au"', 'a = "-2.9 au"'))),
        ("inclination 200", spec("h.toml", good.replace('i = "2.0 deg"', 'i = "200 deg"'))),
        ("coincident bodies", spec("i.toml", good.replace(bodies_c, same_as_b))),
        ("inside the star", spec("j.toml", good.replace('radius = "0.004 au"',
                                                        'radius = "3 au"'))),
        ("ejection inside an orbit", spec("k.toml", good + '[stops]\nescape_distance = "5 au"\n')),
        ("step longer than an orbit", spec("l.toml", good.replace('step = "10 d"',
                                                                  'step = "2000 d"'))),
        ("store too large", spec("m.toml", good.replace('output = "500 steps"',
                                                        'output = "1 steps"').replace(
            'length = "100 yr"', 'length = "1e8 yr"'))),
        ("chunk too large for memory", spec("m2.toml", good.replace(
            'output = "500 steps"', 'output = "1 steps"').replace(
            'chunk = "5000 steps"', 'chunk = "400000 steps"').replace(
            'length = "100 yr"', 'length = "1e5 yr"'))),
        ("chunk not whole outputs", spec("n.toml", good.replace('chunk = "5000 steps"',
                                                                'chunk = "5001 steps"'))),
        ("unknown unit", spec("o.toml", good.replace('step = "10 d"', 'step = "10 parsecs"'))),
        ("bad name", spec("p.toml", good.replace('name = "orrin"', 'name = "../etc"'))),
        ("corrector 4", spec("q.toml", good.replace("corrector = 3", "corrector = 4"))),
        ("ensemble of nobody", spec("r.toml", good + '[ensemble]\nmembers = 3\n'
                                    '[ensemble.perturb]\nbody = "Zed"\nquantity = "a"\n'
                                    'size = 1e-9\n')),
        ("ensemble of zero", spec("s.toml", good + '[ensemble]\nmembers = 0\n'
                                  '[ensemble.perturb]\nbody = "Orrin b"\nquantity = "a"\n'
                                  'size = 1e-9\n')),
        ("show missing job", ["show", "999"]),
        ("show job 0", ["show", "0"]),
        ("show absurd id", ["show", "99999999999999999999"]),
        ("hold missing job", ["hold", "999"]),
        ("release missing job", ["release", "999"]),
        ("cancel missing job", ["cancel", "999"]),
        ("extend missing job", ["extend", "999", "--to", "1 Myr"]),
        ("extend to the past", ["extend", "1", "--to", "1 yr"]),
        ("extend both ways", ["extend", "1", "--to", "1 Myr", "--by", "1 yr"]),
        ("compare a job with itself", ["compare", "1", "1"]),
        ("compare with a missing job", ["compare", "1", "999"]),
        ("verify missing job", ["verify", "999"]),
        ("replay past the end", ["replay", "1", "--checkpoint", "9999"]),
        ("report into a folder", ["report", "1", "--to", tmp]),
        ("export into a missing folder", ["export", "1", "--to", tmp + "/no/x.json"]),
        ("plot into a missing folder", ["plot", "1", "--to", tmp + "/no/x.png"]),
        ("status of a missing ensemble", ["status", "--ensemble", "42"]),
        ("outcomes of a missing ensemble", ["outcomes", "42"]),
        ("deadline in words", ["work", "--deadline", "soon"]),
        ("order sideways", ["work", "--order", "sideways"]),
        ("batch on SQLite", ["batch"]),
        ("batch dry run and submit", ["batch", "--dry-run", "--submit", "--db",
                                      "postgresql+psycopg://u@h/db"]),
        ("backward at no checkpoint", ["backward", "1", "--at", "1 yr"]),
        ("backward of a missing job", ["backward", "999"]),
        ("backward at and checkpoint", ["backward", "1", "--at", "1 yr", "--checkpoint", "1"]),
        ("reversibility of a forward job", ["reversibility", "1"]),
        ("release a done job", ["release", "1"]),
        ("cancel a done job", ["cancel", "1"]),
        ("hold a done job", ["hold", "1"]),
        ("unknown database backend", ["status", "--db", "mysql://u@h/db"]),
        ("missing database driver", ["status", "--db", "postgresql+pg8000://u@127.0.0.1/x"]),
    ]


def _snapshot(ws):
    """The ledger's rows and every store file's bytes, as one digest."""
    import sqlite3

    h = hashlib.sha256()
    con = sqlite3.connect(f"file:{ws / 'ledger.sqlite'}?mode=ro", uri=True)
    for table in ("jobs", "checkpoints", "segments", "events", "ensembles"):
        for row in con.execute(f"SELECT * FROM {table} ORDER BY 1"):
            h.update(repr(row).encode())
    con.close()
    for root, dirs, files in os.walk(ws / "store"):
        dirs.sort()
        for name in sorted(files):
            path = os.path.join(root, name)
            h.update(path.encode())
            with open(path, "rb") as fh:
                h.update(fh.read())
    return h.hexdigest()


@pytest.fixture(scope="module")
def workspace(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("misuse")
    ws, led = init(tmp / "ws")
    led.submit(small_spec(length="100 yr"))
    Worker(led).run()
    led.close()
    return tmp, ws


def test_corpus_has_at_least_forty_cases():
    assert len(_cases()) >= 40


CASES = _cases()


@pytest.mark.parametrize("label,template", CASES, ids=[c[0] for c in CASES])
def test_misuse_is_one_line_and_changes_nothing(label, template, workspace):
    tmp, ws = workspace
    for a in template:
        if isinstance(a, _Spec):
            (tmp / a.rsplit("/", 1)[1]).write_text(a.text)
    args = [a.replace("{tmp}", str(tmp)) for a in template]
    before = _snapshot(ws)
    res = runner.invoke(app, args + ["--workspace", str(ws)])
    assert res.exit_code not in (0, None), (label, res.output)
    assert res.exception is None or isinstance(res.exception, SystemExit), \
        (label, repr(res.exception))
    err = res.stderr.strip()
    assert "Traceback" not in err, (label, err)
    if res.exit_code == 2 and (err.startswith("Usage:") or "─" in err):
        pass  # typer's own usage error box for a malformed command line
    else:
        assert len(err.splitlines()) == 1 and err.startswith("error: "), (label, err)
    assert _snapshot(ws) == before, label
    assert not list(tmp.glob("*.part")), label


def test_replay_of_a_missing_job_is_refused(workspace):
    tmp, ws = workspace
    res = runner.invoke(app, ["replay", "999", "--workspace", str(ws)])
    assert res.exit_code == 2 and res.stderr.strip() == "error: no job 999 in this ledger."
