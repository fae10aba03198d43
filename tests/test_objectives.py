"""Tests of the training objectives against published definitions and scikit-learn refits."""

import numpy as np
import pytest
import jax
import jax.numpy as jnp
from jax.test_util import check_grads
from hypothesis import given, settings, strategies as st
from sklearn.kernel_ridge import KernelRidge

from hilbertune import objectives as ob
from hilbertune.errors import InvalidInputError
from hilbertune.training import quick_compile_options


def _compiled(function, **static):
    # one quick compilation instead of op-by-op dispatch (each new op shape compiles once)
    return jax.jit(function, compiler_options=quick_compile_options(), **static)


def _rbf_gram(n, seed, dim=3):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, dim))
    return np.exp(-0.5 * ((X[:, None, :] - X[None, :, :]) ** 2).sum(-1))


def _labels(n, n_classes, seed):
    rng = np.random.default_rng(seed)
    y = np.arange(n) % n_classes  # every class present
    return rng.permutation(y)


# ----------------------------------------------------------------------------- definitions

def test_target_matrix_two_classes_is_outer_product():
    # Cristianini et al., NIPS 2001: Y = y y^T with y in {-1, +1}
    y = np.array([0, 1, 1, 0, 1])
    signs = 2.0 * y - 1.0
    np.testing.assert_array_equal(np.asarray(ob.target_matrix(jnp.asarray(y), 2)),
                                  np.outer(signs, signs))


def test_target_matrix_multiclass_entries():
    # common practice: 1 for the same class, -1/(C-1) otherwise
    y = jnp.asarray([0, 1, 2, 2])
    Y = np.asarray(ob.target_matrix(y, 3))
    assert Y[2, 3] == 1.0 and Y[0, 0] == 1.0
    np.testing.assert_allclose(Y[0, 1], -0.5)
    np.testing.assert_allclose(Y[1, 2], -0.5)


@pytest.mark.parametrize("n_classes", [2, 3, 4])
def test_alignment_of_target_with_itself_is_one(n_classes):
    # Cristianini et al. 2001: A(K, Y) = <K,Y>_F / (||K||_F ||Y||_F) = 1 for K = Y (Cauchy-Schwarz
    # equality)
    Y = ob.target_matrix(jnp.asarray(_labels(12, n_classes, 0)), n_classes)
    np.testing.assert_allclose(float(ob.kernel_alignment(Y, Y)), 1.0, rtol=1e-6)
    np.testing.assert_allclose(float(ob.centered_alignment(Y, Y)), 1.0, rtol=1e-6)


def test_alignment_matches_frobenius_formula_with_numpy():
    # Cristianini et al. 2001, definition; computed independently with numpy.linalg.norm
    K = _rbf_gram(10, 1)
    Y = np.asarray(ob.target_matrix(jnp.asarray(_labels(10, 2, 1)), 2))
    expected = np.sum(K * Y) / (np.linalg.norm(K, "fro") * np.linalg.norm(Y, "fro"))
    np.testing.assert_allclose(float(ob.kernel_alignment(jnp.asarray(K), jnp.asarray(Y))),
                               expected, rtol=1e-5)


def test_centering_matches_explicit_projection():
    # Cortes, Mohri, Rostamizadeh, JMLR 2012: K_c = H K H with H = I - 1 1^T / N
    K = _rbf_gram(9, 2)
    H = np.eye(9) - np.ones((9, 9)) / 9
    np.testing.assert_allclose(np.asarray(ob.center_gram(jnp.asarray(K))), H @ K @ H,
                               atol=1e-6)


def test_centering_annihilates_constant_matrix():
    # Cortes et al. 2012: H 1 = 0, hence H 1 1^T H = 0
    ones = jnp.ones((7, 7))
    np.testing.assert_allclose(np.asarray(ob.center_gram(ones)), np.zeros((7, 7)), atol=1e-6)


@settings(max_examples=15, deadline=None)
@given(shift=st.floats(-5.0, 5.0), seed=st.integers(0, 1000))
def test_centered_alignment_invariant_to_constant_shift(shift, seed):
    # Cortes et al. 2012: centering removes any constant added to the kernel
    K = jnp.asarray(_rbf_gram(8, seed))
    Y = ob.target_matrix(jnp.asarray(_labels(8, 2, seed)), 2)
    np.testing.assert_allclose(float(ob.centered_alignment(K + shift, Y)),
                               float(ob.centered_alignment(K, Y)), atol=2e-5)


def test_constant_kernel_has_zero_centered_alignment_not_nan():
    Y = ob.target_matrix(jnp.asarray(_labels(6, 2, 3)), 2)
    value = float(ob.centered_alignment(jnp.ones((6, 6)), Y))
    assert value == 0.0


# ----------------------------------------------------------------------------- ridge CV

def _sklearn_holdout_residuals(K, targets, lam, fold_of):
    # scikit-learn reference: KernelRidge(kernel="precomputed", alpha=lam) refit without each
    # held-out block (no intercept, as our closed form)
    residuals = np.zeros_like(targets)
    for fold in np.unique(fold_of):
        out = fold_of == fold
        model = KernelRidge(alpha=lam, kernel="precomputed").fit(K[np.ix_(~out, ~out)],
                                                                  targets[~out])
        residuals[out] = targets[out] - model.predict(K[np.ix_(out, ~out)]).reshape(
            targets[out].shape)
    return residuals


@pytest.mark.parametrize("n_classes", [2, 3])
def test_loo_residuals_equal_sklearn_refits(n_classes):
    with jax.enable_x64(True):
        K = _rbf_gram(14, 4)
        y = _labels(14, n_classes, 4)
        targets = np.asarray(ob.ridge_targets(jnp.asarray(y), n_classes))
        ours = np.asarray(_compiled(ob.ridge_loo_residuals)(jnp.asarray(K),
                                                           jnp.asarray(targets), 0.3))
        reference = _sklearn_holdout_residuals(K, targets, 0.3, np.arange(14))
        np.testing.assert_allclose(ours, reference, atol=1e-10)
        np.testing.assert_allclose(
            float(_compiled(ob.ridge_loo_loss)(jnp.asarray(K), jnp.asarray(targets), 0.3)),
            np.mean(reference**2), rtol=1e-10)


@pytest.mark.parametrize("folds", [3, 5])
def test_kfold_residuals_equal_sklearn_refits(folds):
    with jax.enable_x64(True):
        K = _rbf_gram(17, 5)
        targets = np.asarray(ob.ridge_targets(jnp.asarray(_labels(17, 2, 5)), 2))
        residuals = _compiled(ob.ridge_kfold_residuals, static_argnums=3)
        ours = np.asarray(residuals(jnp.asarray(K), jnp.asarray(targets), 0.2, folds))
        reference = _sklearn_holdout_residuals(K, targets, 0.2, np.arange(17) % folds)
        np.testing.assert_allclose(ours, reference, atol=1e-10)


def test_kfold_with_one_sample_per_fold_is_leave_one_out():
    with jax.enable_x64(True):
        K = jnp.asarray(_rbf_gram(9, 6))
        t = jnp.asarray(2.0 * _labels(9, 2, 6) - 1.0)
        kfold = _compiled(ob.ridge_kfold_residuals, static_argnums=3)(K, t, 0.5, 9)
        loo = _compiled(ob.ridge_loo_residuals)(K, t, 0.5)
        np.testing.assert_allclose(np.asarray(kfold), np.asarray(loo), atol=1e-12)


def test_ridge_targets_coding():
    np.testing.assert_array_equal(np.asarray(ob.ridge_targets(jnp.asarray([0, 1, 1]), 2)),
                                  [[-1.0], [1.0], [1.0]])
    np.testing.assert_array_equal(np.asarray(ob.ridge_targets(jnp.asarray([2, 0]), 3)),
                                  [[-1.0, -1.0, 1.0], [1.0, -1.0, -1.0]])


# ----------------------------------------------------------------------------- masks

@pytest.mark.parametrize("name", sorted(ob.OBJECTIVES))
def test_masked_objective_equals_objective_on_subset(name):
    # padding rows (mask 0) must not change any objective
    with jax.enable_x64(True):
        K = jnp.asarray(_rbf_gram(16, 7))
        y = jnp.asarray(_labels(16, 3, 7))
        mask = jnp.arange(16) < 11
        loss = _compiled(lambda K, y, mask: ob.objective_loss(name, K, y, 3, folds=4, mask=mask))
        subset = loss(K[:11, :11], y[:11], None)
        masked = loss(K, y, mask)
        np.testing.assert_allclose(float(masked), float(subset), rtol=1e-10)


# ----------------------------------------------------------------------------- gradients

@pytest.mark.parametrize("name", sorted(ob.OBJECTIVES))
def test_objective_gradients_match_finite_differences(name):
    # reverse-mode gradient vs central finite differences (f(A + eV) - f(A - eV)) / 2e along
    # random directions V (the test of jax.test_util.check_grads, written out so that both
    # sides run as one quick compilation each); float64 for tight tolerances.
    # K = A A^T / d keeps K symmetric PSD.
    with jax.enable_x64(True):
        rng = np.random.default_rng(8)
        A = jnp.asarray(rng.normal(size=(10, 4)))
        y = jnp.asarray(_labels(10, 3, 8))

        def loss(A):
            return ob.objective_loss(name, A @ A.T / 4.0, y, 3, ridge_lambda=0.3, folds=3)

        value, gradient = _compiled(jax.value_and_grad(loss))(A)
        evaluate = _compiled(loss)
        eps = 1e-5
        for _ in range(3):
            V = jnp.asarray(rng.normal(size=A.shape))
            numeric = (evaluate(A + eps * V) - evaluate(A - eps * V)) / (2 * eps)
            np.testing.assert_allclose(float(jnp.sum(gradient * V)), float(numeric),
                                       rtol=1e-6, atol=1e-9)
        assert np.isfinite(float(value))


def test_check_grads_on_centered_alignment_in_float64():
    # jax.test_util.check_grads itself (forward and reverse mode against finite differences)
    with jax.enable_x64(True):
        rng = np.random.default_rng(12)
        A = jnp.asarray(rng.normal(size=(7, 3)))
        Y = ob.target_matrix(jnp.asarray(_labels(7, 2, 12)), 2)
        check_grads(jax.jit(lambda A: ob.centered_alignment(A @ A.T, Y)), (A,), order=1,
                    modes=("fwd", "rev"), atol=1e-6, rtol=1e-6)


# ----------------------------------------------------------------------------- registry

def test_registry_negates_alignments_and_keeps_ridge_losses():
    K = jnp.asarray(_rbf_gram(8, 10))
    y = jnp.asarray(_labels(8, 2, 10))
    Y = ob.target_matrix(y, 2)
    assert set(ob.OBJECTIVES) == {"alignment", "centered_alignment", "ridge_loo", "ridge_kfold"}
    np.testing.assert_allclose(float(ob.objective_loss("alignment", K, y, 2)),
                               -float(ob.kernel_alignment(K, Y)), rtol=1e-6)
    np.testing.assert_allclose(float(ob.objective_loss("centered_alignment", K, y, 2)),
                               -float(ob.centered_alignment(K, Y)), rtol=1e-6)
    loo = ob.objective_loss("ridge_loo", K, y, 2, ridge_lambda=0.2)
    np.testing.assert_allclose(float(loo), float(ob.ridge_loo_loss(K, ob.ridge_targets(y, 2),
                                                                   0.2)), rtol=1e-6)
    assert ob.HIGHER_IS_BETTER == {"alignment", "centered_alignment"}


def test_ideal_kernel_has_lower_loss_than_noise_kernel():
    # sanity of the orientation: the label kernel itself scores best on every objective
    y = jnp.asarray(_labels(12, 2, 11))
    ideal = 0.5 * (ob.target_matrix(y, 2) + 1.0) + 1e-3 * jnp.eye(12)
    noise = jnp.asarray(_rbf_gram(12, 11, dim=20))
    for name in ob.OBJECTIVES:
        loss = _compiled(lambda K: ob.objective_loss(name, K, y, 2, folds=3))
        assert float(loss(ideal)) < float(loss(noise)), name


def test_unknown_objective_names_the_closest():
    with pytest.raises(InvalidInputError, match="did you mean 'ridge_loo'"):
        ob.resolve_objective("ridge_lo")


def test_weight_penalty_is_squared_distance_from_reference():
    params = {"weights": jnp.asarray([1.0, 2.0]), "log_bandwidth": jnp.asarray(0.5)}
    reference = {"weights": jnp.asarray([1.0, 1.0]), "log_bandwidth": jnp.asarray(0.0),
                 "biases": jnp.zeros(2)}
    np.testing.assert_allclose(float(ob.weight_penalty(params, reference, 0.1)),
                               0.1 * (1.0 + 0.25), rtol=1e-6)
