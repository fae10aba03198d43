"""Training objectives: how well a Gram matrix fits the labels (pure, differentiable JAX).

Data flow: ``kernels.gram_for_training`` gives K of shape [N, N]; the functions here turn K
and integer labels into one number. Alignments are "higher is better"; the registry
``OBJECTIVES`` maps every objective name to a loss to MINIMIZE (alignments negated), which is
what ``training.py`` differentiates. Nothing here validates input: callers pass finite
arrays and integer labels in ``0 .. n_classes - 1``.

Every function takes an optional ``mask`` (0/1 array of shape [N]): rows and columns with
mask 0 are ignored, so the value equals the one computed on the masked-in samples alone.
Training pads batches to a few fixed sizes this way, so one compiled step serves data sets
of similar size.
"""

from __future__ import annotations

import difflib

import numpy as np
import jax
import jax.numpy as jnp
from jax.scipy.linalg import cho_factor, cho_solve

from hilbertune.errors import InvalidInputError


def target_matrix(y_int, n_classes: int):
    """Ideal Gram of the labels.

    Two classes: ``Y = y y^T`` with ``y`` in {-1, +1} (Cristianini et al., NIPS 2001).
    More classes: ``Y_ij = 1`` for the same class, ``-1/(C-1)`` otherwise (common practice;
    it reduces to ``y y^T`` for C = 2).

    Args:
      y_int: int array of shape [N], values in ``0 .. n_classes - 1``.
      n_classes: number of classes C >= 2 (a Python int, static under jit).

    Returns:
      float array of shape [N, N].
    """
    same = y_int[:, None] == y_int[None, :]
    return jnp.where(same, 1.0, -1.0 / (n_classes - 1)).astype(jnp.result_type(float))


def _frobenius_ratio(A, B):
    numerator = jnp.sum(A * B)
    denominator = jnp.sqrt(jnp.sum(A * A) * jnp.sum(B * B))
    # a constant (or zero) matrix has zero norm after centering: report 0 instead of 0/0
    return numerator / jnp.maximum(denominator, jnp.finfo(denominator.dtype).tiny)


def _outer_mask(K, mask):
    m = mask.astype(K.dtype)
    return m, m[:, None] * m[None, :]


def kernel_alignment(K, Y, mask=None):
    """Kernel-target alignment ``<K, Y>_F / (||K||_F ||Y||_F)``.

    Reference: N. Cristianini, J. Shawe-Taylor, A. Elisseeff, J. Kandola, "On kernel-target
    alignment", NIPS 2001.

    Args:
      K: float array of shape [N, N]; Y: float array of shape [N, N] (``target_matrix``).
      mask: optional 0/1 array of shape [N] (see the module docstring).

    Returns:
      float array of shape [] in [-1, 1].
    """
    if mask is not None:
        _, outer = _outer_mask(K, mask)
        K, Y = K * outer, Y * outer
    return _frobenius_ratio(K, Y)


def center_gram(K, mask=None):
    """``H K H`` with ``H = I - 1 1^T / N``, without forming H (subtract row, column means).

    With a mask, ``H = diag(m) - m m^T / sum(m)``: the masked-in block is centered on its own
    means and every masked-out entry is 0.
    """
    if mask is None:
        row = jnp.mean(K, axis=1, keepdims=True)
        col = jnp.mean(K, axis=0, keepdims=True)
        return K - row - col + jnp.mean(K)
    m, outer = _outer_mask(K, mask)
    count = jnp.sum(m)
    K = K * outer
    row = jnp.sum(K, axis=1) / count
    col = jnp.sum(K, axis=0) / count
    return K - row[:, None] * m[None, :] - m[:, None] * col[None, :] + \
        (jnp.sum(K) / count**2) * outer


def centered_alignment(K, Y, mask=None):
    """Centered kernel-target alignment: the alignment of ``H K H`` and ``H Y H``.

    Reference: C. Cortes, M. Mohri, A. Rostamizadeh, "Algorithms for learning kernels based
    on centered alignment", JMLR 13 (2012), Definition 2 (``H = I - 1 1^T / N``).

    Args:
      K, Y: float arrays of shape [N, N]; mask: optional 0/1 array of shape [N].

    Returns:
      float array of shape [].
    """
    return _frobenius_ratio(center_gram(K, mask), center_gram(Y, mask))


def ridge_targets(y_int, n_classes: int):
    """Regression targets for the ridge objectives.

    Two classes: one column, -1 for class 0 and +1 for class 1. More classes: one column per
    class, +1 for the sample's own class and -1 elsewhere (one-vs-rest coding, common
    practice for regularized least-squares classification).

    Returns:
      float array of shape [N, 1] (two classes) or [N, C].
    """
    if n_classes == 2:
        return (2.0 * y_int - 1.0)[:, None].astype(jnp.result_type(float))
    return 2.0 * jax.nn.one_hot(y_int, n_classes, dtype=jnp.result_type(float)) - 1.0


def _ridge_inverse(K, lam):
    # G = K + lam I is symmetric positive definite for a PSD K and lam > 0: Cholesky solve
    n = K.shape[0]
    eye = jnp.eye(n, dtype=K.dtype)
    factor = cho_factor(K + lam * eye, lower=True)
    return cho_solve(factor, eye)


def _as_columns(targets):
    return targets[:, None] if targets.ndim == 1 else targets


def _masked_problem(K, targets, mask):
    # masked-out samples get K rows/columns 0 and target 0: G becomes block diagonal, they
    # decouple from the rest and their residual is exactly 0
    targets = _as_columns(targets)
    if mask is None:
        return K, targets
    m, outer = _outer_mask(K, mask)
    return K * outer, targets * m[:, None].astype(targets.dtype)


def _mean_square(residuals, mask):
    if mask is None:
        return jnp.mean(residuals**2)
    count = jnp.sum(mask.astype(residuals.dtype)) * residuals.shape[1]
    return jnp.sum(residuals**2) / count


def ridge_loo_residuals(K, targets, lam, mask=None):
    """Leave-one-out residuals of kernel ridge regression in closed form.

    With ``G = K + lam I`` and ``alpha = G^-1 y`` the residual of sample i when the model is
    refit without it is ``y_i - f_{-i}(x_i) = alpha_i / (G^-1)_ii`` (common practice; from
    memory: R. Rifkin, R. Lippert, "Notes on regularized least squares", MIT 2007).
    Kernel ridge here has no intercept, as scikit-learn's ``KernelRidge``.

    Args:
      K: float array of shape [N, N]; targets: float array [N] or [N, T]; lam: ridge > 0;
      mask: optional 0/1 array of shape [N] (masked-out rows get residual 0).

    Returns:
      float array of shape [N, T].
    """
    K, targets = _masked_problem(K, targets, mask)
    inverse = _ridge_inverse(K, lam)
    alpha = inverse @ targets
    return alpha / jnp.diagonal(inverse)[:, None]


def ridge_loo_loss(K, targets, lam, mask=None):
    """Mean squared leave-one-out residual of kernel ridge (``ridge_loo_residuals``).

    Returns:
      float array of shape [], the mean over (masked-in) samples and target columns.
    """
    return _mean_square(ridge_loo_residuals(K, targets, lam, mask), mask)


def fold_assignment(n_samples: int, folds) -> np.ndarray:
    """Fold id of every sample: ``position % folds`` for an int, or the given int array.

    Positional folds are stratified when the samples are ordered by class (as training does).
    """
    if isinstance(folds, (int, np.integer)):
        return np.arange(n_samples) % int(folds)
    return np.asarray(folds).astype(int)


def ridge_kfold_residuals(K, targets, lam, folds=5, mask=None):
    """Held-out residuals of k-fold kernel ridge regression in closed form.

    For a held-out block B: ``y_B - f_{-B}(x_B) = ((G^-1)_BB)^-1 alpha_B`` with
    ``G = K + lam I`` and ``alpha = G^-1 y`` (block-matrix inversion; from memory: S. An,
    W. Liu, S. Venkatesh, "Fast cross-validation algorithms for least squares support vector
    machine and kernel ridge regression", Pattern Recognition 40 (2007)). One solve of size
    |B| per fold instead of a refit.

    Args:
      K: float array [N, N]; targets: float array [N] or [N, T]; lam: ridge > 0.
      folds: number of folds (positional assignment ``i % folds``) or a concrete numpy int
        array [N] of fold ids (it fixes the shapes, so it cannot be a traced value).
      mask: optional 0/1 array of shape [N]; masked-out samples may sit in any fold, they
        do not change the residuals of the others (put them last to keep positional folds).

    Returns:
      float array of shape [N, T] (row i: residual of sample i when its fold is held out).
    """
    fold_of = fold_assignment(K.shape[0], folds)
    K, targets = _masked_problem(K, targets, mask)
    inverse = _ridge_inverse(K, lam)
    alpha = inverse @ targets
    residuals = jnp.zeros_like(alpha)
    for fold in np.unique(fold_of):
        block = np.nonzero(fold_of == fold)[0]
        sub = inverse[np.ix_(block, block)]
        residuals = residuals.at[block].set(jnp.linalg.solve(sub, alpha[block]))
    return residuals


def ridge_kfold_loss(K, targets, lam, folds=5, mask=None):
    """Mean squared held-out residual of k-fold kernel ridge (``ridge_kfold_residuals``)."""
    return _mean_square(ridge_kfold_residuals(K, targets, lam, folds, mask), mask)


# --------------------------------------------------------------------------- registry

def _negative_alignment(K, y_int, n_classes, ridge_lambda, folds, mask=None):
    return -kernel_alignment(K, target_matrix(y_int, n_classes), mask)


def _negative_centered_alignment(K, y_int, n_classes, ridge_lambda, folds, mask=None):
    return -centered_alignment(K, target_matrix(y_int, n_classes), mask)


def _ridge_loo(K, y_int, n_classes, ridge_lambda, folds, mask=None):
    return ridge_loo_loss(K, ridge_targets(y_int, n_classes), ridge_lambda, mask)


def _ridge_kfold(K, y_int, n_classes, ridge_lambda, folds, mask=None):
    return ridge_kfold_loss(K, ridge_targets(y_int, n_classes), ridge_lambda, folds, mask)


# name -> loss to MINIMIZE with signature
# (K [N, N], y_int [N], n_classes, ridge_lambda, folds, mask=None)
OBJECTIVES = {
    "alignment": _negative_alignment,
    "centered_alignment": _negative_centered_alignment,
    "ridge_loo": _ridge_loo,
    "ridge_kfold": _ridge_kfold,
}

# objectives whose natural value is "higher is better" (the registry negates them)
HIGHER_IS_BETTER = frozenset({"alignment", "centered_alignment"})


def resolve_objective(name: str):
    """The loss function of an objective name; unknown names raise with the closest match."""
    if name not in OBJECTIVES:
        close = difflib.get_close_matches(str(name), OBJECTIVES, n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        raise InvalidInputError(f"unknown objective {name!r}{hint}; use one of "
                                f"{', '.join(OBJECTIVES)}")
    return OBJECTIVES[name]


def objective_loss(name: str, K, y_int, n_classes: int, *, ridge_lambda: float = 0.1,
                   folds=5, mask=None):
    """Loss to minimize for objective ``name`` on Gram ``K`` [N, N] and labels ``y_int`` [N]."""
    return resolve_objective(name)(K, y_int, n_classes, ridge_lambda, folds, mask)


def weight_penalty(params: dict, reference: dict, strength: float):
    """L2 penalty ``strength * sum ||p - p0||^2`` over the leaves of ``params``.

    Measured from the reference (initial) values, so the penalty keeps a trained encoding
    near the family's design instead of pulling weights to zero (common practice in
    fine-tuning: "L2-SP", from memory: Li, Grandvalet, Davoine, ICML 2018).

    Args:
      params: dict of arrays; reference: dict with the same keys (extra keys ignored).
    """
    total = 0.0
    for name, value in params.items():
        total = total + jnp.sum((value - reference[name]) ** 2)
    return strength * total
