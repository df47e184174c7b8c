"""Run the demo study from Python: the same as ``bayesgeo demo``, through the public API.

Usage: ``python examples/run_study.py [RUN_DIR]`` (default ``study-demo-run``). Set
``BAYESGEO_EXAMPLE_QUICK=1`` for the quick settings (used by the tests).
"""

from __future__ import annotations

import os
import sys
import tempfile
from pathlib import Path

from bayesgeo.cli.demo import write_demo_inputs
from bayesgeo.study.runner import run_study
from bayesgeo.study.settings import read_study

QUICK = os.environ.get("BAYESGEO_EXAMPLE_QUICK") == "1"


def main(out: Path) -> dict:
    with tempfile.TemporaryDirectory() as scratch:
        study = read_study(write_demo_inputs(scratch, quick=QUICK))
        print(f"study: {study['']['title']}")
        res = run_study(study, out=out, overwrite=True, log=print)
    print(f"status {res['status']}: {res['message']}")
    print(f"open {res['report']} in a browser")
    return res


if __name__ == "__main__":
    sys.exit(main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path("study-demo-run"))["status"])
