"""Run every benchmark in one process and print their markdown; paste the output into benchmarks/RESULTS.md with
the date and the machine. Speed figures are ratios measured side by side in one run (shared, noisy machines).

    python benchmarks/run_all.py            # make bench
"""
import datetime
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

import loop_overhead  # noqa: E402
import parallel  # noqa: E402
import scaling  # noqa: E402

if __name__ == "__main__":
    print(f"# Benchmarks, {datetime.date.today()}\n")
    for mod in (loop_overhead, scaling, parallel):
        print(f"\n## {mod.__name__}\n")
        mod.main()
