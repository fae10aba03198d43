"""Tests of hilbertune.diagnostics against published formulas, scipy and scikit-learn."""

import json
import math

import numpy as np
import pytest
import scipy.linalg
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics.pairwise import rbf_kernel
from sklearn.model_selection import GridSearchCV, StratifiedKFold
from sklearn.svm import SVC

from hilbertune.data import load_bundled, split_and_scale
from hilbertune.diagnostics import (SIMULATION_CAVEAT, alignment_of, compare_accuracies,
                                    compare_predictions, concentration,
                                    corrected_resampled_t_test, diagnose_kernel,
                                    effective_dimension, geometric_difference, linear_svm,
                                    mcnemar_exact, precomputed_svm, repeated_split_scores,
                                    spectrum, tuned_rbf_svm)
from hilbertune.errors import InvalidInputError


def random_gram(n, seed, gamma=0.5, features=3):
    X = np.random.default_rng(seed).normal(size=(n, features))
    return rbf_kernel(X, gamma=gamma)


def product_ry_gram(angles):
    # fidelity kernel of the product RY encoding: prod_i cos^2((x_i - x'_i) / 2)
    # (common practice; |<0|RY(a)^T RY(b)|0>|^2 = cos^2((a - b)/2))
    diff = angles[:, None, :] - angles[None, :, :]
    return np.prod(np.cos(diff / 2) ** 2, axis=-1)


# --------------------------------------------------------------------------- spectrum

def test_spectrum_is_descending_eigvalsh():
    K = random_gram(12, 0)
    np.testing.assert_allclose(spectrum(K), np.sort(np.linalg.eigvalsh(K))[::-1], atol=1e-12)


def test_effective_dimension_of_identity_rank_one_and_two_blocks():
    # participation ratio (sum l)^2 / sum l^2: N for a flat spectrum, 1 for rank one
    assert effective_dimension(np.eye(7), centered_gram=False) == pytest.approx(7.0)
    # centered: H I H = H has N - 1 eigenvalues 1 and one 0 (H projects out 1)
    assert effective_dimension(np.eye(7)) == pytest.approx(6.0)
    v = np.random.default_rng(1).normal(size=9)
    assert effective_dimension(np.outer(v, v), centered_gram=False) == pytest.approx(1.0)
    # two equal blocks of ones: eigenvalues (3, 3, 0, ...) -> 36 / 18 = 2 (hand computation)
    blocks = scipy.linalg.block_diag(np.ones((3, 3)), np.ones((3, 3)))
    assert effective_dimension(blocks, centered_gram=False) == pytest.approx(2.0)
    # centered, the two blocks differ only in their mean direction: rank one
    assert effective_dimension(blocks) == pytest.approx(1.0)


def test_centered_effective_dimension_matches_numpy_eigendecomposition_of_hkh():
    # independent: H K H built with numpy and its eigenvalues from numpy.linalg.eigvalsh;
    # centering after Cortes, Mohri & Rostamizadeh, JMLR 13, 795 (2012)
    K = random_gram(30, 11, gamma=0.05) + 2.0  # a large constant part, as in issue 15
    H = np.eye(30) - np.ones((30, 30)) / 30
    values = np.clip(np.linalg.eigvalsh(H @ K @ H), 0, None)
    expected = values.sum() ** 2 / np.sum(values ** 2)
    assert effective_dimension(K) == pytest.approx(expected, rel=1e-9)
    # the constant no longer dominates: uncentered the ratio is close to 1
    assert effective_dimension(K, centered_gram=False) < 1.2 < 3.0 < effective_dimension(K)


# --------------------------------------------------------------------------- concentration

def test_product_ry_kernel_mean_is_half_to_the_n():
    # Derived: for angle differences uniform over a period, E[cos^2(d/2)] = E[(1 + cos d)/2]
    # = 1/2 per qubit; independent qubits give E[k] = (1/2)^n.
    rng = np.random.default_rng(0)
    for n in (1, 2, 3):
        K = product_ry_gram(rng.uniform(0, 2 * np.pi, size=(300, n)))
        report = concentration(K, n)
        assert report["random_state_value"] == 0.5 ** n
        assert report["mean_offdiagonal"] == pytest.approx(0.5 ** n, rel=0.1)


def test_concentration_verdict_flips_with_qubits_and_with_shots():
    rng = np.random.default_rng(1)
    few = concentration(product_ry_gram(rng.uniform(0, 2 * np.pi, (100, 2))), 2, shots=1000)
    many = concentration(product_ry_gram(rng.uniform(0, 2 * np.pi, (100, 40))), 40,
                         shots=1000)
    assert not few["concentrated"] and few["warning"] == ""
    assert many["concentrated"] and "lower the bandwidth" in many["warning"]
    # Derived: at n = 8 the spread is sqrt((3/8)^8 - (1/4)^8) = 0.0194 (E[cos^4(d/2)] = 3/8),
    # the mean m = 2^-8, the noise sqrt(m (1 - m) / shots) = 0.0624 / sqrt(shots): the ratio
    # spread / noise is 0.31 sqrt(shots), 0.54 at 3 shots and 1.96 at 40 shots.
    K8 = product_ry_gram(rng.uniform(0, 2 * np.pi, (150, 8)))
    expected = math.sqrt(0.375 ** 8 - 0.25 ** 8) / math.sqrt(2.0 ** -8 * (1 - 2.0 ** -8))
    for shots in (3, 40):
        report = concentration(K8, 8, shots=shots)
        assert report["spread_to_noise"] == pytest.approx(expected * math.sqrt(shots),
                                                          rel=0.25)
        assert report["concentrated"] == (shots == 3)


def test_shot_noise_is_the_binomial_standard_deviation():
    K = random_gram(20, 2)
    report = concentration(K, 3, shots=500)
    m = report["mean_offdiagonal"]
    # reference: scipy.stats.binom std of the count, divided by shots (a frequency)
    assert report["shot_noise_std"] == pytest.approx(scipy.stats.binom(500, m).std() / 500)
    off = K[~np.eye(20, dtype=bool)]
    assert report["variance_offdiagonal"] == pytest.approx(np.var(off))


def test_nearly_identical_states_are_flagged_with_the_opposite_advice():
    K = 1.0 - 1e-7 * random_gram(30, 3)
    np.fill_diagonal(K, 1.0)
    report = concentration(K, 4, shots=1000)
    assert report["concentrated"] and "raise the bandwidth" in report["warning"]
    json.dumps(report)


# --------------------------------------------------------------------------- geometric difference

def direct_geometric_difference(Kq, Kc, reg):
    # Huang et al., Nat. Commun. 12, 2631 (2021): sqrt(|| sqrt(Kq) Kc^-1 sqrt(Kq) ||_2) after
    # trace normalization to N; our regularizer reg*I on both (see the docstring).
    n = len(Kq)
    Kq = Kq * n / np.trace(Kq) + reg * np.eye(n)
    Kc = Kc * n / np.trace(Kc) + reg * np.eye(n)
    root = np.real(scipy.linalg.sqrtm(Kq))
    return math.sqrt(np.linalg.norm(root @ np.linalg.inv(Kc) @ root, ord=2))


def test_geometric_difference_of_a_kernel_with_itself_is_one():
    K = random_gram(25, 4)
    assert geometric_difference(K, K) == pytest.approx(1.0, abs=1e-9)
    assert geometric_difference(K, 5.0 * K) == pytest.approx(1.0, abs=1e-9)


def test_geometric_difference_matches_sqrtm_inv_norm():
    Kq = random_gram(20, 5, gamma=2.0)
    Kc = random_gram(20, 5, gamma=0.2)
    for reg in (1e-3, 1e-1):
        assert geometric_difference(Kq, Kc, reg=reg) == pytest.approx(
            direct_geometric_difference(Kq, Kc, reg), rel=1e-6)


def test_geometric_difference_of_diagonal_grams_by_hand():
    # diagonal matrices, both with trace N = 3: g^2 = max_i (a_i + r) / (b_i + r)
    a, b, r = np.array([2.0, 0.5, 0.5]), np.array([1.0, 1.0, 1.0]), 1e-3
    expected = math.sqrt(max((a + r) / (b + r)))
    assert geometric_difference(np.diag(a), np.diag(b), reg=r) == pytest.approx(expected)


@settings(max_examples=20, deadline=None)
@given(st.integers(0, 10**6), st.floats(0.05, 5.0), st.floats(0.05, 5.0))
def test_geometric_difference_is_at_least_one(seed, gamma_q, gamma_c):
    # equal traces: if sqrt(Kq) Kc^-1 sqrt(Kq) < I then Kq < Kc and tr Kq < tr Kc, a
    # contradiction; so the largest eigenvalue is >= 1 (Loewner-order argument)
    X = np.random.default_rng(seed).normal(size=(10, 2))
    g = geometric_difference(rbf_kernel(X, gamma=gamma_q), rbf_kernel(X, gamma=gamma_c))
    assert g >= 1.0 - 1e-9


# --------------------------------------------------------------------------- alignment

def test_alignment_by_hand():
    y = np.array(["a", "b", "a", "b", "b"])
    signs = np.where(y == "a", 1.0, -1.0)
    ideal = np.outer(signs, signs)
    # Cristianini et al. (2001): A(yy^T, y) = 1; A(I, y) = N / (sqrt(N) * N) = 1/sqrt(N)
    assert alignment_of(ideal, y) == pytest.approx(1.0)
    assert alignment_of(np.eye(5), y) == pytest.approx(1 / math.sqrt(5))
    # centered (Cortes, Mohri, Rostamizadeh 2012), computed directly with H = I - 11^T/N
    K = random_gram(5, 6)
    H = np.eye(5) - np.ones((5, 5)) / 5
    Kc, Yc = H @ K @ H, H @ ideal @ H
    expected = np.sum(Kc * Yc) / (np.linalg.norm(Kc) * np.linalg.norm(Yc))
    assert alignment_of(K, y, centered=True) == pytest.approx(expected)


def test_alignment_multiclass_ideal_kernel():
    # common practice: Y_ij = 1 for equal labels, -1/(C-1) otherwise; that Y aligns to 1
    y = np.array([0, 1, 2, 0, 1, 2])
    Y = np.where(y[:, None] == y[None, :], 1.0, -0.5)
    assert alignment_of(Y, y) == pytest.approx(1.0)
    assert alignment_of(np.ones((6, 6)), y) == pytest.approx(0.0, abs=1e-12)


# --------------------------------------------------------------------------- baselines

@pytest.fixture(scope="module")
def moons_split():
    data = load_bundled("moons", seed=0, n_samples=80, noise=0.2)
    return split_and_scale(data.X, data.y, test_fraction=0.25, seed=0)


SMALL_C = (0.1, 1.0, 10.0)
SMALL_GAMMA = (0.1, 1.0, 10.0)


def test_tuned_rbf_equals_a_direct_grid_search(moons_split):
    s = moons_split
    ours = tuned_rbf_svm(s.X_train, s.y_train, s.X_test, s.y_test, seed=3, cv=5,
                         C_grid=SMALL_C, gamma_grid=SMALL_GAMMA)
    # reference: sklearn GridSearchCV on the same split, grids and folds
    direct = GridSearchCV(SVC(kernel="rbf"), {"C": list(SMALL_C), "gamma": list(SMALL_GAMMA)},
                          cv=StratifiedKFold(5, shuffle=True, random_state=3),
                          scoring="accuracy").fit(s.X_train, s.y_train)
    assert ours.best_params == {k: float(v) for k, v in direct.best_params_.items()}
    assert ours.cv_accuracy == pytest.approx(direct.best_score_)
    assert ours.test_accuracy == pytest.approx(direct.score(s.X_test, s.y_test))
    np.testing.assert_allclose(ours.gram_train,
                               rbf_kernel(s.X_train, gamma=direct.best_params_["gamma"]))
    json.dumps(ours.summary())


def test_linear_svm_equals_a_direct_grid_search(moons_split):
    s = moons_split
    ours = linear_svm(s.X_train, s.y_train, s.X_test, s.y_test, seed=1, C_grid=SMALL_C)
    direct = GridSearchCV(SVC(kernel="linear"), {"C": list(SMALL_C)},
                          cv=StratifiedKFold(5, shuffle=True, random_state=1)).fit(
        s.X_train, s.y_train)
    assert ours.test_accuracy == pytest.approx(direct.score(s.X_test, s.y_test))
    np.testing.assert_allclose(ours.gram_train, s.X_train @ s.X_train.T)


def test_precomputed_svm_equals_the_builtin_rbf_svm(moons_split):
    s = moons_split
    K_train = rbf_kernel(s.X_train, gamma=1.0)
    K_test = rbf_kernel(s.X_test, s.X_train, gamma=1.0)
    ours = precomputed_svm(K_train, K_test, s.y_train, s.y_test, C=3.0)
    builtin = SVC(kernel="rbf", gamma=1.0, C=3.0).fit(s.X_train, s.y_train)  # reference
    np.testing.assert_array_equal(ours.test_predictions, builtin.predict(s.X_test))
    tuned = precomputed_svm(K_train, K_test, s.y_train, s.y_test, C=SMALL_C, seed=0)
    direct = GridSearchCV(SVC(kernel="rbf", gamma=1.0), {"C": list(SMALL_C)},
                          cv=StratifiedKFold(5, shuffle=True, random_state=0)).fit(
        s.X_train, s.y_train)
    assert tuned.best_params["C"] == direct.best_params_["C"]
    with pytest.raises(InvalidInputError, match="K_test must have shape"):
        precomputed_svm(K_train, K_test.T, s.y_train, s.y_test)


def test_fewer_folds_when_a_class_is_rare():
    rng = np.random.default_rng(0)
    X = rng.normal(size=(23, 2))
    y = np.array([0] * 20 + [1] * 3)
    result = linear_svm(X, y, X[:4], y[:4], cv=5, C_grid=(1.0,))
    assert result.cv_folds == 3


# --------------------------------------------------------------------------- significance

def test_corrected_t_test_by_hand():
    d = np.array([0.02, -0.01, 0.05, 0.03, 0.00, 0.04])
    J, n_train, n_test = 6, 90, 30
    # Nadeau & Bengio (2003): t = mean / sqrt((1/J + n_test/n_train) s^2), J-1 dof
    t = d.mean() / math.sqrt((1 / J + n_test / n_train) * d.var(ddof=1))
    p = 2 * scipy.stats.t.sf(abs(t), J - 1)
    result = corrected_resampled_t_test(d, n_train, n_test)
    assert result["t_statistic"] == pytest.approx(t)
    assert result["p_value"] == pytest.approx(p)
    assert result["dof"] == 5


def test_corrected_t_test_without_overlap_term_is_the_paired_t_test():
    q = np.array([0.80, 0.82, 0.78, 0.85, 0.81, 0.79, 0.84])
    c = np.array([0.78, 0.80, 0.79, 0.80, 0.77, 0.80, 0.80])
    # n_test/n_train -> 0 leaves 1/J: the ordinary paired t-test (scipy.stats.ttest_rel)
    result = corrected_resampled_t_test(q - c, n_train=10**12, n_test=1)
    reference = scipy.stats.ttest_rel(q, c)
    assert result["t_statistic"] == pytest.approx(reference.statistic, rel=1e-9)
    assert result["p_value"] == pytest.approx(reference.pvalue, rel=1e-9)


def test_mcnemar_exact_is_a_binomial_test_on_discordant_rows():
    a = np.array([1, 1, 1, 1, 1, 0, 1, 1, 0, 1, 1, 1], dtype=bool)
    b = np.array([0, 0, 0, 1, 0, 1, 1, 0, 0, 0, 1, 0], dtype=bool)
    result = mcnemar_exact(a, b)
    assert (result["only_a_correct"], result["only_b_correct"]) == (7, 1)
    # reference: scipy.stats.binomtest(7, 8, 0.5), two-sided
    assert result["p_value"] == pytest.approx(scipy.stats.binomtest(7, 8, 0.5).pvalue)
    assert mcnemar_exact(a, a)["p_value"] == 1.0


def test_verdicts_in_plain_words_always_carry_the_caveat():
    q = np.array([0.90, 0.92, 0.91, 0.93, 0.90, 0.92, 0.91, 0.94, 0.92, 0.90])
    c = q - np.array([0.10, 0.12, 0.11, 0.09, 0.10, 0.11, 0.12, 0.10, 0.09, 0.11])
    better = compare_accuracies(q, c, 90, 30)
    worse = compare_accuracies(c, q, 90, 30)
    noise = compare_accuracies(q, q + np.array([0.01, -0.02] * 5), 90, 30)
    assert better["p_value"] < 0.05 and "quantum kernel is significantly more" in \
        better["verdict"]
    assert worse["verdict"].startswith("The classical baseline is significantly more")
    # issue 15 (d): the name is not repeated in parentheses
    assert "(classical baseline)" not in worse["verdict"]
    named = compare_accuracies(c, q, 90, 30, baseline_name="tuned RBF SVM")
    assert named["verdict"].startswith("The tuned RBF SVM is significantly more accurate")
    assert noise["verdict"].startswith("No significant difference")
    for result in (better, worse, noise):
        assert result["verdict"].endswith(SIMULATION_CAVEAT)
        json.dumps(result)
    single = compare_predictions([1, 1, 0, 1], [1, 0, 1, 1])
    assert single["verdict"].startswith("No significant difference")


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.floats(0, 1), st.floats(0, 1)), min_size=2, max_size=12),
       st.floats(0.001, 0.5))
def test_quantum_is_never_called_better_without_significance_and_a_positive_mean(pairs,
                                                                               alpha):
    q, c = np.array(pairs).T
    result = compare_accuracies(q, c, 80, 20, alpha=alpha)
    if "quantum kernel is significantly more accurate" in result["verdict"]:
        assert result["p_value"] is not None
        assert result["p_value"] < alpha and result["mean_difference"] > 0
    assert result["verdict"].endswith(SIMULATION_CAVEAT)


def test_identical_differences_give_no_claim():
    # zero variance: the t statistic is undefined (0/0 or x/0); no significance is claimed
    result = compare_accuracies([0.9, 0.9, 0.9], [0.8, 0.8, 0.8], 80, 20)
    assert result["p_value"] is None and result["t_statistic"] is None
    assert result["verdict"].startswith("No significant difference can be established")
    same = compare_accuracies([0.9, 0.8], [0.9, 0.8], 80, 20)
    assert same["p_value"] == 1.0 and same["verdict"].startswith("No significant")


def test_significance_rejects_too_few_repeats():
    with pytest.raises(InvalidInputError, match="at least 2"):
        compare_accuracies([0.9], [0.8], 80, 20)


# --------------------------------------------------------------------------- repeated splits

def test_repeated_split_scores_use_identical_train_only_splits():
    data = load_bundled("moons", seed=1, n_samples=60, noise=0.2)
    seen = []

    def make_kernel(X_train, y_train, X_test):
        seen.append((X_train.min(axis=0), X_train.max(axis=0)))
        return rbf_kernel(X_train, gamma=1.0), rbf_kernel(X_test, X_train, gamma=1.0)

    result = repeated_split_scores(make_kernel, data.X, data.y, n_repeats=2, seed=4,
                                   quantum_C=SMALL_C, C_grid=SMALL_C, gamma_grid=SMALL_GAMMA,
                                   baselines=("rbf_svm",))
    assert result["seeds"] == [4, 5] and (result["n_train"], result["n_test"]) == (45, 15)
    for low, high in seen:  # each kernel saw features scaled on its own train part
        np.testing.assert_allclose(low, 0.0, atol=1e-12)
        np.testing.assert_allclose(high, math.pi)
    # the second repeat is reproduced from a direct split with seed 5
    s = split_and_scale(data.X, data.y, test_fraction=0.25, seed=5)
    direct = tuned_rbf_svm(s.X_train, s.y_train, s.X_test, s.y_test, seed=5,
                           C_grid=SMALL_C, gamma_grid=SMALL_GAMMA)
    assert result["accuracies"]["rbf_svm"][1] == pytest.approx(direct.test_accuracy)
    quantum = precomputed_svm(rbf_kernel(s.X_train, gamma=1.0),
                              rbf_kernel(s.X_test, s.X_train, gamma=1.0), s.y_train,
                              s.y_test, C=SMALL_C, seed=5)
    assert result["accuracies"]["quantum"][1] == pytest.approx(quantum.test_accuracy)
    json.dumps(result)


def test_diagnose_kernel_is_json_ready():
    K = random_gram(15, 7)
    y = np.array([0, 1] * 7 + [0])
    report = diagnose_kernel(K, y, 3, K_classical=random_gram(15, 7, gamma=0.1))
    assert report["geometric_difference"] >= 1.0
    assert report["effective_dimension"] == pytest.approx(effective_dimension(K))
    json.dumps(report)


def test_geometric_difference_survives_the_degenerate_pair_that_broke_lapack():
    # regression: scipy.linalg.eigh(Kq, Kc, subset_by_index=...) raised LinAlgError
    # ("eigenvectors failed to converge") for this Kq = Kc pair (found by hypothesis in CI);
    # g(K, K) = 1 (Huang et al., Nat. Commun. 12, 2631 (2021))
    X = np.random.default_rng(508).normal(size=(10, 2))
    K = rbf_kernel(X, gamma=4.375)
    assert geometric_difference(K, K) == pytest.approx(1.0, abs=1e-9)


# --------------------------------------------------------------------------- issue 15 (a)

def _psd_sqrt(K):
    values, vectors = np.linalg.eigh(K)
    return (vectors * np.sqrt(np.clip(values, 0, None))) @ vectors.T


def direct_regularized_g(Kq, Kc, lam):
    """Huang et al., Nat. Commun. 12, 2631 (2021), regularized g and training-error term
    (from memory), written out with numpy matrix square roots and an explicit inverse."""
    n = len(Kq)
    Kq = Kq * n / np.trace(Kq)
    Kc = Kc * n / np.trace(Kc)
    root_q, root_c = _psd_sqrt(Kq), _psd_sqrt(Kc)
    R = np.linalg.inv(Kc + lam * np.eye(n))
    g = math.sqrt(np.linalg.norm(root_q @ root_c @ R @ R @ root_c @ root_q, ord=2))
    error = lam * math.sqrt(np.linalg.norm(root_q @ R @ R @ root_q, ord=2))
    return g, error


def test_geometric_difference_curve_matches_numpy_matrix_functions():
    from hilbertune.diagnostics import geometric_difference_curve

    Kq = random_gram(25, 5, gamma=2.0)
    Kc = random_gram(25, 5, gamma=0.2)
    result = geometric_difference_curve(Kq, Kc, lambdas=(1e-4, 1e-2, 1.0))
    for point in result["curve"]:
        g, error = direct_regularized_g(Kq, Kc, point["lambda"])
        assert point["g"] == pytest.approx(g, rel=1e-6)
        assert point["training_error_bound"] == pytest.approx(error, rel=1e-6)
    # larger lambda: smaller g, larger training error (the trade-off the curve shows)
    gs = [p["g"] for p in result["curve"]]
    errors = [p["training_error_bound"] for p in result["curve"]]
    assert gs == sorted(gs, reverse=True) and errors == sorted(errors)
    # the choice: the largest lambda whose training error stays within the limit
    fitting = [p["lambda"] for p in result["curve"] if p["training_error_bound"] <= 0.1]
    assert result["chosen_lambda"] == (fitting[-1] if fitting else 1e-4)
    assert result["g"] == next(p["g"] for p in result["curve"]
                               if p["lambda"] == result["chosen_lambda"])


def test_classical_training_error_is_that_of_an_explicit_kernel_ridge_fit():
    from hilbertune.diagnostics import geometric_difference_curve

    X = np.random.default_rng(3).normal(size=(30, 2))
    y = np.where(X[:, 0] * X[:, 1] > 0, "a", "b")
    Kc = rbf_kernel(X, gamma=0.5)
    result = geometric_difference_curve(rbf_kernel(X, gamma=3.0), Kc, y=y,
                                        lambdas=(1e-3, 1e1))
    Kn = Kc * 30 / np.trace(Kc)
    for point in result["curve"]:
        # kernel ridge regression on +-1 targets, f = K (K + lambda I)^-1 t (common practice)
        t = np.where(y == "b", 1.0, -1.0)
        f = Kn @ np.linalg.solve(Kn + point["lambda"] * np.eye(30), t)
        assert point["classical_training_error"] == pytest.approx(np.mean(np.sign(f) != t))
    assert result["curve"][0]["classical_training_error"] < \
        result["curve"][1]["classical_training_error"]


def test_a_near_singular_classical_gram_is_flagged_by_its_eigenvalues():
    from hilbertune.diagnostics import classical_gram_health

    X = np.random.default_rng(0).normal(size=(40, 3))
    smooth = rbf_kernel(X, gamma=0.01)  # nearly rank one: almost all eigenvalues tiny
    values = np.linalg.eigvalsh(smooth * 40 / np.trace(smooth))  # numpy, independent
    health = classical_gram_health(smooth, 1e-3)
    assert health["eigenvalues_below_lambda"] == int(np.sum(values < 1e-3)) > 20
    assert health["near_singular"] and "nearly singular" in health["warning"]
    sharp = classical_gram_health(rbf_kernel(X, gamma=5.0), 1e-3)
    assert not sharp["near_singular"] and sharp["warning"] == ""


def test_run_diagnostics_reports_the_curve_centered_dimension_and_plain_json():
    from hilbertune.diagnostics import run_diagnostics

    X = np.random.default_rng(4).normal(size=(24, 2))
    y = (X[:, 0] > 0).astype(int)
    k0, k1, kc = rbf_kernel(X, gamma=1.0), rbf_kernel(X, gamma=4.0), rbf_kernel(X, gamma=0.3)
    summary, spectra = run_diagnostics(k0, k1, kc, y, 3, shots=500)
    geo = summary["geometric_difference"]
    curve = geo["curves"]["learned_vs_rbf"]
    assert geo["regularizer"] == curve["chosen_lambda"]
    assert geo["learned_vs_rbf"] == pytest.approx(
        direct_regularized_g(k1, kc, geo["regularizer"])[0], rel=1e-6)
    assert len(curve["curve"]) >= 5 and "classical_training_error" in curve["curve"][0]
    eff = summary["effective_dimension"]
    assert "centered" in eff["computed_on"]
    assert eff["rbf"] == pytest.approx(effective_dimension(kc))
    assert eff["uncentered"]["rbf"] == pytest.approx(effective_dimension(kc,
                                                                         centered_gram=False))
    np.testing.assert_allclose(spectra["final"], np.linalg.eigvalsh(k1)[::-1], atol=1e-10)
    json.dumps(summary, allow_nan=False)


# --------------------------------------------------------------------------- issue 15 (c)

def test_projected_concentration_uses_the_shot_noise_of_pauli_expectations():
    # independent Monte Carlo: sample each expectation as a mean of +-1 outcomes with numpy
    # and recompute exp(-gamma/2 sum (a - b)^2) (Huang et al. 2021 projected kernel)
    rng = np.random.default_rng(7)
    E = rng.uniform(-0.9, 0.9, size=(12, 2, 3))
    gamma, shots = 0.1, 200  # a case where the binomial rule would be off by 2x
    flat = E.reshape(12, -1)
    K = np.exp(-gamma / 2 * ((flat[:, None] - flat[None]) ** 2).sum(-1))
    samples = []
    for _ in range(3000):
        est = 2 * rng.binomial(shots, (1 + flat) / 2) / shots - 1
        samples.append(np.exp(-gamma / 2 * ((est[:, None] - est[None]) ** 2).sum(-1)))
    mc_std = np.std(samples, axis=0)
    off = ~np.eye(12, dtype=bool)
    result = concentration(K, 2, shots=shots, kind="projected", gamma=gamma, expectations=E)
    rms_mc = math.sqrt(np.mean(mc_std[off] ** 2))
    assert result["shot_noise_std"] == pytest.approx(rms_mc, rel=0.05)
    # the Gram-only bound (no expectations) is never below it
    bound = concentration(K, 2, shots=shots, kind="projected", gamma=gamma)
    assert bound["shot_noise_std"] >= result["shot_noise_std"]
    assert "Pauli expectations" in result["rule"]
    # and it is not the fidelity rule's binomial term at the mean value
    m = K[off].mean()
    assert result["shot_noise_std"] < 0.6 * math.sqrt(m * (1 - m) / shots)


def test_all_feature_baselines_match_scikit_learn_on_the_same_rows():
    # Reference: scikit-learn alone (sklearn.preprocessing.StandardScaler fitted on the
    # training rows, GridSearchCV over SVC(kernel="rbf") with StratifiedKFold) on the rows
    # of the same split, all 30 columns of scikit-learn's bundled breast-cancer data.
    from types import SimpleNamespace

    from sklearn.datasets import load_breast_cancer
    from sklearn.preprocessing import StandardScaler

    from hilbertune.diagnostics import C_GRID
    from hilbertune.pipeline import classical_baselines

    X, y = load_breast_cancer(return_X_y=True)
    X, y = X[:180], y[:180]
    split = split_and_scale(X, y, test_fraction=0.3, seed=3, n_components=4)
    out = classical_baselines(split, SimpleNamespace(cv_folds=3), 3, X_all=X)
    assert set(out) == {"rbf_svm", "linear_svm", "rbf_svm_all_features",
                        "linear_svm_all_features"}
    scaler = StandardScaler().fit(X[split.train_indices])
    A, B = scaler.transform(X[split.train_indices]), scaler.transform(X[split.test_indices])
    grid = {"C": list(C_GRID), "gamma": [10.0 ** k / 30 for k in range(-3, 3)]}
    search = GridSearchCV(SVC(kernel="rbf"), grid, scoring="accuracy",
                          cv=StratifiedKFold(3, shuffle=True, random_state=3)).fit(
                              A, split.y_train)
    assert out["rbf_svm_all_features"].test_accuracy == search.score(B, split.y_test)
    assert out["rbf_svm_all_features"].best_params["gamma"] == pytest.approx(
        search.best_params_["gamma"])
    # nothing reduced (4 components of 4 columns): no second family
    narrow = split_and_scale(X[:, :4], y, test_fraction=0.3, seed=3, n_components=4)
    assert set(classical_baselines(narrow, SimpleNamespace(cv_folds=3), 3,
                                   X_all=X[:, :4])) == {"rbf_svm", "linear_svm"}
