"""The alignment-module protocol: how every method — source-only, DANN, ADDA, ADR, … — plugs into the one loop.

An *alignment module* is an ``nn.Module`` that owns the extra networks its method needs (a discriminator, a target
encoder) and declares its training as a list of **stages** run one after another. Each stage holds an ordered list
of **updates**; every training step draws one paired batch and runs the stage's updates in order. An update names
the modules whose parameters it changes and the loss it minimises on the batch; the loop gives each update its
own optimiser, so an update changes exactly the parameters it declares and nothing else.

The loop never branches on a method's name. To add a method: subclass :class:`Alignment`, give it an ``Options``
dataclass and a ``stages()`` method, and register it with ``@METHODS.register("name")``.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, ClassVar, Dict, List, NamedTuple, Optional, Sequence, Tuple, Union

import torch
from torch import nn

from .._checks import build_options
from ..data.batches import Batch
from ..losses import weighted_cross_entropy
from ..nets.model import AdaptedModel
from ..registry import Registry

METHODS: Registry = Registry("method")

LossOut = Union[torch.Tensor, Tuple[torch.Tensor, Dict[str, torch.Tensor]]]


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

    ``loss`` returns a scalar tensor, or ``(scalar, {name: scalar})`` to log extra values. The loss may send
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


class Alignment(nn.Module):
    """Base class of every method. Subclasses set ``name``, an ``Options`` dataclass, and ``stages()``.

    Constructor arguments are stored verbatim in ``self.options`` (validated, unknown keys refused); learned state
    lives in submodules created by :meth:`setup`, so a method can be rebuilt from its config.
    """

    name: ClassVar[str] = ""
    uses_target_labels: ClassVar[bool] = False  # True only for the target-oracle upper bound
    reference: ClassVar[str] = ""  # the paper, for reports

    @dataclass
    class Options:
        pass

    def __init__(self, **options):
        super().__init__()
        self.options = build_options(self.Options, f"method {self.name!r}", options)
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

    # -- plumbing ------------------------------------------------------------------------------------------
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
        """λ at progress ``p``: ``options.weight × schedule(p)`` for methods whose options have ``weight`` and
        ``weight_schedule`` (override :meth:`weight_schedule` for a parametrised schedule)."""
        fn = self.__dict__.get("_weight_fn")
        if fn is None:
            fn = self.__dict__["_weight_fn"] = self.weight_schedule()
        return self.options.weight * fn(p)

    def weight_schedule(self) -> Callable[[float], float]:
        from ..train.schedules import get_schedule

        return get_schedule(self.options.weight_schedule, f"method {self.name!r}")

    def source_loss(self, batch: Batch, t: Optional[Progress] = None) -> torch.Tensor:
        """Cross-entropy of the model on the labelled source batch (per-sample weights honoured)."""
        logits = self.model(batch.x_src, domain="source")  # (B, K)
        return weighted_cross_entropy(logits, batch.y_src, batch.w_src)

    def describe(self) -> Dict[str, Any]:
        """Name and options as plain values (a function option as its import path ``module.qualname``)."""
        from dataclasses import fields

        def plain(v):
            if callable(v) and not isinstance(v, type):
                return f"{getattr(v, '__module__', '?')}.{getattr(v, '__qualname__', repr(v))}"
            return list(v) if isinstance(v, tuple) else v

        return {"name": self.name, **{f.name: plain(getattr(self.options, f.name)) for f in fields(self.options)}}


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
