"""Alignment methods. Importing this package registers every bundled method in :data:`METHODS`."""
from . import adda, adr, confusion, coral, dann, feature_loss, mmd, source_only, target_oracle  # noqa: F401 (registers)
from .base import METHODS, Alignment, Progress, SetupInfo, Stage, Update, build_method

__all__ = ["METHODS", "Alignment", "Progress", "SetupInfo", "Stage", "Update", "build_method"]
