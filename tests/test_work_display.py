"""`work` in a terminal shows a live line per worker (read from the ledger by the
pool's parent); under --quiet, and when its output is not a terminal, it shows
none. Real worker processes under a real pseudo-terminal."""

import os
import pty
import re
import socket
import subprocess
import sys

from orbitledger.runner.inputs import spec as S
from orbitledger.runner.ledger.workspace import init

from helpers import ROOT, ejecting_ensemble_text, small_spec

ANSI = re.compile(r"\x1b\[[0-9;?]*[A-Za-z]")


def campaign(tmp_path):
    ws, led = init(tmp_path / "ws")
    for _ in range(2):
        led.submit(small_spec(length="30000 yr"))
    led.submit_ensemble(S.load_text(ejecting_ensemble_text("lines")))
    led.close()
    return ws


def work_in_terminal(ws, *extra):
    """Run `work --workers 2` with a pseudo-terminal as its output; all it wrote."""
    argv = [sys.executable, "-m", "orbitledger.runner.cli", "work", "--workspace", str(ws),
            "--workers", "2", *extra]
    pid, fd = pty.fork()
    if pid == 0:  # the child: the terminal is its stdin, stdout and stderr
        os.chdir(ROOT)
        os.environ["COLUMNS"] = "160"
        os.execv(sys.executable, argv)
    chunks = []
    while True:
        try:
            data = os.read(fd, 65536)
        except OSError:  # the terminal closed: the child is gone
            break
        if not data:
            break
        chunks.append(data)
    _, status = os.waitpid(pid, 0)
    os.close(fd)
    assert os.waitstatus_to_exitcode(status) == 0, b"".join(chunks)[-2000:]
    return ANSI.sub("", b"".join(chunks).decode("utf-8", "replace"))


def test_a_pool_in_a_terminal_shows_a_line_per_worker(tmp_path):
    text = work_in_terminal(campaign(tmp_path))
    host = socket.gethostname()
    lines = [ln for ln in text.splitlines() if ln.strip().startswith(f"{host}:")]
    owners = {ln.split()[0] for ln in lines}
    assert len(owners) == 2, text[-3000:]  # both workers of the pool have a line
    held = [ln for ln in lines if " of " in ln and "/h" in ln]
    assert any(re.search(r"job \d+ orrin", ln) for ln in held), text[-3000:]
    assert any(re.search(r"jobs \d+-\d+ \(\d+ members of ensemble 1\)", ln) for ln in held)
    assert " INFO " not in text  # the workers' log stays at warnings beside the lines


def test_quiet_or_not_a_terminal_shows_no_lines(tmp_path):
    ws = campaign(tmp_path)
    host = socket.gethostname()
    text = work_in_terminal(ws, "--quiet")
    assert not [ln for ln in text.splitlines() if ln.strip().startswith(f"{host}:")]
    assert "Workers" not in text
    ws2 = campaign(tmp_path / "piped")
    out = subprocess.run([sys.executable, "-m", "orbitledger.runner.cli", "work",
                          "--workspace", str(ws2), "--workers", "2"], cwd=ROOT,
                         capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-2000:]
    assert "Workers" not in out.stdout and "Workers" not in out.stderr
