"""Run the reliability suite and print its summary table.

    .venv/bin/python tests/reliability/run_suite.py            # short variants (what CI runs)
    .venv/bin/python tests/reliability/run_suite.py --long     # the long variants, on demand
    .venv/bin/python tests/reliability/run_suite.py -k load    # any extra pytest arguments

Everything runs on 127.0.0.1 with bounded request counts (see the test
modules). The table has one row per check: requests sent, errors (requests
without a correct answer), p50/p99 latency of answered predictions in ms,
faults injected, items lost (abstained cases acknowledged but not found in the
review store afterwards; must be 0). Exit status: pytest's.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--long", action="store_true", help="run the long variants instead of the short ones")
    args, extra = parser.parse_known_args(argv)
    sys.path.insert(0, str(ROOT))
    from tests.reliability.harness import format_table

    with tempfile.TemporaryDirectory(prefix="demur-reliability-") as tmp:
        report = Path(tmp) / "figures.jsonl"
        env = {**os.environ, "DEMUR_RELIABILITY_REPORT": str(report)}
        cmd = [sys.executable, "-m", "pytest", str(HERE), "-q", "-p", "no:cacheprovider",
               "-m", "long" if args.long else "not long", *extra]
        rc = subprocess.call(cmd, cwd=ROOT, env=env)
        rows = [json.loads(line) for line in report.read_text().splitlines()] if report.exists() else []
    print()
    print(f"demur reliability suite ({'long' if args.long else 'short'} variant, 127.0.0.1, "
          f"{os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f})")
    print(format_table(rows) if rows else "no figures recorded")
    return rc


if __name__ == "__main__":
    sys.exit(main())
