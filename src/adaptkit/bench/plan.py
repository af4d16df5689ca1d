"""The plan of a grid: a bench config validated and expanded into cells, before anything trains.

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

**Roles.** ``baseline`` (default ``source_only``), ``oracle`` (default ``target_oracle``) and ``reference`` (the
method every other is compared with: ``add_method`` if given, else ``dann``, else the first adapting method).

**Sweeps.** A non-empty ``sweep`` (option → list of values) expands every method entry into one candidate per
combination of the values of the options that method has (:func:`expand_sweep`) — ``lr`` (the recipe optimiser's
learning rate, which every method has) and any method option such as ``weight`` — labelled
``<label>__<option><value>__…`` (``dann__weight0.3__lr0.001``). A swept learning rate is the one place where a
method's cells leave the shift's shared recipe; the report's recipes section lists it. Candidates are ordinary
cells, judged by the selection study (``adaptkit-study``, :mod:`adaptkit.bench.study`).

Example:
    >>> plan = plan_grid("tiny", workers=1)  # doctest: +SKIP
    >>> plan.cells[0].name()  # doctest: +SKIP
    'rotated_moons/source_only/seed0'
"""
from __future__ import annotations

import itertools
import math
import numbers
import os
import re
import sys
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, Dict, Iterable, List, Mapping, Optional, Sequence, Tuple

from .._checks import check_choice, check_known, check_number
from ..config import typed_component
from ..plain import to_plain
from .config import RECIPE_SETTINGS, load_config, override_recipes

__all__ = ["CELLS", "LR", "MethodEntry", "ShiftEntry", "Cell", "Candidate", "GridPlan", "expand_sweep",
           "value_text", "plan_grid", "check_registered_in_workers"]

CELLS = "cells"  # sub-folder of out_dir holding one run folder per cell
LR = "lr"  # the sweep key for the recipe optimiser's learning rate (every method has one)

_LABEL = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")
_VALUE_TEXT = re.compile(r"^[A-Za-z0-9._-]+$")  # a swept value as it appears in a folder-safe label
_METHOD_KEYS = ("name", "label", "options")
_SHIFT_KEYS = ("name", "label", "params")


# --------------------------------------------------------------------------------------------------------------
# entries and cells

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
        return to_plain({"method": self.method.spec(), "shift": self.shift.spec(), "seed": self.seed,
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
    candidates: List[Candidate] = field(default_factory=list)  # a sweep's candidates (empty without a sweep)


# --------------------------------------------------------------------------------------------------------------
# the sweep's candidates

@dataclass(frozen=True)
class Candidate:
    """One point of a sweep: a grid method entry and the swept values that made it."""

    method: MethodEntry  # the grid entry (label, name, options with the swept method options)
    base: str  # the label of the unswept entry: candidates with the same base and seed form a group
    settings: Tuple[Tuple[str, Any], ...]  # (option, value) in sweep order; ``lr`` is the recipe's learning rate
    recipe: Dict[str, Any] = field(default_factory=dict)  # overrides of the shift's recipe (``{optim: {lr: v}}``)

    @property
    def label(self) -> str:
        return self.method.label

    def display(self) -> str:
        """``dann[weight=0.3, lr=0.001]`` (the base label alone when nothing was swept)."""
        if not self.settings:
            return self.base
        return f"{self.base}[{', '.join(f'{k}={value_text(v)}' for k, v in self.settings)}]"


def value_text(v: Any) -> str:
    """A swept value as written in labels and tables: ``0.3``, ``true``, ``adam``."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v)  # exact: two distinct floats never share a label
    return str(v)


def _check_values(key: Any, values: Any) -> List[Any]:
    owner = "the bench config's sweep"
    if not isinstance(key, str) or not key:
        raise ValueError(f"The keys of {owner} must be option names (or {LR!r}). Got {key!r} instead.")
    if isinstance(values, (str, bytes)) or not isinstance(values, Sequence) or not values:
        raise ValueError(f"The {key!r} entry of {owner} must be a non-empty list of values, e.g. {key}: [0.3, 1.0]. "
                         f"Got {values!r} instead.")
    out = []
    for v in values:
        if not isinstance(v, (numbers.Real, str)) or (isinstance(v, numbers.Real) and not isinstance(v, bool)
                                                      and not math.isfinite(float(v))):
            raise ValueError(f"The {key!r} entry of {owner} must list finite numbers, strings or booleans. "
                             f"Got {v!r} in {list(values)!r}.")
        if isinstance(v, str) and not _VALUE_TEXT.match(v):
            raise ValueError(f"The {key!r} entry of {owner} lists {v!r}; a swept string must be folder-safe "
                             "(letters, digits, '.', '_', '-'), since it becomes part of a cell's folder name.")
        if key == LR and (isinstance(v, (bool, str)) or v <= 0):
            raise ValueError(f"The {LR!r} entry of {owner} must list learning rates in (0, inf). Got {v!r} in "
                             f"{list(values)!r}.")
        out.append(v)
    texts = [value_text(v) for v in out]
    if len(set(texts)) != len(texts) or any(a == b for a, b in itertools.combinations(out, 2)):  # 1 == 1.0 too
        raise ValueError(f"The {key!r} entry of {owner} must list distinct values. Got {list(values)!r}.")
    return out


def expand_sweep(methods: Sequence[MethodEntry], sweep: Mapping[str, Sequence[Any]]) -> List[Candidate]:
    """One :class:`Candidate` per method entry and combination of the swept values of the options it has.

    ``sweep`` maps ``lr`` (the recipe optimiser's learning rate) or a method option (``weight``, ``adapt_lr`` …) to a
    list of values. A method gets the product of the values of the keys it accepts, in the sweep's key order; a
    method with none of them stays one candidate under its own label. A key that is no method's option (a typo), a
    key also set in an entry's ``options``, an empty or repeated value list, or a non-positive learning rate raise
    ``ValueError`` naming the value and what is accepted. Method option values are validated by the method itself.

    Example:
        >>> ks = expand_sweep([MethodEntry("coral", "coral", {})], {"weight": [0.3, 1.0], "lr": [0.001]})
        >>> [k.label for k in ks]
        ['coral__weight0.3__lr0.001', 'coral__weight1.0__lr0.001']
        >>> ks[0].display(), ks[0].method.options, ks[0].recipe
        ('coral[weight=0.3, lr=0.001]', {'weight': 0.3}, {'optim': {'lr': 0.001}})
    """
    from ..methods import METHODS, build_method

    if not isinstance(sweep, Mapping):
        raise ValueError(f"The bench config's sweep must be a mapping option -> list of values, e.g. "
                         f"{{weight: [0.3, 1.0], lr: [0.001]}}. Got {sweep!r} instead.")
    values = {k: _check_values(k, v) for k, v in sweep.items()}
    accepted: Dict[str, List[str]] = {}
    for m in methods:
        if not isinstance(m, MethodEntry):
            raise TypeError(f"expand_sweep expects the grid's MethodEntry objects. Got {m!r} instead.")
        accepted[m.label] = [f.name for f in fields(build_method(m.name, **m.options).options)]
        if LR in accepted[m.label] and LR in values:
            raise ValueError(f"The sweep key {LR!r} means the recipe's learning rate, but method {m.label!r} also "
                             f"has an option {LR!r}: the sweep would be ambiguous. Sweep that method separately.")
    known = {f.name for n in METHODS.names() for f in fields(METHODS.get(n).Options)}
    for key in values:  # a registered method's option no method of this grid has is fine (it applies to none)
        if key != LR and key not in known and not any(key in a for a in accepted.values()):
            have = "; ".join(f"{label}: {', '.join(a) or '(none)'}" for label, a in accepted.items())
            raise ValueError(f"The sweep key {key!r} is neither {LR!r} (the recipe's learning rate) nor an option of "
                             f"a method. Options of the grid's methods — {have}.")

    out: List[Candidate] = []
    for m in methods:
        keys = [k for k in values if k == LR or k in accepted[m.label]]
        clash = sorted(set(keys) & set(m.options))
        if clash:
            raise ValueError(f"Method {m.label!r} sets {', '.join(map(repr, clash))} in its options and the sweep "
                             "varies it too; remove it from one of the two.")
        if not keys:
            out.append(Candidate(m, m.label, ()))
            continue
        for combo in itertools.product(*(values[k] for k in keys)):
            settings = tuple(zip(keys, combo))
            options = {**m.options, **{k: v for k, v in settings if k != LR}}
            recipe = {"optim": {"lr": float(dict(settings)[LR])}} if LR in keys else {}
            label = m.label + "".join(f"__{k}{value_text(v)}" for k, v in settings)
            out.append(Candidate(MethodEntry(m.name, label, options), m.label, settings, recipe))
    return out


# --------------------------------------------------------------------------------------------------------------
# validation and expansion


def _check_label(label: Any, what: str) -> str:
    if not isinstance(label, str) or not _LABEL.match(label) or ".." in label:
        raise ValueError(f"The label of {what} must be a non-empty folder-safe name (letters, digits, '.', '_', "
                         f"'-'; starting with a letter or digit). Got {label!r} instead; set one with 'label'.")
    return label


def _split_entry(entry: Any, what: str, keys: Tuple[str, ...], accepted: str, values: str, note: str = ""):
    """``(name, label, mapping)`` of an entry given as a name or as a mapping ``{name, label, <keys[2]>}``."""
    if isinstance(entry, str):
        return entry, None, {}
    if not isinstance(entry, Mapping):
        raise TypeError(f"{what} must be {accepted}. Got {entry!r} instead.")
    check_known(entry, keys, noun="key", where=f"in {what}", note=note)
    inner = entry.get(keys[2]) or {}
    if not isinstance(inner, Mapping):
        raise TypeError(f"The {keys[2]!r} of {what} must be a mapping of {values}. Got {inner!r} instead.")
    return entry.get("name"), entry.get("label"), inner


def _method_entry(entry: Any, i: int) -> MethodEntry:
    what = f"methods[{i}]"
    name, label, options = _split_entry(entry, what, _METHOD_KEYS, "a method name, an import path "
                                        "'package.module.attr' or a mapping {name, label, options}", "method options")
    if not isinstance(name, str) or not name:
        raise ValueError(f"{what} needs a 'name': a registered method or an import path. Got {name!r} instead.")
    label = name.rpartition(".")[2] if label is None else label
    return MethodEntry(name, _check_label(label, f"method {name!r} ({what})"), dict(options))


def _shift_entry(entry: Any, i: int) -> ShiftEntry:
    what = f"shifts[{i}]"
    name, label, params = _split_entry(entry, what, _SHIFT_KEYS, "a bundled shift name or a mapping "
                                       "{name, label, params}", "shift parameters",
                                       note=" (shift parameters go under 'params')")
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


def check_registered_in_workers(methods: Sequence[MethodEntry], shifts: Sequence[ShiftEntry],
                                 imports: Sequence[str]) -> None:
    """Refuse a shift or method registered by a module of the user's that ``imports`` does not name: the grid's
    worker processes would not register it, and every cell would fail there ("Unknown shift …"). Called by the grid
    before its cells start in more than one worker process."""
    from ..data.shifts import SHIFTS
    from ..methods import METHODS

    named = [("shift", s.name, SHIFTS) for s in shifts] + [("method", m.name, METHODS) for m in methods
                                                            if m.name in METHODS]
    for kind, name, registry in named:
        module = getattr(registry.get(name), "__module__", None) or ""
        if module.split(".")[0] == "adaptkit" or any(module == i or module.startswith(i + ".") for i in imports):
            continue
        if module == "__main__":
            raise ValueError(f"The {kind} {name!r} is registered in the script or notebook that runs the grid; the "
                             "grid's worker processes cannot import it. Move it to a module and name that module "
                             "in the bench config's imports (imports=[mymodule]), or set workers=1.")
        raise ValueError(f"The {kind} {name!r} is registered by module {module!r}, which the bench config's imports "
                         f"do not name; the grid's worker processes would not know it. Add imports=[{module}] "
                         f"(imports now: {list(imports) or '(none)'}), or set workers=1.")


def shift_recipe(recipes: Mapping[str, Any], shift: ShiftEntry) -> Optional[Dict[str, Any]]:
    """The recipe a shift trains with: ``recipes[<its name>]`` updated by ``recipes[<its label>]`` (a labelled
    variant of a shift inherits the shift's recipe and changes what it sets), or ``None`` when neither exists."""
    by_name, by_label = recipes.get(shift.name), recipes.get(shift.label) if shift.label != shift.name else None
    if by_name is None and by_label is None:
        return None
    if by_label is None:
        return dict(by_name)
    return override_recipes({"r": dict(by_name or {})}, {"r": by_label})["r"]


def full_recipe(r: Mapping[str, Any], shift: ShiftEntry, own: Optional[Mapping[str, Any]] = None) -> Dict[str, Any]:
    """The recipe ``r`` (a shift's share of the run settings), with a sweep candidate's overrides ``own``, checked
    and completed with :class:`~adaptkit.config.RunConfig`'s defaults: every setting the grid's cells of this shift
    share, as plain values. Cells skip the post-training diagnostics unless the recipe asks for them (ours: the
    report draws its own charts, and a cell's plots cost about a second)."""
    from dataclasses import asdict

    from ..config import resolve, run_config

    owner = f"the recipe of shift {shift.label!r}"
    if not isinstance(r, Mapping):
        raise TypeError(f"{owner} must be a mapping of run settings. Got {r!r} instead.")
    r = override_recipes({"r": dict(r)}, {"r": dict(own)})["r"] if own else dict(r)
    check_known(r, RECIPE_SETTINGS, noun="setting", where=f"in {owner}",
                note=" (method, data and seed are set by the grid for each cell)")
    _check_optimiser_uses(r.get("optim"), owner)
    r.setdefault("diagnostics", False)
    try:
        c = resolve(run_config(r, data={"name": shift.name, **shift.params}), owner=owner)
    except (ValueError, TypeError) as e:
        raise e if owner in str(e) else type(e)(f"{owner}: {e}") from None
    return {k: asdict(c.optim) if k == "optim" else getattr(c, k) for k in RECIPE_SETTINGS}


#: optimiser settings each optimiser would silently ignore (:class:`~adaptkit.train.optim.OptimSettings`)
IGNORED_BY = {"adam": ("momentum",), "sgd": ("betas",)}


def _check_optimiser_uses(optim: Any, owner: str) -> None:
    """Refuse an optimiser setting the recipe's optimiser ignores (``momentum`` with ``adam``, ``betas`` with
    ``sgd``) when it differs from the default: the cells would train without it, and nothing would say so."""
    from dataclasses import asdict

    from ..train.optim import OptimSettings

    if not isinstance(optim, Mapping):
        return
    defaults = asdict(OptimSettings())
    name = optim.get("name", defaults["name"])
    for key in IGNORED_BY.get(name, ()):
        value = list(optim[key]) if isinstance(optim.get(key), (list, tuple)) else optim.get(key)
        if key in optim and value != defaults[key]:
            raise ValueError(f"{owner} sets optim.{key}={value!r}, which the {name!r} optimiser ignores (the cells "
                             f"would train without it). Remove it, or set optim.name to the optimiser it belongs to.")


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


def _roles(c: Mapping[str, Any], labels: List[str]) -> Dict[str, str]:
    """The labels of the reference, baseline and oracle: as set (one of the grid's labels), else the defaults."""
    defaults = {"baseline": "source_only", "oracle": "target_oracle",
                "reference": (labels[-1] if c["add_method"] else
                              "dann" if "dann" in labels else
                              next((x for x in labels if x not in ("source_only", "target_oracle")), labels[0]))}
    return {role: defaults[role] if c[role] is None else check_choice(role, "the bench config", c[role], labels)
            for role in ("reference", "baseline", "oracle")}


def plan_grid(config: Any = None, **overrides) -> GridPlan:
    """Validate a bench config and expand it into cells (shift-major, then method, then seed).

    Every error — an unknown method, option, shift, shift parameter, network option, a shift without a recipe,
    two entries with the same label — is raised here, naming the bad value and what is accepted, before any cell
    trains. See :func:`load_config` for ``config`` and ``overrides``.
    """
    from ..methods import build_method
    from ..select import SCORES

    c = load_config(config, overrides)
    from ..config import import_modules

    import_modules(c["imports"], owner="the bench config")  # first: they register the shifts and methods named
    raw_methods = list(c["methods"]) + ([c["add_method"]] if c["add_method"] else [])
    if not raw_methods:
        raise ValueError("The bench config lists no methods: set `methods` (e.g. methods=[source_only,coral]) or "
                         "`add_method`.")
    if not c["shifts"]:
        raise ValueError("The bench config lists no shifts: set `shifts` (e.g. shifts=[rotated_moons]).")
    if not c["seeds"]:
        raise ValueError("The bench config lists no seeds: set `seeds` (e.g. seeds=[0,1,2]).")
    methods = [_method_entry(e, i) for i, e in enumerate(raw_methods)]
    candidates: List[Candidate] = []
    if c["sweep"]:  # a selection study: one method entry per combination of the swept values
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
    for m in methods:  # unknown names, import paths, options and their types and values fail here
        typed = typed_component("method", {"name": m.name, **m.options}, owner=f"method {m.name!r}")
        build_method(typed.pop("name"), **typed)

    from ..data.shifts import SHIFTS

    names = {x for sh in shifts for x in (sh.name, sh.label)}
    unmatched = sorted(set(c["recipes"]) - names - set(SHIFTS.names()))  # a bundled shift's recipe may go unused
    if unmatched:
        raise ValueError(f"The recipe(s) {', '.join(map(repr, unmatched))} match no shift of the grid and no "
                         f"registered shift; a recipe is keyed by a shift's name or label: "
                         f"{', '.join(sorted(names))}.")
    for s in shifts:  # unknown shift parameters, their types and values fail here, naming the shift
        typed_component("data", {"name": s.name, **s.params})
    recipes: Dict[str, Dict[str, Any]] = {}
    for s in shifts:
        r = shift_recipe(c["recipes"], s)
        if r is None:
            raise ValueError(f"No recipe for shift {s.label!r}: add recipes.{s.name} (encoder, head, optim, steps, "
                             f"batch_size) to the bench config. Recipes given for: "
                             f"{', '.join(sorted(c['recipes'])) or '(none)'}.")
        recipes[s.label] = full_recipe(r, s)
        _dry_build(s, recipes[s.label])
    cell_recipes = {}  # (method, shift) -> recipe: the shift's, or with a sweep candidate's overrides (its lr)
    for m in methods:
        for s in shifts:
            own = method_recipes.get(m.label)
            cell_recipes[(m.label, s.label)] = recipes[s.label] if not own else full_recipe(
                shift_recipe(c["recipes"], s), s, own)

    for name in c["scores"]:
        check_choice("scores", "the bench config", name, sorted(SCORES))
    roles = _roles(c, [m.label for m in methods])
    if c["workers"] is None:
        workers = os.cpu_count() or 1
    else:
        workers = check_number("workers", "the bench config", c["workers"], low=1, integer=True)
    check_number("threads_per_worker", "the bench config", c["threads_per_worker"], low=1, integer=True)
    check_choice("launch", "the bench config", c.get("launch", "workers"), ["workers", "export"])
    if c["max_cells"] is not None:
        check_number("max_cells", "the bench config", c["max_cells"], low=0, integer=True)
    from ..config import resolve_device

    resolve_device(c["device"])
    cells = [Cell(m, s, seed, cell_recipes[(m.label, s.label)]) for s in shifts for m in methods for seed in seeds]
    return GridPlan(name=c["name"], methods=methods, shifts=shifts, seeds=seeds, recipes=recipes, cells=cells,
                    out_dir=Path(c["out_dir"]), scores=list(c["scores"]), workers=workers,
                    threads_per_worker=c["threads_per_worker"], device=c["device"], overwrite=c["overwrite"],
                    retry_failed=c["retry_failed"], max_cells=c["max_cells"], verbose=c["verbose"], config=c,
                    method_recipes=method_recipes, candidates=candidates, **roles)
