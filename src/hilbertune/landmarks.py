"""Nystroem approximation of any kernel: N x m kernel entries instead of N x N.

Place in the data flow: after a kernel is frozen (any callable ``kernel_fn(A, B)`` returning
the [len(A), len(B)] Gram, e.g. ``kernels.FrozenKernel``), before a *linear* classifier.
With m landmark rows L chosen from the training data, ``K_mm = k(L, L)`` and
``K_nm = k(X, L)``, the feature map is

    Phi(X) = K_nm U_r S_r^{-1/2}        (K_mm = U S U^T, keeping the r eigenvalues
                                         above rcond * largest)

so that ``Phi(A) Phi(B)^T = K_am K_mm^+ K_mb`` approximates ``k(A, B)``. A linear SVM on
Phi then stands in for the kernel SVM; memory grows as N * m, not N^2, and quantum states
are only ever needed for one block of rows plus the m landmarks.

References:
  Williams, C. K. I. & Seeger, M. (2001). Using the Nystroem method to speed up kernel
    machines. NIPS 13.
  Drineas, P. & Mahoney, M. W. (2005). On the Nystroem method for approximating a Gram
    matrix for improved kernel-based learning. JMLR 6, 2153-2175.
  Arthur, D. & Vassilvitskii, S. (2007). k-means++: the advantages of careful seeding.
    SODA 2007 (landmark seeding, via sklearn.cluster.kmeans_plusplus).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin

from hilbertune.errors import InvalidInputError, NotFittedError

LANDMARK_METHODS = ("uniform", "kmeans++")
SOLVERS = ("auto", "svc", "linear_svc")


class NystroemMap(NamedTuple):
    """A fitted Nystroem feature map (plain arrays; no kernel inside)."""
    landmarks: np.ndarray         # float64 [m, F]: the landmark rows of the training data
    landmark_indices: np.ndarray  # int64 [m]: their row numbers in the training data
    projection: np.ndarray        # float64 [m, r]: U_r S_r^{-1/2}
    eigenvalues: np.ndarray       # float64 [r]: kept eigenvalues of K_mm, descending


def _as_matrix(X, name: str) -> np.ndarray:
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 2:
        raise InvalidInputError(f"{name} must be a 2-D array [samples, features], got shape "
                                f"{X.shape}; reshape it with X.reshape(-1, n_features)")
    if not np.all(np.isfinite(X)):
        raise InvalidInputError(f"{name} contains NaN or infinite values; drop or impute them")
    return X


def _kernel_block(kernel_fn, A, B) -> np.ndarray:
    gram = np.asarray(kernel_fn(A, B), dtype=np.float64)
    if gram.shape != (len(A), len(B)):
        raise InvalidInputError(f"kernel_fn returned shape {gram.shape} for inputs of "
                                f"{len(A)} and {len(B)} rows; it must return the "
                                f"[len(A), len(B)] Gram matrix")
    if not np.all(np.isfinite(gram)):
        raise InvalidInputError("kernel_fn returned NaN or infinite values; check the kernel "
                                "and its inputs")
    return gram


def select_landmarks(X, n_landmarks: int, *, method: str = "uniform", seed: int = 0):
    """Row numbers of ``n_landmarks`` landmark rows of the training data.

    Args:
      X: float array [N, F].
      method: "uniform" (a uniform random subset without replacement) or "kmeans++"
        (k-means++ seeding in input space, ``sklearn.cluster.kmeans_plusplus``: spreads
        the landmarks over the data, Arthur & Vassilvitskii 2007).
      seed: integer seed of the selection.

    Returns:
      int64 array [n_landmarks] of distinct row numbers.
    """
    X = _as_matrix(X, "X")
    n = X.shape[0]
    if not isinstance(n_landmarks, (int, np.integer)) or isinstance(n_landmarks, bool) or \
            not 1 <= n_landmarks <= n:
        raise InvalidInputError(f"n_landmarks must be an integer between 1 and the {n} "
                                f"training rows, got {n_landmarks!r}")
    if method not in LANDMARK_METHODS:
        raise InvalidInputError(f"landmark method must be one of {', '.join(LANDMARK_METHODS)}, "
                                f"got {method!r}")
    if method == "uniform":
        return np.sort(np.random.default_rng(seed).choice(n, size=n_landmarks, replace=False))
    from sklearn.cluster import kmeans_plusplus

    _, indices = kmeans_plusplus(X, n_clusters=int(n_landmarks), random_state=seed)
    indices = np.asarray(indices, dtype=np.int64)
    if len(np.unique(indices)) < len(indices):  # duplicate rows in the data
        rest = np.setdiff1d(np.arange(n), indices)
        extra = np.random.default_rng(seed).choice(rest, len(indices) - len(np.unique(indices)),
                                                   replace=False)
        indices = np.concatenate([np.unique(indices), extra])
    return np.sort(indices)


def fit_nystroem(kernel_fn, X, n_landmarks: int | None = None, *, method: str = "uniform",
                 seed: int = 0, landmark_indices=None, rcond: float = 1e-7) -> NystroemMap:
    """Choose landmarks and build the feature map ``Phi = K_nm U_r S_r^{-1/2}``.

    Args:
      kernel_fn: ``kernel_fn(A, B) -> [len(A), len(B)]`` (A, B float arrays [*, F]).
      X: training data, float array [N, F].
      n_landmarks: m, the number of landmarks (ignored when ``landmark_indices`` is given).
      method, seed: landmark selection, see ``select_landmarks``.
      landmark_indices: explicit row numbers of the landmarks (int array [m]).
      rcond: eigenvalues of K_mm below ``rcond * largest`` are dropped (pseudo-inverse
        square root). The default sits at float32 precision, where simulated quantum
        kernels are computed (common practice: cut at the working precision).

    Returns:
      a NystroemMap; ``nystroem_features`` applies it.
    """
    X = _as_matrix(X, "X")
    if landmark_indices is None:
        if n_landmarks is None:
            raise InvalidInputError("pass n_landmarks (how many landmarks) or landmark_indices")
        indices = select_landmarks(X, n_landmarks, method=method, seed=seed)
    else:
        indices = np.asarray(landmark_indices)
        if indices.ndim != 1 or indices.size == 0 or indices.dtype.kind not in "iu" or \
                indices.min() < 0 or indices.max() >= len(X):
            raise InvalidInputError(f"landmark_indices must be a non-empty 1-D array of row "
                                    f"numbers in [0, {len(X)}), got {landmark_indices!r}")
        indices = indices.astype(np.int64)
    if not (isinstance(rcond, (int, float)) and 0 <= rcond < 1):
        raise InvalidInputError(f"rcond must be a number in [0, 1), got {rcond!r}")
    landmarks = X[indices]
    k_mm = _kernel_block(kernel_fn, landmarks, landmarks)
    k_mm = 0.5 * (k_mm + k_mm.T)  # exact symmetry before the eigendecomposition
    eigenvalues, vectors = np.linalg.eigh(k_mm)
    order = np.argsort(eigenvalues)[::-1]
    eigenvalues, vectors = eigenvalues[order], vectors[:, order]
    if not eigenvalues[0] > 1e-12 * max(1.0, float(np.max(np.abs(eigenvalues)))):
        raise InvalidInputError("the kernel matrix of the landmarks has no positive eigenvalue; "
                                "kernel_fn must be a positive semi-definite kernel")
    keep = eigenvalues > rcond * eigenvalues[0]
    projection = vectors[:, keep] / np.sqrt(eigenvalues[keep])
    return NystroemMap(landmarks, indices, projection, eigenvalues[keep])


def nystroem_features(kernel_fn, X, nystroem_map: NystroemMap, *, block_rows: int = 2048):
    """Nystroem features of new rows: ``Phi(X) = k(X, L) U_r S_r^{-1/2}``.

    Args:
      kernel_fn: the kernel the map was fitted with.
      X: float array [N, F].
      block_rows: rows of X per kernel call, so a quantum kernel holds only ``block_rows``
        states (plus the m landmarks) at a time.

    Returns:
      float64 array [N, r] with r <= m.
    """
    X = _as_matrix(X, "X")
    if X.shape[1] != nystroem_map.landmarks.shape[1]:
        raise InvalidInputError(f"X has {X.shape[1]} features but the landmarks have "
                                f"{nystroem_map.landmarks.shape[1]}; pass data with the "
                                "training columns")
    if not isinstance(block_rows, int) or block_rows < 1:
        raise InvalidInputError(f"block_rows must be a positive integer, got {block_rows!r}")
    out = np.empty((X.shape[0], nystroem_map.projection.shape[1]))
    for start in range(0, X.shape[0], block_rows):
        block = X[start:start + block_rows]
        out[start:start + len(block)] = (_kernel_block(kernel_fn, block, nystroem_map.landmarks)
                                         @ nystroem_map.projection)
    return out


def nystroem_gram(features_a, features_b=None):
    """Approximate Gram ``Phi_a Phi_b^T``: float64 [N_a, N_b] (``features_b=None``: [N_a, N_a])."""
    features_a = np.asarray(features_a, dtype=np.float64)
    features_b = features_a if features_b is None else np.asarray(features_b, dtype=np.float64)
    return features_a @ features_b.T


class NystroemSVM(ClassifierMixin, BaseEstimator):
    """Linear SVM on Nystroem features of any kernel: a kernel SVM for large N.

    ``fit`` chooses landmarks from the training rows, builds the feature map and fits a
    linear SVM on the features: ``SVC(kernel="linear")`` (same objective as the kernel SVM
    on the approximate Gram) or ``LinearSVC`` (squared hinge, scales to very large N).
    ``solver="auto"`` takes SVC up to 5000 training rows.

    Fitted attributes: ``nystroem_map_``, ``classifier_``, ``classes_``.
    """

    def __init__(self, kernel_fn=None, n_landmarks: int = 100, *, landmark_method: str = "kmeans++",
                 C: float = 1.0, solver: str = "auto", seed: int = 0, rcond: float = 1e-7,
                 block_rows: int = 2048):
        self.kernel_fn = kernel_fn
        self.n_landmarks = n_landmarks
        self.landmark_method = landmark_method
        self.C = C
        self.solver = solver
        self.seed = seed
        self.rcond = rcond
        self.block_rows = block_rows

    def fit(self, X, y):
        from sklearn.svm import SVC, LinearSVC

        if not callable(self.kernel_fn):
            raise InvalidInputError("NystroemSVM needs kernel_fn=a callable kernel(A, B), e.g. "
                                    "hilbertune.FrozenKernel(blueprint, params)")
        if self.solver not in SOLVERS:
            raise InvalidInputError(f"solver must be one of {', '.join(SOLVERS)}, got "
                                    f"{self.solver!r}")
        if not (isinstance(self.C, (int, float)) and self.C > 0):
            raise InvalidInputError(f"C must be a positive number, got {self.C!r}")
        X = _as_matrix(X, "X")
        y = np.asarray(y)
        if y.shape != (X.shape[0],):
            raise InvalidInputError(f"y must be a 1-D array with one label per row of X "
                                    f"({X.shape[0]}), got shape {y.shape}")
        if len(np.unique(y)) < 2:
            raise InvalidInputError("y has a single class; a classifier needs at least two")
        m = min(self.n_landmarks, X.shape[0]) if isinstance(self.n_landmarks, int) else \
            self.n_landmarks
        self.nystroem_map_ = fit_nystroem(self.kernel_fn, X, m, method=self.landmark_method,
                                          seed=self.seed, rcond=self.rcond)
        features = nystroem_features(self.kernel_fn, X, self.nystroem_map_,
                                     block_rows=self.block_rows)
        use_svc = self.solver == "svc" or (self.solver == "auto" and X.shape[0] <= 5000)
        classifier = (SVC(kernel="linear", C=self.C) if use_svc else
                      LinearSVC(C=self.C, dual="auto", random_state=self.seed, max_iter=20000))
        self.classifier_ = classifier.fit(features, y)
        self.classes_ = self.classifier_.classes_
        return self

    def _features(self, X):
        if not hasattr(self, "classifier_"):
            raise NotFittedError("this NystroemSVM is not fitted yet; call fit(X, y) first")
        return nystroem_features(self.kernel_fn, X, self.nystroem_map_,
                                 block_rows=self.block_rows)

    def transform(self, X):
        """Nystroem features [N, r] of X."""
        return self._features(X)

    def decision_function(self, X):
        features = self._features(X)
        return self.classifier_.decision_function(features)

    def predict(self, X):
        features = self._features(X)
        return self.classifier_.predict(features)
