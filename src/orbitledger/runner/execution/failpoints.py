"""Named failpoints for fault-injection tests: kill or pause this process at a chosen moment.

Set ORBITLEDGER_FAILPOINTS="name:n[:action][,name:n[:action]...]" and the process
acts the n-th time it reaches failpoint `name`: "kill" (the default) sends
itself SIGKILL; "pause" sends itself SIGSTOP, so that a test can let its lease
lapse, let another worker take over, and wake it with SIGCONT (a process
stopped by the operating system, a swapped-out node, a suspended VM). Unset
(the normal case), a failpoint costs one dictionary lookup.
"""

import os
import signal

ENV = "ORBITLEDGER_FAILPOINTS"
ACTIONS = {"kill": signal.SIGKILL, "pause": signal.SIGSTOP}


def _parse(text):
    out = {}
    for item in filter(None, (t.strip() for t in text.split(","))):
        name, _, rest = item.partition(":")
        count, _, action = rest.partition(":")
        action = action or "kill"
        if action not in ACTIONS:
            raise ValueError(f"{ENV}: failpoint {name!r} has action {action!r}; use one of "
                             f"{', '.join(ACTIONS)} (e.g. {name}:1:pause).")
        out[name] = (int(count or 1), ACTIONS[action])
    return out


_ARMED = _parse(os.environ.get(ENV, ""))
_HITS = {}


def failpoint(name):
    """Die by SIGKILL (or stop by SIGSTOP) here if this failpoint is armed and its
    count is reached."""
    if not _ARMED or name not in _ARMED:
        return
    _HITS[name] = _HITS.get(name, 0) + 1
    count, sig = _ARMED[name]
    if _HITS[name] == count:
        os.kill(os.getpid(), sig)
