"""Alignment methods. Importing this package registers every bundled method in :data:`METHODS`."""
from . import (adda, adr, cdan, confusion, coral, dann, feature_loss, mcd, mmd, self_training,  # noqa: F401 (registers)
               source_only, target_oracle)
from .base import (METHODS, Alignment, DistanceAlignment, Progress, SetupInfo, Stage, Update, WeightOptions,
                   build_method)

__all__ = ["METHODS", "Alignment", "DistanceAlignment", "Progress", "SetupInfo", "Stage", "Update", "WeightOptions",
           "build_method"]
