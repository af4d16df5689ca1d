"""Structured configs: the typed schema of a training run, hydra's config store, and the compose API.

The YAML files under ``configs/`` (shipped inside the package) fill this schema; a misspelt key or a wrong type
fails at composition, before any training. Component groups (``method``, ``encoder``, ``head``, ``data``) hold a
``name`` plus that component's options, which the component's own ``Options`` dataclass validates when it is
built (unknown options are refused with the accepted list).

Hydra's ``_target_`` can import arbitrary code; adaptkit never uses it and builds every component through its
registries. A method given by import path (``method.name=package.module.Name``) does import that module: treat
configs from strangers as code.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Optional

from hydra.core.config_store import ConfigStore

from .train.optim import OptimSettings

CONFIG_DIR = Path(__file__).parent / "configs"


@dataclass
class TrainConfig:
    method: Dict[str, Any] = field(default_factory=lambda: {"name": "source_only"})  # alignment method + options
    encoder: Dict[str, Any] = field(default_factory=lambda: {"name": "mlp"})  # encoder + options
    head: Dict[str, Any] = field(default_factory=lambda: {"name": "linear"})  # task head + options
    data: Dict[str, Any] = field(default_factory=lambda: {"name": "rotated_moons"})  # bundled shift + parameters
    optim: OptimSettings = field(default_factory=OptimSettings)  # optimiser shared by every update
    steps: int = 1000  # training steps over all stages
    batch_size: int = 64  # samples per domain per step
    seed: int = 0  # seeds weights, batches and dropout
    eval_every: int = 100  # evaluation period in steps
    checkpoint_every: int = 0  # checkpoint period in steps (0: only at the end)
    scores: List[str] = field(default_factory=list)  # label-free selection scores to record
    select: Optional[str] = None  # keep the checkpoint this metric ranks best (default: the last)
    on_nonfinite: str = "stop"  # stop | skip: what a NaN/inf loss or gradient does
    check_gradients: bool = True  # check gradients for NaN/inf before every step (false: losses only; faster)
    diagnostics: bool = True  # measure the shift in inputs vs features and draw plots/ after training
    device: str = "auto"  # auto | cpu | cuda | cuda:N
    progress: Optional[bool] = None  # progress bar (default: only on a terminal)
    run_dir: Optional[str] = None  # default: hydra's output directory
    overwrite: bool = False  # replace a finished run in run_dir


def register_configs() -> None:
    cs = ConfigStore.instance()
    cs.store(name="train_schema", node=TrainConfig)


def compose(overrides: Optional[List[str]] = None, config_name: str = "train"):
    """Compose a config from the shipped YAML files, as the CLI would, for use in a notebook.

    Example:
        >>> cfg = compose(["method=dann", "steps=200"])
        >>> cfg.method.name
        'dann'
    """
    from hydra import compose as hydra_compose
    from hydra import initialize_config_dir
    from hydra.core.global_hydra import GlobalHydra

    register_configs()
    if GlobalHydra.instance().is_initialized():
        GlobalHydra.instance().clear()
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return hydra_compose(config_name=config_name, overrides=list(overrides or []))


def fit_from_config(cfg, run_dir: Optional[str] = None):
    """Run :func:`adaptkit.fit` from a composed config (``TrainConfig``-shaped)."""
    from omegaconf import OmegaConf

    from .run import fit

    c = OmegaConf.to_container(cfg, resolve=True)
    method, encoder, head, data = (dict(c[k]) for k in ("method", "encoder", "head", "data"))
    for what, d in (("method", method), ("encoder", encoder), ("head", head), ("data", data)):
        if "name" not in d:
            raise ValueError(f"the {what} config needs a 'name' key; got keys {sorted(d)}.")
    return fit(data.pop("name"), data_options=data, method=method.pop("name"), encoder=encoder.pop("name"),
               encoder_options=encoder, head=head.pop("name"), head_options=head, steps=c["steps"],
               batch_size=c["batch_size"], optim=c["optim"], seed=c["seed"], eval_every=c["eval_every"],
               checkpoint_every=c["checkpoint_every"], scores=c["scores"], select=c["select"],
               on_nonfinite=c["on_nonfinite"], check_gradients=c["check_gradients"], diagnostics=c["diagnostics"], device=c["device"], progress=c["progress"],
               run_dir=run_dir if run_dir is not None else c["run_dir"], overwrite=c["overwrite"], **method)
