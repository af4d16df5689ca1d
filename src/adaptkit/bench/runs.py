"""One table of the run folders under a parent folder (a ``-m`` sweep, a hand-made series): ``runs.csv`` and
``runs.md``, one row per run folder, with the settings that differ between them, the target accuracy where the
target was labelled for scoring, the source-validation accuracy, the label-free scores the runs recorded, and each
run's status. The command is ``adaptkit-runs PARENT``.

A run folder is any folder under the parent holding a ``config.yaml`` or a ``checkpoint.pt`` (hydra's ``.hydra``
folders are skipped). Folders are read with the grid's own reader (:func:`adaptkit.bench.cell.cell_state`) and the
tables drawn with its one table helper (:func:`adaptkit.bench.report.table`).
"""
from __future__ import annotations

import csv
import io
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Dict, List, Mapping, Optional, Union

from ..config import MANAGEMENT
from ..plain import canonical_json
from ..train.files import write_text
from .cell import cell_state, read_json
from .report import _csv_cell, _direction, _md, table

CSV_NAME, MD_NAME = "runs.csv", "runs.md"
FIXED = ("folder", "status")  # first columns; then the differing settings, then the numbers
NUMBERS = ("target_accuracy", "source_val_accuracy", "steps")


@dataclass
class RunsTable:
    """What :func:`summarise_runs` found and wrote: the rows (one dict per run folder, in column order) and paths."""

    columns: List[str]
    rows: List[Dict[str, Any]]
    csv_path: Path
    md_path: Path


def _flatten(value: Any, prefix: str = "") -> Dict[str, Any]:
    if isinstance(value, Mapping):
        out: Dict[str, Any] = {}
        for k, v in value.items():
            out.update(_flatten(v, f"{prefix}{k}."))
        return out
    return {prefix[:-1]: value}


def _settings(folder: Path) -> Dict[str, Any]:
    """The run's settings as dotted keys (``method.weight``), management settings left out; {} when unreadable."""
    import yaml

    try:
        plain = yaml.safe_load((folder / "config.yaml").read_text(encoding="utf-8"))
    except (OSError, yaml.YAMLError):
        return {}
    if not isinstance(plain, dict):
        return {}
    return _flatten({k: v for k, v in plain.items() if k not in MANAGEMENT})


def _kept_record(folder: Path, summary: Mapping[str, Any]) -> Dict[str, Any]:
    """The evaluation record the run kept (its selected step, else the last): where its scores are read."""
    final = summary.get("final") or {}
    step = summary.get("selected_step")
    if step is None or final.get("step") == step:
        return final
    try:
        for line in (folder / "metrics.jsonl").read_text(encoding="utf-8").splitlines():
            rec = json.loads(line)
            if rec.get("step") == step:
                return rec
    except (OSError, ValueError):
        pass
    return final


def _finite(v: Any) -> Optional[float]:
    return float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) else None


def run_folders(parent: Path) -> List[Path]:
    """The run folders under ``parent`` (itself included), sorted by path."""
    found = {p.parent for name in ("config.yaml", "checkpoint.pt") for p in parent.rglob(name)
             if ".hydra" not in p.relative_to(parent).parts}
    return sorted(found)


def _read(folder: Path, parent: Path) -> Dict[str, Any]:
    summary = read_json(folder / "summary.json") or {}
    state = cell_state(folder, summary.get("config_hash"))  # a run folder has no plan: its own record is the result
    row: Dict[str, Any] = {"folder": str(folder.relative_to(parent)) if folder != parent else ".", "status": state}
    row["_settings"] = _settings(folder)
    if state == "finished":
        row.update({k: _finite(summary.get(k)) for k in NUMBERS})
        row["steps"] = summary.get("steps")
        for k, v in sorted(_kept_record(folder, summary).items()):
            if k.startswith("score/"):
                row[k] = _finite(v)
    return row


def summarise_runs(parent: Union[str, Path], out_dir: Union[str, Path, None] = None) -> RunsTable:
    """Read every run folder under ``parent`` and write ``runs.csv`` and ``runs.md`` (in ``out_dir``, default
    ``parent``); returns the :class:`RunsTable`.

    Columns: ``folder`` (relative to ``parent``), ``status`` (``finished``, ``started`` — unfinished or stopped —,
    ``failed``, ``new``), each setting whose value is not the same in every run (dotted, e.g. ``method.weight``),
    ``target_accuracy`` (empty where the target had no labels for scoring), ``source_val_accuracy``, ``steps``, and
    every label-free score recorded (``score/<name>``, of the state the run kept). A setting a run lacks counts as
    differing. Raises ``FileNotFoundError`` naming ``parent`` when it holds no run folder.
    """
    parent = Path(parent)
    if not parent.is_dir():
        raise FileNotFoundError(f"adaptkit-runs: {str(parent)!r} is not a folder; give the parent folder of the run "
                                "folders (e.g. runs/ or a sweep's folder).")
    rows = [_read(f, parent) for f in run_folders(parent)]
    if not rows:
        raise FileNotFoundError(f"adaptkit-runs: no run folder (a folder with config.yaml or checkpoint.pt) under "
                                f"{str(parent)!r}.")
    keys = sorted({k for r in rows for k in r["_settings"]})
    differ = [k for k in keys if len({canonical_json(r["_settings"].get(k, "<absent>")) for r in rows}) > 1]
    scores = sorted({k for r in rows for k in r if k.startswith("score/")})
    columns = list(FIXED) + differ + list(NUMBERS) + scores
    out = []
    for r in rows:
        s = r.pop("_settings")
        out.append({c: (s.get(c) if c in differ else r.get(c)) for c in columns})
    where = Path(out_dir) if out_dir is not None else parent

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(columns)
    for r in out:
        w.writerow([_csv_cell(r[c]) if not isinstance(r[c], (list, dict)) else canonical_json(r[c]) for c in columns])
    csv_path = write_text(where / CSV_NAME, buf.getvalue())
    md_path = write_text(where / MD_NAME, markdown(columns, out) + "\n")
    return RunsTable(columns, out, csv_path, md_path)


def _shown(column: str, v: Any) -> str:
    if v is None:
        return "–"
    if column.endswith("accuracy") and isinstance(v, float):
        return f"{100 * v:.1f}%"
    if isinstance(v, float):
        return f"{v:.4g}"
    if isinstance(v, (list, dict)):
        return canonical_json(v)
    return str(v)


def _header(column: str) -> str:
    if column.startswith("score/"):
        name = column[len("score/"):]
        return f"{column} ({_direction(name)} is better)"
    return column


def markdown(columns: List[str], rows: List[Mapping[str, Any]], *, text: bool = False) -> str:
    """The rows as a Markdown table (``text=True``: padded columns for a terminal); ``–`` marks a missing value
    (no target labels, or an unfinished run)."""
    align = "".join("r" if c in NUMBERS or c.startswith("score/") else "l" for c in columns)
    body = [[_shown(c, r[c]) if text else _md(_shown(c, r[c])) for c in columns] for r in rows]
    return "\n".join(table([_header(c) for c in columns], body, align, text=text))
