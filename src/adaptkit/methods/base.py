"""The alignment-module protocol: how every method — source-only, DANN, ADDA, ADR, … — plugs into the one loop.

An *alignment module* is an ``nn.Module`` that owns the extra networks its method needs (a discriminator, a target
encoder) and declares its training as a list of **stages** run one after another. Each stage holds an ordered list
of **updates**; every training step draws one paired batch and runs the stage's updates in order. An update names
the modules whose parameters it changes and the loss it minimises on the batch; the loop gives each update its
own optimiser, so an update changes exactly the parameters it declares and nothing else.

The loop never branches on a method's name. To add a method: subclass :class:`Alignment`, give it an ``Options``
dataclass and a ``stages()`` method, and register it with ``@METHODS.register("name")``. A method of the form
"source CE + λ·distance(source features, target features)" subclasses :class:`DistanceAlignment` and writes only
its distance.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, ClassVar, Dict, List, Mapping, NamedTuple, Optional, Sequence, Tuple, Union

import torch
from torch import nn

from .._checks import build_options, check_number
from ..data.batches import Batch
from ..losses import info_max_loss, mean_entropy, weighted_cross_entropy
from ..nets.model import AdaptedModel
from ..registry import Registry
from ..train.schedules import WEIGHT_SCHEDULES, bind, weight_schedule

METHODS: Registry = Registry("method")

LossOut = Tuple[torch.Tensor, Dict[str, torch.Tensor]]  # (scalar loss, {name: scalar to log}); logs may be {}

#: Terms on the target predictions that the run setting ``target_terms`` adds to any method (functions of the
#: target logits, to minimise): entropy minimisation (Grandvalet & Bengio, NeurIPS 2004) and information
#: maximisation (its negative, as used for adaptation by Liang, Hu & Feng, ICML 2020).
TARGET_TERMS: Dict[str, Callable[[torch.Tensor], torch.Tensor]] = {"entropy": mean_entropy, "info_max": info_max_loss}


class Progress(NamedTuple):
    """Where training stands when an update runs (a named tuple: built once per step, cheaply)."""

    step: int  # global step, 0-based
    stage: str  # name of the current stage
    stage_step: int  # step within the stage, 0-based
    p: float  # progress through the stage: stage_step / stage_steps, in [0, 1)


@dataclass(frozen=True)
class SetupInfo:
    """What a method may check and size itself by before training starts."""

    feature_dim: int
    n_classes: int
    input_shape: Tuple[int, ...]
    batch_size: int
    steps: int


@dataclass
class Update:
    """One optimisation step: change the parameters of ``modules`` to minimise ``loss(batch, progress)``.

    ``loss`` returns ``(loss, logs)``: the scalar tensor to minimise and a dict ``{name: scalar}`` of values to log
    (averaged between evaluations and recorded as ``<update name>/<name>``; ``{}`` when there is nothing to add —
    the loss itself is always recorded as ``loss/<update name>``). Every bundled method's updates return this pair,
    so a caller unwraps one form only. The loss may send
    gradients into modules it does not declare (e.g. the discriminator through a confusion loss): the loop clears
    every declared parameter's gradient before the update's backward pass and steps only the declared ones, so
    such gradients are never applied. ``repeat`` runs the update
    that many times on the same batch (ADR's generator step). ``optimizer`` overrides the run's optimiser settings
    for this update only (e.g. ``{"name": "adam", "lr": 2e-4, "betas": [0.5, 0.999]}``); the run's learning-rate
    schedule (``optim.schedule``) scales the overridden rate too.
    """

    name: str
    modules: Sequence[nn.Module]
    loss: Callable[[Batch, Progress], LossOut]
    repeat: int = 1
    optimizer: Dict[str, Any] = field(default_factory=dict)

    def parameters(self) -> List[nn.Parameter]:
        seen, out = set(), []
        for m in self.modules:
            for p in m.parameters():
                if p.requires_grad and id(p) not in seen:
                    seen.add(id(p))
                    out.append(p)
        return out


@dataclass
class Stage:
    """A phase of training: ``share`` of the run's steps, each running ``updates`` in order."""

    name: str
    updates: List[Update]
    share: float = 1.0


@dataclass
class WeightOptions:
    """The options every weighted alignment method shares; its ``Options`` extend this dataclass (a subclass may
    give a field another default). :class:`Alignment` validates both and builds λ_p from them."""

    weight: float = 1.0  # λ on the alignment term, >= 0
    weight_schedule: str = "constant"  # factor on λ over progress p: one of schedules.WEIGHT_SCHEDULES


class Alignment(nn.Module):
    """Base class of every method. Subclasses set ``name``, an ``Options`` dataclass, and ``stages()``.

    Constructor arguments are stored verbatim in ``self.options`` (validated, unknown keys refused); learned state
    lives in submodules created by :meth:`setup`, so a method can be rebuilt from its config. Options that extend
    :class:`WeightOptions` get ``weight`` and ``weight_schedule`` checked here, and :meth:`weight_at` gives λ_p;
    a schedule's parameters are read from the options of the same name (DANN's ``gamma`` → ``dann_ramp``).
    """

    name: ClassVar[str] = ""
    uses_target_labels: ClassVar[bool] = False  # True only for the target-oracle upper bound
    uses_target_data: ClassVar[bool] = True  # False for a method that trains on the source alone (source_only)
    preferred_head: ClassVar[Any] = "linear"  # the head a run uses when none is set (a name or {name, options})
    reference: ClassVar[str] = ""  # the paper, for reports

    @dataclass
    class Options:
        pass

    def __init__(self, **options):
        super().__init__()
        owner = f"method {self.name!r}"
        self.options = build_options(self.Options, owner, options)
        self._weight_fn: Optional[Callable[[float], float]] = None
        if all(hasattr(self.options, k) for k in ("weight", "weight_schedule")):  # WeightOptions, or the same fields
            check_number("weight", owner, self.options.weight, low=0)
            self._weight_fn = weight_schedule(self.options.weight_schedule, owner, vars(self.options))
        self.validate_options()
        self._model: Optional[AdaptedModel] = None

    # -- to override --------------------------------------------------------------------------------------
    def validate_options(self) -> None:
        """Check ranges of ``self.options``; raise ValueError/TypeError naming the option."""

    def setup(self, model: AdaptedModel, info: SetupInfo) -> None:
        """Build the method's own networks (sized by ``info``) and check it can run on this data."""

    def stages(self) -> List[Stage]:
        raise NotImplementedError

    def on_stage_start(self, stage: Stage) -> None:
        """Called once when a stage begins (not again when a run resumes inside it)."""

    def memory_needs(self, batch_size: int) -> list:
        """The large tensors this method builds per batch beyond the networks' (e.g. MMD's batch × batch kernel
        matrices), as :class:`adaptkit.train.memory.Need` entries, for the check before training that refuses a
        run that cannot fit. Default: none."""
        return []

    # -- plumbing ------------------------------------------------------------------------------------------
    def add_target_terms(self, terms: Mapping[str, float], schedule: str = "constant") -> None:
        """Add Σ_k w_k·s(p)·term_k(target logits) (:data:`TARGET_TERMS`, ``s`` a weight schedule) to the first
        update of every stage that trains an encoder — the run setting ``target_terms``, for any method. The
        target logits are the model's on the target batch, through the encoder that serves the target at that
        moment; the update changes only the modules it declares, as always."""
        unknown = sorted(k for k in terms if k not in TARGET_TERMS)
        if unknown:
            raise ValueError(f"Unknown target term {unknown[0]!r}; accepted: {sorted(TARGET_TERMS)}.")
        object.__setattr__(self, "_target_terms", {k: float(w) for k, w in terms.items() if w})
        object.__setattr__(self, "_terms_schedule",
                           bind(WEIGHT_SCHEDULES, schedule, param="target_terms_schedule", owner="the run settings"))

    @property
    def target_terms(self) -> Dict[str, float]:
        return dict(getattr(self, "_target_terms", {}))

    def training_stages(self) -> List[Stage]:
        """:meth:`stages` with the target terms (if any) added: what the loop trains."""
        stages = self.stages()
        terms = self.target_terms
        if not terms:
            return stages
        model = self.model
        encoders = {id(p) for m in (model.source_encoder, model.target_encoder) for p in m.parameters()}
        for stage in stages:
            for u in stage.updates:
                if any(id(p) in encoders for p in u.parameters()):
                    u.loss = self._with_terms(u.loss, terms)
                    break
        return stages

    def _with_terms(self, loss: Callable[[Batch, Progress], LossOut], terms: Dict[str, float]):
        schedule = self._terms_schedule

        def with_terms(batch: Batch, t: Progress) -> LossOut:
            value, logs = loss(batch, t)
            logits = self.model(batch.x_tgt, domain="target")
            factor = schedule(t.p)
            logs = dict(logs)
            for name, w in terms.items():
                term = TARGET_TERMS[name](logits)
                logs[f"target_{name}"] = term.detach()
                value = value + (w * factor) * term
            return value, logs

        return with_terms

    def attach(self, model: AdaptedModel, info: SetupInfo) -> None:
        # Held outside nn.Module's registry so the model's parameters are not saved twice in a checkpoint.
        object.__setattr__(self, "_model", model)
        self.setup(model, info)

    @property
    def model(self) -> AdaptedModel:
        if self._model is None:
            raise RuntimeError(f"method {self.name!r} is not attached to a model yet; call attach() first")
        return self._model

    def weight_at(self, p: float) -> float:
        """λ_p = ``options.weight`` × weight_schedule(p), for options with the fields of :class:`WeightOptions`."""
        if self._weight_fn is None:
            raise TypeError(f"method {self.name!r} has no alignment weight: its Options lack the fields of "
                            "WeightOptions (weight, weight_schedule)")
        return self.options.weight * self._weight_fn(p)

    def source_loss(self, batch: Batch, t: Optional[Progress] = None) -> LossOut:
        """Cross-entropy of the model on the labelled source batch (per-sample weights honoured), as an update's
        ``(loss, {})``."""
        logits = self.model(batch.x_src, domain="source")  # (B, K)
        return weighted_cross_entropy(logits, batch.y_src, batch.w_src), {}

    def describe(self) -> Dict[str, Any]:
        """Name and options as plain values (a function option as its import path ``module.qualname``)."""
        from dataclasses import fields

        def plain(v):
            if callable(v) and not isinstance(v, type):
                return f"{getattr(v, '__module__', '?')}.{getattr(v, '__qualname__', repr(v))}"
            return list(v) if isinstance(v, tuple) else v

        return {"name": self.name, **{f.name: plain(getattr(self.options, f.name)) for f in fields(self.options)}}


class DistanceAlignment(Alignment):
    """Base of the methods "encoder+head ← CE(source) + λ_p·D(source features, target features)" (Deep CORAL,
    MMD, a user's feature loss): a subclass writes only :meth:`distance`, as torch's loss modules are thin wrappers
    over a pure function (the function itself lives in :mod:`adaptkit.losses`).

    One update, ``classify_align``, over encoder and head; it logs ``ce`` and ``align`` (= D). λ_p is
    ``weight × weight_schedule(p)`` (:class:`WeightOptions`, which the subclass's ``Options`` extend).
    ``min_batch_size`` > 1 makes :meth:`setup` refuse smaller batches, saying ``min_batch_reason``.

    Example:
        >>> class MeanGap(DistanceAlignment):
        ...     name = "mean_gap"
        ...     def distance(self, f_s, f_t, w_src):
        ...         return (f_s.mean(0) - f_t.mean(0)).pow(2).sum()
        >>> MeanGap(weight=0.5).options
        DistanceAlignment.Options(weight=0.5, weight_schedule='constant')
    """

    min_batch_size: ClassVar[int] = 1
    min_batch_reason: ClassVar[str] = ""

    @dataclass
    class Options(WeightOptions):
        pass

    def distance(self, f_s: torch.Tensor, f_t: torch.Tensor, w_src: Optional[torch.Tensor]) -> torch.Tensor:
        """The alignment term D, a scalar. Shape: f_s ``(B, F)``, f_t ``(B, F)``, w_src ``(B,)`` or None."""
        raise NotImplementedError

    def setup(self, model: AdaptedModel, info: SetupInfo) -> None:
        if info.batch_size < self.min_batch_size:
            raise ValueError(f"method {self.name!r} needs a batch size of at least {self.min_batch_size} "
                             f"({self.min_batch_reason}); got batch_size={info.batch_size}.")

    def loss(self, batch: Batch, t: Progress) -> LossOut:
        m = self.model
        f_s = m.features(batch.x_src, domain="source")  # (B, F)
        f_t = m.features(batch.x_tgt, domain="target")  # (B, F)
        ce = weighted_cross_entropy(m.head(f_s), batch.y_src, batch.w_src)
        align = self.distance(f_s, f_t, batch.w_src)
        lam = self.weight_at(t.p)
        return ce + lam * align, {"ce": ce.detach(), "align": align.detach()}

    def stages(self) -> List[Stage]:
        m = self.model
        return [Stage("train", [Update("classify_align", [m.encoder, m.head], self.loss)])]


def build_method(name_or_obj: Union[str, Alignment, Callable], **options) -> Alignment:
    """A method from its registry name (with options), an ``Alignment`` instance, or a plain loss function
    ``(source_features, target_features) -> loss`` (wrapped by the ``feature_loss`` method)."""
    if isinstance(name_or_obj, Alignment):
        if options:
            raise ValueError(f"options {sorted(options)} were given with an already built method object; "
                             "set them on the object instead.")
        return name_or_obj
    if isinstance(name_or_obj, str):
        if "." in name_or_obj and name_or_obj not in METHODS:
            return _import_method(name_or_obj, options)
        return METHODS.get(name_or_obj)(**options)
    if isinstance(name_or_obj, type) and issubclass(name_or_obj, Alignment):
        return name_or_obj(**options)
    if callable(name_or_obj):
        return METHODS.get("feature_loss")(loss_fn=name_or_obj, **options)
    raise TypeError(f"method must be a registered name ({', '.join(METHODS.names())}), an Alignment, or a loss "
                    f"function; got {type(name_or_obj).__name__}.")


def _import_method(path: str, options: Dict[str, Any]) -> Alignment:
    """``package.module.Name``: an Alignment subclass, or a loss function wrapped by ``feature_loss``.
    Importing runs that module's code: treat such a config like code."""
    from ..registry import import_object

    try:
        obj = import_object(path)
    except (ImportError, AttributeError) as e:
        raise ValueError(f"method {path!r} is neither a registered method ({', '.join(METHODS.names())}) nor an "
                         f"importable 'module.attribute': {e}") from None
    if not (isinstance(obj, type) and issubclass(obj, Alignment)) and not callable(obj):
        raise TypeError(f"method {path!r} must name an Alignment subclass or a loss function; got {obj!r}.")
    return build_method(obj, **options)
