"""adaptkit: unsupervised domain-adaptation trainers — one loop, interchangeable encoder, head and alignment module.

Adaptation without target labels can silently make a model worse than training on the source alone. Validate on
a labelled target sample before any use where errors can hurt someone, following the rules of your field.
"""
from . import config, measure, select  # noqa: F401 — subpackages a notebook reaches as adaptkit.<name>
from .config import RunConfig
from .data.pair import UNLABELLED, DomainPair
from .data.streaming import DatasetPair
from .export import export_run
from .methods import METHODS, Alignment, DistanceAlignment, Stage, Update, build_method
from .run import Run, fit, train
from .safety import ADAPTATION_WARNING
from .saved import load_run

from ._version import __version__

_LAZY = {"AlignedClassifier": "estimator", "label_free_scorer": "estimator"}  # scikit-learn loads on first use


def __getattr__(name: str):
    """``AlignedClassifier`` and ``label_free_scorer`` import scikit-learn (about a second) only when first used,
    so the commands and worker processes that never need them start faster."""
    if name in _LAZY:
        import importlib

        value = getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'adaptkit' has no attribute {name!r}")

__all__ = ["ADAPTATION_WARNING", "AlignedClassifier", "Alignment", "DatasetPair", "DistanceAlignment", "DomainPair",
           "METHODS", "Run",
           "RunConfig", "Stage", "UNLABELLED", "Update", "build_method", "config", "export_run", "fit", "label_free_scorer", "load_run", "measure", "select", "train"]
