"""Alignment methods. Importing this package registers every bundled method in :data:`METHODS`."""
from . import source_only, target_oracle  # noqa: F401  (registration side effects)
from .base import METHODS, Alignment, Progress, SetupInfo, Stage, Update, build_method

__all__ = ["METHODS", "Alignment", "Progress", "SetupInfo", "Stage", "Update", "build_method"]
