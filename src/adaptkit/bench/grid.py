"""The benchmark grid: every method × every shift × every seed, trained fairly, in parallel, resumably.

**Fairness.** On a given shift every method trains with the same *recipe* — encoder, head, optimiser, steps and
batch size — taken from ``recipes[<shift>]`` in the bench config, and with the same seeds (so the report can pair
them: seed ``k`` draws the same toy data and the same initial weights for every method). Only the alignment module
and its own options differ. The shipped recipes use an ``mlp`` head with dropout for every method, because ADR
needs dropout in the head and the others must share its architecture.

**Methods.** An entry of ``methods`` is a registry name (``"dann"``), an import path to your own ``Alignment``
class or plain loss function ``(source_features, target_features) -> scalar`` (``"examples.my_alignment.
energy_distance"``; a function is wrapped by the ``feature_loss`` method), or a mapping
``{name: ..., label: ..., options: {...}}`` whose options become the method's keyword arguments. ``add_method``
appends one more entry — a single override puts your loss into the grid::

    adaptkit-bench add_method=examples.my_alignment.energy_distance

An import path is looked up on ``sys.path`` and then in the current directory; importing runs that module's
code, so treat a bench config from a stranger like code.

**Cells.** Each (shift, method, seed) is an ordinary run folder, ``<out_dir>/cells/<shift>/<method>/seed<k>/``,
written by :func:`adaptkit.fit` (config.yaml, metrics.jsonl, checkpoint.pt, summary.json) plus ``cell.json``,
the grid's description of the cell. Cells run in worker processes through joblib's ``loky`` backend, one torch
thread each by default and ``os.cpu_count()`` workers. The grid is a *single* hydra job that drives joblib itself
rather than a hydra multirun through the joblib launcher: one process then owns the plan, the resume logic, the
fault isolation and the report, and a multirun would start a hydra job (and a config composition) per cell.

**Resume.** Rerunning the same grid skips every cell whose folder holds a summary with status ``finished`` and
runs the rest; an unfinished cell resumes from its checkpoint. A finished cell whose ``cell.json`` differs from
the current plan (say, the steps changed) is refused with the cell's name, unless ``overwrite=true``.

**Interruption.** SIGINT/SIGTERM stops each running cell at a step boundary with a checkpoint; the grid then
starts no more cells, writes the results of the finished ones and raises ``Interrupted``; a rerun resumes.

**Faults.** A cell that raises — a ``ValueError`` from a method's setup, a ``DivergenceError`` from the loop,
anything else — is recorded in ``failure.json`` in its folder (status ``failed`` or ``diverged``, the error and
its traceback; written atomically) and the grid goes on. A rerun retries failed cells (``retry_failed=false``
keeps their failure).

**Sweeps.** A non-empty ``sweep`` (option → list of values) expands every method entry into one entry per
combination of the values of the options that method has — ``lr`` (the recipe optimiser's learning rate, which
every method has) and any method option such as ``weight`` — labelled ``<label>__<option><value>__…``
(``dann__weight0.3__lr0.001``). A swept learning rate is the one place where a method's cells leave the shift's
shared recipe; the report's recipes section lists it. The expansion and the study that judges label-free
selection scores on such a grid live in :mod:`adaptkit.bench.selection`; ``adaptkit-bench`` runs that study
(``selection.md`` beside the cells) whenever the config has a sweep::

    adaptkit-bench bench=selection workers=2

**Results.** At the end ``results.csv`` is rebuilt from the cell folders (never appended to), and ``report.md``
with its charts is written by :func:`adaptkit.bench.report.write_report`, learning curves taken from each cell's
``metrics.jsonl``. A ``## Recipes`` section appended to the report states what every method shared.

Example:
    >>> from adaptkit.bench.grid import run_grid
    >>> result = run_grid("tiny", out_dir="runs/bench/tiny", workers=2)  # doctest: +SKIP
    >>> print(result.table())  # doctest: +SKIP
"""
from __future__ import annotations

import json
import math
import os
import re
import shutil
import sys
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, Iterable, List, Mapping, Optional, Sequence, Tuple

from .._checks import check_known

from hydra.core.config_store import ConfigStore

from ..train.optim import OptimSettings

__all__ = [
    "BenchConfig",
    "Recipe",
    "MethodEntry",
    "ShiftEntry",
    "Cell",
    "GridPlan",
    "GridResult",
    "register_schema",
    "load_config",
    "plan_grid",
    "execute",
    "run_grid",
    "run_grid_from_config",
    "collect_results",
    "format_table",
    "print_summary",
]

CELLS = "cells"  # sub-folder of out_dir holding one run folder per cell
CELL_SPEC = "cell.json"  # the grid's description of a cell, checked on resume
FAILURE = "failure.json"  # written by a cell that raised
RESULTS_CSV = "results.csv"
REPORT = "report.md"
RESOLVED_CONFIG = "bench.yaml"  # the resolved bench config, beside the report

_LABEL = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")
_METHOD_KEYS = ("name", "label", "options")
_SHIFT_KEYS = ("name", "label", "params")


# --------------------------------------------------------------------------------------------------------------
# schema


@dataclass
class Recipe:
    """What every method shares on one shift."""

    encoder: Dict[str, Any] = field(default_factory=lambda: {"name": "mlp"})  # encoder name + options
    head: Dict[str, Any] = field(default_factory=lambda: {"name": "mlp"})  # head name + options (ADR needs dropout)
    optim: OptimSettings = field(default_factory=lambda: OptimSettings(name="adam", lr=0.001))  # every update's optimiser
    steps: int = 1000  # training steps over all of a method's stages
    batch_size: int = 64  # samples per domain per step
    eval_every: Optional[int] = None  # evaluation period in steps, i.e. learning-curve resolution (default: steps // 10)


@dataclass
class BenchConfig:
    """The typed schema of ``adaptkit-bench`` (filled by ``configs/bench.yaml`` and a named grid ``bench=<name>``)."""

    name: str = "custom"  # the grid's name (set by configs/bench/<name>.yaml); used in the default out_dir
    methods: List[Any] = field(default_factory=list)  # registry name | import path 'pkg.mod.attr' | {name, label, options}
    add_method: Optional[str] = None  # one more method entry appended to `methods`, e.g. your loss's import path
    shifts: List[Any] = field(default_factory=list)  # bundled shift name | {name, label, params}
    seeds: List[int] = field(default_factory=lambda: [0, 1, 2])  # shared by every method: paired comparisons
    recipes: Dict[str, Recipe] = field(default_factory=dict)  # per shift name (or label): the shared training recipe
    scores: List[str] = field(default_factory=list)  # label-free selection scores recorded per cell (score/<name>)
    sweep: Dict[str, List[Any]] = field(default_factory=dict)  # option or lr -> values (selection study)
    reference: Optional[str] = None  # method every other is compared with (default: add_method, else dann, else first)
    baseline: Optional[str] = None  # the no-adaptation baseline (default: source_only)
    oracle: Optional[str] = None  # the target-label upper bound (default: target_oracle)
    workers: Optional[int] = None  # parallel worker processes (default: os.cpu_count())
    threads_per_worker: int = 1  # torch threads in each worker
    device: str = "cpu"  # cpu | cuda | cuda:N | auto; toy models run fastest on CPU
    out_dir: str = "runs/bench/${name}"  # grid folder: cells/, results.csv, report.md, charts
    overwrite: bool = False  # retrain every cell of this grid from scratch
    retry_failed: bool = True  # rerun cells that failed or diverged last time (false: keep their failure)
    max_cells: Optional[int] = None  # run at most this many cells, then stop (rerun to finish): a test hook
    verbose: bool = True  # print a line per finished cell


def register_schema() -> None:
    """Store :class:`BenchConfig` as ``bench_schema`` in hydra's config store (``configs/bench.yaml`` uses it)."""
    ConfigStore.instance().store(name="bench_schema", node=BenchConfig)


register_schema()


# --------------------------------------------------------------------------------------------------------------
# the plan


@dataclass(frozen=True)
class MethodEntry:
    name: str  # registry name or import path
    label: str  # name in folders, tables and the report
    options: Dict[str, Any]

    def spec(self) -> Dict[str, Any]:
        return {"name": self.name, "label": self.label, "options": self.options}


@dataclass(frozen=True)
class ShiftEntry:
    name: str  # bundled shift (adaptkit.data.SHIFTS)
    label: str
    params: Dict[str, Any]

    def spec(self) -> Dict[str, Any]:
        return {"name": self.name, "label": self.label, "params": self.params}


@dataclass(frozen=True)
class Cell:
    """One run of the grid: a method on a shift with a seed, trained with the shift's recipe."""

    method: MethodEntry
    shift: ShiftEntry
    seed: int
    recipe: Dict[str, Any]

    @property
    def key(self) -> Tuple[str, str, int]:
        """``(method label, shift label, seed)``: the key of the report's learning curves."""
        return (self.method.label, self.shift.label, self.seed)

    @property
    def relpath(self) -> Path:
        return Path(CELLS) / self.shift.label / self.method.label / f"seed{self.seed}"

    def name(self) -> str:
        return f"{self.shift.label}/{self.method.label}/seed{self.seed}"

    def spec(self, scores: Sequence[str]) -> Dict[str, Any]:
        """Everything that determines this cell's numbers (compared on resume)."""
        return _jsonable({"method": self.method.spec(), "shift": self.shift.spec(), "seed": self.seed,
                          "recipe": self.recipe, "scores": list(scores)})


@dataclass
class GridPlan:
    """A validated, expanded grid."""

    name: str
    methods: List[MethodEntry]
    shifts: List[ShiftEntry]
    seeds: List[int]
    recipes: Dict[str, Dict[str, Any]]  # shift label -> recipe
    cells: List[Cell]
    out_dir: Path
    reference: str
    baseline: str
    oracle: str
    scores: List[str]
    workers: int
    threads_per_worker: int
    device: str
    overwrite: bool
    retry_failed: bool
    max_cells: Optional[int]
    verbose: bool
    config: Dict[str, Any]  # the resolved bench config
    method_recipes: Dict[str, Dict[str, Any]] = field(default_factory=dict)  # method label -> recipe overrides (sweep)
    candidates: List[Any] = field(default_factory=list)  # a sweep's candidates (adaptkit.bench.selection.Candidate)
    write_report: bool = True  # write report.md and its charts (results.csv is always written)


def load_config(config: Any = None, overrides: Optional[Mapping[str, Any]] = None) -> Dict[str, Any]:
    """The bench config as a validated plain dict.

    ``config`` is ``None`` (the shipped ``configs/bench.yaml`` with its default grid), the name of a named grid
    (``"tiny"``: ``configs/bench/tiny.yaml``), or a composed config / mapping (then used as is, over the schema's
    defaults). ``overrides`` are merged on top: lists replace, mappings merge, except that a recipe's ``encoder`` or
    ``head`` given in ``overrides['recipes']`` replaces the current one whole, and so does ``overrides['sweep']``
    the config's sweep. Unknown keys and wrong types raise a ``ValueError`` naming them.
    """
    from omegaconf import DictConfig, OmegaConf
    from omegaconf.errors import OmegaConfBaseException

    if config is None or isinstance(config, str):
        from ..config import compose

        register_schema()
        try:
            base = compose([] if config is None else [f"bench={config}"], config_name="bench")
        except Exception as e:  # hydra's MissingConfigException lists the available grids
            raise ValueError(f"cannot compose the bench config{'' if config is None else f' for grid {config!r}'}: "
                             f"{e}") from None
    elif isinstance(config, (DictConfig, Mapping)):
        base = config
    else:
        raise TypeError(f"The 'config' parameter of run_grid must be None, a named grid (e.g. 'demo', 'tiny') or a "
                        f"mapping of bench settings. Got {type(config).__name__} instead.")
    over = dict(overrides or {})
    recipes = over.pop("recipes", None)
    sweep = over.pop("sweep", None)
    try:
        merged = OmegaConf.merge(OmegaConf.structured(BenchConfig), base, OmegaConf.create(over))
        if recipes is not None or sweep is not None:
            # rebuilt, not merged, so that a replaced encoder or head keeps none of the old one's options
            plain = OmegaConf.to_container(merged)  # interpolations such as ${name} kept
            if recipes is not None:
                plain["recipes"] = _override_recipes(plain["recipes"], recipes)
            if sweep is not None:
                plain["sweep"] = sweep
            merged = OmegaConf.merge(OmegaConf.structured(BenchConfig), plain)
        return OmegaConf.to_container(merged, resolve=True)
    except OmegaConfBaseException as e:
        accepted = ", ".join(f.name for f in BenchConfig.__dataclass_fields__.values())
        raise ValueError(f"bad bench setting: {e}. Accepted bench keys: {accepted}.") from None


def _override_recipes(current: Dict[str, Any], overrides: Any) -> Dict[str, Any]:
    """Recipes with ``overrides`` applied per shift: an ``encoder`` or ``head`` mapping replaces the current one
    whole (a network's options belong to that network), ``optim`` and the other keys update the current values."""
    if not isinstance(overrides, Mapping):
        raise TypeError(f"The 'recipes' override must be a mapping shift -> recipe settings. Got {overrides!r} instead.")
    out = {k: dict(v) for k, v in current.items()}
    for shift, r in overrides.items():
        if not isinstance(r, Mapping):
            raise TypeError(f"The recipe override of shift {shift!r} must be a mapping of recipe settings "
                            f"({', '.join(Recipe.__dataclass_fields__)}). Got {r!r} instead.")
        new = dict(out.get(shift, {}))
        for k, v in r.items():
            new[k] = {**new.get(k, {}), **v} if k == "optim" and isinstance(v, Mapping) else v
        out[shift] = new
    return out


def _check_label(label: Any, what: str) -> str:
    if not isinstance(label, str) or not _LABEL.match(label) or ".." in label:
        raise ValueError(f"The label of {what} must be a non-empty folder-safe name (letters, digits, '.', '_', "
                         f"'-'; starting with a letter or digit). Got {label!r} instead; set one with 'label'.")
    return label


def _method_entry(entry: Any, i: int) -> MethodEntry:
    what = f"methods[{i}]"
    if isinstance(entry, str):
        name, label, options = entry, None, {}
    elif isinstance(entry, Mapping):
        check_known(entry, _METHOD_KEYS, noun="key", where=f"in {what}")
        name, label, options = entry.get("name"), entry.get("label"), entry.get("options") or {}
        if not isinstance(options, Mapping):
            raise TypeError(f"The 'options' of {what} must be a mapping of method options. Got {options!r} instead.")
    else:
        raise TypeError(f"{what} must be a method name, an import path 'package.module.attr' or a mapping "
                        f"{{name, label, options}}. Got {entry!r} instead.")
    if not isinstance(name, str) or not name:
        raise ValueError(f"{what} needs a 'name': a registered method or an import path. Got {name!r} instead.")
    label = name.rpartition(".")[2] if label is None else label
    return MethodEntry(name, _check_label(label, f"method {name!r} ({what})"), dict(options))


def _shift_entry(entry: Any, i: int) -> ShiftEntry:
    what = f"shifts[{i}]"
    if isinstance(entry, str):
        name, label, params = entry, None, {}
    elif isinstance(entry, Mapping):
        check_known(entry, _SHIFT_KEYS, noun="key", where=f"in {what}",
                    note=" (shift parameters go under 'params')")
        name, label, params = entry.get("name"), entry.get("label"), entry.get("params") or {}
        if not isinstance(params, Mapping):
            raise TypeError(f"The 'params' of {what} must be a mapping of shift parameters. Got {params!r} instead.")
    else:
        raise TypeError(f"{what} must be a bundled shift name or a mapping {{name, label, params}}. "
                        f"Got {entry!r} instead.")
    from ..data.shifts import SHIFTS

    SHIFTS.get(name)  # unknown name: ValueError listing the bundled shifts
    if "seed" in params:
        raise ValueError(f"{what} sets 'seed' in its params; the data seed is the cell's seed (set `seeds`).")
    return ShiftEntry(name, _check_label(name if label is None else label, f"shift {name!r} ({what})"), dict(params))


def _unique(labels: Iterable[str], what: str) -> None:
    seen = set()
    for label in labels:
        if label in seen:
            raise ValueError(f"Two {what} have the label {label!r}; give one of them another 'label' "
                             f"(e.g. {{name: ..., label: {label}_2, ...}}).")
        seen.add(label)


def _ensure_importable(methods: Sequence[MethodEntry]) -> None:
    """Import paths may name a module in the current directory (as ``python -m`` would find it): append the
    current directory to ``sys.path`` (last, so it never shadows an installed package)."""
    from ..methods import METHODS

    if any(m.name not in METHODS and "." in m.name for m in methods):
        cwd = os.getcwd()
        if cwd not in sys.path and "" not in sys.path:
            sys.path.append(cwd)


def _check_recipe(r: Dict[str, Any], shift: ShiftEntry) -> Dict[str, Any]:
    from .._checks import check_number

    owner = f"the recipe of shift {shift.label!r}"
    for key in ("encoder", "head"):
        if not isinstance(r.get(key), Mapping) or not isinstance(r[key].get("name"), str):
            raise ValueError(f"The {key!r} of {owner} must be a mapping with a 'name'. Got {r.get(key)!r} instead.")
    check_number("steps", owner, r["steps"], low=1, integer=True)
    check_number("batch_size", owner, r["batch_size"], low=1, integer=True)
    if r.get("eval_every") is not None:
        check_number("eval_every", owner, r["eval_every"], low=1, integer=True)
    OptimSettings.from_dict(r["optim"], owner=f"optim of {owner}")
    return r


def _dry_build(shift: ShiftEntry, recipe: Dict[str, Any]) -> None:
    """Build the shift's data (seed 0) and the recipe's encoder and head once, so that a bad shift parameter or
    network option fails here, naming itself, before any worker starts."""
    from ..data.shifts import make_shift
    from ..nets import build_encoder, build_head, feature_size

    pair = make_shift(shift.name, seed=0, **shift.params)
    enc = dict(recipe["encoder"])
    head = dict(recipe["head"])
    encoder = build_encoder(enc.pop("name"), pair.input_shape, **enc)
    build_head(head.pop("name"), feature_size(encoder, pair.input_shape), pair.n_classes, **head)


def plan_grid(config: Any = None, **overrides) -> GridPlan:
    """Validate a bench config and expand it into cells (shift-major, then method, then seed).

    Every error — an unknown method, option, shift, shift parameter, network option, a shift without a recipe,
    two entries with the same label — is raised here, naming the bad value and what is accepted, before any cell
    trains. See :func:`load_config` for ``config`` and ``overrides``.
    """
    from .._checks import check_choice, check_number
    from ..methods import build_method
    from ..select import SCORES

    c = load_config(config, overrides)
    raw_methods = list(c["methods"]) + ([c["add_method"]] if c["add_method"] else [])
    if not raw_methods:
        raise ValueError("The bench config lists no methods: set `methods` (e.g. methods=[source_only,coral]) or "
                         "`add_method`.")
    if not c["shifts"]:
        raise ValueError("The bench config lists no shifts: set `shifts` (e.g. shifts=[rotated_moons]).")
    if not c["seeds"]:
        raise ValueError("The bench config lists no seeds: set `seeds` (e.g. seeds=[0,1,2]).")
    methods = [_method_entry(e, i) for i, e in enumerate(raw_methods)]
    candidates: List[Any] = []
    if c["sweep"]:  # a selection study: one method entry per combination of the swept values
        from .selection import expand_sweep

        _ensure_importable(methods)
        candidates = expand_sweep(methods, c["sweep"])
        methods = [k.method for k in candidates]
    method_recipes = {k.label: k.recipe for k in candidates if k.recipe}
    shifts = [_shift_entry(e, i) for i, e in enumerate(c["shifts"])]
    _unique((m.label for m in methods), "methods")
    _unique((s.label for s in shifts), "shifts")
    seeds = [check_number("seeds", "the bench config", s, low=0, integer=True) for s in c["seeds"]]
    if len(set(seeds)) != len(seeds):
        raise ValueError(f"The 'seeds' of the bench config must be distinct. Got {seeds} instead.")

    _ensure_importable(methods)
    for m in methods:  # unknown names, import paths and options fail here
        build_method(m.name, **m.options)

    recipes: Dict[str, Dict[str, Any]] = {}
    for s in shifts:
        r = c["recipes"].get(s.label, c["recipes"].get(s.name))
        if r is None:
            raise ValueError(f"No recipe for shift {s.label!r}: add recipes.{s.name} (encoder, head, optim, steps, "
                             f"batch_size) to the bench config. Recipes given for: "
                             f"{', '.join(sorted(c['recipes'])) or '(none)'}.")
        recipes[s.label] = _check_recipe(r, s)
        _dry_build(s, r)
    cell_recipes = {}  # (method, shift) -> recipe: the shift's, or with a sweep candidate's overrides (its lr)
    for m in methods:
        for s in shifts:
            own = method_recipes.get(m.label)
            cell_recipes[(m.label, s.label)] = recipes[s.label] if not own else _check_recipe(
                _override_recipes({s.label: recipes[s.label]}, {s.label: own})[s.label], s)

    for name in c["scores"]:
        check_choice("scores", "the bench config", name, sorted(SCORES))
    labels = [m.label for m in methods]
    roles = {}
    defaults = {"baseline": "source_only", "oracle": "target_oracle",
                "reference": (methods[-1].label if c["add_method"] else
                              "dann" if "dann" in labels else
                              next((x for x in labels if x not in ("source_only", "target_oracle")), labels[0]))}
    for role in ("reference", "baseline", "oracle"):
        if c[role] is None:
            roles[role] = defaults[role]
        else:
            roles[role] = check_choice(role, "the bench config", c[role], labels)
    if c["workers"] is None:
        workers = os.cpu_count() or 1
    else:
        workers = check_number("workers", "the bench config", c["workers"], low=1, integer=True)
    check_number("threads_per_worker", "the bench config", c["threads_per_worker"], low=1, integer=True)
    if c["max_cells"] is not None:
        check_number("max_cells", "the bench config", c["max_cells"], low=0, integer=True)
    from ..run import resolve_device

    resolve_device(c["device"])
    cells = [Cell(m, s, seed, cell_recipes[(m.label, s.label)]) for s in shifts for m in methods for seed in seeds]
    return GridPlan(name=c["name"], methods=methods, shifts=shifts, seeds=seeds, recipes=recipes, cells=cells,
                    out_dir=Path(c["out_dir"]), scores=list(c["scores"]), workers=workers,
                    threads_per_worker=c["threads_per_worker"], device=c["device"], overwrite=c["overwrite"],
                    retry_failed=c["retry_failed"], max_cells=c["max_cells"], verbose=c["verbose"], config=c,
                    method_recipes=method_recipes, candidates=candidates, **roles)


# --------------------------------------------------------------------------------------------------------------
# one cell (runs in a worker process)


def _jsonable(obj: Any) -> Any:
    """A JSON round-trip of ``obj`` (objects by their string form), for exact comparison with a stored spec."""
    return json.loads(json.dumps(obj, sort_keys=True, default=str))


def _read_json(path: Path) -> Optional[Dict[str, Any]]:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return None
    except (OSError, ValueError):
        return None  # a torn or foreign file: treated as absent (our writes are atomic)


def _last_step(cell_dir: Path) -> Optional[int]:
    try:
        lines = (cell_dir / "metrics.jsonl").read_text(encoding="utf-8").splitlines()
        return int(json.loads(lines[-1])["step"]) if lines else None
    except (OSError, ValueError, KeyError, IndexError):
        return None


def run_cell(task: Dict[str, Any]) -> Dict[str, Any]:
    """Train one cell into ``task['dir']`` and return ``{'dir', 'status', 'target_accuracy', 'seconds', 'error'}``.

    Runs in a worker process (or in the caller's, with one worker). Any exception is recorded in the cell's
    ``failure.json`` (``DivergenceError`` as ``diverged``, anything else as ``failed``) and returned, never raised;
    an interruption (SIGINT/SIGTERM) leaves a resumable checkpoint and no failure record.
    """
    for p in reversed(task.get("sys_path", [])):  # a spawned worker finds the user's modules as the parent did
        if p not in sys.path:
            sys.path.insert(0, p)
    import torch

    from ..run import fit
    from ..train import files
    from ..train.loop import DivergenceError, Interrupted

    cell_dir = Path(task["dir"])
    recipe = task["recipe"]
    enc, head = dict(recipe["encoder"]), dict(recipe["head"])
    threads = torch.get_num_threads()
    torch.set_num_threads(task["threads"])
    t0 = time.perf_counter()
    out = {"dir": str(cell_dir), "status": "ok", "target_accuracy": None, "error": None}
    try:
        run = fit(task["shift"]["name"], data_options=task["shift"]["params"], method=task["method"]["name"],
                  encoder=enc.pop("name"), encoder_options=enc, head=head.pop("name"), head_options=head,
                  steps=recipe["steps"], batch_size=recipe["batch_size"], optim=recipe["optim"],
                  eval_every=recipe.get("eval_every"), seed=task["seed"], scores=task["scores"],
                  device=task["device"], run_dir=cell_dir, progress=False, **task["method"]["options"])
        out["target_accuracy"] = run.summary.get("target_accuracy")
    except Interrupted as e:
        out.update(status="interrupted", error=str(e))
    except Exception as e:  # noqa: BLE001 — fault isolation: any error is this cell's result, not the grid's
        status = "diverged" if isinstance(e, DivergenceError) else "failed"
        error = f"{type(e).__name__}: {e}"
        out.update(status=status, error=error)
        files.write_json(cell_dir / FAILURE, {
            "status": status, "error": error, "traceback": traceback.format_exc(),
            "step": _last_step(cell_dir), "wall_seconds": round(time.perf_counter() - t0, 3),
        })
    finally:
        torch.set_num_threads(threads)
    out["seconds"] = time.perf_counter() - t0
    return out


# --------------------------------------------------------------------------------------------------------------
# results


def _cell_state(cell_dir: Path) -> str:
    """``finished``, ``failed`` (or diverged), ``started`` or ``new``."""
    summary = _read_json(cell_dir / "summary.json")
    if summary is not None and summary.get("status") == "finished":
        return "finished"
    if (cell_dir / FAILURE).exists():
        return "failed"
    return "started" if (cell_dir / "checkpoint.pt").exists() else "new"


def _row(cell: Cell, cell_dir: Path) -> Optional[Dict[str, Any]]:
    """The result row of a cell from its folder; ``None`` while the cell has not finished or failed."""
    base = {"method": cell.method.label, "shift": cell.shift.label, "seed": cell.seed}
    summary = _read_json(cell_dir / "summary.json")
    if summary is not None and summary.get("status") == "finished":
        final = summary.get("final") or {}
        row = {**base, "status": "ok", "target_accuracy": summary.get("target_accuracy"),
               "source_val_accuracy": summary.get("source_val_accuracy"), "steps": summary.get("steps"),
               "wall_seconds": summary.get("wall_seconds"), "error": None}
        for k, v in sorted(final.items()):
            if k.startswith("score/"):
                row[k] = None if v is None or (isinstance(v, float) and not math.isfinite(v)) else float(v)
        return row
    failure = _read_json(cell_dir / FAILURE)
    if failure is not None:
        status = failure.get("status") if failure.get("status") in ("failed", "diverged") else "failed"
        return {**base, "status": status, "target_accuracy": None, "source_val_accuracy": None,
                "steps": failure.get("step"), "wall_seconds": failure.get("wall_seconds"),
                "error": str(failure.get("error") or "") or None}
    return None


def _curve(cell_dir: Path) -> List[Tuple[int, float]]:
    try:
        lines = (cell_dir / "metrics.jsonl").read_text(encoding="utf-8").splitlines()
    except OSError:
        return []
    points = []
    for line in lines:
        try:
            rec = json.loads(line)
        except ValueError:
            continue
        if rec.get("target_accuracy") is not None and "step" in rec:
            points.append((int(rec["step"]), float(rec["target_accuracy"])))
    return points


def collect_results(plan: GridPlan) -> Tuple[List[Dict[str, Any]], Dict[tuple, list], List[Cell]]:
    """Read every cell folder of ``plan``: ``(rows, curves, pending cells)``, rows in plan order."""
    rows, curves, pending = [], {}, []
    for cell in plan.cells:
        d = plan.out_dir / cell.relpath
        row = _row(cell, d)
        if row is None:
            pending.append(cell)
            continue
        rows.append(row)
        if row["status"] == "ok":
            pts = _curve(d)
            if pts:
                curves[cell.key] = pts
    return rows, curves, pending


def format_table(rows: Sequence[Mapping[str, Any]], methods: Optional[Sequence[str]] = None,
                 shifts: Optional[Sequence[str]] = None, seeds: Optional[int] = None) -> str:
    """A plain-text table of mean target accuracy (%) ± 95% t-interval half-width, methods × shifts.

    A cell shows ``(k/n ok)`` when only ``k`` of its ``n`` seeds finished, ``–`` when none did.
    """
    from .stats import format_mean_ci, t_interval

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
                iv = t_interval([100.0 * a for a in ok])
                text = format_mean_ci(iv.mean, iv.half_width, fallback_decimals=1)
                if len(ok) < n:
                    text += f" ({len(ok)}/{n} ok)"
            line.append(text)
        body.append(line)
    header = ["target acc. %"] + shifts
    widths = [max(len(x) for x in col) for col in zip(header, *body)]
    fmt = lambda cols: "  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(cols, widths)))
    return "\n".join([fmt(header), fmt(["-" * w for w in widths])] + [fmt(b) for b in body])


@dataclass
class GridResult:
    """What a grid run leaves: the rows of ``results.csv`` and where the files are."""

    plan: GridPlan
    rows: List[Dict[str, Any]]
    out_dir: Path
    results_csv: Optional[Path]
    report: Optional[Path]
    ran: int  # cells trained (or retried) by this call
    reused: int  # cells already finished (or failed, with retry_failed=false) and skipped
    pending: int  # cells not run yet (max_cells reached or interrupted): rerun to finish
    wall_seconds: float
    counts: Dict[str, int] = field(default_factory=dict)  # status -> rows

    @property
    def complete(self) -> bool:
        return self.pending == 0

    def table(self) -> str:
        """:func:`format_table` of the rows, methods in the report's order (baseline, reference, …, oracle)."""
        from .report import _method_order

        p = self.plan
        methods = _method_order([m.label for m in p.methods], p.baseline, p.reference, p.oracle)
        return format_table(self.rows, methods, [s.label for s in p.shifts], seeds=len(p.seeds))


# --------------------------------------------------------------------------------------------------------------
# running


def _prepare(plan: GridPlan) -> Tuple[List[Cell], int]:
    """Check the cell folders against the plan; return the cells to run and how many are reused."""
    to_run, reused, stale = [], 0, []
    for cell in plan.cells:
        d = plan.out_dir / cell.relpath
        if plan.overwrite:
            shutil.rmtree(d, ignore_errors=True)
            to_run.append(cell)
            continue
        state = _cell_state(d)
        stored = _read_json(d / CELL_SPEC)
        if state != "new" or stored is not None:
            if stored != cell.spec(plan.scores):
                stale.append(cell)
                continue
        if state == "finished" or (state == "failed" and not plan.retry_failed):
            reused += 1
        else:
            to_run.append(cell)
    if stale:
        names = ", ".join(c.name() for c in stale[:3]) + (f" and {len(stale) - 3} more" if len(stale) > 3 else "")
        raise ValueError(f"{len(stale)} cell folder(s) under {str(plan.out_dir)!r} were written with other settings "
                         f"than this grid's ({names}; compare their {CELL_SPEC}). Choose another out_dir, or pass "
                         "overwrite=true to retrain the grid.")
    return to_run, reused


def _task(plan: GridPlan, cell: Cell) -> Dict[str, Any]:
    return {"dir": str(plan.out_dir / cell.relpath), "method": cell.method.spec(), "shift": cell.shift.spec(),
            "seed": cell.seed, "recipe": cell.recipe, "scores": plan.scores, "device": plan.device,
            "threads": plan.threads_per_worker, "sys_path": [p or os.getcwd() for p in sys.path]}


def _cost(cell: Cell) -> float:
    """A rough relative cost, to start the longest cells first (shorter tail when workers run out of cells)."""
    conv = 4.0 if "cnn" in str(cell.recipe["encoder"].get("name", "")) else 1.0
    return cell.recipe["steps"] * conv


def _append_recipes(report: Path, plan: GridPlan) -> None:
    from ..train import files

    lines = ["", "## Recipes (shared by every method on a shift)", "",
             f"Seeds {plan.seeds}, the same for every method (seed k draws the same data and initial weights). "
             "Only the alignment module and its own options differ between the methods of a shift.", ""]
    for s in plan.shifts:
        r = plan.recipes[s.label]
        o = r["optim"]
        lines.append(f"- **{s.label}** (shift `{s.name}`, params `{json.dumps(s.params, sort_keys=True)}`): "
                     f"encoder `{json.dumps(r['encoder'], sort_keys=True)}`, head "
                     f"`{json.dumps(r['head'], sort_keys=True)}`, optimiser {o['name']} lr {o['lr']} "
                     f"({o['schedule']} schedule), {r['steps']} steps, batch size {r['batch_size']}.")
    lines += ["", "Methods:", ""]
    for m in plan.methods:
        own = plan.method_recipes.get(m.label)
        lines.append(f"- **{m.label}**: `{m.name}`" + (f" with `{json.dumps(m.options, sort_keys=True)}`"
                                                       if m.options else "")
                     + (f"; recipe overrides `{json.dumps(own, sort_keys=True)}` (a sweep)" if own else ""))
    text = report.read_text(encoding="utf-8").rstrip("\n") + "\n" + "\n".join(lines) + "\n"
    files.write_text(report, text)


def _log(plan: GridPlan, msg: str) -> None:
    if plan.verbose:
        print(msg, flush=True)


def execute(plan: GridPlan) -> GridResult:
    """Run the pending cells of ``plan`` in parallel, then rebuild ``results.csv`` and ``report.md``."""
    from joblib import Parallel, delayed, parallel_config
    from omegaconf import OmegaConf

    from ..train import files

    t0 = time.perf_counter()
    to_run, reused = _prepare(plan)  # refuses stale cell folders before writing anything
    plan.out_dir.mkdir(parents=True, exist_ok=True)
    files.write_text(plan.out_dir / RESOLVED_CONFIG, OmegaConf.to_yaml(OmegaConf.create(_jsonable(plan.config))))
    if plan.max_cells is not None:
        to_run = to_run[:plan.max_cells]
    to_run = sorted(to_run, key=_cost, reverse=True)  # stable: plan order among equal costs
    for cell in to_run:
        d = plan.out_dir / cell.relpath
        (d / FAILURE).unlink(missing_ok=True)  # a retried cell starts without its old failure
        files.write_json(d / CELL_SPEC, cell.spec(plan.scores))

    workers = max(1, min(plan.workers, len(to_run)))
    _log(plan, f"grid {plan.name!r}: {len(plan.methods)} methods × {len(plan.shifts)} shifts × {len(plan.seeds)} "
               f"seeds = {len(plan.cells)} cells; {reused} already done, running {len(to_run)} on {workers} "
               f"worker{'s' if workers > 1 else ''} -> {plan.out_dir}")
    done, interrupted = 0, None
    if to_run:
        tasks = [_task(plan, c) for c in to_run]
        names = {t["dir"]: c.name() for t, c in zip(tasks, to_run)}
        try:
            with parallel_config(backend="loky", inner_max_num_threads=plan.threads_per_worker):
                results = Parallel(n_jobs=workers, return_as="generator_unordered")(
                    delayed(run_cell)(t) for t in tasks)
                for r in results:
                    done += 1
                    acc = "" if r["target_accuracy"] is None else f" target {r['target_accuracy']:.3f}"
                    err = f" — {r['error'].splitlines()[0][:160]}" if r["error"] and r["status"] != "ok" else ""
                    _log(plan, f"[{done:>{len(str(len(tasks)))}}/{len(tasks)}] {names[r['dir']]}: "
                               f"{r['status']}{acc} ({r['seconds']:.1f}s){err}")
                    if r["status"] == "interrupted":  # SIGINT/SIGTERM reached the workers: start no more cells
                        interrupted = r["error"]
                        results.close()  # joblib cancels the queued cells
                        break
        except BaseException as e:  # Ctrl-C, a killed worker: keep what is done, then stop
            print(f"grid stopped after {done} of {len(tasks)} cells ({type(e).__name__}: {e}); writing the results "
                  "of the finished cells. Rerun the same command to resume.", file=sys.stderr, flush=True)
            try:
                _write_outputs(plan)
            except Exception as inner:  # noqa: BLE001 — the original error matters more
                print(f"could not write the partial results: {inner}", file=sys.stderr)
            raise

    rows, pending, csv_path, report = _write_outputs(plan)
    counts: Dict[str, int] = {}
    for r in rows:
        counts[r["status"]] = counts.get(r["status"], 0) + 1
    result = GridResult(plan=plan, rows=rows, out_dir=plan.out_dir, results_csv=csv_path, report=report,
                        ran=done, reused=reused, pending=len(pending), wall_seconds=time.perf_counter() - t0,
                        counts=counts)
    if pending:
        _log(plan, f"{len(pending)} of {len(plan.cells)} cells not run yet: rerun the same command to finish them.")
    if interrupted is not None:
        from ..train.loop import Interrupted

        raise Interrupted(f"grid interrupted with {len(pending)} of {len(plan.cells)} cells unfinished; results of the "
                          f"finished cells are in {plan.out_dir}. Rerun the same command to resume.")
    return result


def _write_outputs(plan: GridPlan):
    """Rebuild ``results.csv`` and ``report.md`` from the cell folders (never appended to)."""
    from .report import write_report, write_results_csv

    rows, curves, pending = collect_results(plan)
    csv_path = report = None
    if rows:
        csv_path = write_results_csv(rows, plan.out_dir / RESULTS_CSV)
    if rows and plan.write_report:
        report = write_report(rows, plan.out_dir, reference=plan.reference, baseline=plan.baseline,
                              oracle=plan.oracle, curves=curves)
        _append_recipes(report, plan)
    return rows, pending, csv_path, report


def run_grid(config: Any = None, **overrides) -> GridResult:
    """Plan and run a grid; returns a :class:`GridResult`.

    ``config``: ``None`` for the shipped default grid, a named grid (``"tiny"``, ``"demo"``), or a composed config /
    mapping. Keyword ``overrides`` set bench keys (``methods=[...]``, ``shifts=[...]``, ``seeds=[0, 1]``,
    ``out_dir=...``, ``workers=2``, ``recipes={"rotated_moons": {"steps": 200}}``, ``max_cells=3``, …).

    Example:
        >>> r = run_grid("tiny", methods=["source_only", "coral"], out_dir="runs/bench/mine")  # doctest: +SKIP
        >>> r.report  # doctest: +SKIP
        PosixPath('runs/bench/mine/report.md')
    """
    return execute(plan_grid(config, **overrides))


def run_grid_from_config(cfg) -> GridResult:
    """The ``adaptkit-bench`` app: run the composed grid, then print the table, the files and the warning.
    A config with a ``sweep`` runs a selection study instead (:func:`adaptkit.bench.selection.run_study`)."""
    from ..run import ADAPTATION_WARNING

    if cfg.get("sweep"):
        from .selection import run_study_from_config

        return run_study_from_config(cfg)
    result = run_grid(cfg)
    print_summary(result)
    print(ADAPTATION_WARNING)
    return result


def print_summary(result: GridResult) -> None:
    """Print the compact table and where the results are."""
    print()
    print(result.table())
    print()
    bad = {k: v for k, v in result.counts.items() if k != "ok"}
    if bad:
        print("not ok: " + ", ".join(f"{v} {k}" for k, v in sorted(bad.items())) + " (errors listed in the report)")
    if result.report is not None:
        print(f"results: {result.results_csv}")
        print(f"report:  {result.report}")
    print(f"wall time {result.wall_seconds:.0f}s ({result.ran} cells run, {result.reused} reused, "
          f"{result.pending} pending)")
