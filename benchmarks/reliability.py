"""The counts behind the README's reliability section, reproduced by one command.

    python benchmarks/reliability.py            # the default suite's cases (about a minute)
    python benchmarks/reliability.py --slow     # adds the thousands of fuzz cases

Runs tests/test_reliability.py, tests/test_fuzz.py, tests/test_faults.py and tests/test_sources.py
(archives, hostile members among them, and several sources) with pytest; each test
records what it tried (tests/_tally.py), and this script adds the records up and prints them with
pytest's own pass/fail line. "data lost" counts source files whose bytes, mode or modification time
changed, and interrupted scans whose rerun did not give the undisturbed scan's bytes.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SUITES = ["tests/test_reliability.py", "tests/test_fuzz.py", "tests/test_faults.py", "tests/test_sources.py"]
LABELS = {"files": "source files tried", "fuzz": "fuzz cases", "faults": "faults injected",
          "refused": "hostile archive members refused", "lost": "data lost"}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--slow", action="store_true", help="also run the tests marked slow")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tally = Path(tmp) / "tally.jsonl"
        marks = ["-m", ""] if args.slow else []  # "" overrides the default -m 'not slow'
        run = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", *marks,
                              *SUITES], cwd=ROOT, env={**os.environ, "LABELPREP_TALLY": str(tally)},
                             capture_output=True, text=True)
        totals = dict.fromkeys(LABELS, 0)
        for line in tally.read_text(encoding="utf-8").splitlines() if tally.exists() else []:
            for kind, n in json.loads(line).items():
                totals[kind] += n
    closing = [line for line in run.stdout.splitlines() if " passed" in line or " failed" in line]
    print(", ".join(f"{LABELS[k]}: {totals[k]:,}" for k in LABELS))
    print(f"pytest: {closing[-1].strip('= ') if closing else 'no result line'}")
    if run.returncode != 0:
        print(run.stdout[-4000:], run.stderr[-2000:], sep="\n", file=sys.stderr)
    return run.returncode


if __name__ == "__main__":
    sys.exit(main())
