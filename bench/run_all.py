"""Run every benchmark script in bench/ (bench_*.py) one after another.

Each script prints its table and appends it to bench/RESULTS.md. Benchmarks are CPU heavy: run
them on a quiet machine with `make bench`, never inside the test suite.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

here = Path(__file__).resolve().parent
failed = []
for script in sorted(here.glob("bench_*.py")):
    print(f"== {script.name}", flush=True)
    if subprocess.run([sys.executable, str(script)], cwd=here.parent).returncode != 0:
        failed.append(script.name)
if failed:
    sys.exit(f"failed: {', '.join(failed)}")
