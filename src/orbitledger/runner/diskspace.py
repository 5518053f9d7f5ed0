"""One line for a full disk: what could not be written, where, the space free there
and what the write needed; shared by the store and the worker (the ledger's
database)."""

import shutil


def human_bytes(n):
    """A byte count as "376 kB", "19.5 MB"."""
    for unit, size in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{n:.0f} B"


def free_bytes(path):
    """Bytes free for this process on the file system holding path (None if unknown)."""
    try:
        return shutil.disk_usage(path).free
    except OSError:
        return None


def no_space_text(what, path, need):
    """The one line a worker stops with when `what` (at `path`) found no space (the
    worker adds what became of its job)."""
    free = free_bytes(path)
    left = "an unknown amount" if free is None else human_bytes(free)
    return (f"no space left for {what} ({left} free there; {need}): free some space "
            "(or move the workspace) and run `work` again")
