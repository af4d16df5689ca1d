"""AlignedClassifier: the scikit-learn face of adaptkit. Arrays in, predictions out.

Rows with ``y == -1`` are the unlabelled target domain (scikit-learn's semi-supervised convention); every other
row is labelled source. ``predict`` answers for target data (the deployed use).

This face is for practitioners with arrays, so it is *guarded by default*: it chooses the alignment weight
without target labels (``weight="auto"``) and keeps the adaptation only where label-free evidence favours it over
source-only (``guard=True``; see :mod:`adaptkit.trust`). ``fit``, the CLI and the benchmark harness default to the
faithful, unguarded methods so that the papers' protocols stay reproducible.

Scoring: ``score`` and scikit-learn's default scoring ignore the unlabelled rows, so the number is an accuracy
on the labelled *source* rows only. To compare candidates without target labels use the label-free scorers of
:func:`label_free_scorer` (``scoring=label_free_scorer("info_max")`` in ``cross_val_score``/``GridSearchCV``).
"""
from __future__ import annotations

import warnings
from typing import Any, Dict, Optional

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin, ClassNamePrefixFeaturesOutMixin, TransformerMixin
from sklearn.utils.multiclass import type_of_target
from sklearn.utils.validation import check_is_fitted, check_random_state, validate_data

from .data.pair import UNLABELLED, DomainPair, _check_float32_range

_DTYPES = (np.float32, np.float64)


class AlignedClassifier(ClassNamePrefixFeaturesOutMixin, ClassifierMixin, TransformerMixin, BaseEstimator):
    """A neural classifier trained on labelled source rows and aligned to unlabelled target rows.

    Args:
        method: alignment method name (``adaptkit.methods.METHODS.names()``) or a loss function
            ``(source_features, target_features) -> loss``.
        weight: the alignment weight: ``"auto"`` (default) chooses it among candidates without target labels
            (:mod:`adaptkit.trust.candidates`), a number fixes it; ignored by methods without a weight (ADDA,
            source-only).
        guard: compare the adapted model with a source-only one on label-free evidence and keep the adaptation
            only where the evidence favours it (default ``True``); ``summary_["decision"]`` says what was kept and
            why. ``False`` gives the method as published.
        weight_candidates: with ``weight="auto"``, the multiples of the method's default weight tried (``None``:
            the run setting's default, 0.3, 3 and 30); ``choose_by``: the selection rule that picks among them
            (:mod:`adaptkit.trust.rules`; ``None``: the run setting's default).
        encoder, head: registered names or ``nn.Module`` instances (cloned per fit); ``head=None``: the method's
            own choice (a linear layer; ADR: dropout before it).
        max_steps: training steps; ``batch_size``: samples per domain per step.
        lr, optimizer, lr_schedule: optimiser settings (see ``adaptkit.train.optim.OptimSettings``).
        method_options, encoder_options, head_options: options of those components.
        validation_fraction: share of source rows held out for validation (the guard's evidence and
            ``history_``); 0.2 by default (ours: the label-shift estimate needs a few samples of every class).
        random_state: seed (``None``: a fresh one per fit, scikit-learn's convention).
        device: ``"auto"``, ``"cpu"`` or ``"cuda"``.
        verbose: show a progress bar.

    Fitted attributes: ``classes_``, ``history_``, ``summary_`` (the run's summary: label-shift estimate, the
    guard's decision and reasons), ``model_`` (the trained network, on the CPU). No training rows are kept: a
    pickled estimator carries the model, not the data.

    Adaptation without target labels can silently make a model worse; check on a labelled target sample.

    Example:
        >>> import numpy as np
        >>> X = np.r_[np.random.default_rng(0).normal(size=(60, 2)), np.random.default_rng(1).normal(size=(40, 2))]
        >>> y = np.r_[np.arange(60) % 2, -np.ones(40, int)]
        >>> clf = AlignedClassifier(method="coral", max_steps=20, random_state=0).fit(X, y)  # doctest: +SKIP
        >>> clf.predict(X[:3]).shape  # doctest: +SKIP
        (3,)
    """

    def __init__(self, method="source_only", weight="auto", guard: bool = True, weight_candidates=None,
                 choose_by=None, encoder="mlp", head=None,
                 max_steps: int = 1000, batch_size: int = 64, lr: float = 0.01, optimizer: str = "sgd",
                 lr_schedule: str = "constant", method_options: Optional[Dict[str, Any]] = None,
                 encoder_options: Optional[Dict[str, Any]] = None, head_options: Optional[Dict[str, Any]] = None,
                 validation_fraction: float = 0.2, random_state=None, device: str = "auto", verbose: bool = False):
        self.method = method
        self.weight = weight
        self.guard = guard
        self.weight_candidates = weight_candidates
        self.choose_by = choose_by
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

    def fit(self, X, y, sample_weight=None):
        """Fit on source rows (``y != -1``) aligned to target rows (``y == -1``). ``sample_weight`` weights the
        source rows (in the source loss and every alignment term); the weights of target rows must be equal."""
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
        sw = None
        if sample_weight is not None:
            from sklearn.utils.validation import _check_sample_weight

            w = _check_sample_weight(sample_weight, X, dtype=np.float64)
            if (w < 0).any():
                raise ValueError("sample_weight must be non-negative.")
            if is_target.any() and np.ptp(w[is_target]) > 0:
                raise ValueError("sample_weight weights the labelled source rows; the unlabelled target rows "
                                 "(y == -1) must all have the same weight.")
            sw = w[source]
        pair = DomainPair(X[source], y_enc, xt, name="arrays",
                          source_val_fraction=self.validation_fraction if len(y_enc) >= 10 else 0.0,
                          target_test_fraction=0.0, split_seed=0, source_w=sw)
        seed = int(check_random_state(self.random_state).randint(0, 2**31 - 1))
        encoder = self.encoder if isinstance(self.encoder, str) else copy.deepcopy(self.encoder)
        head = self.head if isinstance(self.head, str) else copy.deepcopy(self.head)
        optim = {"name": self.optimizer, "lr": self.lr, "schedule": self.lr_schedule}
        options = dict(self.method_options or {})
        trust = {}
        if method != "source_only":
            if self.weight is not None and "weight" not in options and _has_weight(method):
                options["weight"] = self.weight
            trust["guard"] = bool(self.guard)
            if self.weight_candidates is not None:
                trust["weight_candidates"] = [float(v) for v in self.weight_candidates]
            if self.choose_by is not None:
                trust["choose_by"] = self.choose_by
        try:
            run = run_fit(pair, method=method, encoder=encoder, head=head, steps=self.max_steps,
                          batch_size=self.batch_size, optim=optim, seed=seed, device=self.device,
                          progress=bool(self.verbose), encoder_options=self.encoder_options,
                          head_options=self.head_options, diagnostics=False, **trust, **options)
        except DivergenceError as e:  # scikit-learn's MLP raises ValueError here too ("non-finite parameter weights")
            raise ValueError(f"Training produced non-finite values ({str(e).split('. ')[0]}). The input data may "
                             "contain large values and need to be scaled (e.g. sklearn.preprocessing.StandardScaler), "
                             "or lr is too high.") from e
        self.run_ = run.without_data()  # what prediction needs, not the rows it was trained on
        self.model_, self.history_, self.summary_ = self.run_.model, self.run_.history, self.run_.summary
        self.split_ = {"source_train": len(pair.source_train), "source_val": len(pair.source_val),
                       "target": len(pair.target_train_x)}
        self._n_features_out = self.run_.model.feature_dim
        return self

    def score(self, X, y, sample_weight=None) -> float:
        """Accuracy on the labelled rows of ``X`` only: rows with ``y == -1`` (unlabelled target) are left out, so
        on arrays mixing both domains this is a *source-side* accuracy, not a target accuracy. ``nan`` (with a
        warning) when every row is unlabelled. For a label-free comparison use :func:`label_free_scorer`."""
        from sklearn.metrics import accuracy_score

        y = np.asarray(y).ravel()
        known = ~_is_unlabelled(y)
        if not known.any():
            warnings.warn("score: every row is unlabelled (y == -1); there is no accuracy to compute.", UserWarning)
            return float("nan")
        w = None if sample_weight is None else np.asarray(sample_weight)[known]
        return float(accuracy_score(y[known], self.predict(np.asarray(X)[known]), sample_weight=w))

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


def _has_weight(method) -> bool:
    """Whether ``method`` (a registered name, import path, class or loss function) has a ``weight`` option."""
    import dataclasses

    from .methods import METHODS
    from .registry import import_object

    cls = method
    if isinstance(method, str):
        if method in METHODS:
            cls = METHODS.get(method)
        else:
            try:
                cls = import_object(method)
            except (ImportError, AttributeError):
                return False
    options = getattr(cls, "Options", None)
    if options is None:  # a plain loss function: the feature_loss method, which has a weight
        return callable(cls)
    return "weight" in {f.name for f in dataclasses.fields(options)}


def label_free_scorer(name: str):
    """A scikit-learn scorer ``(estimator, X, y) -> float`` that uses no target label: the selection score
    ``name`` of :mod:`adaptkit.select` computed from the fitted estimator's outputs on ``X`` — labelled rows
    (``y != -1``) as the source-validation side, unlabelled rows (``y == -1``) as the target side — signed so
    that greater is better (risks such as IWCV and DEV are negated), as ``cross_val_score`` and ``GridSearchCV``
    expect. On the bundled toys (benchmarks/SELECTION.md) information maximisation chose best on average; every
    score picked a run far below the best at least once: treat it as a hint, not a target accuracy.

    Example:
        >>> scorer = label_free_scorer("info_max")  # GridSearchCV(AlignedClassifier(...), grid, scoring=scorer)
    """
    from .select import SCORES, ScoreInputs, compute_scores

    if name not in SCORES:
        raise ValueError(f"The 'name' parameter of label_free_scorer must be one of {{{', '.join(map(repr, SCORES))}}}. "
                         f"Got {name!r} instead.")
    sign = 1.0 if SCORES[name].higher_is_better else -1.0

    def scorer(estimator, X, y) -> float:
        X, y = np.asarray(X), np.asarray(y).ravel()
        target = _is_unlabelled(y)
        source = ~target
        if not target.any():
            raise ValueError(f"label_free_scorer({name!r}) needs unlabelled target rows (y == -1) in the scored fold.")
        proba_s = estimator.predict_proba(X[source]) if source.any() else None
        labels = None
        if source.any():
            index = {c: i for i, c in enumerate(estimator.classes_)}
            labels = np.array([index.get(v, -1) for v in y[source]])
            keep = labels >= 0  # a class the estimator never saw cannot be scored
            proba_s, labels = proba_s[keep], labels[keep]
            fs = estimator.transform(X[source])[keep]
        else:
            fs = None
        inputs = ScoreInputs(source_feats=fs, source_probs=proba_s, source_labels=labels,
                             target_feats=estimator.transform(X[target]), target_probs=estimator.predict_proba(X[target]))
        value = compute_scores(inputs, names=[name])[name]
        if value is None:
            raise ValueError(f"label_free_scorer({name!r}) cannot score this fold: it needs labelled source rows too.")
        return sign * float(value)

    scorer.__name__ = f"label_free_{name}"
    return scorer


def _is_unlabelled(y: np.ndarray) -> np.ndarray:
    if y.dtype.kind in "iuf":
        return y == UNLABELLED
    return np.array([v == UNLABELLED or v == str(UNLABELLED) for v in y], dtype=bool)


def _data_conversion_warning():
    from sklearn.exceptions import DataConversionWarning

    return DataConversionWarning
