"""Run Lacuna's speed and memory benchmarks and print their ratios.

Usage::

    python tests/benchmarks/run_all.py            # every bench_*.py script, then the
                                                  # pytest-style benchmarks (test_*.py)
    python tests/benchmarks/run_all.py section2d  # only those whose name contains a word

Each benchmark measures Lacuna against a reference in the same run (the machines are
noisy) and exits non-zero when a target is missed; this script reports each outcome and
exits 1 if any missed.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent


def main(argv=None) -> int:
    words = list(sys.argv[1:] if argv is None else argv)
    scripts = sorted(HERE.glob("bench_*.py"))
    tests = sorted(HERE.glob("test_*.py"))
    if words:
        scripts = [s for s in scripts if any(w in s.name for w in words)]
        tests = [t for t in tests if any(w in t.name for w in words)]
    outcomes = []
    for script in scripts:
        print(f"== {script.name}", flush=True)
        outcomes.append((script.name, subprocess.run([sys.executable, str(script)]).returncode))
    for test in tests:
        print(f"== {test.name}", flush=True)
        rc = subprocess.run([sys.executable, "-m", "pytest", "-q", "-s", "-p", "no:cacheprovider",
                             "-o", "addopts=", str(test)]).returncode
        outcomes.append((test.name, rc))
    print("\n== summary")
    for name, rc in outcomes:
        print(f"{'met' if rc == 0 else 'MISSED'}  {name}")
    return 0 if all(rc == 0 for _, rc in outcomes) else 1


if __name__ == "__main__":
    sys.exit(main())
