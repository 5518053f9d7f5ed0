"""Wall times as typed and as SLURM prints them (sbatch --time formats)."""

import pytest

from orbitledger.runner.inputs.walltime import WallTimeError, parse_wall


@pytest.mark.parametrize("text,seconds", [
    ("47 h", 47 * 3600), ("47 hours", 47 * 3600), ("90 minutes", 5400), ("30min", 1800),
    ("90 s", 90), ("2 days", 172800), ("1h30m", 5400), ("2d 4h", 2 * 86400 + 4 * 3600),
    ("1h 30min 10s", 5410), ("0.5 h", 1800),
    # sbatch --time: "minutes", "minutes:seconds", "hours:minutes:seconds",
    # "days-hours", "days-hours:minutes", "days-hours:minutes:seconds".
    ("90", 5400), ("90:30", 5430), ("48:00:00", 172800), ("2-00", 172800),
    ("2-12:30", 2 * 86400 + 12 * 3600 + 1800), ("2-00:00:00", 172800),
])
def test_wall_times(text, seconds):
    assert parse_wall("--deadline", text) == seconds


@pytest.mark.parametrize("text", ["soon", "47 parsecs", "1h30", "h", "", "-2 h", "1:2:3:4"])
def test_bad_wall_times_name_the_option_value_and_forms(text):
    with pytest.raises(WallTimeError, match=r"--deadline must be a wall time such as .*got"):
        parse_wall("--deadline", text)
