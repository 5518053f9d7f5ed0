"""Provenance of a stretch of work: code, dependencies, platform, host, process."""

import functools
import getpass
import os
import platform
import socket
import subprocess
import sys
from importlib import metadata


def _version(dist):
    try:
        return metadata.version(dist)
    except metadata.PackageNotFoundError:
        return None


@functools.lru_cache(maxsize=1)
def source_commit():
    """Git commit of the source tree orbitledger runs from, when it is a checkout."""
    # src/orbitledger/runner/ledger/provenance.py: the checkout is four folders up.
    here = os.path.abspath(__file__)
    for _ in range(5):
        here = os.path.dirname(here)
    if not os.path.isdir(os.path.join(here, ".git")):
        return None
    try:
        out = subprocess.run(["git", "-C", here, "rev-parse", "HEAD"], capture_output=True,
                             text=True, timeout=5, check=True).stdout.strip()
        dirty = subprocess.run(["git", "-C", here, "status", "--porcelain", "--untracked-files=no"],
                               capture_output=True, text=True, timeout=5).stdout.strip()
        return out + ("+dirty" if dirty else "")
    except (OSError, subprocess.SubprocessError):
        return None


@functools.lru_cache(maxsize=1)
def cpu_model():
    """CPU model name from /proc/cpuinfo, or platform.processor()."""
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


@functools.lru_cache(maxsize=1)
def versions():
    """Versions of orbitledger and the libraries whose behaviour the results depend on."""
    return {
        "orbitledger": _version("orbitledger"),
        "source_commit": source_commit(),
        "python": sys.version.split()[0],
        "numpy": _version("numpy"),
        "numba": _version("numba"),
        "llvmlite": _version("llvmlite"),
        "zarr": _version("zarr"),
        "sqlalchemy": _version("SQLAlchemy"),
    }


def redact_argv(argv):
    """The command line with any password in a URL replaced by ***."""
    import re

    return [re.sub(r"(://[^:/@\s]+):[^@/\s]+@", r"\1:***@", a) for a in argv]


def collect():
    """Provenance of this process now (dict)."""
    try:
        user = getpass.getuser()
    except (KeyError, OSError):
        user = str(os.getuid())
    return {
        "host": socket.gethostname(),
        "pid": os.getpid(),
        "user": user,
        # Never record a database password (it may be on the command line).
        "argv": " ".join(redact_argv(sys.argv)),
        "versions": versions(),
        "platform": platform.platform(),
        "cpu": cpu_model(),
    }
