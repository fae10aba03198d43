"""Contract tests of EncodingClassifier: scikit-learn's estimator checks plus our own."""

import pickle

import numpy as np
import pytest
from sklearn.base import clone
from sklearn.datasets import load_iris
from sklearn.model_selection import GridSearchCV, train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.utils.estimator_checks import parametrize_with_checks

from hilbertune.errors import InvalidInputError, NotFittedError
from hilbertune.estimator import EncodingClassifier

# Checks that do not apply, with the reason (scikit-learn's expected_failed_checks hook).
# Currently every check of scikit-learn 1.9 passes, so the mapping is empty; entries would be
# reported as xfail, and strict mode turns an unexpected pass into a failure.
NOT_APPLICABLE = {}


def _expected_failures(estimator):
    return NOT_APPLICABLE


# Inner CV drawn once with 2 folds keeps the ~40 checks fast; selection itself is on (the
# default), so the checks cover the selecting fit.
@parametrize_with_checks([EncodingClassifier(random_state=0,
                                             selection_options={"folds": 2, "repeats": 1})],
                         expected_failed_checks=_expected_failures, xfail_strict=True)
def test_scikit_learn_estimator_checks(estimator, check):
    # scikit-learn's own contract suite (sklearn.utils.estimator_checks)
    check(estimator)


def two_blobs(n=40, seed=0):
    rng = np.random.default_rng(seed)
    y = np.arange(n) % 2
    X = rng.normal(scale=0.5, size=(n, 3)) + np.where(y[:, None] == 1, 1.0, -1.0)
    return X, y


def test_init_stores_parameters_unchanged_and_clone_copies_them():
    grid = (0.5, 5.0)
    est = EncodingClassifier(family="iqp", layers=1, c_grid=grid, steps=3, random_state=4)
    assert est.c_grid is grid and est.family == "iqp" and est.steps == 3
    copy = clone(est)
    assert copy.get_params() == est.get_params()
    assert not hasattr(copy, "params_")


def test_predict_before_fit_names_the_fix():
    with pytest.raises(NotFittedError, match=r"fit\(X, y\)"):
        EncodingClassifier().predict(np.zeros((2, 3)))


def test_string_labels_and_learned_attributes():
    X, y = two_blobs()
    labels = np.where(y == 1, "yes", "no")
    est = EncodingClassifier(steps=4, select=False, random_state=0).fit(X, labels)
    assert est.classes_.tolist() == ["no", "yes"]
    assert est.selection_ is None and est.chosen_ == "full/centered_alignment"
    assert set(est.predict(X)) <= {"no", "yes"}
    assert len(est.history_) == 5 and est.stop_reason_ == "completed 4 steps"
    assert set(est.params_) == {"weights", "biases", "log_bandwidth"}
    assert est.C_ in est.c_grid  # tuned by cross-validation
    decision = est.decision_function(X)
    assert decision.shape == (40,)
    np.testing.assert_array_equal(est.predict(X), est.classes_[(decision > 0).astype(int)])
    assert est.score(X, labels) > 0.9  # two well separated blobs


def test_fixed_c_is_used():
    X, y = two_blobs()
    est = EncodingClassifier(steps=2, C=3.0, random_state=0, selection_options=FAST).fit(X, y)
    assert est.C_ == 3.0 and est.svm_.C == 3.0
    assert est.selection_.scores  # the inner CV used the fixed C too (a one-value grid)


FAST = {"folds": 3, "repeats": 1}


def test_selection_is_the_default_and_keeps_what_it_reports():
    X, y = two_blobs(n=48, seed=3)
    est = EncodingClassifier(steps=6, random_state=1, selection_options=FAST).fit(X, y)
    names = [s.candidate.name for s in est.selection_.scores]
    assert names[0] == "untrained" and est.chosen_ in names
    assert "full/centered_alignment@6" in names and "full/ridge_loo@6" in names
    chosen = est.selection_.params[est.chosen_]
    for key in est.params_:
        np.testing.assert_array_equal(np.asarray(est.params_[key]), np.asarray(chosen[key]))
    if est.chosen_ in ("untrained",) or est.chosen_.startswith("rescaled"):
        assert est.history_ == [] and est.stop_reason_.startswith("not trained")
    else:
        assert est.history_ and est.stop_reason_.startswith("completed")


def test_untrained_only_selection_matches_a_plain_svm_on_the_starting_kernel():
    # independent path: the Gram from hilbertune.quantum_gram at the starting parameters,
    # C tuned the same way, then scikit-learn's SVC (sklearn.svm.SVC, precomputed kernel)
    from sklearn.svm import SVC

    from hilbertune.kernels import quantum_gram
    from hilbertune.training import TrainingSettings, starting_params, tune_svm_c

    X, y = two_blobs(n=40, seed=4)
    est = EncodingClassifier(steps=5, random_state=2,
                             selection_options={**FAST, "scopes": ("untrained",)}).fit(X, y)
    assert est.chosen_ == "untrained" and len(est.selection_.scores) == 1
    start = starting_params(est.blueprint_, X, y, TrainingSettings(steps=5,
                                                                     validation_fraction=0.0),
                            seed=2)
    K = np.asarray(quantum_gram(est.blueprint_, start, X), np.float64)
    C = tune_svm_c(K, y, est.c_grid, est.cv, 2).C
    X_new = two_blobs(n=12, seed=9)[0]
    reference = SVC(kernel="precomputed", C=C).fit(K, y).decision_function(
        np.asarray(quantum_gram(est.blueprint_, start, X_new, X), np.float64))
    # complex64 states on both paths, computed in a different order: float32 agreement
    np.testing.assert_allclose(est.decision_function(X_new), reference, atol=1e-3)


def test_a_class_with_one_row_keeps_the_untrained_encoding():
    X, y = two_blobs(n=21, seed=5)
    y = np.zeros(21, dtype=int)
    y[:10] = 1
    y[10] = 2  # a third class with a single row: no inner CV can judge a learned encoding
    est = EncodingClassifier(steps=3, C=1.0, random_state=0).fit(X, y)
    assert est.chosen_ == "untrained" and est.selection_ is None
    assert "single row" in est.stop_reason_


def test_multiclass_pipeline_with_reuploading_on_iris():
    # scikit-learn bundled iris: 3 classes, 4 features on 2 qubits (features re-uploaded)
    X, y = load_iris(return_X_y=True)
    X_train, X_test, y_train, y_test = train_test_split(X, y, test_size=0.3, random_state=0,
                                                        stratify=y)
    model = make_pipeline(StandardScaler(), EncodingClassifier(n_qubits=2, steps=10,
                                                               random_state=0,
                                                               selection_options=FAST))
    model.fit(X_train, y_train)
    est = model[-1]
    assert est.blueprint_.n_qubits == 2 and est.blueprint_.n_features == 4
    assert est.decision_function(StandardScaler().fit(X_train).transform(X_test)).shape == \
        (45, 3)
    assert model.score(X_test, y_test) > 0.8


def test_grid_search_over_c():
    X, y = two_blobs(n=48, seed=1)
    search = GridSearchCV(EncodingClassifier(steps=2, random_state=0, select=False),
                          {"C": [0.1, 10.0]}, cv=2).fit(X, y)
    assert search.best_params_["C"] in (0.1, 10.0)
    assert search.best_estimator_.C_ == search.best_params_["C"]


def test_same_random_state_same_predictions_and_pickle_round_trip():
    X, y = two_blobs(seed=2)
    a = EncodingClassifier(steps=3, random_state=5, selection_options=FAST).fit(X, y)
    b = EncodingClassifier(steps=3, random_state=5, selection_options=FAST).fit(X, y)
    assert a.chosen_ == b.chosen_
    np.testing.assert_array_equal(a.decision_function(X), b.decision_function(X))
    restored = pickle.loads(pickle.dumps(a))
    np.testing.assert_array_equal(restored.decision_function(X), a.decision_function(X))


@pytest.mark.parametrize("options, message", [
    ({"family": "angle", "n_qubits": 2}, "n_qubits"),
    ({"family": "layerd"}, "did you mean 'layered'"),
    ({"objective": "alignmen"}, "did you mean 'alignment'"),
    ({"C": -1.0}, "C must be"),
    ({"selection_options": {"fold": 3}}, "unknown selection_options"),
    ({"selection_options": {"rule": "median"}}, "unknown selection rule"),
])
def test_bad_hyperparameters_raise_at_fit(options, message):
    X, y = two_blobs()
    with pytest.raises(InvalidInputError, match=message):
        EncodingClassifier(steps=1, random_state=0, **options).fit(X, y)


def test_other_families_fit():
    X, y = two_blobs()
    for family in ("angle", "iqp"):
        est = EncodingClassifier(family=family, layers=1, steps=2, random_state=0,
                                 select=False).fit(X, y)
        assert est.blueprint_.family == family and est.score(X, y) > 0.8
