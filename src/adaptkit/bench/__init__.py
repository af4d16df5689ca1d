"""The benchmark harness: the grid runner (:mod:`.grid`: methods × shifts × seeds, in parallel, resumable), honest
statistics (:mod:`.stats`) and the report (:mod:`.report`). Command line: ``adaptkit-bench``; demo: ``make demo``."""
from .grid import BenchConfig, GridResult, Recipe, plan_grid, run_grid
from .report import read_results_csv, write_report, write_results_csv

__all__ = ["BenchConfig", "GridResult", "Recipe", "plan_grid", "read_results_csv", "run_grid", "write_report",
           "write_results_csv"]
