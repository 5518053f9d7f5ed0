"""A full disk (issue 28): workers run on a small file system of their own (a tmpfs
with a size limit, mounted by the test and removed after) until the store's or
the ledger's writes fail with ENOSPC. The worker stops with one line naming
what was full, where, and the space free; nothing partial is committed; after
the file system is given room, `work` resumes to the bytes of a run that never
met a full disk."""

import shutil
import subprocess

import pytest

from orbitledger.runner.analysis.integrity import verify
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.inputs import spec as S
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.ledger.workspace import init, open_ledger

from helpers import cli, final_state, samples_bytes

SPEC = """
name = "tarn-fill"
[system]
star = { name = "Tarn", mass = "1 Msun" }
[[system.bodies]]
name = "Tarn b"
mass = "1 Mjup"
a = "5 au"
e = 0.05
[method]
step = "30 d"
[span]
length = "100000 yr"
output = "10 steps"
chunk = "20000 steps"
"""


@pytest.fixture(scope="module")
def mounts():
    """Mount points to remove when the module's tests are done (after the check of
    every job that runs when each test ends, which reads the store there)."""
    made = []
    yield made
    for d in made:
        subprocess.run(["umount", str(d)], capture_output=True)


@pytest.fixture
def small_disk(tmp_path, mounts):
    """A 2 MB tmpfs of the test's own; resize(mb) gives it room."""
    d = tmp_path / "disk"
    d.mkdir()
    out = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=2m", "tmpfs", str(d)],
                         capture_output=True, text=True)
    if out.returncode != 0:
        pytest.fail(f"a tmpfs mount is needed (run the tests as root): {out.stderr.strip()}")

    def resize(mb):
        subprocess.run(["mount", "-o", f"remount,size={mb}m", str(d)], check=True)

    mounts.append(d)
    return d, resize


@pytest.mark.parametrize("full", ["store", "everything"])
def test_a_full_disk_stops_work_in_one_line_and_work_resumes_after(tmp_path, small_disk, full):
    disk, resize = small_disk
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref-store")
    rj = ref.submit(S.load_text(SPEC))
    Worker(ref).run()
    if full == "store":  # the ledger beside, the store on the small disk
        ws, led = init(tmp_path / "ws")
        led.close()
        shutil.rmtree(ws / "store")
        (disk / "store").mkdir()
        (ws / "store").symlink_to(disk / "store")
    else:
        ws, led = init(disk / "ws")
        led.close()
    (tmp_path / "job.toml").write_text(SPEC)
    assert cli("submit", tmp_path / "job.toml", "--workspace", ws).returncode == 0
    res = cli("work", "--workspace", ws, "--quiet", "--log-level", "warning")
    lines = res.stderr.strip().splitlines()
    assert res.returncode == 2 and len(lines) == 1, res.stderr
    line = lines[0]
    assert line.startswith("error: no space left for the ") and " free there" in line, line
    where = str(ws / "store") if full == "store" else str(disk)
    assert where in line and "run `work` again" in line and "Traceback" not in line
    with open_ledger(ws) as led:
        row = led.job(1)
        assert 0 < row["steps_done"] < row["total_steps"]  # stopped part-way
        if row["status"] == "running":  # the database itself was full: a dead owner's lease
            pid = int(row["owner"].rsplit(":", 1)[1])
            assert subprocess.run(["kill", "-0", str(pid)], capture_output=True).returncode
        else:
            assert row["status"] == "queued" and row["owner"] is None
        assert verify(led, 1).ok  # nothing partial was committed
    resize(64)
    res = cli("work", "--workspace", ws, "--quiet", "--log-level", "warning")
    assert res.returncode == 0, res.stderr
    with open_ledger(ws) as led:
        assert led.job(1)["status"] == "done"
        assert final_state(led, 1) == final_state(ref, rj)
        assert samples_bytes(led, 1) == samples_bytes(ref, rj)
        assert verify(led, 1).ok
    ref.close()
