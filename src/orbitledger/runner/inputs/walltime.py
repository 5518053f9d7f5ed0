"""Wall-clock durations as people type them and as SLURM prints them.

Accepted, in seconds out:

- a number with a unit: "47 h", "47 hours", "90 minutes", "30min", "90 s", "2 days";
- units run together: "1h30m", "2d 4h", "1h 30min 10s";
- SLURM's time formats (sbatch --time): "MM", "MM:SS", "HH:MM:SS", "D-HH",
  "D-HH:MM", "D-HH:MM:SS" (a bare number is minutes, as in SLURM).
"""

import re

from orbitledger.runner.errors import OrbitLedgerError

_UNITS = {
    "s": 1, "sec": 1, "secs": 1, "second": 1, "seconds": 1,
    "m": 60, "min": 60, "mins": 60, "minute": 60, "minutes": 60,
    "h": 3600, "hr": 3600, "hrs": 3600, "hour": 3600, "hours": 3600,
    "d": 86400, "day": 86400, "days": 86400,
}
_PART = re.compile(r"\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*([a-zA-Z]+)")
_SLURM = re.compile(r"^(?:(\d+)-)?(\d+)(?::(\d+))?(?::(\d+))?$")


class WallTimeError(OrbitLedgerError, ValueError):
    """A wall time that could not be read."""


def parse_wall(option, value):
    """Seconds in a wall-time string; WallTimeError names the option, the value and the fix."""
    text = str(value).strip().lower()
    m = _SLURM.match(text)
    if m:
        days, a, b, c = m.groups()
        fields = [int(x) for x in (a, b, c) if x is not None]
        if days is not None:
            # D-HH, D-HH:MM, D-HH:MM:SS
            h, mi, s = (fields + [0, 0])[:3]
            return float(int(days) * 86400 + h * 3600 + mi * 60 + s)
        if len(fields) == 1:
            return float(fields[0] * 60)  # minutes, as SLURM reads a bare number
        if len(fields) == 2:
            return float(fields[0] * 60 + fields[1])  # MM:SS
        return float(fields[0] * 3600 + fields[1] * 60 + fields[2])  # HH:MM:SS
    total, pos = 0.0, 0
    for part in _PART.finditer(text):
        if part.start() != pos or part.group(2) not in _UNITS:
            break
        total += float(part.group(1)) * _UNITS[part.group(2)]
        pos = part.end()
    else:
        if pos and not text[pos:].strip():
            return total
    raise WallTimeError(f"{option} must be a wall time such as '47 h', '90 minutes', '1h30m', "
                        f"'48:00:00' or '2-00:00:00', got {value!r}.")
