"""The typed schema of a training run — the one definition of every run setting — and hydra's view of it.

:class:`RunConfig` lists every setting of a run once, with its default and a one-line comment. Every face builds
one: :func:`adaptkit.fit` from keyword arguments, ``adaptkit-train`` by hydra composition, the benchmark worker
from a recipe, :class:`adaptkit.AlignedClassifier` from its parameters; ``config.yaml`` in a run folder is it.
:func:`adaptkit.train` runs one (or a composed config: ``adaptkit.train(compose(["method=mmd"]))``).

The component settings — ``method``, ``encoder``, ``head``, ``data`` — are a registered name, or a mapping with a
``name`` and that component's options. Their schema is the component's own: a method's or a network's
``Options`` dataclass, a shift's keyword parameters. :func:`register_configs` stores one structured config per
registered component in hydra's config store under its registry name, so ``method=mmd method.n_kernels=3`` is
type-checked at composition, and :func:`typed_component` applies the same schema to a mapping from Python. A new
option is one line in the component's ``Options``; nothing else lists it.

The hydra primary config ``train`` is generated from :class:`RunConfig` (its defaults list names each component
group's default); ``configs/`` holds presets only (``optim/``, the benchmark grids).

Hydra's ``_target_`` can import arbitrary code; adaptkit never uses it and builds every component through its
registries. A method given by import path (``method.name=package.module.Name``) does import that module: treat
configs from strangers as code.
"""
from __future__ import annotations

import dataclasses
import functools
import inspect
import re
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Mapping, Optional, Tuple

from ._checks import check_choice, check_known, check_number
from .train.optim import OptimSettings
from .train.precision import check_precision

CONFIG_DIR = Path(__file__).parent / "configs"
GROUPS = ("method", "encoder", "head", "data")  # component settings of a run, each a name or {name, options}
AUTO = "auto"  # the value of a method's weight that asks adaptkit to choose it without target labels
AUTO_OPTIONS = ("weight",)  # method options that accept AUTO besides a number (their schema type is Any)


@dataclass
class RunConfig:
    """Every setting of one training run (see the module docstring). ``RunConfig(method="mmd", steps=500)``."""

    method: Any = "source_only"  # alignment method: a registered name, an import path, or {name: ..., options}
    encoder: Any = "mlp"  # encoder: a registered name or {name: ..., options}
    head: Any = None  # task head: a registered name or {name: ..., options} (default: the method's own, see Alignment.preferred_head)
    data: Any = "rotated_moons"  # bundled shift: a registered name or {name: ..., parameters}
    optim: OptimSettings = field(default_factory=OptimSettings)  # optimiser settings shared by every update
    steps: int = 1000  # training steps over all stages
    batch_size: int = 64  # samples per domain per step
    seed: int = 0  # seeds weights, batches, dropout and the toy data's draw
    eval_every: Optional[int] = None  # evaluation period in steps (default: steps // 10)
    checkpoint_every: int = 0  # also checkpoint every N steps (0: only at the end)
    scores: List[str] = field(default_factory=list)  # label-free selection scores to record (adaptkit.select)
    select: Optional[str] = None  # keep the evaluated state this metric ranks best, e.g. score/dev (default: last)
    objective: Optional[str] = None  # a label-free score the CLI returns to a hydra sweeper (greater = better); a hint, not an accuracy
    on_nonfinite: str = "stop"  # stop | skip: what a NaN/inf loss or gradient does
    check_gradients: bool = True  # check gradients for NaN/inf before every step (false: losses only; faster)
    target_terms: Dict[str, float] = field(default_factory=dict)  # terms on the target predictions added to any method: {entropy: w, info_max: w} (adaptkit.methods.base.TARGET_TERMS)
    target_terms_schedule: str = "constant"  # weight schedule of those terms: constant | dann_ramp (train/schedules.py)
    class_weights: Any = "none"  # none | estimated (label shift, from a source-trained model) | reestimated (also updated from the model at every evaluation) | per-class target/source ratios
    guard: bool = False  # also train source-only; keep the adaptation only where label-free evidence favours it
    choose_by: str = "rank_agreement"  # the rule method.weight=auto chooses its candidate by (adaptkit.trust.rules)
    weight_candidates: List[float] = field(default_factory=lambda: [0.3, 3.0, 30.0])  # multiples of the method's default weight that weight=auto tries (ours: chosen on tuning seeds among the sets in benchmarks/RESULTS.md "Designing the guard")
    diagnostics: Optional[bool] = None  # measure the shift in inputs vs features after training (default: with a run_dir)
    device: str = "auto"  # auto | cpu | cuda | cuda:N
    precision: str = "float32"  # float32 | bf16: bf16 autocast of the training forward passes, CUDA only (train/precision.py)
    progress: Optional[bool] = None  # progress bar (default: only on a terminal)
    loader_workers: int = 0  # DataLoader worker processes reading a DatasetPair (0: read in this process); results do not depend on it
    run_dir: Optional[str] = None  # run folder for config, metrics, checkpoints, summary (CLI default: hydra's)
    overwrite: bool = False  # replace a finished run in run_dir
    track: List[str] = field(default_factory=list)  # also log metrics, config and pictures to: tensorboard, mlflow (optional extras; adaptkit.train.trackers)
    track_uri: Optional[str] = None  # MLflow tracking URI, e.g. sqlite:///runs/mlflow.db (default: a file store <run_dir>/mlruns)
    imports: List[str] = field(default_factory=list)  # your modules imported first, in every process (they register shifts, methods, encoders), e.g. [mypkg.shifts]


#: Settings that decide where and how a run is kept, not its numbers: left out of the config hash, so a run can
#: be resumed with another device, progress bar or checkpoint period.
#: ``imports`` only makes names available (the components the run uses are recorded by name and options).
#: ``track``/``track_uri`` only copy what a run logs to TensorBoard or MLflow.
#: ``loader_workers`` only changes which process reads a DatasetPair's samples (tests/data/test_streaming.py).
MANAGEMENT = ("run_dir", "overwrite", "progress", "device", "checkpoint_every", "diagnostics", "imports", "track",
              "track_uri", "loader_workers")
SETTINGS = tuple(f.name for f in dataclasses.fields(RunConfig))


@functools.lru_cache(maxsize=1)
def setting_docs() -> Dict[str, str]:
    """``{setting: its one-line comment}``, read from :class:`RunConfig`'s source (for help texts)."""
    try:
        source = inspect.getsource(RunConfig)
    except (OSError, TypeError):  # no source shipped: help texts go without comments
        return {}
    return {m.group(1): m.group(2).strip() for m in re.finditer(r"^\s+(\w+): [^#\n]*#(.*)$", source, re.M)}


# ----------------------------------------------------------------------------------------------------------------
# component schemas


_MODULE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)*$")


def import_modules(modules: Any, owner: str = "the run settings") -> List[str]:
    """Import each module ``modules`` names (the ``imports`` setting), so that the shifts, methods and networks it
    registers are known before any component is resolved; returns the names. A module in the current directory is
    found too (the directory is appended to ``sys.path``, last, as :func:`adaptkit.registry.import_object` does).
    Importing runs the module's code: a config naming one deserves the same care as code.

    Example:
        >>> import_modules(["json"])
        ['json']
    """
    import importlib
    import os
    import sys

    if isinstance(modules, (str, bytes)) or not hasattr(modules, "__iter__"):
        raise TypeError(f"The 'imports' setting of {owner} must be a list of module names, e.g. [mypkg.shifts]. "
                        f"Got {modules!r} instead.")
    names = list(modules)
    for name in names:
        if not isinstance(name, str) or not _MODULE.match(name):
            raise ValueError(f"The 'imports' setting of {owner} lists {name!r}, which is not a module name "
                             "(dotted Python names, e.g. mypkg.shifts).")
    cwd = os.getcwd()
    if names and cwd not in sys.path and "" not in sys.path:
        sys.path.append(cwd)
    for name in names:
        try:
            importlib.import_module(name)
        except ImportError as e:
            raise ImportError(f"The 'imports' setting of {owner} names module {name!r}, which cannot be imported "
                              f"({type(e).__name__}: {e}).") from None
    return names


def _registry(group: str):
    check_choice("group", "the run schema", group, GROUPS)
    if group == "method":
        from .methods import METHODS

        return METHODS
    if group in ("encoder", "head"):
        from .nets import ENCODERS, HEADS

        return ENCODERS if group == "encoder" else HEADS
    from .data.shifts import SHIFTS

    return SHIFTS


def _option_fields(group: str, name: str) -> List[Tuple[str, Any, Any]]:
    """``(option, type, dataclasses.field)`` of component ``name`` of ``group``: its ``Options`` dataclass (methods,
    encoders, heads) or its keyword parameters (shifts; ``seed`` defaults to the run's seed)."""
    obj = _registry(group).get(name)
    if group == "data":
        hints = typing.get_type_hints(obj)
        out = []
        for p in inspect.signature(obj).parameters.values():
            if p.name == "seed":  # the data draw follows the run's seed unless set
                out.append(("seed", Optional[int], field(default=None)))
            elif p.default is not inspect.Parameter.empty:
                out.append((p.name, hints.get(p.name, Any), field(default=p.default)))
        return out
    options = getattr(obj, "Options", None)
    if options is None:
        return []
    hints = typing.get_type_hints(options)
    if group == "method":  # a number or "auto": checked by typed_component, not by OmegaConf
        hints.update({k: Any for k in AUTO_OPTIONS if k in hints})
    return [(f.name, hints.get(f.name, Any),
             field(default=f.default) if f.default is not dataclasses.MISSING else
             field(default_factory=f.default_factory)) for f in dataclasses.fields(options)]


@functools.lru_cache(maxsize=None)
def _schema_cached(group: str, name: str, obj_id: int) -> type:
    fields = [("name", str, field(default=name))] + _option_fields(group, name)
    return dataclasses.make_dataclass(f"{group}_{name}", fields)


def component_schema(group: str, name: str) -> type:
    """The structured config of component ``name`` in ``group``: ``name`` plus its options, with their types and
    defaults (a dataclass built once from the component's own ``Options``)."""
    return _schema_cached(group, name, id(_registry(group).get(name)))


def _plain_value(v: Any) -> bool:
    if v is None or isinstance(v, (bool, int, float, str)):
        return True
    if isinstance(v, (list, tuple)):
        return all(_plain_value(x) for x in v)
    if isinstance(v, Mapping):
        return all(isinstance(k, str) and _plain_value(x) for k, x in v.items())
    return False


def typed_component(group: str, value: Any, owner: Optional[str] = None) -> Dict[str, Any]:
    """``{"name": ..., **options}`` for a component setting given as a name or a mapping, with every option
    checked against the component's schema exactly as hydra checks it at composition (unknown options refused
    with the accepted list, values converted to the declared type or refused naming the option).

    A method named by import path (``package.module.Name``) has no registered schema: its options are checked
    when it is built. Options holding objects (a loss function) are kept as they are.

    Example:
        >>> typed_component("method", {"name": "mmd", "n_kernels": "3"})["n_kernels"]
        3
    """
    from omegaconf import OmegaConf
    from omegaconf.errors import OmegaConfBaseException

    if isinstance(value, str):
        value = {"name": value}
    if not isinstance(value, Mapping) or not isinstance(value.get("name"), str):
        raise TypeError(f"The {group!r} setting must be a registered name or a mapping with a 'name' and the "
                        f"{group}'s options. Got {value!r} instead.")
    value = dict(value)
    name = value["name"]
    registry = _registry(group)
    if name not in registry:
        if group == "method" and "." in name:  # an import path: its Options are checked when it is built
            return value
        registry.get(name)  # the registry's error lists the registered names
    schema = component_schema(group, name)
    accepted = [f.name for f in dataclasses.fields(schema) if f.name != "name"]
    owner = owner or f"{'shift' if group == 'data' else group} {name!r}"
    check_known([k for k in value if k != "name"], accepted, noun="option" if group != "data" else "parameter",
                where=f"for {owner}")
    objects = {k: v for k, v in value.items() if not _plain_value(v)}
    plain = {k: (list(v) if isinstance(v, tuple) else v) for k, v in value.items() if k not in objects}
    try:
        typed = OmegaConf.to_container(OmegaConf.merge(OmegaConf.structured(schema), plain))
    except OmegaConfBaseException as e:
        key = str(getattr(e, "key", None) or getattr(e, "full_key", "") or "?")
        hint = typing.get_type_hints(schema).get(key)
        kind = getattr(hint, "__name__", None) or str(hint).replace("typing.", "")
        raise TypeError(f"The {key!r} {'option' if group != 'data' else 'parameter'} of {owner} must be {kind}. "
                        f"Got {value.get(key)!r} instead.") from None
    typed.update(objects)
    if group == "method":
        for k in AUTO_OPTIONS:
            v = typed.get(k)
            if k in typed and v != AUTO and (isinstance(v, bool) or not isinstance(v, (int, float))):
                raise TypeError(f"The {k!r} option of {owner} must be a number or {AUTO!r}. Got {v!r} instead.")
            if isinstance(v, int) and not isinstance(v, bool):
                typed[k] = float(v)
    return typed


def _check_run_numbers(c: RunConfig, owner: str) -> None:
    check_number("steps", owner, c.steps, low=1, integer=True)
    check_number("batch_size", owner, c.batch_size, low=1, integer=True)
    check_number("seed", owner, c.seed, low=0, integer=True)
    check_number("checkpoint_every", owner, c.checkpoint_every, low=0, integer=True)
    check_number("loader_workers", owner, c.loader_workers, low=0, integer=True)
    if c.eval_every is not None:
        check_number("eval_every", owner, c.eval_every, low=1, integer=True)
    check_choice("on_nonfinite", owner, c.on_nonfinite, ["skip", "stop"])
    check_precision(c.precision, owner)
    for name in ("check_gradients", "overwrite"):
        if not isinstance(getattr(c, name), bool):
            raise TypeError(f"The {name!r} parameter of {owner} must be true or false. Got {getattr(c, name)!r} "
                            "instead.")
    for name in ("diagnostics", "progress"):
        if getattr(c, name) is not None and not isinstance(getattr(c, name), bool):
            raise TypeError(f"The {name!r} parameter of {owner} must be true, false or null. Got "
                            f"{getattr(c, name)!r} instead.")
    if isinstance(c.scores, str) or not all(isinstance(s, str) for s in c.scores):
        raise TypeError(f"The 'scores' parameter of {owner} must be a list of score names. Got {c.scores!r} instead.")
    if c.objective is not None:
        from .select import SCORES

        name = c.objective[len("score/"):] if str(c.objective).startswith("score/") else c.objective
        check_choice("objective", owner, name, sorted(SCORES))
    if not isinstance(c.guard, bool):
        raise TypeError(f"The 'guard' parameter of {owner} must be true or false. Got {c.guard!r} instead.")
    from .trust.rules import rule_names

    check_choice("choose_by", owner, c.choose_by, rule_names())
    cands = c.weight_candidates
    if isinstance(cands, (str, bytes)) or not hasattr(cands, "__iter__") or not list(cands):
        raise TypeError(f"The 'weight_candidates' parameter of {owner} must be a non-empty list of positive "
                        f"multiples. Got {cands!r} instead.")
    for v in cands:
        check_number("weight_candidates", owner, v, low=0, low_open=True)
    _check_target_terms(c, owner)
    from .train.trackers import check_tracking

    c.track = check_tracking(c.track, c.track_uri, c.run_dir, owner)
    cw = c.class_weights
    if isinstance(cw, str):
        check_choice("class_weights", owner, cw, ["estimated", "reestimated", "none"])
    elif not hasattr(cw, "__iter__") or not all(isinstance(v, (int, float)) and not isinstance(v, bool) and v >= 0
                                                 for v in cw):
        raise TypeError(f"The 'class_weights' parameter of {owner} must be 'none', 'estimated', 'reestimated' or a list of "
                        f"non-negative per-class ratios. Got {cw!r} instead.")


def _check_target_terms(c: RunConfig, owner: str) -> None:
    from .methods.base import TARGET_TERMS
    from .train.schedules import WEIGHT_SCHEDULES

    if not isinstance(c.target_terms, Mapping):
        raise TypeError(f"The 'target_terms' parameter of {owner} must be a mapping {{term: weight}} with terms among "
                        f"{sorted(TARGET_TERMS)}. Got {c.target_terms!r} instead.")
    for name, w in c.target_terms.items():
        check_choice("target_terms", owner, name, sorted(TARGET_TERMS))
        check_number(f"target_terms.{name}", owner, w, low=0)
    check_choice("target_terms_schedule", owner, c.target_terms_schedule, sorted(WEIGHT_SCHEDULES))


def _preferred_head(method: Any, obj: Any = None) -> Any:
    """The head a method trains with when none is set (:attr:`adaptkit.Alignment.preferred_head`)."""
    from .methods import METHODS
    from .registry import import_object

    if obj is not None:
        return type(obj).preferred_head
    name = method if isinstance(method, str) else (method.get("name") if isinstance(method, Mapping) else None)
    if isinstance(name, str) and name in METHODS:
        return METHODS.get(name).preferred_head
    if isinstance(name, str) and "." in name:
        try:
            cls = import_object(name)
            return getattr(cls, "preferred_head", "linear")
        except (ImportError, AttributeError):
            return "linear"  # the method's own error comes when it is built
    return "linear"


def resolve(config: RunConfig, parts: Optional[Mapping[str, Any]] = None, owner: str = "the run settings") -> RunConfig:
    """A checked copy of ``config`` with every default filled in: components as typed ``{name, options}``
    mappings, ``optim`` as :class:`OptimSettings`, ``eval_every`` and the data seed set. Components passed as
    objects in ``parts`` (an ``nn.Module`` encoder, an ``Alignment``, a ``DomainPair``) keep the description
    already in ``config``. Raises ``ValueError``/``TypeError`` naming the setting and what is accepted."""
    if not isinstance(config, RunConfig):
        raise TypeError(f"expected a RunConfig. Got {type(config).__name__} instead.")
    parts = dict(parts or {})
    c = dataclasses.replace(config)
    c.imports = import_modules(c.imports, owner)  # first: they register components the settings name
    _check_run_numbers(c, owner)
    if c.head is None and "head" not in parts:  # the method's own choice of head
        c.head = _preferred_head(c.method, parts.get("method"))
    for group in GROUPS:
        value = getattr(c, group)
        if group not in parts:
            setattr(c, group, typed_component(group, value))
        elif isinstance(value, str):  # a description of the object in parts
            setattr(c, group, {"name": value})
    if "data" not in parts and c.data.get("seed") is None:
        c.data["seed"] = c.seed  # a new draw of the toy data per run seed
    optim = c.optim
    if not isinstance(optim, OptimSettings):
        if not isinstance(optim, Mapping):
            raise TypeError(f"The 'optim' setting must be a mapping of optimiser settings. Got {optim!r} instead.")
        optim = OptimSettings.from_dict(dict(optim))
    c.optim = optim.validate()
    c.scores = list(c.scores)
    if c.objective is not None:  # the objective is a recorded score: record it
        c.objective = c.objective[len("score/"):] if c.objective.startswith("score/") else c.objective
        c.scores += [] if c.objective in c.scores else [c.objective]
    c.weight_candidates = [float(v) for v in c.weight_candidates]
    c.target_terms = {str(k): float(v) for k, v in c.target_terms.items()}
    if not isinstance(c.class_weights, str):
        c.class_weights = [float(v) for v in c.class_weights]
    c.eval_every = max(1, c.steps // 10) if c.eval_every is None else c.eval_every
    return c


def check(config: RunConfig) -> RunConfig:
    """:func:`resolve` ``config`` and build its method once (no networks), so that every setting and option is
    checked — with an error naming it — before any data is drawn or any folder is written. Returns the resolved
    config. A method given by import path is imported here."""
    from .methods import build_method

    c = resolve(config)
    options = dict(c.method)
    build_method(options.pop("name"), **options)
    data = dict(c.data)
    check_files = getattr(_registry("data").get(data.pop("name")), "check_files", None)
    if check_files is not None:  # a data source reading the user's files: they exist (cheap; nothing is read)
        check_files(**data)
    dev = resolve_device(c.device)
    if c.device != "auto":  # an explicit CPU refuses bf16 now; with auto, where the run's device is known
        from .train.precision import check_precision_on

        check_precision_on(c.precision, dev)
    return c


def resolve_device(device: Any):
    """The ``torch.device`` a ``device`` setting names: ``auto`` (CUDA when present, else the CPU), ``cpu``,
    ``cuda`` or ``cuda:N``."""
    import torch

    if isinstance(device, torch.device):
        return device
    if device == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    try:
        dev = torch.device(device)
    except (RuntimeError, TypeError):
        raise ValueError(f"The 'device' parameter of the run settings must be 'auto', 'cpu', 'cuda' or 'cuda:N'. "
                         f"Got {device!r} instead.") from None
    return dev


def check_device_available(dev, setting: Any = None):
    """``dev`` (a ``torch.device``) when this machine has it; else a ValueError listing the devices it has. Called
    where a run is built (not when a config is checked: a sweep may be composed on a machine without the GPUs its
    launcher sends the runs to)."""
    import torch

    device = setting if setting is not None else str(dev)
    n = torch.cuda.device_count() if torch.cuda.is_available() else 0
    if (dev.type == "cuda" and (dev.index or 0) >= n) or (dev.type == "mps" and not _mps()):
        shown = ", ".join(["cpu", *(f"cuda:{i}" for i in range(n))] + (["mps"] if _mps() else []))
        raise ValueError(f"The 'device' parameter of the run settings names {device!r}, which this machine does not "
                         f"have ({n} CUDA device{'s' if n != 1 else ''} visible). Available devices: {shown} (or "
                         "'auto').")
    return dev


def _mps() -> bool:
    import torch

    backend = getattr(torch.backends, "mps", None)
    return bool(backend is not None and backend.is_available())


def run_config(settings: Optional[Mapping[str, Any]] = None, **more) -> RunConfig:
    """A :class:`RunConfig` from a mapping of settings (and keyword settings on top), refusing unknown keys with
    the accepted list. A plain-mapping ``optim`` updates the default optimiser settings.

    Example:
        >>> run_config({"method": "coral", "steps": 200}).steps
        200
    """
    given = {**dict(settings or {}), **more}
    check_known(given, SETTINGS, noun="setting", where="for a run")
    if isinstance(given.get("optim"), Mapping):
        given["optim"] = OptimSettings.from_dict(dict(given["optim"]))
    return RunConfig(**given)


def config_hash(config: RunConfig) -> str:
    """A short digest of everything that determines a resolved run's numbers (:data:`MANAGEMENT` left out), the
    contents of a ``data=table`` run's files included (:func:`adaptkit.data.table.files_digest`)."""
    import hashlib

    from .data.table import files_digest
    from .plain import canonical_json

    plain = {k: v for k, v in as_plain(config).items() if k not in MANAGEMENT}
    digest = files_digest(plain.get("data"))
    if digest is not None:
        plain["data_files"] = digest
    return hashlib.sha256(canonical_json(plain).encode()).hexdigest()[:16]


def as_plain(config: RunConfig) -> Dict[str, Any]:
    """The config as plain values (``config.yaml``): objects by a description, functions by import path."""
    from .plain import to_plain

    return to_plain({f.name: getattr(config, f.name) if f.name != "optim" else dataclasses.asdict(config.optim)
                     for f in dataclasses.fields(config)})


# ----------------------------------------------------------------------------------------------------------------
# hydra


#: Where ``adaptkit-train`` keeps hydra's own files and, unless ``run_dir`` is set, the run folder: a readable name
#: (data, method, seed) and the run's short config hash (:func:`folder_hash`), the same for a single run and for
#: the same run in a ``-m`` sweep. Deterministic, never timestamped: different settings never share a folder, and
#: the same settings find their finished run again (``adaptkit-train`` reuses it).
RUN_FOLDER = "${data.name}/${method.name}/seed${seed}-${adaptkit_hash:}"
HYDRA_SETTINGS = {
    "run": {"dir": "runs/" + RUN_FOLDER},
    "sweep": {"dir": "runs", "subdir": RUN_FOLDER},
    "job": {"chdir": False},
}
HASH_LENGTH = 8  # hex digits of the config hash in a default run folder's name


def folder_hash(composed) -> str:
    """The first :data:`HASH_LENGTH` hex digits of :func:`config_hash` of the run a composed config describes (its
    ``hydra`` node left out): the suffix of the CLI's default run folder. Settings that do not change a run's
    numbers (:data:`MANAGEMENT`) do not change it.

    Example:
        >>> folder_hash(compose(["method=coral"])) == folder_hash(compose(["method=coral", "progress=true"]))
        True
    """
    from omegaconf import OmegaConf

    keys = [k for k in composed if k != "hydra"]
    plain = OmegaConf.to_container(OmegaConf.masked_copy(composed, keys), resolve=True)
    return config_hash(resolve(run_config(plain)))[:HASH_LENGTH]


def _register_resolver() -> None:
    from omegaconf import OmegaConf

    if not OmegaConf.has_resolver("adaptkit_hash"):  # ${adaptkit_hash:} in hydra's folders: the whole config's hash
        OmegaConf.register_new_resolver("adaptkit_hash", lambda *, _root_: folder_hash(_root_))


OPTIM_DEFAULT = "sgd"  # the optim preset (configs/optim/) the primary config starts from: OptimSettings' defaults


HELP_HEADER = """adaptkit-train: train one run (or a -m sweep) of an encoder, a task head and an alignment method.

  adaptkit-train method=dann data=rotated_moons seed=3          one run, into runs/<data>/<method>/seed<k>-<hash>/
  adaptkit-train -m method=source_only,coral seed=0,1,2         a sweep (finished runs are reused)
  adaptkit-train method=mmd --cfg job                           the resolved settings, with every option

Adaptation without target labels can silently make a model worse than training on the source alone: validate on a
labelled target sample before any use where errors can hurt someone.
"""


def _help_settings() -> Dict[str, Any]:
    """hydra's ``--help`` page for ``adaptkit-train``: what the command does, the groups it composes (not the
    benchmark grids, which belong to ``adaptkit-bench``) and the resolved config."""
    from pathlib import Path

    groups = []
    for g in GROUPS:
        groups.append(f"{g}: {', '.join(_registry(g).names())}")
    optim = sorted(p.stem for p in (Path(__file__).parent / "configs" / "optim").glob("*.yaml"))
    groups.append(f"optim: {', '.join(optim)}")
    template = (HELP_HEADER + "\n== Configuration groups (group=option) ==\n" + "\n".join(groups)
                + "\n\n== Settings (override any with key=value) ==\n$CONFIG\n"
                + "More: README.md; hydra's own options: --hydra-help.\n")
    return {"app_name": "adaptkit-train", "template": template.replace("$", "\\$").replace("\\$CONFIG", "$CONFIG")}


def _primary_schema() -> type:
    """The hydra primary config ``train``: :class:`RunConfig`'s fields (components as names, filled by their
    groups), a defaults list naming each group's default, and the hydra settings."""
    defaults = ["_self_"] + [{g: getattr(RunConfig(), g)} for g in GROUPS] + [{"optim": OPTIM_DEFAULT}]
    own = [(f.name, Any if f.name in GROUPS else typing.get_type_hints(RunConfig)[f.name],
            field(default=f.default) if f.default is not dataclasses.MISSING else
            field(default_factory=f.default_factory)) for f in dataclasses.fields(RunConfig)]
    return dataclasses.make_dataclass("train", [("defaults", List[Any], field(default_factory=lambda: defaults)),
                                                *own, ("hydra", Any, field(default_factory=lambda: {**HYDRA_SETTINGS, "help": _help_settings()}))])


def register_configs() -> None:
    """Store the primary config ``train`` and one structured config per registered component (group/name) in
    hydra's config store. Idempotent; components registered since the last call are added."""
    from hydra.core.config_store import ConfigStore

    _register_resolver()
    cs = ConfigStore.instance()
    cs.store(name="train", node=_primary_schema())
    for group in GROUPS:
        for name in _registry(group).names():
            cs.store(group=group, name=name, node=component_schema(group, name))


def compose(overrides: Optional[List[str]] = None, config_name: str = "train"):
    """Compose a config from the shipped schema and presets, as the CLI would, for use in a notebook.

    Example:
        >>> cfg = compose(["method=dann", "steps=200"])
        >>> cfg.method.name, cfg.method.gamma
        ('dann', 10.0)
    """
    from hydra import compose as hydra_compose
    from hydra import initialize_config_dir
    from hydra.core.global_hydra import GlobalHydra

    register_configs()
    if GlobalHydra.instance().is_initialized():
        GlobalHydra.instance().clear()
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return hydra_compose(config_name=config_name, overrides=list(overrides or []))


def from_composed(cfg) -> RunConfig:
    """The :class:`RunConfig` of a composed config (``compose(...)`` or the CLI's)."""
    from omegaconf import OmegaConf

    plain = OmegaConf.to_container(cfg, resolve=True)
    return run_config({k: v for k, v in plain.items() if k not in ("defaults", "hydra")})
