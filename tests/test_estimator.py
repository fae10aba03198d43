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


@parametrize_with_checks([EncodingClassifier(random_state=0)],
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
    est = EncodingClassifier(steps=4, random_state=0).fit(X, labels)
    assert est.classes_.tolist() == ["no", "yes"]
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
    est = EncodingClassifier(steps=2, C=3.0, random_state=0).fit(X, y)
    assert est.C_ == 3.0 and est.svm_.C == 3.0


def test_multiclass_pipeline_with_reuploading_on_iris():
    # scikit-learn bundled iris: 3 classes, 4 features on 2 qubits (features re-uploaded)
    X, y = load_iris(return_X_y=True)
    X_train, X_test, y_train, y_test = train_test_split(X, y, test_size=0.3, random_state=0,
                                                        stratify=y)
    model = make_pipeline(StandardScaler(), EncodingClassifier(n_qubits=2, steps=10,
                                                               random_state=0))
    model.fit(X_train, y_train)
    est = model[-1]
    assert est.blueprint_.n_qubits == 2 and est.blueprint_.n_features == 4
    assert est.decision_function(StandardScaler().fit(X_train).transform(X_test)).shape == \
        (45, 3)
    assert model.score(X_test, y_test) > 0.8


def test_grid_search_over_c():
    X, y = two_blobs(n=48, seed=1)
    search = GridSearchCV(EncodingClassifier(steps=2, random_state=0),
                          {"C": [0.1, 10.0]}, cv=2).fit(X, y)
    assert search.best_params_["C"] in (0.1, 10.0)
    assert search.best_estimator_.C_ == search.best_params_["C"]


def test_same_random_state_same_predictions_and_pickle_round_trip():
    X, y = two_blobs(seed=2)
    a = EncodingClassifier(steps=3, random_state=5).fit(X, y)
    b = EncodingClassifier(steps=3, random_state=5).fit(X, y)
    np.testing.assert_array_equal(a.decision_function(X), b.decision_function(X))
    restored = pickle.loads(pickle.dumps(a))
    np.testing.assert_array_equal(restored.decision_function(X), a.decision_function(X))


@pytest.mark.parametrize("options, message", [
    ({"family": "angle", "n_qubits": 2}, "n_qubits"),
    ({"family": "layerd"}, "did you mean 'layered'"),
    ({"objective": "alignmen"}, "did you mean 'alignment'"),
    ({"C": -1.0}, "C must be"),
])
def test_bad_hyperparameters_raise_at_fit(options, message):
    X, y = two_blobs()
    with pytest.raises(InvalidInputError, match=message):
        EncodingClassifier(steps=1, random_state=0, **options).fit(X, y)


def test_other_families_fit():
    X, y = two_blobs()
    for family in ("angle", "iqp"):
        est = EncodingClassifier(family=family, layers=1, steps=2, random_state=0).fit(X, y)
        assert est.blueprint_.family == family and est.score(X, y) > 0.8
