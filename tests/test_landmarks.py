"""Nystroem landmarks: exactness at m = N, monotone error, agreement with scikit-learn."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import make_blobs, make_moons
from sklearn.kernel_approximation import Nystroem
from sklearn.metrics.pairwise import rbf_kernel
from sklearn.svm import SVC

from hilbertune.circuits import initial_params
from hilbertune.encodings import build_encoding
from hilbertune.errors import InvalidInputError, NotFittedError
from hilbertune.kernels import FrozenKernel
from hilbertune.landmarks import (NystroemSVM, fit_nystroem, nystroem_features, nystroem_gram,
                                  select_landmarks)


def rbf(gamma):
    # reference kernel: sklearn.metrics.pairwise.rbf_kernel, exp(-gamma ||a - b||^2)
    return lambda A, B: rbf_kernel(A, B, gamma=gamma)


@pytest.fixture(scope="module")
def quantum_kernel():
    """A small entangling (layered, ring of CZ) fidelity kernel on 3 qubits, 2 features."""
    blueprint = build_encoding("layered", 2, n_qubits=3, layers=2)
    return FrozenKernel(blueprint, initial_params(blueprint, bandwidth=1.0))


class LookupKernel:
    """A kernel on a finite point set, read from a precomputed Gram (rows matched exactly).

    Lets several tests reuse one simulated quantum Gram instead of simulating (and
    compiling) each block shape anew.
    """

    def __init__(self, X, gram):
        self.index = {row.tobytes(): i for i, row in enumerate(np.asarray(X, np.float64))}
        self.gram = np.asarray(gram, np.float64)

    def __call__(self, A, B):
        rows = [self.index[r.tobytes()] for r in np.asarray(A, np.float64)]
        cols = [self.index[r.tobytes()] for r in np.asarray(B, np.float64)]
        return self.gram[np.ix_(rows, cols)]


@pytest.fixture(scope="module")
def moons_quantum():
    """(X, y, lookup kernel) for 150 moons points under the quantum kernel, simulated once."""
    blueprint = build_encoding("layered", 2, n_qubits=3, layers=2)
    kernel = FrozenKernel(blueprint, initial_params(blueprint, bandwidth=1.0))
    X, y = make_moons(150, noise=0.15, random_state=0)
    return X, y, LookupKernel(X, kernel(X))


def relative_error(K, features):
    return np.linalg.norm(K - nystroem_gram(features)) / np.linalg.norm(K)


def test_all_rows_as_landmarks_give_the_exact_rbf_gram(rng):
    # With every training row a landmark, K_nm K_mm^+ K_mn = K K^+ K = K (pseudo-inverse
    # identity, Penrose 1955); Williams & Seeger (2001) Sec. 2.
    X = rng.normal(size=(35, 3))
    kernel = rbf(0.4)
    nmap = fit_nystroem(kernel, X, landmark_indices=np.arange(35))
    K = kernel(X, X)
    assert relative_error(K, nystroem_features(kernel, X, nmap)) < 1e-6
    # and between new rows and training rows too (the map generalizes, not just memorizes)
    X_new = rng.normal(size=(7, 3))
    approx = nystroem_gram(nystroem_features(kernel, X_new, nmap),
                           nystroem_features(kernel, X, nmap))
    np.testing.assert_allclose(approx, kernel(X_new, X), atol=1e-6)


def test_all_rows_as_landmarks_give_the_exact_quantum_gram(rng, quantum_kernel):
    # Same identity on a simulated fidelity kernel (rank < N: 3-qubit states span at most
    # 2**6 = 64 real dimensions of density matrices, so the pseudo-inverse matters here).
    X = rng.uniform(-2, 2, size=(80, 2))
    K = quantum_kernel(X)
    nmap = fit_nystroem(quantum_kernel, X, landmark_indices=np.arange(80))
    assert nmap.projection.shape[1] < 80  # rank-deficient: tiny eigenvalues were clipped
    assert relative_error(K, nystroem_features(quantum_kernel, X, nmap)) < 1e-5


@pytest.mark.parametrize("kernel_name", ["rbf", "quantum"])
def test_error_never_grows_for_nested_landmark_sets(rng, moons_quantum, kernel_name):
    # For nested landmark sets S1 in S2 the residual K - K_nys(S) is a Schur complement that
    # shrinks in the Loewner order, so its Frobenius norm cannot grow (from memory: Drineas
    # & Mahoney, JMLR 2005, Sec. 4; the Schur-complement view of the Nystroem residual).
    X = moons_quantum[0][:48]
    kernel = rbf(0.5) if kernel_name == "rbf" else moons_quantum[2]
    K = kernel(X, X)
    order = rng.permutation(48)
    errors = []
    for m in (1, 2, 4, 8, 16, 32, 48):
        nmap = fit_nystroem(kernel, X, landmark_indices=order[:m])
        errors.append(relative_error(K, nystroem_features(kernel, X, nmap)))
    assert all(b <= a + 1e-6 for a, b in zip(errors, errors[1:])), errors
    assert errors[0] > 0.3 and errors[-1] < 1e-5, errors  # from coarse to exact


def test_error_falls_on_average_with_random_landmark_sets(rng):
    # Not nested: mean over seeds of ||K - K_nys||_F drops as m grows (Drineas & Mahoney 2005,
    # Theorem 3: the expected error bound decreases with the number of sampled columns).
    X = rng.normal(size=(60, 4))
    kernel = rbf(0.2)
    K = kernel(X, X)
    means = []
    for m in (3, 10, 30):
        means.append(np.mean([relative_error(K, nystroem_features(
            kernel, X, fit_nystroem(kernel, X, m, seed=s))) for s in range(6)]))
    assert means[0] > means[1] > means[2]


def test_agrees_with_scikit_learn_nystroem_for_the_same_landmarks(rng):
    # Reference: sklearn.kernel_approximation.Nystroem (kernel="rbf"). Its features are
    # K_nm K_mm^{-1/2} (a rotation of ours), so compare the approximate Grams Phi Phi^T.
    X = rng.normal(size=(70, 5))
    X_test = rng.normal(size=(20, 5))
    reference = Nystroem(kernel="rbf", gamma=0.15, n_components=25, random_state=0).fit(X)
    ours = fit_nystroem(rbf(0.15), X, landmark_indices=reference.component_indices_)
    ref_train, ref_test = reference.transform(X), reference.transform(X_test)
    our_train = nystroem_features(rbf(0.15), X, ours)
    our_test = nystroem_features(rbf(0.15), X_test, ours)
    np.testing.assert_allclose(nystroem_gram(our_train), ref_train @ ref_train.T, atol=1e-8)
    np.testing.assert_allclose(nystroem_gram(our_test, our_train), ref_test @ ref_train.T,
                               atol=1e-8)


def test_blocked_features_equal_unblocked(rng):
    X = rng.normal(size=(23, 2))
    kernel = rbf(0.7)
    nmap = fit_nystroem(kernel, X, 9, seed=4)
    np.testing.assert_allclose(nystroem_features(kernel, X, nmap, block_rows=5),
                               nystroem_features(kernel, X, nmap), atol=1e-12)


def test_landmark_selection_is_reproducible_and_distinct(rng):
    X = rng.normal(size=(50, 3))
    for method in ("uniform", "kmeans++"):
        a = select_landmarks(X, 12, method=method, seed=3)
        assert len(np.unique(a)) == 12 and a.min() >= 0 and a.max() < 50
        np.testing.assert_array_equal(a, select_landmarks(X, 12, method=method, seed=3))
    # the k-means++ seeding is scikit-learn's (sklearn.cluster.kmeans_plusplus)
    from sklearn.cluster import kmeans_plusplus
    _, expected = kmeans_plusplus(X, n_clusters=12, random_state=3)
    np.testing.assert_array_equal(select_landmarks(X, 12, method="kmeans++", seed=3),
                                  np.sort(expected))


def test_kmeans_plus_plus_landmarks_cover_clusters_better_than_uniform():
    # Six tight, well separated clusters and six landmarks: k-means++ seeding (Arthur &
    # Vassilvitskii 2007) puts one landmark in each cluster, while uniform sampling misses
    # some, leaving their whole kernel block unexplained; clustering-based landmarks lower
    # the Nystroem error (Zhang, Tsang & Kwok, ICML 2008, "Improved Nystroem low-rank
    # approximation").
    X, _ = make_blobs(n_samples=[20] * 6, n_features=2, cluster_std=0.1,
                      center_box=(-10, 10), random_state=1)
    kernel = rbf(1.0)
    K = kernel(X, X)

    def mean_error(method):
        return np.mean([relative_error(K, nystroem_features(
            kernel, X, fit_nystroem(kernel, X, 6, method=method, seed=s))) for s in range(8)])

    assert mean_error("kmeans++") < 0.1 < 0.3 < mean_error("uniform")


def test_linear_svm_on_all_landmarks_solves_the_kernel_svm():
    # Phi Phi^T = K at m = N, so sklearn.svm.SVC(kernel="linear") on Phi solves the same dual
    # problem as sklearn.svm.SVC(kernel="precomputed") on K: identical decision values once
    # both solvers run to a tight tolerance and no eigenvalue is clipped.
    X, y = make_moons(90, noise=0.2, random_state=0)
    X_train, y_train, X_test = X[:60], y[:60], X[60:]
    kernel = rbf(1.5)
    nmap = fit_nystroem(kernel, X_train, landmark_indices=np.arange(60), rcond=1e-13)
    on_features = SVC(kernel="linear", C=2.0, tol=1e-9).fit(
        nystroem_features(kernel, X_train, nmap), y_train)
    reference = SVC(kernel="precomputed", C=2.0, tol=1e-9).fit(kernel(X_train, X_train),
                                                                y_train)
    np.testing.assert_allclose(
        on_features.decision_function(nystroem_features(kernel, X_test, nmap)),
        reference.decision_function(kernel(X_test, X_train)), atol=1e-6)
    # the estimator (default rcond and solver tolerance) gives the same predictions
    model = NystroemSVM(kernel, n_landmarks=60, solver="svc", C=2.0).fit(X_train, y_train)
    scores = reference.decision_function(kernel(X_test, X_train))
    np.testing.assert_allclose(model.decision_function(X_test), scores, atol=5e-3)
    np.testing.assert_array_equal(model.predict(X_test),
                                  reference.predict(kernel(X_test, X_train)))


def test_nystroem_svm_on_a_quantum_kernel_tracks_the_exact_svm(moons_quantum):
    X, y, kernel = moons_quantum
    X_train, y_train, X_test, y_test = X[:100], y[:100], X[100:], y[100:]
    exact = SVC(kernel="precomputed", C=1.0).fit(kernel(X_train, X_train), y_train)
    exact_acc = exact.score(kernel(X_test, X_train), y_test)
    assert exact_acc > 0.8  # the kernel itself is useful on this data
    for solver in ("svc", "linear_svc"):
        model = NystroemSVM(kernel, n_landmarks=20, solver=solver).fit(X_train, y_train)
        assert model.score(X_test, y_test) >= exact_acc - 0.06
        assert model.transform(X_test).shape == (50, model.nystroem_map_.projection.shape[1])


def test_invalid_inputs_are_refused_with_our_error(rng):
    X = rng.normal(size=(10, 2))
    kernel = rbf(1.0)
    with pytest.raises(InvalidInputError, match="between 1 and the 10"):
        fit_nystroem(kernel, X, 11)
    with pytest.raises(InvalidInputError, match="between 1 and the 10"):
        fit_nystroem(kernel, X, 0)
    with pytest.raises(InvalidInputError, match="landmark method"):
        fit_nystroem(kernel, X, 3, method="kmeans")
    with pytest.raises(InvalidInputError, match=r"\[len\(A\), len\(B\)\]"):
        fit_nystroem(lambda A, B: np.ones((len(A), 1)), X, 3)
    with pytest.raises(InvalidInputError, match="NaN"):
        fit_nystroem(lambda A, B: np.full((len(A), len(B)), np.nan), X, 3)
    with pytest.raises(InvalidInputError, match="no positive eigenvalue"):
        fit_nystroem(lambda A, B: -np.ones((len(A), len(B))), X, 3)
    nmap = fit_nystroem(kernel, X, 3)
    with pytest.raises(InvalidInputError, match="features"):
        nystroem_features(kernel, rng.normal(size=(4, 3)), nmap)
    with pytest.raises(NotFittedError, match="fit"):
        NystroemSVM(kernel).predict(X)
    with pytest.raises(InvalidInputError, match="single class"):
        NystroemSVM(kernel, 3).fit(X, np.zeros(10))
