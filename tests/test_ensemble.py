"""Ensembles: reproducible members, fair (breadth-first) progress, survival of kills."""

import os
import random
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from orbitledger.runner.inputs import spec as S
from orbitledger.runner.inputs.ensemble import draws, member_spec
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.ledger.workspace import init
from helpers import ROOT, final_state, small_spec_text

ILVAR = os.path.join(ROOT, "jobs", "ilvar-ensemble.toml")


def ensemble_text(members=6, quantity="a", rule="step", size="1e-9", relative="true",
                  body="Orrin c", **kw):
    return small_spec_text(**kw) + f"""
[ensemble]
members = {members}
seed = 11
[ensemble.perturb]
body = "{body}"
quantity = "{quantity}"
rule = "{rule}"
size = {size}
relative = {relative}
"""


def member_system(spec, k):
    return S.resolve(member_spec(spec, k)).system


def test_members_differ_exactly_as_the_rule_says():
    spec = S.load_text(ensemble_text())
    base = S.resolve(spec.model_copy(update={"ensemble": None})).system.elements()
    a_c = 6.1
    for k in range(4):
        els = member_system(spec, k).elements()
        # The perturbed quantity differs by k * 1e-9 of its value ...
        assert els[1, 0] - base[1, 0] == pytest.approx(k * 1e-9 * a_c, abs=2e-14)
        # ... and nothing else differs beyond the round trip of the conversions
        # (element -> state -> barycentric frame -> element, ~1e-15 relative).
        np.testing.assert_allclose(np.delete(els.ravel(), 6), np.delete(base.ravel(), 6),
                                   rtol=1e-13, atol=1e-11)
    # Member 0 of a step rule is the unperturbed system, bit for bit.
    unperturbed = S.resolve(spec.model_copy(update={"ensemble": None})).system
    assert member_system(spec, 0).x.tobytes() == unperturbed.x.tobytes()


def test_same_spec_same_members_and_distinct_hashes():
    spec = S.load_text(ensemble_text(rule="normal", size='"1 cm"', relative="false",
                                     quantity="x"))
    again = S.load_text(ensemble_text(rule="normal", size='"1 cm"', relative="false",
                                      quantity="x"))
    hashes = set()
    for k in range(6):
        a, b = member_system(spec, k), member_system(again, k)
        assert a.x.tobytes() == b.x.tobytes() and a.v.tobytes() == b.v.tobytes()
        hashes.add(S.spec_sha256(member_spec(spec, k)))
    assert len(hashes) == 6
    # A 1 cm normal draw: the heliocentric x of Orrin c moves by 1 cm * z_k.
    z = draws("normal", 11, 6)
    base = S.resolve(spec.model_copy(update={"ensemble": None})).system.heliocentric()[0]
    cm_au = 0.01 / 149_597_870_700.0
    for k in range(6):
        xh = member_system(spec, k).heliocentric()[0]
        assert xh[2, 0] - base[2, 0] == pytest.approx(cm_au * z[k], abs=1e-15)
        np.testing.assert_allclose(xh[[1, 3]], base[[1, 3]], atol=1e-15)


def test_bad_ensemble_rules_are_named():
    with pytest.raises(S.SpecError, match="`ensemble.perturb.body` names 'Nobody'"):
        S.load_text(ensemble_text(body="Nobody"))
    with pytest.raises(S.SpecError, match="needs a unit"):
        S.load_text(ensemble_text(quantity="x", relative="false"))
    with pytest.raises(S.SpecError, match="members"):
        S.load_text(ensemble_text(members=0))


def test_submit_creates_all_members_in_one_go(tmp_path):
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    ens, ids = led.submit_ensemble(S.load_text(ensemble_text(members=5)))
    assert len(ids) == 5 and led.ensemble(ens)["members"] == 5
    rows = led.jobs(ensemble_id=ens)
    assert [r["name"] for r in rows] == [f"orrin-m{k:04d}" for k in range(5)]
    assert len({r["spec_sha256"] for r in rows}) == 5
    led.close()


def _files(folder):
    return {str(f.relative_to(folder)): f.read_bytes()
            for f in sorted(folder.rglob("*")) if f.is_file()}


def test_member_stores_are_what_a_single_submit_writes(tmp_path):
    # Reproducibility, not correctness: an ensemble's member stores are
    # written by threads from the first member's layout; each must be the
    # bytes a submit of that member alone writes through zarr, hold the
    # hashes the ledger recorded, and pass verify.
    from orbitledger.runner.analysis.integrity import verify

    spec = S.load_text(ensemble_text(members=7))
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    _, ids = led.submit_ensemble(spec)
    for k, jid in enumerate(ids):
        one = Ledger(f"sqlite:///{tmp_path}/one{k}.sqlite", tmp_path / f"one{k}")
        alone = one.submit(member_spec(spec, k))
        assert _files(led.store.job_path(jid)) == _files(one.store.job_path(alone)), k
        assert one.checkpoints(alone)[0]["chain_sha256"] == led.checkpoints(jid)[0]["chain_sha256"]
        one.close()
        rep = verify(led, jid)
        assert rep.ok, rep.problem
    led.close()


def test_a_member_store_that_cannot_be_written_leaves_nothing(tmp_path):
    # A file where member 5's folder must go: the thread writing it fails,
    # the submit says so and the ledger holds no ensemble and no job.
    from orbitledger.runner.errors import StoreError

    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    (tmp_path / "store").mkdir(exist_ok=True)
    (tmp_path / "store" / "job-00000005").write_text("in the way")
    with pytest.raises(StoreError, match="job 5"):
        led.submit_ensemble(S.load_text(ensemble_text(members=9)))
    assert led.n_jobs() == 0 and led.ensembles() == []
    led.close()


def test_depth_first_on_request(tmp_path):
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    _, ids = led.submit_ensemble(S.load_text(ensemble_text(members=3, length="500 yr",
                                                           chunk="2000 steps")))
    Worker(led, order="depth").run()
    segs = sorted((s["started_at"], s["job_id"]) for j in ids for s in led.segments(j))
    # Each member ran in one segment, one after another.
    assert [j for _, j in segs] == ids
    led.close()


def test_breadth_first_holds_with_several_workers(tmp_path):
    # Chunks of about half a second of compute each: longer than the two
    # workers' difference in start-up (a worker holds its first member while
    # it loads the compiled kernel, about 0.4 s, and the other one may work
    # through the rest meanwhile), so that what is measured is the claim
    # order, not which process started first. With 2000-step chunks (a few
    # ms) a start 0.2 s late put the others 4 chunks ahead in 1 run of 4.
    ws, led = init(tmp_path / "ws")
    chunk = 1_000_000
    _, ids = led.submit_ensemble(S.load_text(ensemble_text(
        members=6, length="160000 yr", chunk=f"{chunk} steps", output="10000 steps")))
    # Two independent workers, each running members one at a time (--lanes 1;
    # a batch would let the first take every member; pools split batches,
    # test_batched_work_is_split_between_a_pools_workers).
    procs = [subprocess.Popen([sys.executable, "-m", "orbitledger.runner.cli", "work", "--workspace", str(ws),
                               "--quiet", "--lanes", "1"], cwd=ROOT) for _ in range(2)]
    assert [p.wait(timeout=300) for p in procs] == [0, 0]
    # Replay the commits in time order; after each, no member is more than
    # (workers + 1) chunks ahead of the least advanced one.
    commits = sorted((c["created_at"], j, c["step"]) for j in ids for c in led.checkpoints(j))
    progress = {j: 0 for j in ids}
    total = led.job(ids[0])["total_steps"]
    worst = 0
    for _, j, step in commits:
        progress[j] = step
        unfinished = [p for p in progress.values() if p < total]
        if unfinished:
            worst = max(worst, max(progress.values()) - min(unfinished))
    assert worst <= 3 * chunk, worst
    assert len({s["pid"] for j in ids for s in led.segments(j)}) == 2
    led.close()


def test_ensemble_survives_kills_with_the_same_outcomes(tmp_path):
    # Eight members: about 5 s of work, so that several of the kills below
    # land while members are running (half of them end early in encounters).
    text = open(ILVAR).read().replace("members = 16", "members = 8").replace(
        'length = "3000 yr"', 'length = "1500 yr"')
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref")
    _, ref_ids = ref.submit_ensemble(S.load_text(text))
    Worker(ref, lanes=1).run()  # every member alone; the killed workers batch them
    ws, led = init(tmp_path / "ws")
    _, ids = led.submit_ensemble(S.load_text(text))
    rng = random.Random(3)
    kills = 0
    for _ in range(6):
        p = subprocess.Popen([sys.executable, "-m", "orbitledger.runner.cli", "work", "--workspace", str(ws),
                              "--quiet"], cwd=ROOT)
        time.sleep(rng.uniform(1.2, 2.5))
        if p.poll() is None:
            p.send_signal(signal.SIGKILL)
            kills += 1
        p.wait()
    p = subprocess.run([sys.executable, "-m", "orbitledger.runner.cli", "work", "--workspace", str(ws),
                        "--quiet"], cwd=ROOT)
    assert p.returncode == 0 and kills >= 3
    for a, b in zip(ref_ids, ids):
        ra, rb = ref.job(a), led.job(b)
        assert (ra["status"], ra["outcome"], ra["outcome_step"], ra["outcome_bodies"]) == \
            (rb["status"], rb["outcome"], rb["outcome_step"], rb["outcome_bodies"])
        assert final_state(ref, a) == final_state(led, b)
    led.close()
    ref.close()


def test_outcomes_command_table_plot_and_report(tmp_path):
    from typer.testing import CliRunner

    from orbitledger.runner.cli import app

    ws, led = init(tmp_path / "ws")
    text = open(ILVAR).read().replace("members = 16", "members = 3").replace(
        'length = "3000 yr"', 'length = "1000 yr"')
    led.submit_ensemble(S.load_text(text))
    Worker(led).run()
    led.close()
    r = CliRunner().invoke(app, ["outcomes", "1", "--workspace", str(ws), "--plot",
                                 str(tmp_path / "s.svg"), "--html", str(tmp_path / "r.html")])
    assert r.exit_code == 0, r.output
    assert "instability fraction" in r.output and "Wilson" in r.output
    assert (tmp_path / "s.svg").read_text().startswith("<?xml")
    page = (tmp_path / "r.html").read_text()
    assert "data:image/png;base64," in page and "Wilson interval" in page
