"""Named failpoints for fault-injection tests: kill this process at a chosen moment.

Set ORBITLEDGER_FAILPOINTS="name:n[,name:n...]" and the process sends itself
SIGKILL the n-th time it reaches failpoint `name`. Unset (the normal case),
a failpoint costs one dictionary lookup.
"""

import os
import signal

ENV = "ORBITLEDGER_FAILPOINTS"


def _parse(text):
    out = {}
    for item in filter(None, (t.strip() for t in text.split(","))):
        name, _, count = item.partition(":")
        out[name] = int(count or 1)
    return out


_ARMED = _parse(os.environ.get(ENV, ""))
_HITS = {}


def failpoint(name):
    """Die by SIGKILL here if this failpoint is armed and its count is reached."""
    if not _ARMED or name not in _ARMED:
        return
    _HITS[name] = _HITS.get(name, 0) + 1
    if _HITS[name] == _ARMED[name]:
        os.kill(os.getpid(), signal.SIGKILL)
