"""The distribution installs one top-level name, `orbitledger`, from the src layout:
every import path is a folder path (orbitledger.runner.ledger is
src/orbitledger/runner/ledger/), nothing is imported under a bare folder name (two
copies of a module would split its state, e.g. the stop flag), and the numerical
core imports nothing from the rest."""

import ast
import importlib.util
import os
import re
import subprocess
import sys

from helpers import ROOT

SRC = os.path.join(ROOT, "src")
BARE = re.compile(r"^\s*(from|import) (runner|integrators)\b", re.M)


def _python_files(top):
    for dirpath, _, files in os.walk(top):
        for name in sorted(files):
            if name.endswith(".py"):
                yield os.path.join(dirpath, name)


def test_sources_import_only_through_orbitledger():
    files = list(_python_files(SRC)) + list(_python_files(os.path.join(ROOT, "tests")))
    assert len(files) > 100  # the walk found the tree (a moved folder would make this vacuous)
    bad = []
    for path in files:
        with open(path, encoding="utf-8") as fh:
            if BARE.search(fh.read()):
                bad.append(os.path.relpath(path, ROOT))
    assert bad == []


def test_every_import_path_is_a_folder_path():
    # The module a dotted name imports is the file at that path under src/: no
    # package-dir mapping, no second copy elsewhere on sys.path.
    pkg = os.path.join(SRC, "orbitledger")
    modules = []
    for path in _python_files(pkg):
        rel = os.path.relpath(path, SRC)[:-3].split(os.sep)
        if rel[-1] == "__init__":
            rel = rel[:-1]
        modules.append((".".join(rel), path))
    assert len(modules) > 60
    for name, path in modules:
        spec = importlib.util.find_spec(name)
        assert spec is not None and os.path.realpath(spec.origin) == os.path.realpath(path), name
    for folder in ("runner", "integrators", "orbitledger"):
        assert not os.path.exists(os.path.join(ROOT, folder)), folder
    with open(os.path.join(ROOT, "pyproject.toml"), encoding="utf-8") as fh:
        assert "package-dir" not in fh.read()


def test_the_numerical_core_imports_only_numpy_numba_and_the_standard_library():
    # The two-wing rule (DESIGN.md, Layout): integrators/ is pure computation;
    # the job manager imports it, never the reverse. llvmlite is numba's own
    # compiler back end (the batched kernel sets one of its vectorizer limits).
    core = os.path.join(SRC, "orbitledger", "integrators")
    allowed = {"numpy", "numba", "llvmlite"} | set(sys.stdlib_module_names)
    bad = []
    for path in _python_files(core):
        with open(path, encoding="utf-8") as fh:
            tree = ast.parse(fh.read(), path)
        # The file's package, as a dotted path (a relative import resolves from it).
        package = os.path.relpath(os.path.dirname(path), SRC).split(os.sep)
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                if node.level:  # relative: must stay inside integrators/
                    base = package[:len(package) - (node.level - 1)]
                    if base[:2] != ["orbitledger", "integrators"]:
                        bad.append((os.path.relpath(path, ROOT), "." * node.level
                                    + (node.module or "")))
                    continue
                names = [node.module]
            else:
                continue
            for name in names:
                top = name.split(".")[0]
                if name.startswith("orbitledger.integrators"):
                    continue
                if top not in allowed:
                    bad.append((os.path.relpath(path, ROOT), name))
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


def test_provenance_names_the_checkouts_commit():
    # Segments record the commit of the source tree they ran from; the lookup
    # walks from the module's folder to the checkout (it found nothing while the
    # module sat one folder deeper than the lookup assumed).
    from orbitledger.runner.ledger.provenance import source_commit

    head = subprocess.run(["git", "-C", ROOT, "rev-parse", "HEAD"], capture_output=True,
                          text=True)
    if head.returncode != 0:  # not a checkout (an unpacked sdist): nothing to name
        assert source_commit() is None
        return
    assert source_commit().split("+")[0] == head.stdout.strip()
