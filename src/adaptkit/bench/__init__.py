"""The benchmark harness, one module per job: the settings (:mod:`.config`), the plan of a grid (:mod:`.plan`),
one cell's worker (:mod:`.cell`), running a grid (:mod:`.grid`), every written file (:mod:`.report`), honest
statistics (:mod:`.stats`), judging selection scores (:mod:`.judge`), the selection study (:mod:`.study`) and the
two commands (:mod:`.app`). Command line: ``adaptkit-bench`` (a grid) and ``adaptkit-study`` (a selection study);
demo: ``make demo``."""
from .config import BenchConfig
from .grid import GridResult, run_grid
from .plan import plan_grid
from .report import read_results_csv, write_report, write_results_csv
from .study import run_study

__all__ = ["BenchConfig", "GridResult", "plan_grid", "read_results_csv", "run_grid", "run_study",
           "write_report", "write_results_csv"]
