"""Choosing an alignment weight with a scikit-learn search when the target has no labels.

``GridSearchCV`` needs a score per fold. ``AlignedClassifier.score`` counts only labelled rows, so in a search it
is a *source* accuracy, blind to what alignment does to the target. ``label_free_scorer("info_max")`` scores each
fold from the fitted model's outputs alone: labelled rows as the source side, unlabelled rows (y = -1) as the
target side. It is a hint, not a target accuracy (benchmarks/SELECTION.md: it picks runs a few points below the
best on average, and far below it sometimes).

The data: the bundled rotated two-moons shift (scikit-learn's ``make_moons``, target rotated by 30°).

    python examples/search_without_target_labels.py
"""
import os

import numpy as np
from sklearn.model_selection import GridSearchCV, KFold

from adaptkit import ADAPTATION_WARNING, AlignedClassifier, label_free_scorer
from adaptkit.data import make_shift

STEPS = int(os.environ.get("EXAMPLE_STEPS", 600))

pair = make_shift("rotated_moons", angle=30, seed=0)
X_source = np.r_[pair.source_train.x.numpy(), pair.source_val.x.numpy()]
y_source = np.r_[pair.source_train.y.numpy(), pair.source_val.y.numpy()]
X_target = pair.target_train_x.numpy()
X = np.r_[X_source, X_target]
y = np.r_[y_source, -np.ones(len(X_target), dtype=int)]  # -1: unlabelled target rows

search = GridSearchCV(
    AlignedClassifier(method="coral", guard=False, max_steps=STEPS, random_state=0),  # the method as published
    {"weight": [1.0, 30.0, 1000.0]},
    scoring=label_free_scorer("info_max"),  # no target label used
    cv=KFold(3, shuffle=True, random_state=0),  # every fold holds source and target rows
)
search.fit(X, y)
scores = {float(w): round(float(v), 3) for w, v in zip(search.cv_results_["param_weight"], search.cv_results_["mean_test_score"])}
print("label-free score (info_max, greater is better) per weight:", scores)
print("chosen weight:", search.best_params_["weight"])

# This toy has target labels, kept aside for checking the choice: a real deployment would need a labelled target
# sample here.
X_test, y_test = pair.target_test_x.numpy(), pair.scoring_sets()["target_test"].y.numpy()
source_only = AlignedClassifier(method="source_only", guard=False, max_steps=STEPS, random_state=0).fit(X, y)
print(f"target accuracy on held-out target rows: chosen model {search.best_estimator_.score(X_test, y_test):.3f}, "
      f"source-only {source_only.score(X_test, y_test):.3f}")
print(ADAPTATION_WARNING)
