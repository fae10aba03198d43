"""A scikit-learn classifier that learns an encoding circuit and freezes it into an SVM.

Data flow inside ``fit``: validate (scikit-learn rules) -> build the encoding for the number
of features -> learn and choose the encoding (``selection.learn_and_select``: the untrained
encoding, rescaled bandwidths and trained encodings, compared by nested inner
cross-validation; a learned one is kept only when, on the same inner folds, it beats the
untrained one by more than one standard error of the paired difference) or, with
``select=False``, one ``training.train_encoding`` -> fidelity Gram of the training data
with the chosen parameters -> C by stratified CV (``training.tune_svm_c``) unless given ->
``SVC(kernel="precomputed")``. ``predict`` /
``decision_function`` compute the Gram between new rows and the training rows. Works with
``clone``, ``Pipeline`` and ``GridSearchCV``.
"""

from __future__ import annotations

import functools

import numpy as np
import jax
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.exceptions import NotFittedError as _SklearnNotFittedError
from sklearn.svm import SVC
from sklearn.utils import check_random_state
from sklearn.utils.multiclass import check_classification_targets
from sklearn.utils.validation import validate_data

from hilbertune.circuits import encode_states
from hilbertune.encodings import build_encoding
from hilbertune.errors import InvalidInputError, NotFittedError
from hilbertune.kernels import device_path, quantum_gram
from hilbertune.selection import SelectionSettings, learn_and_select
from hilbertune.training import (TrainingSettings, padded_size, quick_compile,
                                 quick_compile_options, starting_params, train_encoding,
                                 tune_svm_c)

# families whose qubit count follows from the number of features
_FIXED_WIDTH = ("angle", "iqp", "basis", "amplitude")


# States of small problems (at most QUICK_COMPILE_AMPLITUDES amplitudes): compiled quickly,
# because for them compiling dominates; larger ones go through quantum_gram (memory budget,
# blocked products). One compiled function per encoding and padded row count.
@functools.lru_cache(maxsize=1)
def _quick_states():
    return jax.jit(lambda blueprint, params, X: encode_states(blueprint, params, X),
                   static_argnums=0, compiler_options=quick_compile_options())


class UnfittedClassifierError(NotFittedError, _SklearnNotFittedError):
    """Our ``NotFittedError`` that scikit-learn's tools also recognise as theirs."""


def _pad(X):
    extra = padded_size(X.shape[0]) - X.shape[0]
    return X if extra == 0 else np.concatenate([X, np.repeat(X[:1], extra, axis=0)])


class InvalidInputTypeError(InvalidInputError, TypeError):
    """Bad input of the wrong type (e.g. sparse matrices, objects that are not numbers)."""


def _reraise(exc: Exception):
    """scikit-learn's validation messages, raised as our error types on one line."""
    kind = InvalidInputTypeError if isinstance(exc, TypeError) else InvalidInputError
    raise kind(" ".join(str(exc).split())) from None


class EncodingClassifier(ClassifierMixin, BaseEstimator):
    """Learn a data-encoding circuit, then classify with an SVM on its fidelity kernel.

    Parameters (keyword-only, stored unchanged):
      family: encoding family ("layered", "angle", "iqp", "amplitude", "basis").
      n_qubits: qubits of the "layered" family; None = min(n_features, 8). With more features
        than qubits the layered family re-uploads (qubit q takes features q, q + n, ...).
        The other families take their width from the features (None or that width).
      layers: repeated blocks of the "layered" and "iqp" families; ignored by the others.
      encoding_options: extra keyword options for the family (dict), e.g. {"entangler": "linear"}.
      objective, steps, learning_rate, optimizer, batch_size, validation_fraction, bandwidth:
        training settings (see ``hilbertune.training.TrainingSettings``). The defaults are
        small (15 steps, full batch up to 512 rows and class-balanced mini-batches of 512
        beyond, no validation split, so no early stopping): each new data size costs one
        compilation of the training step, which dominates short fits.
      C: SVM constant; None = chosen by stratified CV over ``c_grid`` with ``cv`` folds.
      select: True (default) = learn several candidates and keep the one chosen by nested
        inner cross-validation on the training rows (``hilbertune.selection``): the untrained
        encoding, its bandwidth rescaled, and full training with ``objective`` and ridge LOO
        at 1/4 of ``steps`` and at the end; the best of them is kept only when, fold by fold,
        it beats the untrained encoding by more than one standard error of the paired
        difference (``selection.rule`` "paired"), a guard against learning that makes the
        kernel worse than not learning. False = train once with ``objective`` and keep the
        result (about 12 times faster, no such guard).
      selection_options: dict of ``hilbertune.selection.SelectionSettings`` fields, e.g.
        {"folds": 3, "repeats": 1, "rule": "best"}; None = the defaults. The inner folds are
        lowered to the smallest class count when a class has fewer rows.
      random_state: int, numpy RandomState or None; drives the split, batches and CV folds.

    Learned attributes: ``classes_``, ``n_features_in_``, ``blueprint_``, ``params_``,
    ``initial_params_``, ``history_``, ``stop_reason_``, ``C_``, ``svm_``, ``seed_``,
    ``chosen_`` (name of the kept candidate, e.g. "untrained" or "full/ridge_loo@15"),
    ``selection_`` (the ``Selection`` with every candidate's inner-CV scores and the reason;
    None with ``select=False``) and ``X_fit_`` (the training rows, needed for the Gram of
    new rows against them). ``history_`` and ``stop_reason_`` describe the training run
    that produced the kept candidate (an empty history when nothing was trained).

    Small problems (padded rows * 2**n_qubits <= 2**16) compute states with XLA's quick
    compilation options and the Gram with numpy; larger ones use ``quantum_gram`` (memory
    budget, blocked products).
    """

    def __init__(self, *, family="layered", n_qubits=None, layers=2, encoding_options=None,
                 objective="centered_alignment", steps=15, learning_rate=0.05,
                 optimizer="adam", batch_size=512, validation_fraction=0.0, bandwidth=None,
                 C=None, c_grid=(0.1, 1.0, 10.0, 100.0), cv=3, select=True,
                 selection_options=None, random_state=None):
        self.family = family
        self.n_qubits = n_qubits
        self.layers = layers
        self.encoding_options = encoding_options
        self.objective = objective
        self.steps = steps
        self.learning_rate = learning_rate
        self.optimizer = optimizer
        self.batch_size = batch_size
        self.validation_fraction = validation_fraction
        self.bandwidth = bandwidth
        self.C = C
        self.c_grid = c_grid
        self.cv = cv
        self.select = select
        self.selection_options = selection_options
        self.random_state = random_state

    # ------------------------------------------------------------------ helpers

    def _blueprint(self, n_features: int):
        options = dict(self.encoding_options or {})
        family = self.family
        if family in _FIXED_WIDTH:
            if family == "iqp":
                options.setdefault("layers", self.layers)
            blueprint = build_encoding(family, n_features, **options)
            if self.n_qubits is not None and blueprint.n_qubits != self.n_qubits:
                raise InvalidInputError(
                    f"family {family!r} needs {blueprint.n_qubits} qubits for {n_features} "
                    f"features, but n_qubits={self.n_qubits}; leave n_qubits=None")
            return blueprint
        if family == "layered":
            n_qubits = min(n_features, 8) if self.n_qubits is None else self.n_qubits
            options.setdefault("n_qubits", n_qubits)
            options.setdefault("layers", self.layers)
        return build_encoding(family, n_features, **options)

    def _settings(self) -> TrainingSettings:
        return TrainingSettings(objective=self.objective, steps=self.steps,
                                learning_rate=self.learning_rate, optimizer=self.optimizer,
                                batch_size=self.batch_size,
                                validation_fraction=self.validation_fraction,
                                bandwidth=self.bandwidth)

    def _selection_settings(self, y) -> SelectionSettings:
        options = dict(self.selection_options or {})
        unknown = sorted(set(options) - set(SelectionSettings._fields))
        if unknown:
            raise InvalidInputError(f"unknown selection_options {unknown}; use some of "
                                    f"{', '.join(SelectionSettings._fields)}")
        if self.C is not None:
            options.setdefault("c_grid", (float(self.C),))
        options.setdefault("c_grid", tuple(float(c) for c in self.c_grid))
        options.setdefault("c_folds", int(self.cv))
        try:
            settings = SelectionSettings(**options)
            smallest = int(np.unique(y, return_counts=True)[1].min())
            return settings._replace(folds=int(min(settings.folds, smallest)))
        except (TypeError, ValueError) as exc:
            raise InvalidInputError(f"selection_options: {' '.join(str(exc).split())}") \
                from None

    def _gram(self, X, X_train=None, params=None):
        """Gram of rows X against the training rows, float64 numpy [len(X), N_train].

        Both sides are padded to ``padded_size`` rows (copies of row 0, cut off afterwards) so
        that batches of similar size share one compiled Gram function. ``params`` defaults to
        the fitted ones.
        """
        X_train = self.X_fit_ if X_train is None else X_train
        params = self.params_ if params is None else params
        X_a = _pad(X)
        X_b = X_a if X_train is X else _pad(X_train)
        if (quick_compile(max(X_a.shape[0], X_b.shape[0]), self.blueprint_.n_qubits)
                and not device_path()):
            # fidelity kernel |<a|b>|^2 from the states (one complex product, as fidelity_gram)
            states_a = np.asarray(_quick_states()(self.blueprint_, params, X_a))
            states_b = states_a if X_b is X_a else np.asarray(
                _quick_states()(self.blueprint_, params, X_b))
            overlap = states_a @ states_b.conj().T
            gram = overlap.real.astype(np.float64) ** 2 + overlap.imag.astype(np.float64) ** 2
        else:  # memory budget checked, blocked; on an accelerator kept on the device
            gram = quantum_gram(self.blueprint_, params, X_a, X_b)
        return np.asarray(gram, dtype=np.float64)[:X.shape[0], :X_train.shape[0]]

    def _learn(self, X, y, seed: int):
        """(params, initial params, history, stop reason, chosen name, Selection or None)."""
        settings = self._settings()
        if not self.select:
            result = train_encoding(self.blueprint_, X, y, settings, seed=seed)
            return (result.params, result.initial_params, result.history,
                    result.stop_reason, f"full/{self.objective}", None)
        options = self._selection_settings(y)
        if options.folds < 2:  # a class with one row: no inner CV possible; keep the simplest
            start = starting_params(self.blueprint_, X, y, settings, seed=seed)
            return start, start, [], "not trained: a class has a single row, too few to " \
                "judge a learned encoding", "untrained", None

        def gram(params, X_a, X_b=None):
            return self._gram(X_a, X_a if X_b is None else X_b, params=params)

        selection = learn_and_select(self.blueprint_, X, y, settings, options, seed=seed,
                                     gram=gram)
        run = selection.run_of(selection.chosen)
        history, reason = ((run.history, run.stop_reason) if run is not None else
                           ([], f"not trained: {selection.chosen} chosen by inner CV"))
        return (selection.params[selection.chosen], selection.params["untrained"], history,
                reason, selection.chosen, selection)

    def _check_fitted(self):
        if not hasattr(self, "svm_"):
            raise UnfittedClassifierError(f"this {type(self).__name__} is not fitted yet; call "
                                 "fit(X, y) before predict, decision_function or score")

    def __sklearn_is_fitted__(self):
        return hasattr(self, "svm_")

    # ------------------------------------------------------------------ API

    def fit(self, X, y):
        """Learn the encoding on (X [N, F], y [N]) and fit the SVM; returns self."""
        try:
            X, y = validate_data(self, X, y, dtype=np.float64)
            check_classification_targets(y)
        except (ValueError, TypeError) as exc:  # TypeError: sparse or non-numeric input
            _reraise(exc)
        self.classes_ = np.unique(y)
        if self.classes_.shape[0] < 2:
            raise InvalidInputError(f"y contains only one class ({self.classes_[0]!r}); a "
                                    "classifier needs samples of at least 2 classes")
        if self.C is not None and not (isinstance(self.C, (int, float, np.number))
                                       and self.C > 0):
            raise InvalidInputError(f"C must be a positive number or None (tuned by CV), "
                                    f"got {self.C!r}")
        random = check_random_state(self.random_state)
        seed = int(self.random_state) if isinstance(self.random_state, (int, np.integer)) \
            else int(random.randint(0, 2**31 - 1))
        self.blueprint_ = self._blueprint(X.shape[1])
        (self.params_, self.initial_params_, self.history_, self.stop_reason_, self.chosen_,
         self.selection_) = self._learn(X, y, seed)
        self.seed_ = seed
        self.X_fit_ = X
        gram = self._gram(X, X)
        gram = 0.5 * (gram + gram.T)
        if self.C is None:
            choice = tune_svm_c(gram, y, self.c_grid, self.cv, seed)
            self.C_ = choice.C
        else:
            self.C_ = float(self.C)
        # break_ties: with three or more classes predict is the argmax of decision_function
        # (scikit-learn's one-vs-one votes can tie; then SVC would take the first class)
        self.svm_ = SVC(kernel="precomputed", C=self.C_, break_ties=True).fit(gram, y)
        return self

    def _new_rows(self, X):
        self._check_fitted()
        try:
            return validate_data(self, X, reset=False, dtype=np.float64)
        except (ValueError, TypeError) as exc:
            _reraise(exc)

    def decision_function(self, X):
        """SVM decision values: shape [N] for two classes, [N, C] (one-vs-rest) for more."""
        gram = self._gram(self._new_rows(X))
        return self.svm_.decision_function(gram)

    def predict(self, X):
        """Predicted labels, shape [N], values from ``classes_``."""
        gram = self._gram(self._new_rows(X))
        return self.svm_.predict(gram)
