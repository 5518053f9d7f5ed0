"""Per-file durations of a test run, from pytest's JUnit XML report.

Run the suite with a report, then summarise it:

    PYTEST_ADDOPTS="--junitxml=/tmp/junit.xml" bash .ci/run
    .venv/bin/python tests/benchmarks/ci_durations.py /tmp/junit.xml [--top 25]

Prints a Markdown table of test files by total time (tests, seconds, share),
the figure docs/benchmarks.md records so that the next slowdown is seen.
Setup of session services (PostgreSQL, SLURM) is counted in the first test
that needs them.
"""

import argparse
import sys
import xml.etree.ElementTree as ET
from collections import defaultdict


def per_file(path):
    """{test file: (tests, seconds)} from a JUnit XML report."""
    root = ET.parse(path).getroot()
    out = defaultdict(lambda: [0, 0.0])
    for case in root.iter("testcase"):
        parts = case.get("classname", "?").split(".")
        f = next((p for p in parts if p.startswith("test_")), parts[0])
        out[f][0] += 1
        out[f][1] += float(case.get("time", 0.0))
    return {k: tuple(v) for k, v in out.items()}


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("report")
    ap.add_argument("--top", type=int, default=25)
    args = ap.parse_args()
    files = per_file(args.report)
    total = sum(t for _, t in files.values())
    n = sum(k for k, _ in files.values())
    print(f"{n} tests, {total:.0f} s in test bodies and fixtures\n")
    print("| file | tests | seconds | share |")
    print("|---|---|---|---|")
    for f, (k, t) in sorted(files.items(), key=lambda kv: -kv[1][1])[:args.top]:
        print(f"| {f}.py | {k} | {t:.0f} | {100 * t / total:.1f} % |")
    rest = sorted(files.items(), key=lambda kv: -kv[1][1])[args.top:]
    if rest:
        print(f"| {len(rest)} other files | {sum(k for _, (k, _) in rest)} | "
              f"{sum(t for _, (_, t) in rest):.0f} | "
              f"{100 * sum(t for _, (_, t) in rest) / total:.1f} % |")


if __name__ == "__main__":
    sys.exit(main())
