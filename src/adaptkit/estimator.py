"""AlignedClassifier: the scikit-learn face of adaptkit. Arrays in, predictions out.

Rows with ``y == -1`` are the unlabelled target domain (scikit-learn's semi-supervised convention); every other
row is labelled source. ``predict`` answers for target data (the deployed use).
"""
from __future__ import annotations

import warnings
from typing import Any, Dict, Optional

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin, TransformerMixin
from sklearn.utils.multiclass import type_of_target
from sklearn.utils.validation import check_is_fitted, check_random_state, validate_data

from .data.pair import UNLABELLED, DomainPair, _check_float32_range

_DTYPES = (np.float32, np.float64)


class AlignedClassifier(ClassifierMixin, TransformerMixin, BaseEstimator):
    """A neural classifier trained on labelled source rows and aligned to unlabelled target rows.

    Args:
        method: alignment method name (``adaptkit.methods.METHODS.names()``) or a loss function
            ``(source_features, target_features) -> loss``.
        encoder, head: registered names or ``nn.Module`` instances (cloned per fit).
        max_steps: training steps; ``batch_size``: samples per domain per step.
        lr, optimizer, lr_schedule: optimiser settings (see ``adaptkit.train.optim.OptimSettings``).
        method_options, encoder_options, head_options: options of those components.
        validation_fraction: share of source rows held out for the validation metrics in ``history_``.
        random_state: seed (``None``: a fresh one per fit, scikit-learn's convention).
        device: ``"auto"``, ``"cpu"`` or ``"cuda"``.
        verbose: show a progress bar.

    Adaptation without target labels can silently make a model worse; check on a labelled target sample.

    Example:
        >>> import numpy as np
        >>> X = np.r_[np.random.default_rng(0).normal(size=(60, 2)), np.random.default_rng(1).normal(size=(40, 2))]
        >>> y = np.r_[np.arange(60) % 2, -np.ones(40, int)]
        >>> clf = AlignedClassifier(method="coral", max_steps=20, random_state=0).fit(X, y)  # doctest: +SKIP
        >>> clf.predict(X[:3]).shape  # doctest: +SKIP
        (3,)
    """

    def __init__(self, method="source_only", encoder="mlp", head="linear", max_steps: int = 1000,
                 batch_size: int = 64, lr: float = 0.01, optimizer: str = "sgd", lr_schedule: str = "constant",
                 method_options: Optional[Dict[str, Any]] = None, encoder_options: Optional[Dict[str, Any]] = None,
                 head_options: Optional[Dict[str, Any]] = None, validation_fraction: float = 0.1,
                 random_state=None, device: str = "auto", verbose: bool = False):
        self.method = method
        self.encoder = encoder
        self.head = head
        self.max_steps = max_steps
        self.batch_size = batch_size
        self.lr = lr
        self.optimizer = optimizer
        self.lr_schedule = lr_schedule
        self.method_options = method_options
        self.encoder_options = encoder_options
        self.head_options = head_options
        self.validation_fraction = validation_fraction
        self.random_state = random_state
        self.device = device
        self.verbose = verbose

    def _check_X(self, X, reset: bool) -> np.ndarray:
        X = validate_data(self, X, reset=reset, allow_nd=True, dtype=_DTYPES, ensure_min_samples=1)
        if X.dtype == np.float64:  # the network computes in float32: larger finite values would become inf
            _check_float32_range(X, "X")
        if reset:
            self._input_shape = X.shape[1:]
        elif X.shape[1:] != self._input_shape:
            raise ValueError(f"X has samples of shape {X.shape[1:]}, but {type(self).__name__} was fitted on "
                             f"samples of shape {self._input_shape}.")
        return X

    def fit(self, X, y):
        """Fit on source rows (``y != -1``) aligned to target rows (``y == -1``)."""
        import copy

        from .run import fit as run_fit
        from .train.loop import DivergenceError

        if y is None:
            raise ValueError(f"{type(self).__name__} requires y to be passed, but the target y is None. Mark "
                             "unlabelled target rows with -1.")
        X = self._check_X(X, reset=True)
        y = np.asarray(y)
        if y.ndim == 2 and y.shape[1] == 1:
            warnings.warn("A column-vector y was passed when a 1d array was expected.", _data_conversion_warning())
            y = y.ravel()
        if y.ndim != 1:
            raise ValueError(f"y must be 1-D with one label per row; got shape {y.shape}.")
        if y.shape[0] != X.shape[0]:
            raise ValueError(f"X has {X.shape[0]} rows but y has {y.shape[0]}; lengths must match.")
        if y.dtype.kind in "fc":
            finite = np.all(np.isfinite(y))
        else:  # an object array may hide float NaN/inf among its labels
            finite = y.dtype != object or not any(isinstance(v, (float, np.floating)) and not np.isfinite(v)
                                                  for v in y)
        if not finite:
            raise ValueError("y contains NaN or infinite values; use -1 to mark unlabelled target rows.")
        is_target = _is_unlabelled(y)
        source = ~is_target
        if not source.any():
            raise ValueError("y marks every row as unlabelled target (-1); at least one labelled source row is needed.")
        kind = type_of_target(y[source])
        if kind in ("continuous", "continuous-multioutput", "multilabel-indicator", "multiclass-multioutput"):
            raise ValueError(f"Unknown label type: {kind!r}. AlignedClassifier needs class labels, with -1 for "
                             "unlabelled target rows.")
        try:
            self.classes_, y_enc = np.unique(y[source], return_inverse=True)
        except TypeError:  # unorderable mixtures such as 0 and "a", or None
            kinds = sorted({type(v).__name__ for v in y[source]})
            raise ValueError(f"y mixes label types ({', '.join(kinds)}) among the labelled rows; labels must be all "
                             "numbers or all strings, with -1 for unlabelled target rows.") from None
        method = self.method
        if not is_target.any():
            warnings.warn("y has no unlabelled target rows (y == -1): training source-only, no alignment.",
                          UserWarning)
            method = "source_only"
        xt = X[is_target] if is_target.any() else X[source]
        if len(self.classes_) == 1:
            warnings.warn("only one class in the labelled rows; every prediction will be that class.", UserWarning)
        pair = DomainPair(X[source], y_enc, xt, name="arrays",
                          source_val_fraction=self.validation_fraction if len(y_enc) >= 10 else 0.0,
                          target_test_fraction=0.0, split_seed=0)
        seed = int(check_random_state(self.random_state).randint(0, 2**31 - 1))
        encoder = self.encoder if isinstance(self.encoder, str) else copy.deepcopy(self.encoder)
        head = self.head if isinstance(self.head, str) else copy.deepcopy(self.head)
        optim = {"name": self.optimizer, "lr": self.lr, "schedule": self.lr_schedule}
        try:
            self.run_ = run_fit(pair, method=method, encoder=encoder, head=head, steps=self.max_steps,
                                batch_size=self.batch_size, optim=optim, seed=seed, device=self.device,
                                progress=bool(self.verbose), encoder_options=self.encoder_options,
                                head_options=self.head_options, **dict(self.method_options or {}))
        except DivergenceError as e:  # scikit-learn's MLP raises ValueError here too ("non-finite parameter weights")
            raise ValueError(f"Training produced non-finite values ({str(e).split('. ')[0]}). The input data may "
                             "contain large values and need to be scaled (e.g. sklearn.preprocessing.StandardScaler), "
                             "or lr is too high.") from e
        self.history_ = self.run_.history
        return self

    def predict_proba(self, X) -> np.ndarray:
        check_is_fitted(self, "run_")
        X = self._check_X(X, reset=False)
        p = self.run_.predict_proba(X)
        bad = ~np.isfinite(p).all(axis=1)
        if bad.any():  # finite inputs can still overflow the network (values far outside the training range)
            raise ValueError(f"the model's outputs are not finite for {int(bad.sum())} row(s) of X (first: row "
                             f"{int(np.flatnonzero(bad)[0])}); X holds values far outside the range seen in fit "
                             f"(max |x| = {float(np.abs(X).max()):.3g}). Scale the features as for fit.")
        return p[:, : len(self.classes_)] if len(self.classes_) > 1 else np.ones((X.shape[0], 1))

    def predict(self, X) -> np.ndarray:
        proba = self.predict_proba(X)
        return self.classes_[np.argmax(proba, axis=1)]

    def transform(self, X) -> np.ndarray:
        """Target-side features of ``X``: shape (n_samples, feature_dim)."""
        check_is_fitted(self, "run_")
        X = self._check_X(X, reset=False)
        f = self.run_.features(X)
        if not np.isfinite(f).all():
            raise ValueError(f"the features of X are not finite; X holds values far outside the range seen in fit "
                             f"(max |x| = {float(np.abs(X).max()):.3g}). Scale the features as for fit.")
        return f.astype(X.dtype, copy=False)

    def fit_transform(self, X, y=None, **fit_params):
        if y is None:
            raise ValueError("AlignedClassifier.fit_transform needs y (with -1 for unlabelled target rows).")
        return self.fit(X, y).transform(X)

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = False
        tags.non_deterministic = False
        return tags


def _is_unlabelled(y: np.ndarray) -> np.ndarray:
    if y.dtype.kind in "iuf":
        return y == UNLABELLED
    return np.array([v == UNLABELLED or v == str(UNLABELLED) for v in y], dtype=bool)


def _data_conversion_warning():
    from sklearn.exceptions import DataConversionWarning

    return DataConversionWarning
