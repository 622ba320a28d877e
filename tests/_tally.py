"""What the reliability tests tried, counted for the README's summary (benchmarks/reliability.py).

A test calls :func:`tally` with what it did (source files verified, fuzz cases, faults injected,
data lost). Outside that script the counts go nowhere: ``LABELPREP_TALLY`` is unset.
"""

from __future__ import annotations

import json
import os

KINDS = ("files", "fuzz", "faults", "refused", "lost")


def tally(**counts: int) -> None:
    """Append ``counts`` (keys from :data:`KINDS`) to the file named by ``LABELPREP_TALLY``."""
    unknown = set(counts) - set(KINDS)
    if unknown:
        raise ValueError(f"unknown tally kinds {sorted(unknown)}; expected {KINDS}")
    target = os.environ.get("LABELPREP_TALLY")
    if target:
        with open(target, "a", encoding="utf-8") as fh:
            fh.write(json.dumps(counts) + "\n")
