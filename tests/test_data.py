"""Tests of hilbertune.data: CSV loading and its errors, bundled data, the invented demo,
label codes, and the train-only split + preprocessing (checked against scikit-learn)."""

import hashlib
import math

import numpy as np
import pytest
from sklearn import datasets
from sklearn.decomposition import PCA
from sklearn.model_selection import train_test_split
from sklearn.preprocessing import MinMaxScaler, StandardScaler

from hilbertune.data import (ANGLE_RANGE, Preprocessing, decode_labels, encode_labels,
                             invented_demo, load_bundled, load_csv, split_and_scale)
from hilbertune.errors import InvalidInputError


def write(tmp_path, text, name="data.csv", mode="w"):
    path = tmp_path / name
    if mode == "wb":
        path.write_bytes(text)
    else:
        path.write_text(text, encoding="utf-8")
    return path


# --------------------------------------------------------------------------- load_csv

def test_load_csv_reads_features_string_labels_and_file_digest(tmp_path):
    text = "a,b,label\n1.5,2,cat\n-3,4e-1,dog\n0,7,cat\n"
    path = write(tmp_path, text)
    data = load_csv(path, "label")
    np.testing.assert_array_equal(data.X, [[1.5, 2.0], [-3.0, 0.4], [0.0, 7.0]])
    assert data.y.tolist() == ["cat", "dog", "cat"]
    assert data.feature_names == ("a", "b") and data.target_name == "label"
    # digest of the raw bytes, as hashlib computes it
    assert data.sha256 == hashlib.sha256(text.encode("utf-8")).hexdigest()
    assert data.invented is False and data.n_dropped == 0


def test_load_csv_target_in_the_middle_integer_labels_and_semicolons(tmp_path):
    path = write(tmp_path, "x;y;z\n1;0;2\n3;1.0;4\n5;1;6\n")
    data = load_csv(path, "y")
    np.testing.assert_array_equal(data.X, [[1, 2], [3, 4], [5, 6]])
    assert data.y.dtype.kind == "i" and data.y.tolist() == [0, 1, 1]
    assert data.feature_names == ("x", "z")


@pytest.mark.parametrize("content, target, expected", [
    (None, "label", "does not exist"),
    ("", "label", "empty"),
    ("   \n\n", "label", "empty"),
    (b"PK\x03\x04\x00\x00binary", "label", "binary"),
    ("1,2,3\n4,5,6\n", "3", "add a header row"),
    ("a,a,label\n1,2,x\n3,4,y\n", "label", "duplicate column"),
    ("alpha,beta,label\n1,2,x\n3,4,y\n", "lable", "did you mean 'label'"),
    ("alpha,beta,label\n1,2,x\n3,4,y\n", "target", "available columns: alpha, beta, label"),
    ("a,b,label\n1,2,x\n3,4,x\n", "label", "only one class"),
    ("a,b,label\n1,2,x\n3,red,y\n", "label", "column 'b' is not numeric (line 3 has 'red')"),
    ("a,b,label\n1,,x\n3,4,y\n5,6,x\n", "label", "--drop-missing"),
    ("a,b,label\n1,NaN,x\n3,4,y\n", "label", "column(s) ['b'] at line 2"),
    ("a,b,label\n1,inf,x\n3,4,y\n", "label", "infinite values"),
    ("a,b,label\n1,2,\n3,4,y\n5,6,x\n", "label", "empty or NaN label"),
    ("a,b,label\n1,2,x\n3,4\n", "label", "line 3 has 2 cells"),
    ("label\nx\ny\n", "label", "at least one feature column"),
    ("a,b,label\n", "label", "no data rows"),
])
def test_load_csv_rejects_bad_files_with_one_line_messages(tmp_path, content, target,
                                                           expected):
    if content is None:
        path = tmp_path / "missing.csv"
    elif isinstance(content, bytes):
        path = write(tmp_path, content, mode="wb")
    else:
        path = write(tmp_path, content)
    with pytest.raises(InvalidInputError) as error:
        load_csv(path, target)
    message = str(error.value)
    assert expected in message
    assert "\n" not in message


def test_load_csv_drop_missing_removes_rows_with_missing_features_or_labels(tmp_path):
    path = write(tmp_path, "a,b,label\n1,2,x\n,4,y\n5,6,\n7,8,y\n9,?,x\n10,11,x\n")
    data = load_csv(path, "label", drop_missing=True)
    np.testing.assert_array_equal(data.X, [[1, 2], [7, 8], [10, 11]])
    assert data.y.tolist() == ["x", "y", "x"] and data.n_dropped == 3


# --------------------------------------------------------------------------- bundled + demo

def test_load_bundled_matches_scikit_learn():
    # reference: sklearn.datasets.load_wine and make_circles with the same arguments
    wine = load_bundled("wine")
    reference = datasets.load_wine()
    np.testing.assert_array_equal(wine.X, reference.data)
    np.testing.assert_array_equal(wine.y, reference.target)
    assert wine.feature_names == tuple(reference.feature_names) and not wine.invented
    circles = load_bundled("circles", seed=3, n_samples=50, noise=0.05)
    X, y = datasets.make_circles(n_samples=50, noise=0.05, factor=0.5, random_state=3)
    np.testing.assert_array_equal(circles.X, X)
    np.testing.assert_array_equal(circles.y, y)


def test_load_bundled_unknown_name_suggests_the_closest():
    with pytest.raises(InvalidInputError, match="did you mean 'iris'"):
        load_bundled("irs")


def test_invented_demo_is_deterministic_by_seed_and_labelled_invented():
    a, b, c = invented_demo(120, seed=5), invented_demo(120, seed=5), invented_demo(120, 6)
    np.testing.assert_array_equal(a.X, b.X)
    np.testing.assert_array_equal(a.y, b.y)
    assert a.sha256 == b.sha256 and a.sha256 != c.sha256
    assert not np.array_equal(a.X, c.X)
    assert a.invented and "INVENTED" in a.source
    assert a.X.shape == (120, 4) and set(a.y.tolist()) == {"healthy", "outbreak"}
    # neither class is rare (the rule splits the square roughly in half)
    assert 0.3 < np.mean(a.y == "outbreak") < 0.7


def test_invented_demo_needs_a_real_kernel_not_a_linear_one():
    # the invented boundary is nonlinear: a linear SVM stays far below an RBF SVM
    # (reference: scikit-learn SVC; trade fact, common practice for XOR-like classes)
    from sklearn.svm import SVC

    data = invented_demo(240, seed=0)
    split = split_and_scale(data.X, data.y, test_fraction=0.25, seed=0)
    linear = SVC(kernel="linear", C=1.0).fit(split.X_train, split.y_train)
    rbf = SVC(kernel="rbf", C=10.0, gamma=1.0).fit(split.X_train, split.y_train)
    assert rbf.score(split.X_test, split.y_test) > linear.score(split.X_test,
                                                                split.y_test) + 0.1


# --------------------------------------------------------------------------- labels

def test_encode_labels_agrees_with_numpy_unique_and_round_trips():
    y = np.array(["b", "a", "c", "a"])
    codes, classes = encode_labels(y)
    reference_classes, reference_codes = np.unique(y, return_inverse=True)  # numpy reference
    np.testing.assert_array_equal(classes, reference_classes)
    np.testing.assert_array_equal(codes, reference_codes)
    np.testing.assert_array_equal(decode_labels(codes, classes), y)
    with pytest.raises(InvalidInputError):
        decode_labels([3], classes)


# --------------------------------------------------------------------------- split + scale

def _toy(n=40, f=3, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, f)) * np.array([1.0, 100.0, 0.01])[:f]
    y = np.array(["p", "q"])[rng.integers(0, 2, n)]
    y[:2] = ["p", "q"]
    return X, y


def test_split_is_the_stratified_scikit_learn_split():
    X, y = _toy()
    split = split_and_scale(X, y, test_fraction=0.25, seed=7)
    # reference: sklearn.model_selection.train_test_split with the same seed and stratify
    train, test = train_test_split(np.arange(len(y)), test_size=0.25, random_state=7,
                                   stratify=y)
    np.testing.assert_array_equal(split.train_indices, train)
    np.testing.assert_array_equal(split.test_indices, test)
    np.testing.assert_array_equal(split.y_train, y[train])


def test_scaler_is_fit_on_train_rows_only():
    X, y = _toy()
    split = split_and_scale(X, y, test_fraction=0.25, seed=1, clip=False)
    # reference: sklearn MinMaxScaler fitted on the train rows alone
    reference = MinMaxScaler(feature_range=ANGLE_RANGE).fit(X[split.train_indices])
    np.testing.assert_allclose(split.X_train, reference.transform(X[split.train_indices]),
                               atol=1e-12)
    np.testing.assert_allclose(split.X_test, reference.transform(X[split.test_indices]),
                               atol=1e-12)
    assert split.X_train.min() == pytest.approx(0.0) and split.X_train.max() == \
        pytest.approx(math.pi)

    # an outlier in a TEST row must change nothing that was fitted
    X_outlier = X.copy()
    X_outlier[split.test_indices[0]] = 1e6
    leaked = split_and_scale(X_outlier, y, test_fraction=0.25, seed=1, clip=False)
    for a, b in zip(split.preprocessing.to_arrays().values(),
                    leaked.preprocessing.to_arrays().values()):
        np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(split.X_train, leaked.X_train)


def test_test_values_outside_the_training_range_are_clipped_by_default():
    X, y = _toy()
    X_outlier = X.copy()
    split0 = split_and_scale(X, y, seed=2)
    X_outlier[split0.test_indices[0]] = 1e6
    X_outlier[split0.test_indices[1]] = -1e6
    split = split_and_scale(X_outlier, y, seed=2)
    assert split.X_test.min() >= 0.0 and split.X_test.max() <= math.pi
    np.testing.assert_allclose(split.X_test[0], math.pi)
    np.testing.assert_allclose(split.X_test[1], 0.0)


def test_pca_path_equals_standardize_pca_minmax_fit_on_train():
    X, y = _toy(n=60, f=3, seed=4)
    split = split_and_scale(X, y, test_fraction=0.3, seed=4, n_components=2, reduce="pca",
                            clip=False)
    assert split.preprocessing.reduce == "pca" and split.X_train.shape[1] == 2
    # reference: StandardScaler -> PCA(svd_solver="full") -> MinMaxScaler, all fitted on train
    train = X[split.train_indices]
    standard = StandardScaler().fit(train)
    pca = PCA(n_components=2, svd_solver="full").fit(standard.transform(train))
    minmax = MinMaxScaler(ANGLE_RANGE).fit(pca.transform(standard.transform(train)))

    def reference(rows):
        return minmax.transform(pca.transform(standard.transform(rows)))

    np.testing.assert_allclose(split.X_train, reference(train), atol=1e-10)
    np.testing.assert_allclose(split.X_test, reference(X[split.test_indices]), atol=1e-10)


def test_first_columns_reduction_and_no_padding():
    X, y = _toy(f=3)
    first = split_and_scale(X, y, seed=0, n_components=2, reduce="first", clip=False)
    reference = MinMaxScaler(ANGLE_RANGE).fit(X[first.train_indices, :2])
    np.testing.assert_allclose(first.X_test, reference.transform(X[first.test_indices, :2]),
                               atol=1e-12)
    # more components than features keeps every feature
    assert split_and_scale(X, y, seed=0, n_components=8).X_train.shape[1] == 3


def test_preprocessing_survives_npz_without_pickle(tmp_path):
    X, y = _toy(n=50)
    split = split_and_scale(X, y, seed=3, n_components=2)
    np.savez(tmp_path / "params.npz", **split.preprocessing.to_arrays())
    with np.load(tmp_path / "params.npz", allow_pickle=False) as stored:
        restored = Preprocessing.from_arrays(stored)
    np.testing.assert_array_equal(restored.transform(X[split.test_indices]), split.X_test)
    assert restored.reduce == "pca" and restored.clip is True
    with pytest.raises(InvalidInputError, match="feature columns"):
        restored.transform(X[:, :2])


@pytest.mark.parametrize("kwargs, expected", [
    ({"test_fraction": 0.0}, "strictly between 0 and 1"),
    ({"test_fraction": 1.5}, "strictly between 0 and 1"),
    ({"reduce": "svd", "n_components": 1}, "'pca' or 'first'"),
    ({"n_components": 0}, "positive integer"),
    ({"feature_range": (1.0, 1.0)}, "low < high"),
])
def test_split_rejects_bad_options(kwargs, expected):
    X, y = _toy()
    with pytest.raises(InvalidInputError, match=expected):
        split_and_scale(X, y, **kwargs)


def test_split_rejects_single_sample_classes_and_non_finite_rows():
    X, y = _toy()
    y = y.copy()
    y[5] = "lonely"
    with pytest.raises(InvalidInputError, match="single sample"):
        split_and_scale(X, y)
    X, y = _toy()
    X[3, 1] = np.nan
    with pytest.raises(InvalidInputError, match="rows \\[3\\]"):
        split_and_scale(X, y)
