"""Kernel diagnostics, classical baselines on identical splits, and paired significance tests.

Last stage before the report: given a frozen quantum Gram (numpy), say how concentrated it
is, how many directions its spectrum really uses, how far it is from a tuned classical
kernel (geometric difference), and whether its accuracy differs significantly from tuned
classical SVMs evaluated on the very same splits. Everything returns numpy arrays or
JSON-able dicts; nothing here prints or writes files.
"""

from __future__ import annotations

import math
from typing import Callable, NamedTuple

import numpy as np
import scipy.linalg
import scipy.stats

from hilbertune.data import encode_labels, split_and_scale
from hilbertune.errors import InvalidInputError

#: Said with every verdict: the comparison concerns an exact classical simulation.
SIMULATION_CAVEAT = ("The quantum kernel was simulated exactly on a classical computer; a "
                     "simulated kernel is no evidence about performance on quantum hardware.")

#: Grids of the classical baselines (common practice: log-spaced C and gamma).
C_GRID = tuple(float(v) for v in 10.0 ** np.arange(-2, 4))  # 0.01 ... 1000
GAMMA_GRID = tuple(float(v) for v in 10.0 ** np.arange(-3, 3))  # 0.001 ... 100


# --------------------------------------------------------------------------- checks

def _square(K, name: str = "K") -> np.ndarray:
    K = np.asarray(K, dtype=np.float64)
    if K.ndim != 2 or K.shape[0] != K.shape[1] or K.shape[0] == 0:
        raise InvalidInputError(f"{name} must be a square [N, N] Gram matrix, got shape "
                                f"{K.shape}; pass the train-train kernel")
    if not np.isfinite(K).all():
        raise InvalidInputError(f"{name} contains NaN or infinite entries; recompute the "
                                "kernel from finite features")
    return 0.5 * (K + K.T)  # symmetric by definition; remove rounding asymmetry


def _labels(y, n: int) -> np.ndarray:
    y = np.asarray(y)
    if y.ndim != 1 or y.shape[0] != n:
        raise InvalidInputError(f"labels must be 1-D of length {n} (one per Gram row), got "
                                f"shape {y.shape}")
    return y


# --------------------------------------------------------------------------- spectrum

def spectrum(K) -> np.ndarray:
    """Eigenvalues of a symmetric Gram, descending: float64 [N] (``scipy.linalg.eigvalsh``)."""
    return scipy.linalg.eigvalsh(_square(K))[::-1]


def centered(K) -> np.ndarray:
    """The centered Gram ``H K H`` with ``H = I - 11^T / N`` (Cortes, Mohri & Rostamizadeh,
    JMLR 13, 795 (2012)): the Gram of the features after their mean is removed."""
    K = _square(K)
    row_means = K.mean(axis=0)
    # H K H = K - 1 r^T - r 1^T + mean(K), with r the column means (K symmetric)
    return K - row_means[None, :] - row_means[:, None] + K.mean()


def effective_dimension(K, *, centered_gram: bool = True) -> float:
    """Participation ratio of the spectrum, ``(sum_i l_i)^2 / sum_i l_i^2``.

    Computed on the centered Gram ``H K H`` by default: an uncentered Gram of a kernel with
    a large mean value (a tuned RBF Gram, a fidelity Gram of nearly identical states) has
    one eigenvalue that carries that constant, and it dominates the ratio (issue 15: tuned
    RBF 1.06 uncentered, 2.62 centered). ``centered_gram=False`` gives the old number.

    Between 1 (one eigenvalue carries everything) and N (flat spectrum, e.g. the identity):
    the number of directions the kernel effectively uses. Negative eigenvalues from
    rounding are set to 0 first. This is the participation ratio, a standard measure in
    physics (Bell & Dean, Discuss. Faraday Soc. 50, 55 (1970), from memory) and in the
    dimensionality of neural data (Gao et al., bioRxiv 214262 (2017), from memory) — not
    the "effective dimension" of Huang et al. (2021) or of Abbas et al. (2021).
    """
    eigenvalues = np.clip(spectrum(centered(K) if centered_gram else K), 0.0, None)
    total = eigenvalues.sum()
    if total <= 0:
        raise InvalidInputError("the Gram matrix has no positive eigenvalue (after centering "
                                "when centered_gram=True); the kernel is constant — check "
                                "the encoding and the features")
    return float(total ** 2 / np.sum(eigenvalues ** 2))


# --------------------------------------------------------------------------- concentration

def concentration(K, n_qubits: int, shots: int = 1000, *, kind: str = "fidelity",
                  gamma: float = 1.0, expectations=None) -> dict:
    """Is the kernel exponentially concentrated for a given number of shots?

    Thanasilp, Wang, Cerezo, Holmes, Nat. Commun. 15, 5200 (2024): when the off-diagonal
    kernel values concentrate (their variance shrinks exponentially with the qubit count),
    a polynomial number of shots cannot tell them apart and the trained model becomes
    independent of the data. For fidelity kernels the typical value of random states is
    ``1/2**n`` (mean overlap of Haar-random states).

    Our rule (documented, not from the paper): the kernel is **concentrated** when the
    spread of its off-diagonal values is smaller than the shot noise of one estimate at
    their mean value, ``std(k_ij) < sqrt(m (1 - m) / shots)`` with ``m = mean(k_ij)`` (the
    binomial standard deviation of an inversion-test estimate with ``shots`` shots).
    Then the differences the SVM relies on are below the measurement noise. The message
    says whether values sit near ``1/2**n`` (nearly orthogonal states: lower the
    bandwidth or the qubit count) or near 1 (nearly identical states: raise the bandwidth).

    A **projected** kernel (``kind="projected"``) is not estimated by counting one outcome:
    each sample's single-qubit Pauli expectations are measured (``shots`` per basis) and
    the kernel is computed from them. Its shot noise is then the root-mean-square of the
    per-entry standard deviation of ``hardware.projected_entry_variance`` (delta method
    through ``exp(-gamma sum ||.||^2)``), from the Pauli ``expectations`` [N, n, 3] when
    given, otherwise from its worst-case bound (every expectation at 0, maximal variance),
    which needs only K, gamma and n.

    Args:
      K: float array [N, N], the train Gram (N >= 2).
      n_qubits: qubits of the encoding.
      shots: shots per kernel entry (fidelity) or per measurement basis (projected).
      kind: "fidelity" or "projected"; gamma: the projected kernel's bandwidth.
      expectations: optional float array [N, n_qubits, 3] (projected only).

    Returns:
      JSON-able dict: mean_offdiagonal, variance_offdiagonal, std_offdiagonal,
      random_state_value (1/2**n), shots, shot_noise_std, spread_to_noise,
      concentrated (bool), warning (str, "" when not concentrated), rule (str).
    """
    K = _square(K)
    if K.shape[0] < 2:
        raise InvalidInputError("concentration needs at least 2 samples (off-diagonal "
                                "entries); pass a larger Gram")
    if not (isinstance(n_qubits, (int, np.integer)) and n_qubits >= 1):
        raise InvalidInputError(f"n_qubits must be a positive integer, got {n_qubits!r}")
    if not (isinstance(shots, (int, np.integer)) and shots >= 1):
        raise InvalidInputError(f"shots must be a positive integer, got {shots!r}")
    values = K[~np.eye(K.shape[0], dtype=bool)]
    mean = float(values.mean())
    variance = float(values.var())
    spread = math.sqrt(variance)
    if kind not in ("fidelity", "projected"):
        raise InvalidInputError(f"kind must be 'fidelity' or 'projected', got {kind!r}")
    if kind == "projected":
        from hilbertune.hardware import projected_entry_variance, projected_variance_bound

        off = ~np.eye(K.shape[0], dtype=bool)
        if expectations is None:
            entry_variance = projected_variance_bound(K, gamma=gamma, n_qubits=int(n_qubits),
                                                      shots=int(shots))
            source = "worst-case bound (all expectations 0)"
        else:
            entry_variance = projected_entry_variance(expectations, None, gamma=gamma,
                                                      shots=int(shots))
            source = "measured Pauli expectations"
        noise = math.sqrt(float(np.mean(entry_variance[off])))
        rule = ("concentrated when std of off-diagonal values < root-mean-square shot-noise "
                "std of an entry estimated from Pauli expectations (delta method, "
                f"{source}; shots per basis)")
    else:
        m = min(max(mean, 0.0), 1.0)
        noise = math.sqrt(m * (1.0 - m) / shots)  # binomial std of a frequency estimate
        rule = "concentrated when std of off-diagonal values < sqrt(m(1-m)/shots)"
    random_value = 2.0 ** (-int(n_qubits))
    concentrated = bool(spread < noise)
    warning = ""
    if concentrated and kind == "projected":
        cause = (f"the kernel values sit near {mean:.3g}; " + (
            "lower gamma (the projected kernel's bandwidth) so that they spread out"
            if mean < 0.5 else "raise gamma so that they spread out"))
        warning = (f"Kernel values are concentrated: their spread ({spread:.3g}) is below "
                   f"the shot noise of one estimate from Pauli expectations with {shots} "
                   f"shots per basis ({noise:.3g}), so on hardware the Gram would be mostly "
                   f"noise; {cause}.")
    elif concentrated:
        if mean < 0.5:
            cause = (f"the states are nearly orthogonal (mean {mean:.3g}, random states give "
                     f"{random_value:.3g}); lower the bandwidth or use fewer qubits")
        else:
            cause = (f"the states are nearly identical (mean {mean:.3g}); raise the "
                     "bandwidth")
        warning = (f"Kernel values are concentrated: their spread ({spread:.3g}) is below "
                   f"the shot noise of one estimate with {shots} shots ({noise:.3g}), so on "
                   f"hardware the Gram would be mostly noise; {cause}.")
    return {"mean_offdiagonal": mean, "variance_offdiagonal": variance,
            "std_offdiagonal": spread, "random_state_value": random_value,
            "shots": int(shots), "shot_noise_std": noise,
            "spread_to_noise": (spread / noise) if noise > 0 else math.inf,
            "concentrated": concentrated, "warning": warning, "kind": kind, "rule": rule}


# --------------------------------------------------------------------------- geometry

def _psd_part(K) -> np.ndarray:
    eigenvalues, vectors = scipy.linalg.eigh(K)
    return (vectors * np.clip(eigenvalues, 0.0, None)) @ vectors.T


def geometric_difference(K_quantum, K_classical, *, reg: float = 1e-3) -> float:
    """Geometric difference ``g = sqrt(|| sqrt(Kq) Kc^-1 sqrt(Kq) ||_2)``.

    Huang, Broughton, Mohseni, Babbush, Boixo, Neven, McClean, Nat. Commun. 12, 2631
    (2021), Eq. (5): both Grams trace-normalized to N. A large g says the quantum kernel
    could fit some labels that the classical kernel needs much more data for; g near 1
    says the classical kernel is at least as expressive on this data.

    Regularized version used here: after trace normalization, both matrices are made PSD
    (negative eigenvalues from rounding set to 0) and get ``reg * I`` added,
    ``g = sqrt(lambda_max(Kq', Kc'))`` with ``Kq' = Kq + reg I``, ``Kc' = Kc + reg I`` (the
    largest generalized eigenvalue equals the spectral norm above). Adding the same
    ``reg`` to both keeps their traces equal, so ``g(K, K) = 1`` exactly and ``g >= 1``
    always (if ``Kq' < Kc'`` in the Loewner order, then ``tr Kq' < tr Kc'``). The value
    still depends on ``reg`` whenever ``Kc`` is nearly singular; report it.

    Args:
      K_quantum, K_classical: float arrays [N, N] on the same training samples.
      reg: positive regularizer, relative to an average eigenvalue of 1.

    Returns:
      g as a float >= 1.
    """
    Kq, Kc = _square(K_quantum, "K_quantum"), _square(K_classical, "K_classical")
    if Kq.shape != Kc.shape:
        raise InvalidInputError(f"the two Grams differ in shape ({Kq.shape} vs {Kc.shape}); "
                                "compute both on the same training samples")
    if not (reg > 0 and math.isfinite(reg)):
        raise InvalidInputError(f"reg must be a positive finite number, got {reg!r}")
    n = Kq.shape[0]
    for name, K in (("K_quantum", Kq), ("K_classical", Kc)):
        if np.trace(K) <= 0:
            raise InvalidInputError(f"{name} has non-positive trace; it is not a kernel Gram")
    Kq = _psd_part(Kq * (n / np.trace(Kq))) + reg * np.eye(n)
    Kc = _psd_part(Kc * (n / np.trace(Kc))) + reg * np.eye(n)
    # ||sqrt(Kq) Kc^-1 sqrt(Kq)||_2 is the largest generalized eigenvalue of (Kq, Kc); whiten
    # with the Cholesky factor Kc = L L^T and take the largest eigenvalue of L^-1 Kq L^-T.
    # (LAPACK's subset generalized solver failed to converge on degenerate pairs, Kq = Kc.)
    lower = scipy.linalg.cholesky(Kc, lower=True)
    half = scipy.linalg.solve_triangular(lower, Kq, lower=True)
    whitened = scipy.linalg.solve_triangular(lower, half.T, lower=True)
    largest = np.linalg.eigvalsh(0.5 * (whitened + whitened.T))[-1]
    return float(math.sqrt(max(float(largest), 0.0)))


#: Regularizers of the geometric-difference curve, relative to an average eigenvalue of 1
#: (both Grams are trace-normalized to N).
LAMBDA_GRID = (1e-5, 1e-4, 1e-3, 1e-2, 1e-1, 1.0)

#: The classical model's worst-case training error allowed at the chosen regularizer (ours:
#: Huang et al. ask only that it be small).
TRAINING_ERROR_LIMIT = 0.1

#: A classical Gram is flagged near-singular above this condition number (ours).
NEAR_SINGULAR_CONDITION = 1e8


def _trace_normalized(K, name):
    n = K.shape[0]
    if np.trace(K) <= 0:
        raise InvalidInputError(f"{name} has non-positive trace; it is not a kernel Gram")
    return K * (n / np.trace(K))


def geometric_difference_curve(K_quantum, K_classical, *, y=None, lambdas=LAMBDA_GRID,
                               error_limit: float = TRAINING_ERROR_LIMIT) -> dict:
    """Regularized geometric difference over a range of lambda, with the classical model's
    training error, and lambda chosen where that error stays small.

    Huang, Broughton, Mohseni, Babbush, Boixo, Neven, McClean, Nat. Commun. 12, 2631 (2021),
    Methods (regularized geometric difference; formulas written from memory): with both
    Grams trace-normalized to N and ``R = (Kc + lambda I)^-1``,

        g(lambda)         = sqrt(|| sqrt(Kq) sqrt(Kc) R^2 sqrt(Kc) sqrt(Kq) ||_2)
        e_train(lambda)   = lambda sqrt(|| sqrt(Kq) R^2 sqrt(Kq) ||_2)

    ``e_train`` bounds the training error of the classical kernel-ridge model on labels the
    quantum kernel fits; g bounds its prediction error. Small lambda: small training error,
    large g (at lambda -> 0, g -> the unregularized g); large lambda: g shrinks because the
    classical model no longer fits its training data. They report g together with that
    error and pick lambda so that it stays small; we take the **largest lambda of the grid
    with e_train <= error_limit** (0.1, our choice), or the smallest lambda when none is.

    Computed with one eigendecomposition of Kc (``numpy.linalg.eigh``): with ``Kc = V c V^T``
    and ``W = V^T Kq V``, ``g^2 = lambda_max(D W D)`` for ``D = diag(sqrt(c) / (c + lambda))``
    and ``e_train^2 = lambda^2 lambda_max(D' W D')`` for ``D' = diag(1 / (c + lambda))``
    (``||A B A||_2 = ||B^1/2 A^2 B^1/2||_2`` for PSD B).

    Args:
      K_quantum, K_classical: float arrays [N, N] on the same training samples.
      y: optional training labels [N]; then each point also holds the actual training error
        of the classical kernel-ridge classifier (one-vs-rest targets +-1,
        ``f = Kc (Kc + lambda I)^-1 Y``, fraction of rows whose largest output is not their
        class).
      lambdas: increasing positive regularizers (relative to an average eigenvalue of 1).

    Returns:
      JSON-able dict: curve [{lambda, g, training_error_bound, classical_training_error}],
      chosen_lambda, g (at chosen_lambda), training_error_bound (there), error_limit, rule.
    """
    Kq, Kc = _square(K_quantum, "K_quantum"), _square(K_classical, "K_classical")
    if Kq.shape != Kc.shape:
        raise InvalidInputError(f"the two Grams differ in shape ({Kq.shape} vs {Kc.shape}); "
                                "compute both on the same training samples")
    lambdas = [float(v) for v in lambdas]
    if not lambdas or any(not (v > 0 and math.isfinite(v)) for v in lambdas) \
            or sorted(set(lambdas)) != lambdas:
        raise InvalidInputError(f"lambdas must be increasing positive numbers, got {lambdas}")
    n = Kq.shape[0]
    Kq = _psd_part(_trace_normalized(Kq, "K_quantum"))
    c, V = np.linalg.eigh(_trace_normalized(Kc, "K_classical"))
    c = np.clip(c, 0.0, None)
    W = V.T @ Kq @ V
    W = 0.5 * (W + W.T)
    targets = None
    if y is not None:
        codes, classes = encode_labels(_labels(y, n))
        targets = np.where(codes[:, None] == np.arange(max(classes.size, 2))[None, :], 1.0, -1.0)
        if classes.size == 2:
            targets = targets[:, 1:]  # one output suffices for two classes
        projected_targets = V.T @ targets

    def largest(d):
        return max(float(np.linalg.eigvalsh(d[:, None] * W * d[None, :])[-1]), 0.0)

    curve = []
    for lam in lambdas:
        point = {"lambda": lam,
                 "g": math.sqrt(largest(np.sqrt(c) / (c + lam))),
                 "training_error_bound": lam * math.sqrt(largest(1.0 / (c + lam)))}
        if targets is not None:
            fitted = V @ ((c / (c + lam))[:, None] * projected_targets)
            if fitted.shape[1] == 1:
                predicted = (fitted[:, 0] > 0).astype(int)
                truth = (targets[:, 0] > 0).astype(int)
            else:
                predicted, truth = fitted.argmax(axis=1), targets.argmax(axis=1)
            point["classical_training_error"] = float(np.mean(predicted != truth))
        curve.append(point)
    fitting = [p for p in curve if p["training_error_bound"] <= error_limit]
    chosen = fitting[-1] if fitting else curve[0]
    return {"curve": curve, "chosen_lambda": chosen["lambda"], "g": chosen["g"],
            "training_error_bound": chosen["training_error_bound"],
            "error_limit": float(error_limit),
            "rule": (f"largest lambda whose worst-case classical training error "
                     f"lambda sqrt(||sqrt(Kq) (Kc + lambda I)^-2 sqrt(Kq)||) <= {error_limit} "
                     "(Huang et al. 2021 pick lambda so that this error stays small; the "
                     "limit is ours)"
                     + ("" if fitting else "; no lambda of the grid met it, the smallest "
                        "is used"))}


def classical_gram_health(K_classical, lam: float) -> dict:
    """Is the trace-normalized classical Gram nearly singular at regularizer ``lam``?

    Flagged when its condition number exceeds ``NEAR_SINGULAR_CONDITION`` or when more than
    half of its eigenvalues lie below ``lam`` (then g mostly measures the regularizer;
    issue 15 found 95 of 105 below lambda = 1e-3 on a tuned RBF Gram). Eigenvalues from
    ``numpy.linalg.eigvalsh``.
    """
    K = _trace_normalized(_square(K_classical, "K_classical"), "K_classical")
    values = np.linalg.eigvalsh(K)
    largest, smallest = float(values[-1]), float(values[0])
    condition = largest / smallest if smallest > 0 else math.inf
    below = int(np.sum(values < lam))
    near = bool(condition > NEAR_SINGULAR_CONDITION or below > K.shape[0] / 2)
    warning = ""
    if near:
        warning = (f"The classical Gram is nearly singular: {below} of {K.shape[0]} "
                   f"trace-normalized eigenvalues lie below lambda = {lam:g} (condition number "
                   f"{condition:.3g}), so the geometric difference depends strongly on "
                   "lambda; read it together with the curve over lambda.")
    return {"eigenvalues": int(K.shape[0]), "eigenvalues_below_lambda": below,
            "lambda": float(lam), "smallest_eigenvalue": smallest,
            "largest_eigenvalue": largest,
            "condition_number": condition if math.isfinite(condition) else None,
            "near_singular": near, "warning": warning}


# --------------------------------------------------------------------------- alignment

def _ideal_kernel(y) -> np.ndarray:
    # Y_ij = 1 for equal labels; -1 (two classes) or -1/(C-1) (C classes) otherwise
    # (Cristianini et al., NIPS 2001 for two classes; the multiclass form is common practice)
    codes, classes = encode_labels(y)
    other = -1.0 / max(classes.size - 1, 1)
    same = codes[:, None] == codes[None, :]
    return np.where(same, 1.0, other)


def alignment_of(K, y, *, centered: bool = False) -> float:
    """Kernel-target alignment ``<K, Y>_F / (||K||_F ||Y||_F)`` in plain numpy.

    Cristianini, Shawe-Taylor, Elisseeff, Kandola, NIPS 2001; ``centered=True`` first
    centers both with ``H = I - 11^T/N`` (Cortes, Mohri, Rostamizadeh, JMLR 13, 795
    (2012)). ``Y`` is the ideal kernel of the labels (see ``_ideal_kernel``).

    Args:
      K: float array [N, N]; y: labels [N] (any dtype, at least two classes).
    """
    K = _square(K)
    y = _labels(y, K.shape[0])
    if np.unique(y).size < 2:
        raise InvalidInputError("alignment needs at least two classes in y")
    Y = _ideal_kernel(y)
    if centered:
        H = np.eye(K.shape[0]) - 1.0 / K.shape[0]
        K, Y = H @ K @ H, H @ Y @ H
    denominator = np.linalg.norm(K) * np.linalg.norm(Y)
    if denominator == 0:
        return 0.0
    return float(np.sum(K * Y) / denominator)


# --------------------------------------------------------------------------- baselines

class BaselineResult(NamedTuple):
    """A classifier evaluated on one split."""

    name: str
    test_accuracy: float
    train_accuracy: float
    cv_accuracy: float | None  # best mean CV accuracy on the train part (None: no search)
    best_params: dict  # chosen hyperparameters (JSON-able floats)
    cv_folds: int  # folds used (0 when no search)
    test_predictions: np.ndarray  # [N_test] predicted labels
    gram_train: np.ndarray  # float64 [N_train, N_train] Gram of the chosen kernel

    def summary(self) -> dict:
        """JSON-able part (no arrays)."""
        return {"name": self.name, "test_accuracy": self.test_accuracy,
                "train_accuracy": self.train_accuracy, "cv_accuracy": self.cv_accuracy,
                "best_params": dict(self.best_params), "cv_folds": self.cv_folds}


def _folds(y_train, cv: int, seed: int):
    from sklearn.model_selection import StratifiedKFold

    if not (isinstance(cv, (int, np.integer)) and cv >= 2):
        raise InvalidInputError(f"cv must be an integer >= 2, got {cv!r}")
    smallest = int(np.unique(y_train, return_counts=True)[1].min())
    if smallest < 2:
        raise InvalidInputError("a class has a single training sample; cross-validation "
                                "needs at least 2 per class — use more data")
    # fewer folds when a class is rarer than cv (StratifiedKFold needs one per fold)
    k = min(int(cv), smallest)
    return StratifiedKFold(n_splits=k, shuffle=True, random_state=seed), k


def _check_split(X_train, y_train, X_test, y_test):
    X_train = np.asarray(X_train, dtype=np.float64)
    X_test = np.asarray(X_test, dtype=np.float64)
    if X_train.ndim != 2 or X_test.ndim != 2 or X_train.shape[1] != X_test.shape[1]:
        raise InvalidInputError(f"X_train {X_train.shape} and X_test {X_test.shape} must be "
                                "2-D with the same number of features")
    y_train = _labels(y_train, X_train.shape[0])
    y_test = _labels(y_test, X_test.shape[0])
    if np.unique(y_train).size < 2:
        raise InvalidInputError("the training labels hold one class only; use a stratified "
                                "split")
    return X_train, y_train, X_test, y_test


def _jsonable(params: dict) -> dict:
    return {k: (float(v) if isinstance(v, (int, float, np.number)) else v)
            for k, v in params.items()}


def _searched(name, estimator, grid, X_train, y_train, X_test, y_test, seed, cv, gram,
              n_jobs=None):
    from sklearn.model_selection import GridSearchCV

    folds, k = _folds(y_train, cv, seed)
    search = GridSearchCV(estimator, grid, cv=folds, scoring="accuracy", refit=True,
                          n_jobs=n_jobs)
    search.fit(X_train, y_train)
    model = search.best_estimator_
    return BaselineResult(name=name,
                          test_accuracy=float(model.score(X_test, y_test)),
                          train_accuracy=float(model.score(X_train, y_train)),
                          cv_accuracy=float(search.best_score_),
                          best_params=_jsonable(search.best_params_), cv_folds=k,
                          test_predictions=np.asarray(model.predict(X_test)),
                          gram_train=gram(model))


def tuned_rbf_svm(X_train, y_train, X_test, y_test, *, seed: int = 0, cv: int = 5,
                  C_grid=C_GRID, gamma_grid=GAMMA_GRID, n_jobs=None) -> BaselineResult:
    """RBF SVM, C and gamma chosen by stratified k-fold CV on the train part only.

    ``GridSearchCV(SVC(kernel="rbf"), {"C": C_grid, "gamma": gamma_grid},
    cv=StratifiedKFold(cv, shuffle=True, random_state=seed), scoring="accuracy")``, refit
    on the whole train part, scored once on the test part. ``gram_train`` is
    ``exp(-gamma ||x - x'||^2)`` at the chosen gamma (for ``geometric_difference``).
    ``n_jobs`` goes to ``GridSearchCV`` (None: one process). About 2-3 s for 180 training
    rows on one slow core (36 grid points x 5 folds).
    """
    from sklearn.metrics.pairwise import rbf_kernel
    from sklearn.svm import SVC

    X_train, y_train, X_test, y_test = _check_split(X_train, y_train, X_test, y_test)
    grid = {"C": list(C_grid), "gamma": list(gamma_grid)}
    return _searched("rbf_svm", SVC(kernel="rbf"), grid, X_train, y_train, X_test, y_test,
                     seed, cv, lambda m: rbf_kernel(X_train, gamma=m.gamma), n_jobs)


def linear_svm(X_train, y_train, X_test, y_test, *, seed: int = 0, cv: int = 5,
               C_grid=C_GRID, n_jobs=None) -> BaselineResult:
    """Linear SVM (``SVC(kernel="linear")``), C chosen by CV on the train part only.

    ``gram_train`` is ``X_train X_train^T``.
    """
    from sklearn.svm import SVC

    X_train, y_train, X_test, y_test = _check_split(X_train, y_train, X_test, y_test)
    return _searched("linear_svm", SVC(kernel="linear"), {"C": list(C_grid)}, X_train,
                     y_train, X_test, y_test, seed, cv, lambda m: X_train @ X_train.T,
                     n_jobs)


def precomputed_svm(K_train, K_test, y_train, y_test, *, C=C_GRID, seed: int = 0,
                    cv: int = 5, name: str = "quantum_svm", n_jobs=None) -> BaselineResult:
    """SVM on a precomputed kernel (``SVC(kernel="precomputed")``).

    Args:
      K_train: float array [N_train, N_train]; K_test: [N_test, N_train] (test rows
        against training columns).
      C: one number (no search) or a sequence (chosen by CV on the train part, with the
        same folds rule as the classical baselines so the comparison is fair).
    """
    from sklearn.svm import SVC

    K_train = _square(K_train, "K_train")
    K_test = np.asarray(K_test, dtype=np.float64)
    if K_test.ndim != 2 or K_test.shape[1] != K_train.shape[0]:
        raise InvalidInputError(f"K_test must have shape [N_test, {K_train.shape[0]}] (test "
                                f"rows x training columns), got {K_test.shape}")
    y_train = _labels(y_train, K_train.shape[0])
    y_test = _labels(y_test, K_test.shape[0])
    if np.ndim(C) == 0:
        if not (C > 0 and math.isfinite(C)):
            raise InvalidInputError(f"C must be a positive number, got {C!r}")
        model = SVC(kernel="precomputed", C=float(C)).fit(K_train, y_train)
        return BaselineResult(name=name, test_accuracy=float(model.score(K_test, y_test)),
                              train_accuracy=float(model.score(K_train, y_train)),
                              cv_accuracy=None, best_params={"C": float(C)}, cv_folds=0,
                              test_predictions=np.asarray(model.predict(K_test)),
                              gram_train=K_train)
    return _searched(name, SVC(kernel="precomputed"), {"C": [float(c) for c in C]},
                     K_train, y_train, K_test, y_test, seed, cv, lambda m: K_train, n_jobs)


# --------------------------------------------------------------------------- significance

def corrected_resampled_t_test(differences, n_train: int, n_test: int) -> dict:
    """Corrected resampled t-test of paired accuracy differences over J random splits.

    Nadeau & Bengio, Machine Learning 52, 239 (2003): ``t = mean(d) / sqrt((1/J +
    n_test/n_train) * s^2)`` with ``s^2`` the sample variance (ddof=1) of the J differences;
    two-sided p from Student's t with J - 1 degrees of freedom (``scipy.stats.t``). The
    ``n_test/n_train`` term corrects for the overlap of training sets between splits.

    Returns:
      JSON-able dict: test, n_repeats, mean_difference, t_statistic, dof, p_value.
      t_statistic and p_value are None when all differences are equal but non-zero (zero
      variance: the test is undefined and no significance is claimed).
    """
    d = np.asarray(differences, dtype=np.float64).reshape(-1)
    if d.size < 2 or not np.isfinite(d).all():
        raise InvalidInputError(f"the t-test needs at least 2 finite paired differences, got "
                                f"{d.size}; use n_repeats >= 2 (10 or more is better)")
    for name, value in (("n_train", n_train), ("n_test", n_test)):
        if not (isinstance(value, (int, np.integer)) and value >= 1):
            raise InvalidInputError(f"{name} must be a positive integer, got {value!r}")
    J = d.size
    mean = float(d.mean())
    variance = float(d.var(ddof=1))
    if variance == 0 and mean == 0:
        t, p = 0.0, 1.0  # no difference at all
    elif variance == 0:
        # identical non-zero differences: no variance estimate, the statistic is undefined;
        # report None rather than a spurious p = 0
        t, p = None, None
    else:
        t = mean / math.sqrt((1.0 / J + n_test / n_train) * variance)
        p = float(2.0 * scipy.stats.t.sf(abs(t), df=J - 1))
    return {"test": "corrected resampled t-test (Nadeau & Bengio 2003)", "n_repeats": J,
            "mean_difference": mean, "t_statistic": t if t is None else float(t),
            "dof": J - 1, "p_value": p}


def mcnemar_exact(correct_a, correct_b) -> dict:
    """McNemar's exact test on one test set: do classifiers a and b err on different rows?

    Discordant counts ``b = #(a right, b wrong)``, ``c = #(a wrong, b right)``; under the
    null each discordant row goes either way with probability 1/2, so the two-sided p is
    ``scipy.stats.binomtest(b, b + c, 0.5).pvalue`` (McNemar, Psychometrika 12, 153 (1947);
    exact binomial form, common practice). p = 1 when there are no discordant rows.

    Args:
      correct_a, correct_b: bool arrays [N_test], True where each classifier is right.
    """
    a = np.asarray(correct_a, dtype=bool).reshape(-1)
    b = np.asarray(correct_b, dtype=bool).reshape(-1)
    if a.shape != b.shape or a.size == 0:
        raise InvalidInputError(f"correct_a and correct_b must be non-empty and of equal "
                                f"length, got {a.size} and {b.size}")
    only_a = int(np.sum(a & ~b))
    only_b = int(np.sum(~a & b))
    p = 1.0 if only_a + only_b == 0 else float(
        scipy.stats.binomtest(only_a, only_a + only_b, 0.5).pvalue)
    return {"test": "McNemar exact test", "only_a_correct": only_a,
            "only_b_correct": only_b, "mean_difference": float(a.mean() - b.mean()),
            "p_value": p}


def _verdict(mean: float, p, alpha: float, baseline_name: str) -> str:
    # the quantum kernel is called better ONLY when p < alpha AND the difference is positive
    if p is None:
        words = (f"no significant difference can be established between the quantum "
                 f"kernel and the {baseline_name}: every split gave the same difference "
                 f"({mean:+.3f}), so the test has no variance estimate; use more repeats or "
                 "larger test sets")
    elif p < alpha and mean > 0:
        words = (f"the quantum kernel is significantly more accurate than the "
                 f"{baseline_name} (mean difference {mean:+.3f}, p = {p:.3g} < {alpha})")
    elif p < alpha and mean < 0:
        words = (f"the {baseline_name} is significantly more accurate "
                 f"than the quantum kernel (mean difference {mean:+.3f}, p = {p:.3g} < "
                 f"{alpha})")
    else:
        words = (f"no significant difference between the quantum kernel and the "
                 f"{baseline_name} (mean difference {mean:+.3f}, p = {p:.3g}, alpha = "
                 f"{alpha})")
    return words[0].upper() + words[1:] + ". " + SIMULATION_CAVEAT


def _check_alpha(alpha):
    if not (0 < alpha < 1):
        raise InvalidInputError(f"alpha must lie strictly between 0 and 1, got {alpha!r}")


def compare_accuracies(acc_quantum, acc_classical, n_train: int, n_test: int, *,
                       alpha: float = 0.05, baseline_name: str = "classical baseline") -> dict:
    """Paired comparison of per-split test accuracies with the corrected resampled t-test.

    Args:
      acc_quantum, acc_classical: float arrays [J], test accuracies on the same J splits.
      n_train, n_test: sizes of each split's parts.

    Returns:
      JSON-able dict: the fields of ``corrected_resampled_t_test`` (difference = quantum
      minus classical), alpha, baseline, verdict (plain words, ends with
      ``SIMULATION_CAVEAT``), caveat.
    """
    _check_alpha(alpha)
    q = np.asarray(acc_quantum, dtype=np.float64).reshape(-1)
    c = np.asarray(acc_classical, dtype=np.float64).reshape(-1)
    if q.shape != c.shape:
        raise InvalidInputError(f"need one classical accuracy per quantum accuracy (paired "
                                f"splits), got {q.size} and {c.size}")
    result = corrected_resampled_t_test(q - c, n_train, n_test)
    result.update(alpha=float(alpha), baseline=baseline_name, caveat=SIMULATION_CAVEAT,
                  verdict=_verdict(result["mean_difference"], result["p_value"], alpha,
                                   baseline_name))
    return result


def compare_predictions(correct_quantum, correct_classical, *, alpha: float = 0.05,
                        baseline_name: str = "classical baseline") -> dict:
    """Single-split comparison with McNemar's exact test (a = quantum, b = classical).

    Returns:
      JSON-able dict: the fields of ``mcnemar_exact``, alpha, baseline, verdict, caveat.
    """
    _check_alpha(alpha)
    result = mcnemar_exact(correct_quantum, correct_classical)
    result.update(alpha=float(alpha), baseline=baseline_name, caveat=SIMULATION_CAVEAT,
                  verdict=_verdict(result["mean_difference"], result["p_value"], alpha,
                                   baseline_name))
    return result


# --------------------------------------------------------------------------- repeated splits

def repeated_split_scores(make_kernel_fn: Callable, X, y, *, n_repeats: int = 10,
                          test_fraction: float = 0.25, seed: int = 0,
                          n_components: int | None = None, reduce: str = "pca",
                          quantum_C=C_GRID, cv: int = 5,
                          baselines=("rbf_svm", "linear_svm"), C_grid=C_GRID,
                          gamma_grid=GAMMA_GRID, n_jobs=None) -> dict:
    """Per-split test accuracies of the quantum kernel and classical baselines on J
    identical splits, for ``compare_accuracies``.

    Split r uses ``split_and_scale(X, codes, test_fraction, seed=seed + r, ...)``
    (preprocessing fitted on that split's train part only); labels are encoded to 0..C-1
    first. ``make_kernel_fn(X_train, y_train, X_test)`` returns ``(K_train [N_train,
    N_train], K_test [N_test, N_train])``; the quantum SVM's C is tuned like the baselines'.
    Cost: about 5 s per repeat for 240 rows on one slow core, mostly the two grid searches
    (pass smaller grids or ``n_jobs=2`` to go faster).

    Leakage warning: if ``make_kernel_fn`` uses parameters learned on another split of the
    same data, the test rows of these splits were partly seen while learning, which favours
    the quantum kernel. For an honest comparison, learn the parameters inside
    ``make_kernel_fn`` from the ``X_train, y_train`` it is given.

    Returns:
      JSON-able dict: seeds [J], n_train, n_test, accuracies {"quantum": [J], "rbf_svm":
      [J], "linear_svm": [J]}.
    """
    if not (isinstance(n_repeats, (int, np.integer)) and n_repeats >= 2):
        raise InvalidInputError(f"n_repeats must be an integer >= 2 for a paired test, got "
                                f"{n_repeats!r}")
    unknown = [b for b in baselines if b not in ("rbf_svm", "linear_svm")]
    if unknown:
        raise InvalidInputError(f"unknown baseline(s) {unknown}; use 'rbf_svm' and/or "
                                "'linear_svm'")
    codes, _ = encode_labels(y)
    fitters = {"rbf_svm": lambda *a, **k: tuned_rbf_svm(*a, C_grid=C_grid,
                                                        gamma_grid=gamma_grid, **k),
               "linear_svm": lambda *a, **k: linear_svm(*a, C_grid=C_grid, **k)}
    seeds = [int(seed) + r for r in range(n_repeats)]
    scores = {"quantum": []} | {b: [] for b in baselines}
    n_train = n_test = None
    for split_seed in seeds:
        part = split_and_scale(X, codes, test_fraction=test_fraction, seed=split_seed,
                               n_components=n_components, reduce=reduce)
        n_train, n_test = part.X_train.shape[0], part.X_test.shape[0]
        K_train, K_test = make_kernel_fn(part.X_train, part.y_train, part.X_test)
        quantum = precomputed_svm(np.asarray(K_train), np.asarray(K_test), part.y_train,
                                  part.y_test, C=quantum_C, seed=split_seed, cv=cv,
                                  n_jobs=n_jobs)
        scores["quantum"].append(quantum.test_accuracy)
        for b in baselines:
            scores[b].append(fitters[b](part.X_train, part.y_train, part.X_test, part.y_test,
                                        seed=split_seed, cv=cv, n_jobs=n_jobs).test_accuracy)
    return {"seeds": seeds, "n_train": n_train, "n_test": n_test, "accuracies": scores}


def diagnose_kernel(K_train, y_train, n_qubits: int, *, shots: int = 1000,
                    K_classical=None, reg: float = 1e-3, top_eigenvalues: int = 10) -> dict:
    """All kernel diagnostics of one train Gram as a JSON-able dict.

    Keys: spectrum_top (largest eigenvalues), effective_dimension, concentration (see
    ``concentration``), alignment, centered_alignment, and geometric_difference (with
    ``reg``) when ``K_classical`` (same samples) is given.
    """
    eigenvalues = spectrum(K_train)
    result = {"spectrum_top": [float(v) for v in eigenvalues[:top_eigenvalues]],
              "effective_dimension": effective_dimension(K_train),
              "concentration": concentration(K_train, n_qubits, shots),
              "alignment": alignment_of(K_train, y_train),
              "centered_alignment": alignment_of(K_train, y_train, centered=True)}
    if K_classical is not None:
        result["geometric_difference"] = geometric_difference(K_train, K_classical, reg=reg)
        result["geometric_difference_reg"] = float(reg)
    return result


def run_diagnostics(k_untrained, k_chosen, k_classical, y_train, n_qubits: int, *,
                    shots: int = 1000, kind: str = "fidelity", gamma: float = 1.0,
                    expectations=None, lambdas=LAMBDA_GRID) -> tuple:
    """The ``diagnostics`` section of a run summary (JSON-able) plus spectra (numpy).

    Args:
      k_untrained, k_chosen: train Grams of the untrained and the chosen quantum kernel.
      k_classical: train Gram of the tuned RBF SVM's kernel (same rows).
      y_train: training labels [N] (for the classical model's training error).
      n_qubits: qubits of the encoding.
      shots: shots per kernel entry (fidelity) or per measurement basis (projected), for
        the concentration rule.
      kind, gamma: the kernel the SVM uses ("fidelity" or "projected") and the projected
        bandwidth; they choose the concentration rule's shot-noise model.
      expectations: optional Pauli expectations [N, n, 3] of the chosen encoding on the
        training rows (projected only; without them the worst-case bound is used).
      lambdas: regularizers of the geometric-difference curve.

    Returns:
      (summary dict with concentration, effective_dimension (centered Gram HKH),
      geometric_difference (curve over lambda, chosen lambda, classical-Gram health);
      dict of descending eigenvalue arrays "initial", "final", "rbf" of the uncentered
      Grams).
    """
    curves = {name: geometric_difference_curve(K, k_classical, y=y_train, lambdas=lambdas)
              for name, K in (("learned_vs_rbf", k_chosen), ("untrained_vs_rbf", k_untrained))}
    chosen_lambda = curves["learned_vs_rbf"]["chosen_lambda"]
    health = classical_gram_health(k_classical, chosen_lambda)
    geo = {"learned_vs_rbf": curves["learned_vs_rbf"]["g"],
           "untrained_vs_rbf": curves["untrained_vs_rbf"]["g"],
           "regularizer": chosen_lambda,
           "lambda_rule": curves["learned_vs_rbf"]["rule"],
           "curves": curves,
           "classical_gram": health,
           "meaning": "g close to 1: the classical kernel can fit whatever the quantum one "
                      "can on these samples (Huang et al. 2021); large g is necessary, not "
                      "sufficient, for a quantum advantage"}
    grams = (("initial", k_untrained), ("final", k_chosen), ("rbf", k_classical))
    effective = {k: float(effective_dimension(v)) for k, v in grams}
    effective["uncentered"] = {k: float(effective_dimension(v, centered_gram=False))
                               for k, v in grams}
    effective["computed_on"] = ("centered Gram HKH, H = I - 11^T/N (participation ratio of "
                                "its eigenvalues)")
    out = {"concentration": concentration(k_chosen, n_qubits, shots=shots, kind=kind,
                                          gamma=gamma, expectations=expectations),
           "effective_dimension": effective,
           "geometric_difference": geo}
    spectra = {"initial": spectrum(k_untrained), "final": spectrum(k_chosen),
               "rbf": spectrum(k_classical)}
    return out, spectra
