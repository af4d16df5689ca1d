"""``adaptkit.fit`` and ``adaptkit.run.train``: build the parts a run's settings name, run the one loop, return a
:class:`Run`. :func:`fit` is the notebook face (keyword arguments → :class:`~adaptkit.config.RunConfig`);
:func:`train` takes a ``RunConfig`` and is what every face — notebook, CLI, benchmark worker, scikit-learn
estimator — ends in."""
from __future__ import annotations

import contextlib
import inspect
import math
import random
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Mapping, Optional, Union

import numpy as np
import torch
from torch import nn

from .config import (AUTO, GROUPS, MANAGEMENT, SETTINGS, RunConfig, as_plain, check_device_available, config_hash,
                     from_composed, resolve, resolve_device, run_config, setting_docs)
from .data.batches import PairedBatches
from .data.pair import DomainPair
from .data.streaming import DatasetPair, streaming_parts
from .methods import METHODS, Alignment, SetupInfo, build_method
from .nets import AdaptedModel, build_encoder, build_head, feature_size
from .train import distributed, files
from .train.evaluate import Evaluator
from .train.loop import BEST, CHECKPOINT, METRICS, SUMMARY, Interrupted, Trainer, load_checkpoint
from .train.trackers import track_finished, tracked
from .post_training import DONE, PENDING, POST_TRAINING, post_training_plan, post_training_step, unfinished_steps
from .safety import ADAPTATION_WARNING
from .trust.class_weights import class_weights_for, final_class_weights, with_class_weights


@dataclass
class Run:
    """What a training run leaves: the trained parts, the history of evaluations and the summary."""

    model: AdaptedModel
    method: Alignment
    history: List[Dict[str, Any]]
    summary: Dict[str, Any]
    data: Optional[DomainPair]  # None after without_data()
    run_dir: Optional[Path] = None
    device: torch.device = field(default_factory=lambda: torch.device("cpu"))

    def without_data(self) -> "Run":
        """A copy that keeps what prediction needs (the trained parts, history, summary) but not the training data:
        the model is moved to the CPU, ready to pickle or ship."""
        import dataclasses

        return dataclasses.replace(self, data=None, model=self.model.cpu(), device=torch.device("cpu"))

    def __repr__(self) -> str:
        s = self.summary
        acc = s.get("target_accuracy")
        return (f"Run(method={s.get('method')!r}, data={s.get('data')!r}, seed={s.get('seed')}, steps={s.get('steps')}, "
                f"source_val_accuracy={s.get('source_val_accuracy')}, target_accuracy={acc}, "
                f"run_dir={str(self.run_dir) if self.run_dir else None!r})")

    def _inputs(self, x) -> torch.Tensor:
        """``x`` as a float tensor of samples, refused in one line when its samples cannot be this run's inputs (the
        summary's ``input_shape``; a flattened sample of as many values is accepted, as the encoders reshape)."""
        x = torch.as_tensor(np.asarray(x, dtype=np.float32) if not isinstance(x, torch.Tensor) else x).float()
        want = self.summary.get("input_shape")
        if want is not None:
            want = tuple(int(d) for d in want)
            got = tuple(x.shape[1:])
            if x.dim() < 2 or (got != want and math.prod(got) != math.prod(want)):
                raise ValueError(f"This run was trained on samples of shape {want} ({math.prod(want)} values); got "
                                 f"an array of shape {tuple(x.shape)}. Pass a batch of shape (n, {', '.join(map(str, want))}).")
        return x

    @torch.no_grad()
    def predict_proba(self, x, domain: str = "target") -> np.ndarray:
        self.model.eval()
        x = self._inputs(x)
        out = [torch.softmax(self.model(c.to(self.device), domain), 1).cpu() for c in x.split(1024)]
        return torch.cat(out).numpy()

    def predict(self, x, domain: str = "target") -> np.ndarray:
        return self.predict_proba(x, domain).argmax(1)

    @torch.no_grad()
    def features(self, x, domain: str = "target") -> np.ndarray:
        self.model.eval()
        x = self._inputs(x)
        return torch.cat([self.model.features(c.to(self.device), domain).cpu() for c in x.split(1024)]).numpy()


def versions() -> Dict[str, str]:
    """The versions a run was trained with, for its summary: adaptkit, torch, numpy, Python, and torchvision when it
    is installed (read from its package metadata, so the record does not depend on what this process imported).

    Example:
        >>> sorted(versions())[:3]
        ['adaptkit', 'numpy', 'python']
    """
    import platform
    from importlib import metadata

    from ._version import __version__

    out = {"adaptkit": __version__, "torch": torch.__version__, "numpy": np.__version__,
           "python": platform.python_version()}
    try:
        out["torchvision"] = metadata.version("torchvision")
    except metadata.PackageNotFoundError:
        pass
    return out


def seed_everything(seed: int) -> None:
    random.seed(seed)
    np.random.seed(seed % 2**32)
    torch.manual_seed(seed)


def read_summary(run_dir: Union[str, Path]) -> Optional[Dict[str, Any]]:
    """The run folder's ``summary.json`` (``None`` when there is none); a file that cannot be read or is not a JSON
    mapping is refused in one line naming it."""
    import json

    path = Path(run_dir) / SUMMARY
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return None
    except (OSError, UnicodeDecodeError) as e:
        raise ValueError(f"{path} cannot be read ({getattr(e, 'strerror', None) or e}); restore it, or pass "
                         "overwrite=True (CLI: overwrite=true) to start the run folder afresh.") from None
    try:
        summary = json.loads(text)
    except ValueError as e:
        raise ValueError(f"{path} is not valid JSON ({e}): the file is damaged. Restore it, or pass overwrite=True "
                         "(CLI: overwrite=true) to start the run folder afresh.") from None
    if not isinstance(summary, dict):
        raise ValueError(f"{path} must hold a JSON object (a run summary); got a JSON {type(summary).__name__}. "
                         "Restore it, or pass overwrite=True (CLI: overwrite=true) to start the run folder afresh.")
    return summary


def _prepare_run_dir(run_dir: Path, overwrite: bool) -> Optional[Dict[str, Any]]:
    """Make ``run_dir`` ready for a run: emptied with ``overwrite``; a finished run there refused, unless its
    post-training phase is unfinished: then its summary is returned, for :func:`complete` to finish that phase
    without training."""
    if overwrite:
        for name in (CHECKPOINT, SUMMARY, METRICS, BEST, "config.yaml", "diagnostics.json"):
            (run_dir / name).unlink(missing_ok=True)
        shutil.rmtree(run_dir / "plots", ignore_errors=True)
        return None
    summary = read_summary(run_dir)
    if summary is None or summary.get("status") != "finished":
        return None
    if not unfinished_steps(run_dir, summary):
        raise ValueError(f"run folder {str(run_dir)!r} already holds a finished run. Pass overwrite=True "
                         "(CLI: overwrite=true) to replace it, or choose another run_dir.")
    if not (run_dir / CHECKPOINT).exists():
        raise ValueError(f"run folder {str(run_dir)!r} holds a finished run whose post-training steps "
                         f"({', '.join(unfinished_steps(run_dir, summary))}) are unfinished, but its {CHECKPOINT} "
                         "is missing, so they cannot be completed; restore it, or pass overwrite=True (CLI: "
                         "overwrite=true) to retrain.")
    return summary


def _object_name(obj) -> str:
    return f"<{type(obj).__module__}.{type(obj).__qualname__}>"


def _describe_pair(pair: DomainPair) -> Dict[str, Any]:
    # the shape of the data enters the config hash, so a checkpoint cannot resume on a different pair
    if isinstance(pair, DatasetPair):
        return pair.describe()
    return {"name": pair.name, "input_shape": list(pair.input_shape), "n_classes": pair.n_classes,
            "n_source_train": len(pair.source_train), "n_target_train": len(pair.target_train_x)}


def _network(group: str, value, options: Optional[Dict[str, Any]], parts: Dict[str, Any]):
    """The config entry of an encoder or head given by name (options in ``options``) or as an ``nn.Module``;
    ``None``: the default (for a head, the method's own choice)."""
    if value is None:
        if options:
            raise ValueError(f"{group}_options need a {group} name (e.g. {group}='mlp').")
        return None
    if isinstance(value, nn.Module):
        if options:
            raise ValueError(f"{group}_options apply to a registered {group} name, not to an nn.Module.")
        parts[group] = value
        return {"name": _object_name(value)}
    if isinstance(value, Mapping):
        return {**value, **dict(options or {})}
    if isinstance(value, str):
        return {"name": value, **dict(options or {})}
    raise TypeError(f"{group} must be a registered name or an nn.Module; got {type(value).__name__}.")


def fit(data: Union[DomainPair, str, Mapping] = "rotated_moons", *, method: Any = "source_only",
        encoder: Union[str, Mapping, nn.Module] = "mlp", head: Union[str, Mapping, nn.Module, None] = None,
        encoder_options: Optional[Dict[str, Any]] = None, head_options: Optional[Dict[str, Any]] = None,
        data_options: Optional[Dict[str, Any]] = None, **settings) -> Run:
    """Train ``encoder`` + ``head`` on a domain pair with an alignment ``method`` and return the :class:`Run`.

    Args:
        data: a :class:`DomainPair`, or a bundled shift's name (its parameters in ``data_options``).
        method: a registered name (``adaptkit.methods.METHODS.names()``), an ``Alignment`` instance or class,
            an import path ``"package.module.Name"``, or a plain function ``(source_features, target_features)
            -> loss``. Keyword arguments that are not run settings are the method's options (unknown ones are
            refused with the accepted list).
        encoder, head: registered names (options in ``encoder_options``/``head_options``) or your own
            ``nn.Module`` (trained in place). The default head is the method's own choice (a linear layer; ADR:
            dropout before one, which its critic needs).
        **settings: any run setting of :class:`adaptkit.config.RunConfig` — listed below — and the method's
            options.

    A ``run_dir`` holding an unfinished run is resumed; a finished one is refused unless ``overwrite=True``.

    Example:
        >>> run = fit("rotated_moons", method="source_only", steps=50, progress=False)  # doctest: +SKIP
        >>> run.summary["target_accuracy"]  # doctest: +SKIP
    """
    run_settings = {k: settings.pop(k) for k in list(settings) if k in SETTINGS and k not in GROUPS}
    method_options = settings  # what is left: the method's own options
    if "optim" in run_settings and run_settings["optim"] is None:
        run_settings.pop("optim")
    if "scores" in run_settings:
        run_settings["scores"] = list(run_settings["scores"])
    if isinstance(run_settings.get("run_dir"), Path):
        run_settings["run_dir"] = str(run_settings["run_dir"])
    if isinstance(run_settings.get("device"), torch.device):
        run_settings["device"] = str(run_settings["device"])
    parts: Dict[str, Any] = {}
    if isinstance(data, (DomainPair, DatasetPair)):
        if data_options:
            raise ValueError(f"data_options apply to a bundled shift name, not to a {type(data).__name__} object.")
        parts["data"], data_entry = data, _describe_pair(data)
    elif isinstance(data, (str, Mapping)):
        data_entry = {**({"name": data} if isinstance(data, str) else data), **dict(data_options or {})}
    else:
        raise TypeError(f"data must be a DomainPair, a DatasetPair or a bundled shift name; got {type(data).__name__}.")
    if isinstance(method, (str, Mapping)):
        method_entry = {**({"name": method} if isinstance(method, str) else method), **method_options}
    else:  # an Alignment object or class, or a loss function
        parts["method"] = build_method(method, **method_options)
        method_entry = None
    config = run_config(run_settings, data=data_entry,
                        encoder=_network("encoder", encoder, encoder_options, parts),
                        head=_network("head", head, head_options, parts))
    if method_entry is not None:
        config.method = method_entry
    else:
        config.method = _describe_method(parts["method"], method)
    return train(config, parts)


def _describe_method(obj: Alignment, given: Any) -> Dict[str, Any]:
    """The config entry of a method given as an object: its registry name (or ``<module.Class>``), its options."""
    described = obj.describe()  # a registered class is recorded by its registry name (a loss function: feature_loss)
    if not obj.name or obj.name not in METHODS or type(obj) is not METHODS.get(obj.name):
        described["name"] = given if isinstance(given, str) else obj.name or _object_name(obj)
    return described


def _recorded_method(entry: Dict[str, Any], method_obj: Alignment) -> Dict[str, Any]:
    """The method entry a run records: a registry name as given; an import path with every option it took."""
    if "." in entry["name"] and entry["name"] not in METHODS:
        return _describe_method(method_obj, entry["name"])
    return entry


def settings_hash(config: RunConfig, parts: Optional[Mapping[str, Any]] = None) -> str:
    """The ``config_hash`` that :func:`train` of ``config`` records in its summary (and, for an unguarded run, in
    its checkpoints), computed without building any network or drawing any data: what a grid compares a cell's
    summary with. A guarded run records the hash of the settings it was asked for, not of the candidate it kept."""
    parts = dict(parts or {})
    c = resolve(config, parts)
    if not (c.guard or c.method.get("weight") == AUTO) and "method" not in parts:
        options = dict(c.method)
        c.method = _recorded_method(c.method, build_method(options.pop("name"), **options))
    return config_hash(c)


def method_label(method_obj: Alignment, fallback: str = "") -> str:
    """The name a run's titles, progress bar and summary (``summary["method"]``) show for its method: the registry
    name, except for the ``feature_loss`` wrapper of a user's own loss function, which shows that function's name
    (``fit(method=mean_gap)`` → ``"mean_gap"``; an import path ``"pkg.losses.mean_gap"`` → ``"mean_gap"``). A
    lambda, which has no name of its own, stays ``"feature_loss"``. The config keeps ``feature_loss`` and the
    function's path, which is what rebuilds the run.

    Example:
        >>> def mean_gap(fs, ft):
        ...     return (fs.mean(0) - ft.mean(0)).pow(2).sum()
        >>> method_label(build_method(mean_gap))
        'mean_gap'
    """
    name = method_obj.name or fallback
    loss_fn = getattr(getattr(method_obj, "options", None), "loss_fn", None) if name == "feature_loss" else None
    if isinstance(loss_fn, str):
        label = loss_fn.rpartition(".")[2]
    else:
        label = getattr(loss_fn, "__name__", "") if loss_fn is not None else ""
    return label if label and label.isidentifier() else name


def train(config: RunConfig, parts: Optional[Mapping[str, Any]] = None) -> Run:
    """Build the parts a :class:`~adaptkit.config.RunConfig` names, run the one loop, and return the :class:`Run`.
    ``config`` may also be a composed hydra config (:func:`adaptkit.config.compose`).

    ``parts`` holds components given as objects instead of names (``"data"``: a :class:`DomainPair`,
    ``"encoder"``/``"head"``: an ``nn.Module``, ``"method"``: an :class:`Alignment`); the config then holds their
    descriptions. :func:`fit`, the CLI, the benchmark worker and :class:`~adaptkit.AlignedClassifier` all come
    through here. With ``guard=true`` or a method weight of ``auto``, the run is a guarded choice among candidate
    runs (:func:`adaptkit.trust.candidates.train_guarded`); otherwise one faithful run of the method.
    """
    parts = dict(parts or {})
    if not isinstance(config, RunConfig) and hasattr(config, "keys"):  # a composed (OmegaConf) config
        config = from_composed(config)
    c = resolve(config, parts)
    group = distributed.setup_run(c)  # under torchrun: the process group (None in one process)
    if group is not None and not group.is_main:
        p = prepare(c, parts)  # trains alongside rank 0 and writes nothing
        summary = distributed.follow(p.trainer, c.run_dir)
        return Run(p.model, p.method, p.trainer.history, summary, p.pair, None, p.device)
    if c.run_dir is not None:  # refused now, not at the first write steps later
        files.check_writable(c.run_dir)
    if c.guard or c.method.get("weight") == AUTO:
        from .trust.candidates import train_guarded

        run = train_guarded(c, parts, prepare=prepare, complete=complete, save=save_run)
        if c.track:
            plain = as_plain(c)
            track_finished(c, run, plain, {k: v for k, v in plain.items() if k not in MANAGEMENT})
        return run
    p = prepare(c, parts)
    rd = p.run_dir
    with (files.FolderLock(rd, what="run folder") if rd is not None else contextlib.nullcontext()):
        previous = None
        if rd is not None:
            previous = _prepare_run_dir(rd, c.overwrite)
            files.remove_temporaries(rd)  # left by a process killed between a write and its rename (plots/ too)
            if (rd / CHECKPOINT).exists():
                state = load_checkpoint(rd / CHECKPOINT)
                check_folder_config(rd, state)
                p.trainer.load_state_dict(state, source=str(rd / CHECKPOINT))
                if previous is not None and p.trainer.step != p.trainer.steps:
                    raise ValueError(f"{rd / SUMMARY} records a finished run, but {rd / CHECKPOINT} holds the state "
                                     f"after {p.trainer.step} of {p.trainer.steps} steps; the folder was changed "
                                     "by hand. Pass overwrite=True (CLI: overwrite=true) to retrain.")
            else:
                from omegaconf import OmegaConf

                files.write_text(rd / "config.yaml", OmegaConf.to_yaml(OmegaConf.create(p.plain)))
        if group is not None:
            group.barrier()  # the folder is ready: the other ranks may read its checkpoint (distributed.follow)
        with tracked(c, p.trainer, p.plain, (Interrupted, KeyboardInterrupt)) as tracking:  # nothing unless c.track
            run = complete(p, previous)
            if rd is not None:
                files.write_json(rd / SUMMARY, run.summary)
            tracking.finish(run)
    return run


def check_folder_config(run_dir: Path, state: Mapping[str, Any]) -> None:
    """Refuse to resume from a run folder whose ``config.yaml`` no longer matches its checkpoint (``state``, as
    loaded): a hand-edited config would otherwise be silently ignored. Names the differing settings, and the file
    when it cannot be read. Settings that do not change a run's numbers (:data:`~adaptkit.config.MANAGEMENT`) may
    differ."""
    from omegaconf import OmegaConf

    from .train.loop import _config_diff

    path = run_dir / "config.yaml"
    recorded = state.get("config") if isinstance(state, Mapping) else None  # a foreign file: the loader refuses it
    if not path.exists() or not isinstance(recorded, Mapping):
        return
    try:
        written = OmegaConf.to_container(OmegaConf.load(path), resolve=False)
    except Exception as e:  # noqa: BLE001 — yaml, OmegaConf and OS errors alike: name the file
        first = str(e).splitlines()[0] if str(e) else ""
        raise ValueError(f"{path} cannot be read as a config ({type(e).__name__}: {first}); restore it, or start "
                         "a new run folder.") from None
    if not isinstance(written, dict):
        raise ValueError(f"{path} holds a {type(written).__name__}, not a mapping of run settings; restore it, or "
                         "start a new run folder.")
    diff = _config_diff({k: v for k, v in recorded.items() if k not in MANAGEMENT},
                        {k: v for k, v in written.items() if k not in MANAGEMENT})
    if diff:
        shown = "; ".join(diff[:8]) + (f"; and {len(diff) - 8} more" if len(diff) > 8 else "")
        raise ValueError(f"{path} no longer matches the checkpoint beside it ({shown}; checkpoint -> config.yaml): "
                         "a run resumes with the settings it started with. Restore config.yaml to resume, or train "
                         "the new settings in another run_dir.")


@dataclass
class Prepared:
    """A run ready to train: its resolved config and built parts, and the :class:`Trainer` that will train it."""

    config: RunConfig
    pair: DomainPair
    model: AdaptedModel
    method: Alignment
    trainer: Trainer
    device: torch.device
    plain: Dict[str, Any]  # the config as plain values (config.yaml)
    class_weights: Optional[Dict[str, Any]]

    @property
    def run_dir(self) -> Optional[Path]:
        return Path(self.config.run_dir) if self.config.run_dir is not None else None


def build_parts(c: RunConfig, parts: Mapping[str, Any], input_shape, n_classes: int, device,
                check_memory: bool = False) -> tuple:
    """The untrained model and method a resolved config ``c`` names, for inputs of ``input_shape`` and
    ``n_classes`` classes: the method built, the seed set, the encoder and head built, the method attached (which
    may unshare the target encoder), all on ``device``. Objects in ``parts`` (``method``, ``encoder``, ``head``)
    are used instead of names. What :func:`prepare` and :func:`adaptkit.load_run` both build from. With
    ``check_memory`` (training), a run whose largest tensors cannot fit in the device's free memory is refused
    before any network is built (:func:`adaptkit.train.memory.check_fits`)."""
    if "method" in parts:
        method_obj = parts["method"]
    else:
        options = dict(c.method)
        method_obj = build_method(options.pop("name"), **options)
        c.method = _recorded_method(c.method, method_obj)
    if check_memory:
        from .nets import ENCODERS
        from .train.memory import check_fits

        named = "encoder" not in parts and c.encoder.get("name") in ENCODERS
        check_fits(c, input_shape, method_obj, device, ENCODERS.get(c.encoder["name"]) if named else None)

    seed_everything(c.seed)
    if "encoder" in parts:
        enc = parts["encoder"]
    else:
        options = dict(c.encoder)
        enc = build_encoder(options.pop("name"), input_shape, **options)
    d = feature_size(enc, input_shape)
    if "head" in parts:
        hd = parts["head"]
    else:
        options = dict(c.head)
        hd = build_head(options.pop("name"), d, n_classes, **options)
    model = AdaptedModel(enc, hd, d, n_classes).to(device)
    method_obj.attach(model, SetupInfo(feature_dim=d, n_classes=n_classes, input_shape=input_shape,
                                       batch_size=c.batch_size, steps=c.steps))
    method_obj.to(device)
    return model, method_obj


def prepare(c: RunConfig, parts: Optional[Mapping[str, Any]] = None) -> Prepared:
    """Build everything a resolved config ``c`` names (data, method, networks, batches, evaluator, trainer); train
    nothing. ``parts["estimate"]`` (a label-shift estimate) is used for ``class_weights=estimated``."""
    parts = dict(parts or {})
    dev = check_device_available(resolve_device(c.device), c.device)
    group = distributed.current(c.seed, dev)
    if "data" in parts:
        pair = parts["data"]
    else:
        from .data.shifts import make_shift

        options = dict(c.data)
        pair = make_shift(options.pop("name"), **options)
    model, method_obj = build_parts(c, parts, pair.input_shape, pair.n_classes, dev, check_memory=True)
    if c.target_terms:
        method_obj.add_target_terms(c.target_terms, c.target_terms_schedule)

    if isinstance(pair, DatasetPair):  # read batch by batch through a DataLoader (data/streaming.py)
        _warn_large_batch(c.batch_size, len(pair.source_train), len(pair.target_train))
        class_weights = class_weights_for(c, pair, parts.get("estimate"))
        batches, evaluator = streaming_parts(c, pair, method_obj, dev, class_weights)
    else:
        training = pair.oracle_training_data() if method_obj.uses_target_labels else pair.training_data()
        _warn_large_batch(c.batch_size, len(training.source_x), len(training.target_x))
        class_weights = class_weights_for(c, pair, parts.get("estimate"))
        if class_weights is not None and c.class_weights != "reestimated":
            training = with_class_weights(training, class_weights["ratios"])
        batches = PairedBatches(training, c.batch_size, c.seed, dev)
        evaluator = Evaluator(pair.scoring_sets(), pair.target_train_x, dev, scores=c.scores)
    if class_weights is not None and c.class_weights == "reestimated":  # trust/reweighting.py
        from .trust.reweighting import Reestimating, ReweightedBatches

        sample = pair.in_memory_sample() if isinstance(pair, DatasetPair) else pair
        batches = ReweightedBatches(batches, class_weights["ratios"])
        evaluator = Reestimating(evaluator, batches, sample.source_val, sample.target_train_x, dev)
    selection = None if c.select is None else _selection_rule(c.select, c.scores)
    plain = as_plain(c)
    meta = {"method": method_label(method_obj, c.method["name"]), "data": c.data["name"], "seed": c.seed,
            "post_training": post_training_plan(c),  # pending until complete() has run each step
            "config_hash": config_hash(c), "config": {k: v for k, v in plain.items() if k not in MANAGEMENT},
            "input_shape": list(pair.input_shape), "n_classes": pair.n_classes,  # what load_run rebuilds for
            "versions": versions(), "adaptkit_warning": ADAPTATION_WARNING,
            "world_size": 1 if group is None else group.world_size}  # processes that trained it (torchrun)
    rd = Path(c.run_dir) if c.run_dir is not None and (group is None or group.is_main) else None  # rank 0 writes
    if group is not None:
        group.broadcast_state((model, method_obj))
    trainer = Trainer(model, method_obj, batches, steps=c.steps, optim=c.optim, evaluate=evaluator,
                      eval_every=c.eval_every, checkpoint_every=c.checkpoint_every, run_dir=rd,
                      progress=c.progress if group is None or group.is_main else False, meta=meta, select=selection,
                      on_nonfinite=c.on_nonfinite, check_gradients=c.check_gradients, distributed=group,
                      precision=c.precision, device=dev)
    return Prepared(c, pair, model, method_obj, trainer, dev, plain, class_weights)


class _Stop(BaseException):
    """A SIGTERM/SIGINT during the post-training phase (a BaseException, so no broad ``except`` in a diagnostic
    swallows it); :func:`complete` turns it into :class:`~adaptkit.train.loop.Interrupted`."""


@contextlib.contextmanager
def _stop_on_signals(enabled: bool):
    """SIGTERM/SIGINT raise :class:`_Stop` at once inside the block (main thread only). The post-training steps
    can stop anywhere: each writes its files atomically and is recorded done only after them, and a rerun redoes
    a step that was stopped. The training loop installs its own handlers while it runs and puts these back."""
    import signal
    import threading

    if not enabled or threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum, frame):
        raise _Stop(signal.Signals(signum).name)

    old = {sig: signal.signal(sig, handler) for sig in (signal.SIGTERM, signal.SIGINT)}
    try:
        yield
    finally:
        for sig, h in old.items():
            signal.signal(sig, h)


def _interrupted(p: Prepared, steps_left: List[str], signal_name: str) -> Interrupted:
    rd = p.run_dir
    if rd is None:
        return Interrupted(f"interrupted ({signal_name}): training finished, stopped in the post-training "
                           f"{steps_left[0].replace('_', '-')} step (no run_dir: nothing saved)")
    return Interrupted(f"interrupted, resumable: training finished ({p.trainer.steps} steps); stopped ({signal_name}) "
                       f"in the post-training phase before {', '.join(s.replace('_', '-') for s in steps_left)} "
                       f"{'was' if len(steps_left) == 1 else 'were'} done; rerun the same command (or fit with the "
                       f"same run_dir) to complete {'it' if len(steps_left) == 1 else 'them'} without retraining, "
                       f"from {rd}")


def _warn_large_batch(batch_size: int, n_source: int, n_target: int) -> None:
    """Warn (once per run) when a batch is larger than a domain's training set: each batch then repeats samples,
    drawn across passes of the shuffled data, and costs memory for nothing."""
    over = [f"the {name} ({n} training samples)" for name, n in (("source", n_source), ("target", n_target))
            if batch_size > n]
    if over:
        import warnings

        warnings.warn(f"batch_size={batch_size} is larger than {' and '.join(over)}: every batch repeats samples. "
                      f"A batch_size of at most {min(n_source, n_target)} draws each sample at most once per batch.",
                      UserWarning, stacklevel=3)


def complete(p: Prepared, previous: Optional[Mapping[str, Any]] = None) -> Run:
    """Train ``p`` to its last step (from wherever its trainer stands), then run the post-training phase: the
    label-shift estimate every summary carries, the class weights used and, when asked, the diagnostics and their
    plots. ``previous``: the summary of a finished run whose post-training phase is unfinished (its trainer
    restored from the final checkpoint): nothing is trained, only the steps it still owes are run.

    Each post-training step is recorded in ``summary["post_training"]`` (``pending`` → ``done``; ``off`` when not
    asked) and, with a run folder, the summary is written after each. SIGTERM/SIGINT during the phase raise
    :class:`~adaptkit.train.loop.Interrupted` ("interrupted, resumable"), as they do during training."""
    c, rd = p.config, p.run_dir
    with _stop_on_signals(p.trainer.handle_signals):
        todo: List[str] = []
        try:
            if previous is None:
                summary = p.trainer.run()
                getattr(p.trainer.batches, "close", lambda: None)()  # a DataLoader's workers end with training
                plan = summary["post_training"] = dict(summary.get("post_training") or post_training_plan(c))
                todo = [s for s in POST_TRAINING if plan.get(s) == PENDING]
                if p.trainer._stop_requested and todo:  # a signal in the last step: stop before the phase
                    raise _Stop("SIGTERM or SIGINT")
            else:
                summary = dict(previous)
                todo = unfinished_steps(rd, summary)
                plan = summary["post_training"] = dict(summary["post_training"])
                for step in todo:
                    plan[step] = PENDING
            run = Run(model=p.model, method=p.method, history=p.trainer.history, summary=summary, data=p.pair,
                      run_dir=rd, device=p.device)
            if p.class_weights is not None:
                summary["class_weights"] = final_class_weights(p)
            while todo:
                post_training_step(todo[0], run, c)
                plan[todo[0]] = DONE
                if rd is not None:
                    files.write_json(rd / SUMMARY, summary)
                todo.pop(0)  # only now: a stop inside the write above leaves the step owed on disk, and says so
        except _Stop as stop:
            if not todo:  # the loop's final writes: the folder keeps its last checkpoint, training resumes
                raise Interrupted(f"interrupted, resumable: stopped ({stop}) before the end of training was saved; "
                                  "rerun the same command (or fit with the same run_dir) to continue"
                                  + (f" from {rd}" if rd else " (no run_dir: nothing saved)")) from None
            raise _interrupted(p, todo, str(stop)) from None
    return run


def save_run(run: Run, p: Prepared) -> None:
    """Write a run trained in memory into the run folder its config names (config, checkpoint, metrics, summary),
    each file atomically, under the folder's lock — for runs trained apart from their folder (guarded runs)."""
    from omegaconf import OmegaConf

    rd = p.run_dir
    if rd is None:
        return
    with files.FolderLock(rd, what="run folder"):
        _prepare_run_dir(rd, p.config.overwrite)
        files.write_text(rd / "config.yaml", OmegaConf.to_yaml(OmegaConf.create(p.plain)))
        p.trainer.run_dir = rd
        p.trainer.save_checkpoint()
        files.write_jsonl(rd / METRICS, run.history)
        files.write_json(rd / SUMMARY, run.summary)


def _settings_help() -> str:
    docs = setting_docs()
    defaults = RunConfig()
    lines = []
    for name in SETTINGS:
        if name in GROUPS:
            continue
        value = getattr(defaults, name)
        shown = "OptimSettings()" if name == "optim" else repr(value)
        lines.append(f"        {name}={shown}: {docs.get(name, '')}")
    return "\n".join(lines)


def _settings_signature() -> inspect.Signature:
    own = [p for p in inspect.signature(fit).parameters.values() if p.kind is not p.VAR_KEYWORD]
    defaults = RunConfig()
    run = [inspect.Parameter(n, inspect.Parameter.KEYWORD_ONLY, default=getattr(defaults, n))
           for n in SETTINGS if n not in GROUPS]
    return inspect.Signature(own + run + [inspect.Parameter("method_options", inspect.Parameter.VAR_KEYWORD)],
                             return_annotation=Run)


fit.__doc__ = fit.__doc__.rstrip() + "\n\n    Run settings (each a field of RunConfig, with its default):\n\n" + _settings_help() + "\n"
fit.__signature__ = _settings_signature()


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
