"""Arrays in, predictions out: ``AlignedClassifier`` with scikit-learn's conventions.

Source rows carry their labels; target rows are marked ``y == -1`` (scikit-learn's semi-supervised convention).
The data: scikit-learn's bundled wine table, split by a selection on alcohol content (the bundled
``selection_bias`` shift), so the target holds mostly the wines the source under-represents.

    python examples/arrays.py
"""
import os

import numpy as np

from adaptkit import ADAPTATION_WARNING, AlignedClassifier
from adaptkit.data import make_shift

STEPS = int(os.environ.get("EXAMPLE_STEPS", 800))

pair = make_shift("selection_bias", seed=0)
X_source = np.r_[pair.source_train.x.numpy(), pair.source_val.x.numpy()]
y_source = np.r_[pair.source_train.y.numpy(), pair.source_val.y.numpy()]
X_target = pair.target_train_x.numpy()
X = np.r_[X_source, X_target]
y = np.r_[y_source, -np.ones(len(X_target), dtype=int)]  # -1: unlabelled target rows

clf = AlignedClassifier(method="mmd", max_steps=STEPS, batch_size=32, optimizer="adam", lr=1e-3, random_state=0)
clf.fit(X, y)
print("predictions for the first target rows:", clf.predict(X_target[:8]))
print("features:", clf.transform(X_target).shape)
# This toy has target labels, kept aside for scoring: a real deployment would need a labelled target sample here.
target_test_accuracy = (clf.predict(pair.target_test_x.numpy()) == pair.scoring_sets()["target_test"].y.numpy()).mean()
print(f"target accuracy on the held-out target rows: {target_test_accuracy:.3f}")
print(ADAPTATION_WARNING)
