"""The words every face of adaptkit says about adapting without target labels — written once, here.

The notebook face (:func:`adaptkit.fit`), the command line, the scikit-learn estimator, the benchmark report and
the selection study all show these texts; nothing else in the package spells them out again.
"""

ADAPTATION_WARNING = (
    "Adaptation without target labels can silently make a model worse than training on the source alone. "
    "Validate on a labelled target sample before any use where errors can hurt someone, following the rules "
    "of your field."
)

#: Beside every table of target accuracies (benchmark reports): those numbers used labels deployments lack.
REPORT_NOTE = (
    "Adaptation without target labels can make a model worse than source-only. "
    "The target accuracies in this report were computed with target labels, which real deployments do not have. "
    "Validate on a labelled target sample before any use where errors can hurt someone, "
    "following the rules of your field."
)

#: Beside every comparison of label-free selection scores.
SCORE_WARNING = (
    "No label-free score replaces a labelled target sample. Every score below is computed without target labels, "
    "and every one of them can pick a candidate far below the best; the regrets here were measured *with* target "
    "labels, which a real deployment does not have. If choosing wrongly can hurt someone, label a sample of the "
    "target domain and choose with it."
)
