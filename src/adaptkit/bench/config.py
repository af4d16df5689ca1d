"""The bench settings: the typed schema of a grid (:class:`BenchConfig`), its registration in
hydra's config store, and loading a config with overrides merged on top (:func:`load_config`).

The YAML files ``configs/bench.yaml`` (a grid) and ``configs/study.yaml`` (a selection study) fill this schema,
with a named grid from ``configs/bench/<name>.yaml``; a misspelt key or a wrong type fails at composition. Importing
this module registers the schema, so the bench configs compose (:func:`compose_bench`) wherever it is imported.

Example:
    >>> c = load_config("tiny", {"workers": 1})
    >>> c["name"], c["workers"], c["out_dir"]
    ('tiny', 1, 'runs/bench/tiny')
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Dict, List, Mapping, Optional

from hydra.core.config_store import ConfigStore

from ..config import SETTINGS

__all__ = ["BenchConfig", "register_schema", "compose_bench", "load_config", "override_recipes"]

SCHEMA = "bench_schema"  # the name configs/bench.yaml lists in its defaults
#: A recipe is a shift's share of the run settings (adaptkit.config.RunConfig) — everything except what the grid
#: sets per cell (method, data, seed, scores, device, run folder); unset ones take RunConfig's defaults.
GRID_OWNED = ("method", "data", "seed", "scores", "device", "progress", "run_dir", "overwrite", "imports")
RECIPE_SETTINGS = tuple(k for k in SETTINGS if k not in GRID_OWNED)


@dataclass
class BenchConfig:
    """The typed schema of ``adaptkit-bench`` and ``adaptkit-study`` (filled by ``configs/bench.yaml`` or
    ``configs/study.yaml`` and a named grid ``bench=<name>``)."""

    name: str = "custom"  # the grid's name (set by configs/bench/<name>.yaml); used in the default out_dir
    imports: List[str] = field(default_factory=list)  # your modules imported first, in the grid and every worker process (they register shifts, methods), e.g. [mypkg.shifts]
    methods: List[Any] = field(default_factory=list)  # registry name | import path 'pkg.mod.attr' | {name, label, options}
    add_method: Optional[str] = None  # one more method entry appended to `methods`, e.g. your loss's import path
    shifts: List[Any] = field(default_factory=list)  # bundled shift name | {name, label, params}
    seeds: List[int] = field(default_factory=lambda: [0, 1, 2])  # shared by every method: paired comparisons
    recipes: Dict[str, Dict[str, Any]] = field(default_factory=dict)  # shift name or label -> its run settings
    scores: List[str] = field(default_factory=list)  # label-free selection scores recorded per cell (score/<name>)
    sweep: Dict[str, List[Any]] = field(default_factory=dict)  # option or lr -> values (selection study)
    reference: Optional[str] = None  # method every other is compared with (default: add_method, else dann, else first)
    baseline: Optional[str] = None  # the no-adaptation baseline (default: source_only)
    oracle: Optional[str] = None  # the target-label upper bound (default: target_oracle)
    workers: Optional[int] = None  # parallel worker processes (default: os.cpu_count())
    launch: str = "workers"  # workers: run the cells here | export: write cells.json for a hydra launcher (adaptkit-cell, bench/launch.py)
    threads_per_worker: int = 1  # torch threads in each worker
    device: str = "cpu"  # cpu | cuda | cuda:N | auto; toy models run fastest on CPU
    out_dir: str = "runs/bench/${name}"  # grid folder: cells/, results.csv, report.md, charts
    overwrite: bool = False  # retrain every cell of this grid from scratch
    retry_failed: bool = True  # rerun cells that failed or diverged last time (false: keep their failure)
    max_cells: Optional[int] = None  # run at most this many cells, then stop (rerun to finish): a test hook
    verbose: bool = True  # print a line per finished cell


def register_schema() -> None:
    """Store :class:`BenchConfig` as ``bench_schema`` in hydra's config store (``configs/bench.yaml`` uses it)."""
    ConfigStore.instance().store(name=SCHEMA, node=BenchConfig)


register_schema()


def compose_bench(overrides: Optional[List[str]] = None, config_name: str = "bench"):
    """Compose ``configs/bench.yaml`` (or ``configs/study.yaml`` with ``config_name="study"``) as the command line
    would, for a notebook or a test.

    Example:
        >>> compose_bench(["bench=tiny"]).name
        'tiny'
    """
    from ..config import compose

    register_schema()
    return compose(overrides, config_name=config_name)


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
        try:
            base = compose_bench([] if config is None else [f"bench={config}"])
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
                plain["recipes"] = override_recipes(plain["recipes"], recipes)
            if sweep is not None:
                plain["sweep"] = sweep
            merged = OmegaConf.merge(OmegaConf.structured(BenchConfig), plain)
        return OmegaConf.to_container(merged, resolve=True)
    except OmegaConfBaseException as e:
        accepted = ", ".join(f.name for f in BenchConfig.__dataclass_fields__.values())
        raise ValueError(f"bad bench setting: {e}. Accepted bench keys: {accepted}.") from None


def override_recipes(current: Dict[str, Any], overrides: Any) -> Dict[str, Any]:
    """Recipes with ``overrides`` applied per shift: an ``encoder`` or ``head`` mapping replaces the current one
    whole (a network's options belong to that network), and so does an ``optim`` mapping naming another optimiser
    (``sgd``'s momentum is no setting of ``adam``); ``optim`` otherwise and the other keys update the current values.

    Example:
        >>> override_recipes({"moons": {"steps": 10, "optim": {"name": "sgd", "lr": 0.1}}}, {"moons": {"optim": {"lr": 1}}})
        {'moons': {'steps': 10, 'optim': {'name': 'sgd', 'lr': 1}}}
    """
    if not isinstance(overrides, Mapping):
        raise TypeError(f"The 'recipes' override must be a mapping shift -> recipe settings. Got {overrides!r} instead.")
    out = {k: dict(v) for k, v in current.items()}
    for shift, r in overrides.items():
        if not isinstance(r, Mapping):
            raise TypeError(f"The recipe override of shift {shift!r} must be a mapping of recipe settings "
                            f"(run settings: {', '.join(RECIPE_SETTINGS)}). Got {r!r} instead.")
        new = dict(out.get(shift, {}))
        for k, v in r.items():
            if k == "optim" and isinstance(v, Mapping):
                current = new.get(k) if isinstance(new.get(k), Mapping) else {}
                other = "name" in v and current.get("name") not in (None, v["name"])
                # optim settings update the current ones, unless they name another optimiser: its settings are its own
                new[k] = dict(v) if other else {**current, **v}
            else:
                new[k] = v
        out[shift] = new
    return out
