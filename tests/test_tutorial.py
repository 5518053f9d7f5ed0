"""docs/tutorial.py (a jupytext notebook) runs from top to bottom: every cell of the
tutorial works against the code as it is."""

import os
import subprocess
import sys

from helpers import ROOT


def test_the_tutorial_runs(tmp_path):
    env = dict(os.environ, TUTORIAL_OUT=str(tmp_path), MPLBACKEND="Agg")
    out = subprocess.run([sys.executable, os.path.join(ROOT, "docs", "tutorial.py")],
                         cwd=tmp_path, env=env, capture_output=True, text=True, timeout=900)
    assert out.returncode == 0, out.stdout[-2000:] + out.stderr[-4000:]
    assert "members unstable" in out.stdout
    for name in ("energy.png", "eccentricity.png", "survival.png"):
        assert (tmp_path / name).stat().st_size > 1000, name
