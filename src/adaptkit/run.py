"""``adaptkit.fit``: build the parts, run the one loop, return a :class:`Run`. The notebook face of the library;
the CLI and the scikit-learn estimator both go through :func:`fit`."""
from __future__ import annotations

import random
import shutil
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Optional, Union

import numpy as np
import torch
from torch import nn

from ._checks import check_choice, check_number
from .data.batches import PairedBatches
from .data.pair import DomainPair
from .methods import Alignment, SetupInfo, build_method
from .nets import AdaptedModel, build_encoder, build_head, feature_size
from .train import files
from .train.evaluate import Evaluator
from .train.loop import CHECKPOINT, METRICS, SUMMARY, BEST, Trainer, config_hash, load_checkpoint
from .train.optim import OptimSettings
from .safety import ADAPTATION_WARNING


@dataclass
class Run:
    """What a training run leaves: the trained parts, the history of evaluations and the summary."""

    model: AdaptedModel
    method: Alignment
    history: List[Dict[str, Any]]
    summary: Dict[str, Any]
    data: DomainPair
    run_dir: Optional[Path] = None
    device: torch.device = field(default_factory=lambda: torch.device("cpu"))

    @torch.no_grad()
    def predict_proba(self, x, domain: str = "target") -> np.ndarray:
        self.model.eval()
        x = torch.as_tensor(np.asarray(x, dtype=np.float32) if not isinstance(x, torch.Tensor) else x).float()
        out = [torch.softmax(self.model(c.to(self.device), domain), 1).cpu() for c in x.split(1024)]
        return torch.cat(out).numpy()

    def predict(self, x, domain: str = "target") -> np.ndarray:
        return self.predict_proba(x, domain).argmax(1)

    @torch.no_grad()
    def features(self, x, domain: str = "target") -> np.ndarray:
        self.model.eval()
        x = torch.as_tensor(np.asarray(x, dtype=np.float32) if not isinstance(x, torch.Tensor) else x).float()
        return torch.cat([self.model.features(c.to(self.device), domain).cpu() for c in x.split(1024)]).numpy()


def resolve_device(device: Union[str, torch.device]) -> torch.device:
    if isinstance(device, torch.device):
        return device
    if device == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    try:
        return torch.device(device)
    except RuntimeError:
        raise ValueError(f"The 'device' parameter of fit must be 'auto', 'cpu', 'cuda' or 'cuda:N'. Got {device!r} "
                         "instead.") from None


def seed_everything(seed: int) -> None:
    random.seed(seed)
    np.random.seed(seed % 2**32)
    torch.manual_seed(seed)


def _component_config(obj, options: Dict[str, Any]) -> Dict[str, Any]:
    if isinstance(obj, str):
        return {"name": obj, **options}
    return {"name": f"<{type(obj).__module__}.{type(obj).__qualname__}>", **options}


def _prepare_run_dir(run_dir: Path, overwrite: bool) -> None:
    summary = run_dir / SUMMARY
    if summary.exists():
        import json

        status = json.loads(summary.read_text()).get("status")
        if status == "finished" and not overwrite:
            raise ValueError(f"run folder {str(run_dir)!r} already holds a finished run. Pass overwrite=True "
                             "(CLI: overwrite=true) to replace it, or choose another run_dir.")
    if overwrite:
        for name in (CHECKPOINT, SUMMARY, METRICS, BEST, "config.yaml", "diagnostics.json"):
            (run_dir / name).unlink(missing_ok=True)
        shutil.rmtree(run_dir / "plots", ignore_errors=True)


def fit(data: Union[DomainPair, str], *, method: Union[str, Alignment, Any] = "source_only",
        encoder: Union[str, nn.Module] = "mlp", head: Union[str, nn.Module] = "linear", steps: int = 1000,
        batch_size: int = 64, optim: Optional[Dict[str, Any]] = None, seed: int = 0,
        eval_every: Optional[int] = None, device: Union[str, torch.device] = "auto",
        run_dir: Optional[Union[str, Path]] = None, overwrite: bool = False, progress: Optional[bool] = None,
        encoder_options: Optional[Dict[str, Any]] = None, head_options: Optional[Dict[str, Any]] = None,
        data_options: Optional[Dict[str, Any]] = None, scores=(), select: Optional[str] = None,
        checkpoint_every: int = 0, on_nonfinite: str = "stop", check_gradients: bool = True,
        diagnostics: bool = False,
        **method_options) -> Run:
    """Train ``encoder`` + ``head`` on a domain pair with an alignment ``method`` and return the :class:`Run`.

    Args:
        data: a :class:`DomainPair`, or the name of a bundled shift (parameters in ``data_options``).
        method: a registered name (``adaptkit.methods.METHODS.names()``), an ``Alignment`` instance or class,
            an import path ``"package.module.Name"``, or a plain function ``(source_features, target_features)
            -> loss``. Extra keyword arguments are the method's options (unknown ones are refused).
        encoder, head: registered names (options in ``encoder_options``/``head_options``) or your own
            ``nn.Module`` (trained in place).
        steps: training steps over all stages; ``batch_size`` samples per domain per step.
        optim: optimiser settings (see :class:`~adaptkit.train.optim.OptimSettings`).
        eval_every: evaluation period in steps (default: steps // 10).
        run_dir: a folder for config, metrics, checkpoints and summary. An unfinished run there is resumed;
            a finished one is refused unless ``overwrite=True``.
        scores: label-free selection scores to record at each evaluation (see :mod:`adaptkit.select`).
        select: keep the evaluated state that this metric ranks best (e.g. ``"score/dev"``); default: last.
        on_nonfinite: ``"stop"`` (raise, keeping the last finite checkpoint) or ``"skip"`` non-finite updates.
        check_gradients: check gradients for NaN/inf before every optimiser step (default); ``False`` checks
            only losses each update and parameters at evaluations (faster for tiny models).
        diagnostics: after training, measure the shift in inputs vs features, calibration and the label-shift
            alarm (:func:`adaptkit.measure.runs.diagnose`); with ``run_dir``, also write ``diagnostics.json`` and
            ``plots/`` there and add the figures to the summary.

    Example:
        >>> run = fit("rotated_moons", method="source_only", steps=50, progress=False)  # doctest: +SKIP
        >>> run.summary["target_accuracy"]  # doctest: +SKIP
    """
    check_number("steps", "fit", steps, low=1, integer=True)
    check_number("batch_size", "fit", batch_size, low=1, integer=True)
    check_number("seed", "fit", seed, low=0, integer=True)
    check_number("checkpoint_every", "fit", checkpoint_every, low=0, integer=True)
    check_choice("on_nonfinite", "fit", on_nonfinite, ["skip", "stop"])
    eval_every = max(1, steps // 10) if eval_every is None else check_number("eval_every", "fit", eval_every,
                                                                             low=1, integer=True)
    encoder_options, head_options = dict(encoder_options or {}), dict(head_options or {})
    optim_settings = OptimSettings.from_dict(optim or {})
    dev = resolve_device(device)

    if isinstance(data, str):
        from .data.shifts import make_shift

        data_options = {"seed": seed, **dict(data_options or {})}  # a new draw of the toy data per run seed
        pair = make_shift(data, **data_options)
        data_config = {"name": data, **data_options}
    elif isinstance(data, DomainPair):
        if data_options:
            raise ValueError("data_options apply to a bundled shift name, not to a DomainPair object.")
        # the shape of the data enters the config hash, so a checkpoint cannot resume on a different pair
        pair, data_config = data, {"name": data.name, "input_shape": list(data.input_shape),
                                   "n_classes": data.n_classes, "n_source_train": len(data.source_train),
                                   "n_target_train": len(data.target_train_x)}
    else:
        raise TypeError(f"data must be a DomainPair or a bundled shift name; got {type(data).__name__}.")

    method_obj = build_method(method, **method_options)
    config = {
        "method": method_obj.describe() if not isinstance(method, str) or method_options else {"name": method},
        "encoder": _component_config(encoder, encoder_options), "head": _component_config(head, head_options),
        "data": data_config, "steps": steps, "batch_size": batch_size, "optim": asdict(optim_settings),
        "seed": seed, "eval_every": eval_every, "scores": list(scores), "select": select,
        "on_nonfinite": on_nonfinite,
    }
    config["method"] = {**method_obj.describe(), "name": method_obj.name or config["method"]["name"]}

    seed_everything(seed)
    enc = build_encoder(encoder, pair.input_shape, **encoder_options) if isinstance(encoder, str) else encoder
    if not isinstance(enc, nn.Module):
        raise TypeError(f"encoder must be a registered name or an nn.Module; got {type(enc).__name__}.")
    if not isinstance(encoder, str) and encoder_options:
        raise ValueError("encoder_options apply to a registered encoder name, not to an nn.Module.")
    d = feature_size(enc, pair.input_shape)
    hd = build_head(head, d, pair.n_classes, **head_options) if isinstance(head, str) else head
    if not isinstance(hd, nn.Module):
        raise TypeError(f"head must be a registered name or an nn.Module; got {type(hd).__name__}.")
    model = AdaptedModel(enc, hd, d, pair.n_classes).to(dev)
    method_obj.attach(model, SetupInfo(feature_dim=d, n_classes=pair.n_classes, input_shape=pair.input_shape,
                                       batch_size=batch_size, steps=steps))
    method_obj.to(dev)

    training = pair.oracle_training_data() if method_obj.uses_target_labels else pair.training_data()
    batches = PairedBatches(training, batch_size, seed, dev)
    evaluator = Evaluator(pair.scoring_sets(), pair.target_train_x, dev, scores=scores)
    selection = None
    if select is not None:
        selection = _selection_rule(select, scores)
    meta = {"method": config["method"]["name"], "data": data_config["name"], "seed": seed,
            "config_hash": config_hash(config), "config": _plain(config), "adaptkit_warning": ADAPTATION_WARNING}

    rd = Path(run_dir) if run_dir is not None else None
    trainer = Trainer(model, method_obj, batches, steps=steps, optim=optim_settings, evaluate=evaluator,
                      eval_every=eval_every, checkpoint_every=checkpoint_every, run_dir=rd, progress=progress,
                      meta=meta, select=selection, on_nonfinite=on_nonfinite, check_gradients=check_gradients)
    if rd is not None:
        _prepare_run_dir(rd, overwrite)
        rd.mkdir(parents=True, exist_ok=True)
        if (rd / CHECKPOINT).exists():
            trainer.load_state_dict(load_checkpoint(rd / CHECKPOINT), source=str(rd / CHECKPOINT))
        else:
            from omegaconf import OmegaConf

            files.write_text(rd / "config.yaml", OmegaConf.to_yaml(OmegaConf.create(_plain(config))))
    summary = trainer.run()
    run = Run(model=model, method=method_obj, history=trainer.history, summary=summary, data=pair, run_dir=rd,
              device=dev)
    if diagnostics:
        from .measure.runs import diagnose

        summary["diagnostics"] = diagnose(run, seed=seed, plots=rd is not None)
        if rd is not None:
            files.write_json(rd / SUMMARY, summary)
    return run


def _selection_rule(select: str, scores):
    if select in ("source_val_accuracy",):
        return ("source_val_accuracy", True)
    if select in ("source_val_loss",):
        return ("source_val_loss", False)
    from .select import SCORES

    name = select[len("score/"):] if select.startswith("score/") else select
    if name not in SCORES:
        raise ValueError(f"The 'select' parameter of fit must be one of source_val_accuracy, source_val_loss, "
                         f"{', '.join(sorted(SCORES))}. Got {select!r} instead.")
    if name not in scores:
        raise ValueError(f"select={select!r} needs that score recorded: add {name!r} to scores.")
    return (f"score/{name}", SCORES[name].higher_is_better)


def _plain(obj):
    """Config values as YAML-safe plain types (callables and objects by their qualified name)."""
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if obj is None or isinstance(obj, (bool, int, float, str)):
        return obj
    return f"<{getattr(obj, '__module__', '?')}.{getattr(obj, '__qualname__', type(obj).__name__)}>"
