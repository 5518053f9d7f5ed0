"""The distribution installs one top-level name, `orbitledger`; the folders runner/
and integrators/ are its subpackages and are never imported under their folder names
(two copies of a module would split its state, e.g. the stop flag)."""

import os
import re
import subprocess
import sys

from helpers import ROOT

BARE = re.compile(r"^\s*(from|import) (runner|integrators)\b", re.M)


def test_sources_import_only_through_orbitledger():
    bad = []
    for folder in ("runner", "integrators", "tests", "orbitledger"):
        for dirpath, _, files in os.walk(os.path.join(ROOT, folder)):
            for name in files:
                if name.endswith(".py"):
                    path = os.path.join(dirpath, name)
                    with open(path, encoding="utf-8") as fh:
                        if BARE.search(fh.read()):
                            bad.append(os.path.relpath(path, ROOT))
    assert bad == []


def test_the_program_loads_no_folder_named_modules_and_the_api_is_lazy():
    code = ("import sys, orbitledger; assert 'orbitledger.runner' not in sys.modules; "
            "from orbitledger import Ledger, System, verify; import orbitledger.runner.cli; "
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('runner', 'integrators')))")
    out = subprocess.run([sys.executable, "-c", code], cwd="/", capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_status_loads_nothing_heavy(tmp_path):
    # `status` is what an operator runs most, on ledgers of 100 000 jobs: its
    # time is mostly start-up, so it must not load the numerical core, numpy,
    # the store (numpy, zarr), units or plotting.
    ws = tmp_path / "ws"
    subprocess.run([sys.executable, "-m", "orbitledger.runner.cli", "init", "--workspace",
                    str(ws)], check=True, capture_output=True)
    code = ("import sys; sys.argv = ['orbitledger', 'status', '--workspace', %r]\n"
            "from orbitledger.runner.cli import main\n"
            "try:\n    main()\nexcept SystemExit:\n    pass\n"
            "heavy = ('numba', 'numpy', 'zarr', 'astropy', 'matplotlib', 'xarray', 'scipy')\n"
            "print(sorted({m.split('.')[0] for m in sys.modules} & set(heavy)), "
            "file=sys.stderr)\n" % str(ws))
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.stderr.strip().splitlines()[-1] == "[]", out.stderr
