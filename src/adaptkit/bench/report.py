"""Every file the harness writes for people: ``results.csv`` and ``report.md`` (with its charts) for a grid,
``selection.md`` and ``selection.csv`` for a selection study, ``bench.yaml`` (the resolved config), and the text
tables printed in a terminal. Each is written once, whole, from the cell folders' numbers — never appended to.

A **result row** is one run of the grid (one method on one shift with one seed)::

    {"method": "dann", "shift": "rotated_moons", "seed": 0, "status": "ok",   # "ok" | "failed" | "diverged" | "stale"
     "target_accuracy": 0.87, "source_val_accuracy": 0.97, "steps": 3000, "wall_seconds": 41.2,
     "error": None, "entropy": 0.21}                                         # + any float score columns

Learning curves travel separately as ``{(method, shift, seed): [(step, target_accuracy), ...]}``.

The prose of the reports lives in ``templates/*.md`` beside this module (filled with :class:`string.Template`);
every table, Markdown or plain text, comes from :func:`table`. Every file is written atomically (a temporary file in
the same folder, then ``os.replace``), so a reader never sees half a report, and ``report.md`` is written last,
after the charts it links to.

Example:
    >>> print("\\n".join(table(["method", "acc."], [["dann", "87 ± 2"]])))
    | method | acc. |
    | --- | ---: |
    | dann | 87 ± 2 |
"""
from __future__ import annotations

import csv
import io
import json
import math
import re
from collections import Counter, defaultdict
from importlib import resources
from pathlib import Path
from string import Template
from typing import Any, Dict, Iterable, List, Mapping, Optional, Sequence

from .._checks import check_choice, check_number
from ..plain import canonical_json
from ..safety import REPORT_NOTE, SCORE_WARNING
from ..train.files import write_with
from .curves import check_curves, curve_chart
from .judge import ORACLE, RANDOM, ScoreSummary, StudyResult, ordered, summarise
from .plan import GridPlan, value_text
from .stats import (
    Interval,
    PairedComparison,
    average_ranks,
    format_mean_ci,
    format_seeds,
    format_p,
    gap_closed,
    paired_comparison,
    t_interval,
)

__all__ = [
    "RESULT_COLUMNS",
    "STATUSES",
    "STUDY_COLUMNS",
    "RESULTS_CSV",
    "REPORT",
    "RESOLVED_CONFIG",
    "SELECTION_MD",
    "SELECTION_CSV",
    "TEMPLATES",
    "table",
    "check_rows",
    "write_results_csv",
    "read_results_csv",
    "write_report",
    "write_resolved_config",
    "format_table",
    "method_order",
    "write_study",
    "study_table",
]

RESULTS_CSV = "results.csv"
REPORT = "report.md"
RESOLVED_CONFIG = "bench.yaml"  # the resolved bench config, beside the report
SELECTION_MD = "selection.md"
SELECTION_CSV = "selection.csv"
TEMPLATES = ("report.md", "recipes.md", "selection.md")  # under adaptkit/bench/templates/

#: Fixed leading columns of a results CSV, in order; score columns follow, sorted by name.
RESULT_COLUMNS = ("method", "shift", "seed", "status", "target_accuracy", "source_val_accuracy", "steps",
                  "wall_seconds", "error")
#: Accepted values of a row's ``status``.
STATUSES = ("ok", "failed", "diverged", "stale")  # stale: the cell's record came from other settings (never a result)
#: Columns of ``selection.csv``: one row per score × group.
STUDY_COLUMNS = ("score", "method", "shift", "seed", "candidates", "scored", "picked", "picked_accuracy", "best",
                 "best_accuracy", "regret", "spearman", "picked_best", "tied_at_top", "regret_random_tie_break")

_FLOAT_COLUMNS = ("target_accuracy", "source_val_accuracy", "wall_seconds")
_FRACTION_COLUMNS = ("target_accuracy", "source_val_accuracy")  # accuracies are fractions in [0, 1]
_CONFIDENCE = 0.95


# --------------------------------------------------------------------------------------------------------------
# templates and tables


def _fill(name: str, **values: Any) -> str:
    """The template ``templates/<name>`` with ``values`` filled in (a missing value raises ``KeyError``); one
    trailing newline, whatever blank lines an empty optional part leaves at the end."""
    text = resources.files(__package__).joinpath("templates", name).read_text(encoding="utf-8")
    return Template(text).substitute({k: str(v) for k, v in values.items()}).rstrip("\n") + "\n"


def table(header: Sequence[str], rows: Sequence[Sequence[str]], align: Optional[str] = None, *,
          text: bool = False) -> List[str]:
    """The lines of a table: a Markdown pipe table, or with ``text=True`` padded columns for a terminal.

    ``align`` holds one letter per column, ``l`` (left) or ``r`` (right); the default is the first column left and
    the others right.
    """
    align = align or "l" + "r" * (len(header) - 1)
    if text:
        widths = [max(len(x) for x in col) for col in zip(header, *rows)]

        def fmt(cols):
            return "  ".join(c.ljust(w) if a == "l" else c.rjust(w) for c, w, a in zip(cols, widths, align))

        return [fmt(header), fmt(["-" * w for w in widths])] + [fmt(r) for r in rows]
    sep = ["---:" if a == "r" else "---" for a in align]
    return ["| " + " | ".join(header) + " |", "| " + " | ".join(sep) + " |"] + \
        ["| " + " | ".join(r) + " |" for r in rows]


# --------------------------------------------------------------------------------------------------------------
# row validation


def _missing(x) -> bool:
    return x is None or (isinstance(x, float) and math.isnan(x))


def check_rows(rows: Iterable[Mapping]) -> list[dict]:
    """Validate result rows once, at the boundary, and return them as plain dicts.

    Each row needs every column of :data:`RESULT_COLUMNS`; ``status`` must be one of :data:`STATUSES`;
    ``seed`` an integer; ``steps`` an integer or ``None``; accuracies fractions in [0, 1], ``None`` or NaN;
    ``error`` a string or ``None``; any other key is a score column and must hold a number or ``None``.
    A (method, shift, seed) cell may appear only once: duplicates would make the seed pairing ambiguous.
    """
    out, seen = [], {}
    for i, row in enumerate(rows):
        if not isinstance(row, Mapping):
            raise TypeError(f"Result row {i} must be a mapping with keys {', '.join(RESULT_COLUMNS)}. "
                            f"Got {type(row).__name__} instead.")
        lacking = [c for c in RESULT_COLUMNS if c not in row]
        if lacking:
            raise ValueError(f"Result row {i} lacks the key{'s' if len(lacking) > 1 else ''} "
                             f"{', '.join(map(repr, lacking))}. Required keys: {', '.join(RESULT_COLUMNS)}.")
        owner = f"result row {i}"
        for key in ("method", "shift"):
            if not isinstance(row[key], str) or not row[key]:
                raise TypeError(f"The {key!r} value of {owner} must be a non-empty string. Got {row[key]!r} instead.")
        owner = f"result row {i} ({row['method']} / {row['shift']} / seed {row['seed']!r})"
        check_number("seed", owner, row["seed"], integer=True)
        check_choice("status", owner, row["status"], STATUSES)
        if row["steps"] is not None:
            check_number("steps", owner, row["steps"], low=0, integer=True)
        for key in _FLOAT_COLUMNS:
            v = row[key]
            if _missing(v):
                continue
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                raise TypeError(f"The {key!r} value of {owner} must be a number or None. Got {v!r} instead.")
            if key in _FRACTION_COLUMNS and math.isfinite(v):
                check_number(key, owner, v, low=0.0, high=1.0)
        if row["error"] is not None and not isinstance(row["error"], str):
            raise TypeError(f"The 'error' value of {owner} must be a string or None. Got {row['error']!r} instead.")
        for key, v in row.items():
            if key in RESULT_COLUMNS:
                continue
            if not isinstance(key, str) or not key or key != key.strip() or any(c in key for c in ",\r\n\""):
                raise ValueError(f"Score column names of {owner} must be plain non-empty strings "
                                 f"(no commas, quotes or line breaks). Got {key!r} instead.")
            if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float))):
                raise TypeError(f"The score column {key!r} of {owner} must hold a number or None. Got {v!r} instead.")
        cell = (row["method"], row["shift"], int(row["seed"]))
        if cell in seen:
            raise ValueError(f"Result rows {seen[cell]} and {i} are both {cell[0]} / {cell[1]} / seed {cell[2]}: "
                             "each (method, shift, seed) cell may appear once.")
        seen[cell] = i
        clean = dict(row)
        clean["seed"] = int(row["seed"])
        if row["steps"] is not None:
            clean["steps"] = int(row["steps"])
        out.append(clean)
    return out


# --------------------------------------------------------------------------------------------------------------
# atomic writes


def _atomic_write(path: Path, write, *, mode: str = "w", **open_kwargs) -> Path:
    """Call ``write(file)`` on a temporary file beside ``path``, then move it over ``path`` in one step."""
    return write_with(path, write, mode=mode, **open_kwargs)


def _atomic_savefig(fig, path: Path) -> Path:
    return _atomic_write(path, lambda f: fig.savefig(f, format="png", dpi=110), mode="wb")


# --------------------------------------------------------------------------------------------------------------
# CSV


def _score_columns(rows: Sequence[Mapping]) -> list[str]:
    return sorted({k for r in rows for k in r if k not in RESULT_COLUMNS})


def _csv_cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        return repr(v)  # repr round-trips a float exactly ("nan" and "inf" included)
    return str(v)


def write_results_csv(rows: Iterable[Mapping], path) -> Path:
    """Write result rows to ``path`` as CSV, atomically; returns the path.

    Columns: :data:`RESULT_COLUMNS` in that order, then every score column found in any row, sorted by name.
    ``None`` is written as an empty cell; floats with ``repr`` so they read back exactly.
    """
    rows = check_rows(rows)
    columns = list(RESULT_COLUMNS) + _score_columns(rows)

    def write(f):
        w = csv.writer(f, lineterminator="\n")
        w.writerow(columns)
        for r in rows:
            w.writerow([_csv_cell(r.get(c)) for c in columns])

    return _atomic_write(Path(path), write, newline="", encoding="utf-8")


def _parse_float(text: str, column: str, line: int, path) -> Optional[float]:
    if text == "":
        return None
    try:
        return float(text)
    except ValueError:
        raise ValueError(f"{path}, line {line}: the {column!r} cell must be a number or empty. Got {text!r}.") from None


def read_results_csv(path) -> list[dict]:
    """Read rows written by :func:`write_results_csv` back into dicts with Python types.

    Empty cells become ``None`` (so an empty ``error`` string reads back as ``None``); ``seed`` and ``steps``
    become ``int``; accuracies, ``wall_seconds`` and every score column become ``float``. The rows are
    validated with :func:`check_rows`.
    """
    path = Path(path)
    with open(path, newline="", encoding="utf-8") as f:
        reader = csv.reader(f)
        try:
            header = next(reader)
        except StopIteration:
            raise ValueError(f"{path} is empty; expected a header with {', '.join(RESULT_COLUMNS)}.") from None
        lacking = [c for c in RESULT_COLUMNS if c not in header]
        if lacking:
            raise ValueError(f"{path} lacks the column{'s' if len(lacking) > 1 else ''} "
                             f"{', '.join(map(repr, lacking))}. Required columns: {', '.join(RESULT_COLUMNS)}.")
        rows = []
        for line, cells in enumerate(reader, start=2):
            if not cells:
                continue
            if len(cells) != len(header):
                raise ValueError(f"{path}, line {line}: {len(cells)} cells for {len(header)} columns.")
            raw = dict(zip(header, cells))
            row: dict = {}
            for c, text in raw.items():
                if c in ("method", "shift", "status"):
                    row[c] = text
                elif c == "error":
                    row[c] = text or None
                elif c in ("seed", "steps"):
                    try:
                        row[c] = None if text == "" else int(text)
                    except ValueError:  # left for check_rows to report with the row's name
                        row[c] = _parse_float(text, c, line, path)
                else:
                    row[c] = _parse_float(text, c, line, path)
            rows.append(row)
    return check_rows(rows)


# --------------------------------------------------------------------------------------------------------------
# aggregation


class _Grid:
    """Result rows indexed by shift and method; only ``ok`` rows with a finite target accuracy enter means."""

    def __init__(self, rows: list[dict]):
        self.rows = rows
        self.acc: dict = defaultdict(dict)        # (shift, method) -> {seed: target accuracy}
        self.src_val: dict = defaultdict(list)    # (shift, method) -> [source val accuracy]
        self.excluded: dict = defaultdict(Counter)  # (shift, method) -> Counter(reason)
        self.runs: Counter = Counter()            # (shift, method) -> number of rows
        for r in rows:
            key = (r["shift"], r["method"])
            self.runs[key] += 1
            if r["status"] != "ok":
                self.excluded[key][r["status"]] += 1
            elif _missing(r["target_accuracy"]) or not math.isfinite(r["target_accuracy"]):
                self.excluded[key]["missing accuracy"] += 1
            else:
                self.acc[key][r["seed"]] = float(r["target_accuracy"])
                if not _missing(r["source_val_accuracy"]):
                    self.src_val[key].append(float(r["source_val_accuracy"]))
        self.shifts = sorted({r["shift"] for r in rows})
        self.methods_seen = list(dict.fromkeys(r["method"] for r in rows))

    def methods_in(self, shift: str) -> list[str]:
        return [m for m in self.methods_seen if self.runs[(shift, m)]]

    def interval(self, shift: str, method: str) -> Interval:
        return t_interval(self.acc.get((shift, method), {}).values(), _CONFIDENCE)

    def mean(self, shift: str, method: str) -> Optional[float]:
        return self.interval(shift, method).mean


def method_order(methods: Sequence[str], baseline: str, reference: str, oracle: str) -> list[str]:
    """Baseline first, then the reference, then the rest as they first appeared, the oracle last."""
    head = [m for m in (baseline, reference) if m in methods]
    tail = [oracle] if oracle in methods else []
    return list(dict.fromkeys(head + [m for m in methods if m not in head + tail] + tail))


# --------------------------------------------------------------------------------------------------------------
# markdown helpers


def _md(text) -> str:
    """Text safe inside a markdown table cell: one line, pipes escaped."""
    return " ".join(str(text).split()).replace("|", "\\|")


def _code(text: str, limit: int = 2000) -> str:
    """``text`` as one inline code span, whatever backticks it contains."""
    text = " ".join(str(text).split())
    if len(text) > limit:
        text = text[:limit] + " …"
    longest = max((len(m) for m in re.findall(r"`+", text)), default=0)
    fence = "`" * (longest + 1)
    pad = " " if text.startswith("`") or text.endswith("`") or not text else ""
    return f"{fence}{pad}{text}{pad}{fence}"


def _pct(x: Optional[float]) -> Optional[float]:
    return None if x is None else 100.0 * x


def _slugs(names: Sequence[str]) -> dict:
    """A distinct, file-name-safe slug for each name."""
    out, used = {}, set()
    for name in names:
        base = re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("._") or "shift"
        slug, k = base, 1
        while slug.lower() in used:
            k += 1
            slug = f"{base}_{k}"
        used.add(slug.lower())
        out[name] = slug
    return out


# --------------------------------------------------------------------------------------------------------------
# charts


def _new_figure(width: float, height: float):
    # A bare Figure renders through the Agg canvas without pyplot: no global backend switch, no open-figure state.
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), layout="constrained")
    return fig, fig.add_subplot()


def _bar_chart(grid: _Grid, shift: str, methods: Sequence[str], baseline: str, oracle: str, path: Path) -> Path:
    fig, ax = _new_figure(max(4.0, 1.0 + 0.9 * len(methods)), 3.6)
    means, errs, colors, hatches = [], [], [], []
    for m in methods:
        iv = grid.interval(shift, m)
        means.append(_pct(iv.mean) if iv.mean is not None else 0.0)
        errs.append(_pct(iv.half_width) if iv.half_width is not None else 0.0)
        colors.append("0.6" if m == baseline else ("0.85" if m == oracle else "C0"))
        hatches.append("//" if m == oracle else "")
    x = range(len(methods))
    bars = ax.bar(x, means, yerr=errs, capsize=4, color=colors, edgecolor="0.2", linewidth=0.6)
    for bar, h in zip(bars, hatches):
        bar.set_hatch(h)
    for i, m in enumerate(methods):
        iv = grid.interval(shift, m)
        if iv.mean is None:
            ax.text(i, 1.0, "no ok runs", ha="center", va="bottom", rotation=90, fontsize=8)
        elif iv.half_width is None:
            ax.text(i, means[i], "n=1", ha="center", va="bottom", fontsize=8)
    base = grid.mean(shift, baseline)
    if base is not None:
        ax.axhline(100 * base, color="0.3", linestyle="--", linewidth=0.8, label=f"{baseline} mean")
        ax.legend(loc="lower right", fontsize=8)
    ax.set_xticks(list(x), [m + (" *" if m == oracle else "") for m in methods], rotation=30, ha="right")
    ax.set_ylabel("target accuracy (%)")
    ax.set_ylim(0, 100)
    ax.set_title(f"{shift}\nmean ± 95% CI over seeds" + ("; * uses target labels" if oracle in methods else ""),
                 fontsize=9)
    return _atomic_savefig(fig, path)


def _bare_figure(width: float, height: float):
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), layout="constrained")


# --------------------------------------------------------------------------------------------------------------
# report


def _excluded_text(counter: Counter) -> str:
    return ", ".join(f"{n} {why}" for why, n in sorted(counter.items())) or "–"


def _comparison_row(c: PairedComparison) -> list[str]:
    d = c.difference
    notes = []
    if c.t_test_reason:
        notes.append(f"t-test: {c.t_test_reason}")
    if c.wilcoxon_reason:
        notes.append(f"Wilcoxon: {c.wilcoxon_reason}")
    elif c.wilcoxon_min_p is not None and c.wilcoxon_min_p > 0.05:
        notes.append(f"Wilcoxon p cannot go below {format_p(c.wilcoxon_min_p)} with these {c.n} pairs (zero differences are dropped)")
    if c.unpaired_seeds:
        notes.append("unpaired seeds left out: " + ", ".join(map(str, c.unpaired_seeds)))
    return [
        f"{_md(c.a)} − {_md(c.b)}",
        str(c.n),
        format_mean_ci(_pct(d.mean), _pct(d.half_width)),
        format_p(c.t_test_p),
        format_p(c.wilcoxon_p),
        _md("; ".join(notes)) or "–",
    ]


def write_report(
    rows: Iterable[Mapping],
    out_dir,
    reference: str = "dann",
    baseline: str = "source_only",
    oracle: str = "target_oracle",
    curves: Optional[Mapping[tuple, Sequence[tuple]]] = None,
    plan: Optional[GridPlan] = None,
) -> Path:
    """Write ``out_dir/report.md`` and its PNG charts from result rows; returns the path of ``report.md``.

    The report holds, per shift: mean target accuracy with a 95% Student-t interval over seeds, the number of
    seeds used and excluded, and the fraction of the ``baseline`` → ``oracle`` gap each method closes; paired
    comparisons (same seeds) of every method against ``baseline`` and against ``reference``, with the paired
    t-test and the Wilcoxon signed-rank p-values; a bar chart with interval error bars, and learning curves
    when ``curves`` (``{(method, shift, seed): [(step, target_accuracy), ...]}``) is given. Then the average
    rank of each method across shifts (the oracle left out), every failed or diverged run with its error, and,
    when the grid's ``plan`` is given, the recipes every method shared on each shift.

    Only rows with status ``ok`` and a target accuracy enter means; the others are counted and listed.
    Names absent from the rows (say, no oracle was run) leave the cells that need them as "n/a".
    """
    for name, value in (("reference", reference), ("baseline", baseline), ("oracle", oracle)):
        if not isinstance(value, str) or not value:
            raise TypeError(f"The {name!r} parameter of write_report must be a method name (a non-empty string). "
                            f"Got {value!r} instead.")
    rows = check_rows(rows)
    curves = check_curves(curves) if curves is not None else {}
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)

    grid = _Grid(rows)
    all_methods = method_order(grid.methods_seen, baseline, reference, oracle)
    status_counts = Counter(r["status"] for r in rows)
    text = _fill(
        "report.md", note=REPORT_NOTE, n_runs=len(rows), n_methods=len(all_methods), n_shifts=len(grid.shifts),
        n_seeds=len({r["seed"] for r in rows}), statuses=", ".join(f"{status_counts[s]} {s}" for s in STATUSES),
        methods=", ".join(_md(m) for m in all_methods) or "(none)", baseline=_md(baseline),
        reference=_md(reference), oracle=_md(oracle),
        shifts="".join(line + "\n" for line in _shift_sections(grid, all_methods, baseline, reference, oracle,
                                                                 curves, out_dir)),
        ranks="\n".join(_rank_section(grid, [m for m in all_methods if m != oracle])),
        failures="\n".join(_failure_lines(rows)),
        recipes="" if plan is None else _recipes_section(plan))
    return _atomic_write(out_dir / REPORT, lambda f: f.write(text), encoding="utf-8")


def _shift_sections(grid: _Grid, all_methods, baseline, reference, oracle, curves, out_dir: Path) -> List[str]:
    """Per shift: the accuracy table, its bar chart, the paired comparisons and the learning curves."""
    slugs = _slugs(grid.shifts)
    lines: List[str] = []
    for shift in grid.shifts:
        methods = [m for m in all_methods if grid.runs[(shift, m)]]
        slug = slugs[shift]
        lines += [f"## Shift: {_md(shift)}", ""]
        base_mean, oracle_mean = grid.mean(shift, baseline), grid.mean(shift, oracle)
        table_rows = []
        for m in methods:
            iv = grid.interval(shift, m)
            g = gap_closed(iv.mean, base_mean, oracle_mean)
            table_rows.append([
                _md(m) + (" (uses target labels)" if m == oracle else ""),
                format_seeds(grid.acc.get((shift, m), {}).values(), scale=100, confidence=_CONFIDENCE),
                str(iv.n),
                _md(_excluded_text(grid.excluded.get((shift, m), Counter()))),
                "n/a" if g is None else f"{100 * g:.0f}%",
                format_seeds(grid.src_val.get((shift, m), []), scale=100, confidence=_CONFIDENCE),
            ])
        lines += table(["method", "target acc. (%) ± 95% CI", "n seeds", "excluded", "gap closed",
                        "source val. acc. (%)"], table_rows)
        lines.append("")
        bar = _bar_chart(grid, shift, methods, baseline, oracle, out_dir / f"accuracy_{slug}.png")
        lines += [f"![{_md(shift)}: target accuracy per method]({bar.name})", ""]

        lines += [f"### Paired comparisons on {_md(shift)}", ""]
        pairs = []
        for other in (baseline, reference):
            for m in methods:
                if m != other and (m, other) not in pairs and (other, m) not in pairs:
                    pairs.append((m, other))
        absent = [o for o in dict.fromkeys((baseline, reference)) if not grid.runs[(shift, o)]]
        for o in absent:
            lines.append(f"`{_md(o)}` has no runs on this shift, so there is no comparison against it.")
        comp_rows = []
        for m, other in pairs:
            if not grid.runs[(shift, other)]:
                continue
            c = paired_comparison(grid.acc.get((shift, m), {}), grid.acc.get((shift, other), {}),
                                  a_name=m, b_name=other, confidence=_CONFIDENCE)
            comp_rows.append(_comparison_row(c))
        if absent:
            lines.append("")
        if comp_rows:
            lines += table(["comparison", "n pairs", "mean difference (pp) ± 95% CI", "paired t-test p",
                            "Wilcoxon signed-rank p", "notes"], comp_rows, align="lrrrrl")
        else:
            lines.append("No comparisons possible on this shift.")
        lines.append("")

        if any(k[1] == shift for k in curves):
            cpath = curve_chart(curves, shift, methods, out_dir / f"curves_{slug}.png", baseline=baseline,
                                oracle=oracle, new_figure=_bare_figure, save=_atomic_savefig)
            lines += [f"![{_md(shift)}: learning curves]({cpath.name})", ""]

    stray = sorted({k[1] for k in curves} - set(grid.shifts), key=str)
    if stray:
        lines += [f"Learning curves were given for shifts with no result rows, not plotted: "
                  f"{', '.join(_md(s) for s in stray)}.", ""]
    return lines


def _rank_section(grid: _Grid, ranked: Sequence[str]) -> List[str]:
    table_ = {s: {m: grid.mean(s, m) for m in ranked} for s in grid.shifts}
    ranks = average_ranks(table_, methods=list(ranked))
    if ranks.shifts_used:
        rank_rows = sorted(ranked, key=lambda m: ranks.mean_rank[m])
        lines = table(["method", "mean rank"] + [_md(s) for s in ranks.shifts_used],
                      [[_md(m), f"{ranks.mean_rank[m]:.2f}"] +
                       [f"{ranks.per_shift[s][m]:g}" for s in ranks.shifts_used] for m in rank_rows])
    else:
        lines = ["No shift has a mean for every ranked method; no ranks computed."]
    if ranks.shifts_dropped:
        lines += ["", "Shifts left out (some method has no mean there): "
                  + ", ".join(_md(s) for s in ranks.shifts_dropped) + "."]
    return lines


def _failure_lines(rows: Sequence[Mapping]) -> List[str]:
    bad = sorted((r for r in rows if r["status"] != "ok"), key=lambda r: (r["shift"], r["method"], r["seed"]))
    if not bad:
        return ["None: every run finished with status `ok`."]
    return [f"- {_md(r['shift'])} / {_md(r['method'])} / seed {r['seed']}: **{r['status']}** — "
            + (_code(r["error"]) if r["error"] else "(no error message recorded)") for r in bad]


def _json(obj: Any) -> str:
    return json.dumps(obj, sort_keys=True)


def _recipes_section(plan: GridPlan) -> str:
    """What every method shared on each shift, and what each method brought (its options, a swept recipe)."""
    shifts = []
    for s in plan.shifts:
        r = plan.recipes[s.label]
        o = r["optim"]
        shifts.append(f"- **{s.label}** (shift `{s.name}`, params `{_json(s.params)}`): encoder `{_json(r['encoder'])}`, "
                      f"head `{_json(r['head'])}`, optimiser {o['name']} lr {o['lr']} ({o['schedule']} schedule), "
                      f"{r['steps']} steps, batch size {r['batch_size']}.")
    methods = []
    for m in plan.methods:
        own = plan.method_recipes.get(m.label)
        methods.append(f"- **{m.label}**: `{m.name}`" + (f" with `{_json(m.options)}`" if m.options else "")
                       + (f"; recipe overrides `{_json(own)}` (a sweep)" if own else ""))
    return _fill("recipes.md", seeds=plan.seeds, shifts="\n".join(shifts), methods="\n".join(methods)).rstrip("\n")


def write_resolved_config(config: Mapping[str, Any], out_dir) -> Path:
    """Write the resolved bench config as ``out_dir/bench.yaml`` (keys sorted; atomically); returns its path."""
    from omegaconf import OmegaConf

    text = OmegaConf.to_yaml(OmegaConf.create(json.loads(canonical_json(config))))
    return _atomic_write(Path(out_dir) / RESOLVED_CONFIG, lambda f: f.write(text), encoding="utf-8")


def format_table(rows: Sequence[Mapping[str, Any]], methods: Optional[Sequence[str]] = None,
                 shifts: Optional[Sequence[str]] = None, seeds: Optional[int] = None) -> str:
    """A plain-text table of mean target accuracy (%) ± 95% t-interval half-width, methods × shifts.

    A cell shows ``(k/n ok)`` when only ``k`` of its ``n`` seeds finished, ``–`` when none did.
    """
    methods = list(methods) if methods is not None else list(dict.fromkeys(r["method"] for r in rows))
    shifts = list(shifts) if shifts is not None else list(dict.fromkeys(r["shift"] for r in rows))
    body = []
    for m in methods:
        line = [m]
        for s in shifts:
            cell = [r for r in rows if r["method"] == m and r["shift"] == s]
            ok = [r["target_accuracy"] for r in cell if r["status"] == "ok" and r["target_accuracy"] is not None]
            n = seeds if seeds is not None else len(cell)
            if not ok:
                text = "–" + (f" (0/{n} ok)" if n else "")
            else:
                text = format_seeds(ok, scale=100, fallback_decimals=1)
                if len(ok) < n:
                    text += f" ({len(ok)}/{n} ok)"
            line.append(text)
        body.append(line)
    return "\n".join(table(["target acc. %"] + shifts, body, text=True))


# --------------------------------------------------------------------------------------------------------------
# the selection study


def _pp(iv: Interval) -> str:
    if iv.mean is None:
        return "n/a"
    return format_mean_ci(100 * iv.mean, None if iv.half_width is None else 100 * iv.half_width, fallback_decimals=1)


def _rho(x: Optional[float]) -> str:
    return "–" if x is None else f"{x:+.2f}"


def _share(x: Optional[float]) -> str:
    return "n/a" if x is None else f"{100 * x:.0f}%"


def _direction(name: str) -> str:
    from ..select import SCORES

    if name == RANDOM:
        return "uniform over candidates"
    if name == ORACLE:
        return "uses target labels"
    if name.startswith("rule: "):
        return "rule (it picks)"
    return "higher" if SCORES[name].higher_is_better else "lower"


def _plural(n: int, noun: str) -> str:
    return f"{n} {noun}{'s' * (n != 1)}"


def study_table(summaries: Sequence[ScoreSummary]) -> str:
    """A plain-text table of a study's summaries (best mean regret first; the reference rows last)."""
    header = ["score", "better", "regret pp ± 95% CI", "mean rho", "picked best", "missing", "ties at top"]
    body = [[s.score, _direction(s.score).split(" ")[0] if s.score not in (RANDOM, ORACLE) else "-",
             _pp(s.regret), _rho(s.spearman_mean), _share(s.share_best), str(s.n_missing),
             "-" if s.score in (RANDOM, ORACLE) else str(s.n_tied)]
            for s in ordered(summaries)]
    return "\n".join(table(header, body, "llrrrrr", text=True))


def _breakdown(records, names, key: str, values: Sequence[Any]) -> List[str]:
    rows = []
    for s in names:
        line = [s]
        for v in values:
            summ = summarise([r for r in records if r[key] == v], [s])[0]
            line.append(f"{_pp(summ.regret)} (ρ {_rho(summ.spearman_mean)})" if summ.n_groups else "–")
        rows.append(line)
    return table(["score"] + [f"{v}" for v in values], rows, "l" + "r" * len(values))


def _target_test_size(shift) -> Optional[int]:
    """Labelled target test samples of a shift (seed 0): the granularity of its accuracies."""
    from ..data.shifts import make_shift

    try:
        data = make_shift(shift.name, seed=0, **shift.params).scoring_sets()["target_test"]
        return int(len(data.y))
    except Exception:  # noqa: BLE001 — a note in the report, never a reason to lose the study
        return None


def write_study(study: StudyResult, out_dir, *, command: Optional[str] = None) -> tuple[Path, Path]:
    """Write ``selection.csv`` and ``selection.md`` into ``out_dir`` atomically; returns their paths."""
    out_dir = Path(out_dir)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(STUDY_COLUMNS)
    for r in study.records:
        w.writerow([_csv_cell(r[c]) for c in STUDY_COLUMNS])
    csv_path = _atomic_write(out_dir / SELECTION_CSV, lambda f: f.write(buf.getvalue()), encoding="utf-8")

    g = study.grid
    plan = g.plan
    ordered_ = ordered(study.summaries)
    names = [s.score for s in ordered_]
    per_group = sorted({len(x.accuracies) for x in study.groups})
    sizes = "0" if not per_group else str(per_group[0]) if per_group[0] == per_group[-1] else \
        f"{per_group[0]}–{per_group[-1]}"
    rows = [[s.score, _direction(s.score), _pp(s.regret), str(s.regret.n), _rho(s.spearman_mean),
             _share(s.share_best), str(s.n_missing), "–" if s.score in (RANDOM, ORACLE) else str(s.n_tied),
             _pp(s.regret_random_tie_break)] for s in ordered_]
    all_groups = table(["score", "better", "mean regret (pp) ± 95% CI", "groups", "mean Spearman ρ",
                        "picked the best", "missing", "ties at top", "regret, random tie-break (pp)"], rows,
                       "llrrrrrrr")
    methods = list(dict.fromkeys(x.method for x in study.groups))
    text = _fill(
        "selection.md", warning=SCORE_WARNING, random=RANDOM, oracle=ORACLE,
        command="" if not command else (f"Command: `{command}`; this call trained {g.ran} cells and reused "
                                        f"{g.reused} in {study.wall_seconds:.0f} s.\n\n"),
        n_methods=_plural(len(methods), "method"), n_shifts=_plural(len(plan.shifts), "shift"),
        n_seeds=_plural(len(plan.seeds), "seed"), n_groups=len(study.groups), sizes=sizes, n_cells=len(plan.cells),
        sweep=json.dumps(plan.config.get("sweep") or {}), all_groups="\n".join(all_groups),
        per_shift="\n".join(_breakdown(study.records, names, "shift", [s.label for s in plan.shifts])),
        per_method="\n".join(_breakdown(study.records, names, "method", methods)),
        candidates="\n".join(_candidate_lines(study.candidates)), resolved_config=RESOLVED_CONFIG,
        recipes="\n".join(_study_recipe_lines(plan)), n_failed=study.counts.get("failed candidates", 0),
        n_small=study.counts.get("groups under two candidates", 0), largest=_largest_regret(study.records))
    md_path = _atomic_write(out_dir / SELECTION_MD, lambda f: f.write(text), encoding="utf-8")
    return md_path, csv_path


def _candidate_lines(candidates) -> List[str]:
    lines = []
    for base in dict.fromkeys(k.base for k in candidates):
        mine = [k for k in candidates if k.base == base]
        swept: Dict[str, List[str]] = {}
        for k in mine:
            for key, v in k.settings:
                swept.setdefault(key, [])
                if value_text(v) not in swept[key]:
                    swept[key].append(value_text(v))
        grid_text = " × ".join(f"{key} ∈ {{{', '.join(vs)}}}" for key, vs in swept.items()) or "nothing swept"
        lines.append(f"- **{base}** ({_plural(len(mine), 'candidate')}): {grid_text}")
    return lines


def _study_recipe_lines(plan: GridPlan) -> List[str]:
    lines = []
    for s in plan.shifts:
        r = plan.recipes[s.label]
        n_test = _target_test_size(s)
        lines.append(f"- **{s.label}** (shift `{s.name}`, params `{_json(s.params)}`"
                     + ("" if n_test is None else f"; {n_test} labelled target test samples, so one sample is "
                                                  f"{100 / n_test:.2g} points") + "): "
                     f"encoder `{r['encoder']['name']}`, head `{r['head']['name']}`, {r['optim']['name']} (lr "
                     f"{r['optim']['lr']} unless swept), {r['steps']} steps, batch size {r['batch_size']}.")
    return lines


def _largest_regret(records: Sequence[Mapping[str, Any]]) -> str:
    picks = [r for r in records if r["score"] not in (RANDOM, ORACLE) and r["regret"] is not None]
    worst = max(picks, key=lambda r: r["regret"], default=None)
    if worst is None:
        return ""
    return (f"\n\nLargest single regret: {100 * worst['regret']:.1f} points ({worst['score']} on {worst['method']} / "
            f"{worst['shift']} / seed {worst['seed']}: picked `{worst['picked']}` at "
            f"{100 * worst['picked_accuracy']:.1f}%, best `{worst['best']}` at {100 * worst['best_accuracy']:.1f}%).")
