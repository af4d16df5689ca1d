"""Trust: what can be said without target labels — the target's class proportions, class weights for alignment,
a label-free choice among candidate runs, and a guard that keeps an adaptation only where the evidence favours it.

Nothing here can prove an adapted model better than source-only: that needs labelled target data. See
:mod:`adaptkit.safety`.
"""
from .label_shift import LabelShiftEstimate, bbse, calibrate, class_ratios, em_priors, estimate_label_shift

__all__ = ["LabelShiftEstimate", "bbse", "calibrate", "class_ratios", "em_priors", "estimate_label_shift"]
