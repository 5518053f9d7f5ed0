"""A worker that wakes up late: paused (SIGSTOP) inside its commit path until its
lease lapsed and another worker finished the job, then woken (SIGCONT).

The pause failpoint itself is checked here; the late writer's effect on the
store is the window docs/reliability.md names (issue 28): its whole-chunk
sample write can still overwrite rows the new owner committed. That test is
marked as an expected failure until committed bytes are never rewritten.
"""

import os
import signal
import subprocess
import sys
import time

import pytest

from orbitledger.runner.analysis.integrity import verify
from orbitledger.runner.execution.worker import Worker
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.ledger.workspace import init, open_ledger

from helpers import ROOT, final_state, samples_bytes, small_spec

def process_state(pid):
    """The kernel's one-letter state of a process ('T': stopped), or None once gone."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            return fh.read().rsplit(b")", 1)[1].split()[0].decode()
    except FileNotFoundError:
        return None


def wait_for_state(pid, want, timeout=120.0):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        state = process_state(pid)
        if state == want:
            return True
        if state in (None, "Z"):
            return False
        time.sleep(0.05)
    return False


def test_a_pause_failpoint_stops_the_process_until_it_is_continued():
    code = ("from orbitledger.runner.execution.failpoints import failpoint\n"
            "failpoint('here'); failpoint('here'); print('woke', flush=True)\n")
    p = subprocess.Popen([sys.executable, "-c", code], cwd=ROOT, stdout=subprocess.PIPE,
                         text=True, env=dict(os.environ, ORBITLEDGER_FAILPOINTS="here:2:pause"))
    try:
        assert wait_for_state(p.pid, "T"), "the process did not stop at its failpoint"
        time.sleep(0.3)
        assert process_state(p.pid) == "T"  # still stopped: nothing wakes it but SIGCONT
        os.kill(p.pid, signal.SIGCONT)
        out, _ = p.communicate(timeout=60)
    finally:
        if p.poll() is None:
            p.kill()
    assert p.returncode == 0 and out.strip() == "woke"


def test_an_unknown_failpoint_action_is_refused_in_one_line():
    code = "import orbitledger.runner.execution.failpoints"
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True,
                         env=dict(os.environ, ORBITLEDGER_FAILPOINTS="here:1:sleep"))
    assert out.returncode != 0
    assert "failpoint 'here' has action 'sleep'; use one of kill, pause" in out.stderr


@pytest.mark.damages_store
@pytest.mark.xfail(strict=True, reason="issue 28: a late writer's whole-chunk sample write "
                   "overwrites rows the new owner committed (the store must never rewrite "
                   "committed bytes)")
def test_a_worker_paused_before_its_store_write_loses_nothing_another_committed(tmp_path):
    spec = small_spec(length="600 yr", chunk="2000 steps", output="100 steps")
    ref = Ledger(f"sqlite:///{tmp_path}/ref.sqlite", tmp_path / "ref")
    rj = ref.submit(spec)
    Worker(ref).run()
    ws, led = init(tmp_path / "ws")
    j = led.submit(spec)
    led.close()
    # Worker A stops itself at its second store write (one chunk committed),
    # after its fence check; its lease (2 s) then lapses.
    a = subprocess.Popen(
        [sys.executable, "-m", "orbitledger.runner.cli", "work", "--workspace", str(ws),
         "--lease", "2", "--quiet"], cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
        text=True, env=dict(os.environ, ORBITLEDGER_FAILPOINTS="before_store_write:2:pause"))
    try:
        assert wait_for_state(a.pid, "T"), "worker A did not pause"
        time.sleep(3.0)
        # Worker B takes the job over and finishes it.
        b = subprocess.run([sys.executable, "-m", "orbitledger.runner.cli", "work",
                            "--workspace", str(ws), "--quiet"], cwd=ROOT, capture_output=True,
                           text=True, timeout=600)
        assert b.returncode == 0, b.stderr
        os.kill(a.pid, signal.SIGCONT)
        _, a_err = a.communicate(timeout=120)
    finally:
        if a.poll() is None:
            a.kill()
    led = open_ledger(ws)
    row = led.job(j)
    assert row["status"] == "done" and row["owner"] is None
    # A's late commit was refused, in one line naming the fence.
    assert [ln for ln in a_err.splitlines() if "fenc" in ln.lower()], a_err
    assert final_state(led, j) == final_state(ref, rj)
    assert samples_bytes(led, j) == samples_bytes(ref, rj)
    assert verify(led, j).ok
    led.close()
    ref.close()
