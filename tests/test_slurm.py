"""A real single-node SLURM (started by tests/services/slurm.sh): array workers
finish a campaign against PostgreSQL; a warning signal to a running task leads
to a checkpoint and a requeue, and the job completes with the same final state
as an uninterrupted run.
"""

import os
import re
import subprocess
import tempfile
import time

import pytest
from typer.testing import CliRunner

from orbitledger.runner.inputs import spec as S
from orbitledger.runner.cli import app
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.ledger.workspace import init
from conftest import SERVICES, new_pg_database
from helpers import final_state, samples_bytes, small_spec_text

# One SLURM per machine (it writes /etc/slurm): the module's tests stay on one
# test process under pytest-xdist's --dist loadgroup.
pytestmark = pytest.mark.xdist_group("slurm")


# Session scope: under pytest-xdist a module-scoped fixture is set up again when
# the group's tests are not run back to back, and SLURM does not restart reliably
# at once; the group keeps every test here on one process.
@pytest.fixture(scope="session")
def slurm():
    base = tempfile.mkdtemp(prefix="orbitledger-slurm-")
    out = subprocess.run(["bash", os.path.join(SERVICES, "slurm.sh"), "start", base],
                         capture_output=True, text=True, timeout=600)
    if out.returncode != 0:
        pytest.fail(f"could not start SLURM for the tests: {out.stderr.strip()[-500:]}")
    yield base
    subprocess.run(["scancel", "--user", "root"], capture_output=True)
    subprocess.run(["bash", os.path.join(SERVICES, "slurm.sh"), "stop", base],
                   capture_output=True, timeout=60)


def _job_info(jid):
    out = subprocess.run(["scontrol", "show", "job", str(jid)], capture_output=True, text=True)
    return out.stdout


def _submit(ws, url, tasks, margin=60):
    res = CliRunner().invoke(app, ["batch", "--workspace", str(ws), "--db", url, "--tasks",
                                   str(tasks), "--time", "20 min", "--margin", str(margin),
                                   "--submit"])
    assert res.exit_code == 0, res.output
    return re.search(r"submitted SLURM job (\d+)", res.output).group(1)


def _wait(pred, timeout, what):
    end = time.time() + timeout
    while time.time() < end:
        if pred():
            return
        time.sleep(1.0)
    raise AssertionError(f"timed out waiting for {what}")


def test_array_of_workers_finishes_a_campaign(slurm, pg_server, tmp_path):
    url = new_pg_database(pg_server)
    ws, led = init(tmp_path / "ws", url)
    ids = [led.submit(S.load_text(small_spec_text(name=f"c{k}", length="20000 yr",
                                                  chunk="50000 steps"))) for k in range(4)]
    jid = _submit(ws, url, tasks=2)
    _wait(lambda: all(led.job(j)["status"] == "done" for j in ids), 240, "the campaign")
    hosts_pids = {(s["host"], s["pid"]) for j in ids for s in led.segments(j)}
    assert len(hosts_pids) >= 1
    _wait(lambda: "COMPLETED" in _job_info(f"{jid}_0") or "JobState=COMPLETED" in
          _job_info(jid) or not _job_info(jid), 60, "the array to end")
    logs = list((ws / "slurm").glob(f"{jid}_*.out"))
    assert logs and any("worker exit code 0" in p.read_text() for p in logs)
    led.close()


def test_warning_signal_checkpoints_requeues_and_completes_exactly(slurm, pg_server, tmp_path):
    text = small_spec_text(name="long", length="600000 yr", chunk="200000 steps",
                           output="5000 steps")
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref")
    rid = ref.submit(S.load_text(text))
    Worker(ref).run()
    url = new_pg_database(pg_server)
    ws, led = init(tmp_path / "ws", url)
    j = led.submit(S.load_text(text))
    jid = _submit(ws, url, tasks=1)
    task = f"{jid}_0"
    _wait(lambda: led.job(j)["status"] == "running" and led.job(j)["steps_done"] > 0, 120,
          "the task to commit a first chunk")
    # The warning SLURM sends before the wall-time limit, delivered now.
    subprocess.run(["scancel", "--signal=USR1", "--batch", task], check=True)
    _wait(lambda: led.job(j)["status"] == "queued", 60, "the checkpoint and release")
    stopped_at = led.job(j)["steps_done"]
    assert 0 < stopped_at < led.job(j)["total_steps"]
    _wait(lambda: "Restarts=1" in _job_info(task), 60, "the requeue")

    def restarted():
        # A requeued job waits ~cred_expire before it is eligible; ask SLURM
        # to start it as soon as it is pending again.
        if "JobState=PENDING" in _job_info(task):
            subprocess.run(["scontrol", "update", f"JobId={task}", "StartTime=now"],
                           capture_output=True)
        return led.job(j)["status"] == "done"

    _wait(restarted, 300, "the requeued task to finish")
    assert "Restarts=1" in _job_info(task)
    segs = led.segments(j)
    assert len(segs) >= 2 and segs[0]["end_step"] == stopped_at
    assert final_state(led, j) == final_state(ref, rid)
    assert samples_bytes(led, j) == samples_bytes(ref, rid)
    log = next((ws / "slurm").glob(f"{jid}_0.out")).read_text()
    assert "work remains: requeueing" in log and "restart 1" in log
    led.close()
    ref.close()


def test_batch_refuses_sqlite_and_writes_no_password(tmp_path):
    ws, led = init(tmp_path / "ws")
    led.close()
    res = CliRunner().invoke(app, ["batch", "--workspace", str(ws)])
    assert res.exit_code == 2 and "needs a database all nodes share" in res.stderr
    from orbitledger.runner.execution.slurm import script

    text = script(ws, 3, 3600, 120)
    assert "#SBATCH --array=0-2" in text and "#SBATCH --signal=B:USR1@120" in text
    assert "#SBATCH --requeue" in text and "postgresql" not in text
