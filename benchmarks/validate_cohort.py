"""The rules on the full validation cohort (`hemostream validate`, 30 patients per scenario).

    python -m benchmarks.validate_cohort                   # about 15-25 minutes on 2 cores
    python -m benchmarks.validate_cohort --per-scenario 5  # a quicker look

Writes benchmarks/validation.json and validation.html and prints the table. Not run in CI
(CI runs a one-patient cohort in tests/test_validate.py).
"""

from __future__ import annotations

import argparse
import sys

from hemostream.app.cli import main as hemostream

from .machine import ROOT


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchmarks.validate_cohort")
    ap.add_argument("--per-scenario", default="30")
    ap.add_argument("--config", default=None)
    a = ap.parse_args(argv)
    out = ROOT / "benchmarks"
    args = ["validate", "--per-scenario", a.per_scenario, "--json",
            str(out / "validation.json"), "--html", str(out / "validation.html")]
    if a.config:
        args += ["--config", a.config]
    return hemostream(args)


if __name__ == "__main__":
    sys.exit(main())
