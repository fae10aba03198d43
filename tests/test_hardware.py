"""Shot noise, device noise, PSD repair and shot budgets against outside references.

References used below: scipy.stats.binom (moments, pmf) for the shot statistics; scipy.linalg.eigh
for the nearest-PSD reconstruction (Higham 1988); an independent dense density-matrix
simulation with Pauli-twirl depolarizing channels (Nielsen & Chuang 2000, Eq. 8.102 and the
Pauli-sum form of the depolarizing channel, common practice); scikit-learn's bundled iris data.
"""

from __future__ import annotations

import itertools
import json
import math

import jax
import numpy as np
import pytest
import scipy.linalg
import scipy.stats
from sklearn.datasets import load_iris

from hilbertune import build_encoding, initial_params, quantum_gram
from hilbertune import hardware as hw
from hilbertune.circuits import AngleRule, Blueprint, Step
from hilbertune.errors import InvalidInputError, ResourceLimitError
from hilbertune.kernels import interference_zero_probability


def _z_score_of_sample_variance(samples, sigma2, mu4):
    """z of the sample variance: Var(s^2) = (mu4 - sigma^4 (n - 3) / (n - 1)) / n
    (standard result for the unbiased sample variance of iid draws; common practice)."""
    n = samples.size
    var_of_s2 = (mu4 - sigma2**2 * (n - 3) / (n - 1)) / n
    return (np.var(samples, ddof=1) - sigma2) / math.sqrt(var_of_s2)


def _binomial_fourth_central(shots, p):
    # excess kurtosis from scipy.stats.binom: mu4 = (kurt + 3) var^2
    var, kurt = scipy.stats.binom.stats(shots, p, moments="vk")
    return (float(kurt) + 3.0) * float(var) ** 2


def _chi_square_p_value(counts, shots, p):
    """Goodness of fit of integer counts to Binomial(shots, p), bins with expectation < 5
    merged into their neighbours (common practice for the chi-square test)."""
    pmf = scipy.stats.binom.pmf(np.arange(shots + 1), shots, p)
    observed = np.bincount(counts, minlength=shots + 1).astype(float)
    expected = pmf * counts.size
    obs_bins, exp_bins, o, e = [], [], 0.0, 0.0
    for ob, ex in zip(observed, expected):
        o, e = o + ob, e + ex
        if e >= 5:
            obs_bins.append(o)
            exp_bins.append(e)
            o = e = 0.0
    obs_bins[-1] += o
    exp_bins[-1] += e
    exp_bins = np.array(exp_bins) * (sum(obs_bins) / sum(exp_bins))
    return scipy.stats.chisquare(obs_bins, exp_bins).pvalue


# --------------------------------------------------------------------------- shot statistics

@pytest.mark.parametrize("k", [0.05, 0.3, 0.5, 0.92])
def test_inversion_test_counts_are_binomial(k):
    shots = 40
    K = np.full((120, 150), k)
    est = hw.shot_sampled_gram(K, shots, estimator="inversion_test", seed=11)
    samples = est.ravel()
    # mean k and variance k(1-k)/shots (binomial, scipy.stats.binom)
    sigma2 = scipy.stats.binom.var(shots, k) / shots**2
    assert sigma2 == pytest.approx(k * (1 - k) / shots)
    z_mean = (samples.mean() - k) / math.sqrt(sigma2 / samples.size)
    assert abs(z_mean) < 4.5
    mu4 = _binomial_fourth_central(shots, k) / shots**4
    assert abs(_z_score_of_sample_variance(samples, sigma2, mu4)) < 4.5
    counts = np.rint(samples * shots).astype(int)
    assert np.allclose(counts, samples * shots)
    assert _chi_square_p_value(counts, shots, k) > 1e-4
    np.testing.assert_allclose(hw.shot_variance(K[:2, :2], shots), sigma2)


@pytest.mark.parametrize("k", [0.0, 0.4, 0.85])
def test_swap_test_variance_is_one_minus_k_squared(k):
    shots = 30
    K = np.full((150, 120), k)
    est = hw.shot_sampled_gram(K, shots, estimator="swap_test", seed=5)
    samples = est.ravel()
    # P0 = 1/2 + k/2, k_hat = 2 P0_hat - 1: var = 4 P0 (1 - P0) / s = (1 - k^2) / s
    p0 = 0.5 + 0.5 * k
    sigma2 = 4 * scipy.stats.binom.var(shots, p0) / shots**2
    assert sigma2 == pytest.approx((1 - k * k) / shots)
    np.testing.assert_allclose(hw.shot_variance(K[:1, :1], shots, estimator="swap_test"), sigma2)
    assert abs((samples.mean() - k) / math.sqrt(sigma2 / samples.size)) < 4.5
    mu4 = 16 * _binomial_fourth_central(shots, p0) / shots**4
    assert abs(_z_score_of_sample_variance(samples, sigma2, mu4)) < 4.5
    counts = np.rint((samples + 1) * shots / 2).astype(int)
    assert _chi_square_p_value(counts, shots, p0) > 1e-4


@pytest.mark.parametrize("mu, shots", [(0.0, 2), (0.0, 7), (0.3, 5), (-0.8, 20), (0.95, 50)])
def test_squared_overlap_variance_matches_exact_enumeration(mu, shots):
    # Var(R^2) with R = 2 m / s - 1, m ~ Binomial(s, (1 + mu)/2), summed over scipy's pmf
    m = np.arange(shots + 1)
    pmf = scipy.stats.binom.pmf(m, shots, (1 + mu) / 2)
    r2 = (2 * m / shots - 1) ** 2
    exact = np.sum(pmf * r2**2) - np.sum(pmf * r2) ** 2
    got = hw._squared_estimate_variance(np.array(mu), shots)
    assert float(got) == pytest.approx(exact, rel=1e-10, abs=1e-14)


def test_hadamard_test_estimate_is_unbiased_with_the_stated_variance():
    shots = 25
    overlap = 0.5 * np.exp(0.7j)  # k = 0.25
    overlaps = np.full((130, 130), overlap)
    K = np.abs(overlaps) ** 2
    est = hw.shot_sampled_gram(K, shots, estimator="hadamard_test", seed=3, symmetric=False,
                               overlaps=overlaps)
    samples = est.ravel()
    variance = float(hw.shot_variance(K[:1, :1], shots, estimator="hadamard_test",
                                      overlaps=overlaps[:1, :1])[0, 0])
    # leading order 4 (Re^2 (1 - Re^2) + Im^2 (1 - Im^2)) / s (delta method, common practice)
    re, im = overlap.real, overlap.imag
    assert variance == pytest.approx(4 * (re**2 * (1 - re**2) + im**2 * (1 - im**2)) / shots,
                                     rel=0.15)
    assert abs((samples.mean() - 0.25) / math.sqrt(variance / samples.size)) < 4.5
    rel_err_of_var = math.sqrt(2.0 / samples.size) * 2  # generous: the estimate is not normal
    assert np.var(samples, ddof=1) == pytest.approx(variance, rel=3 * rel_err_of_var)


def _tiny_encoding():
    bp = build_encoding("iqp", 3, layers=1)
    rng = np.random.default_rng(7)
    params = initial_params(bp, bandwidth=0.8)
    return bp, params, rng.uniform(-1.0, 1.0, size=(5, 3))


def test_state_overlaps_are_what_the_interference_circuit_measures():
    bp, params, X = _tiny_encoding()
    ov = hw.state_overlaps(bp, params, X)
    K = np.asarray(quantum_gram(bp, params, X))
    np.testing.assert_allclose(np.abs(ov) ** 2, K, atol=2e-6)
    # P0 = 1/2 + 1/2 Re<psi(x)|psi(x')> of the simulated one-ancilla circuit (kernels module)
    pairs = list(itertools.product(range(5), repeat=2))
    a = np.array([X[i] for i, _ in pairs])
    b = np.array([X[j] for _, j in pairs])
    p0 = np.asarray(interference_zero_probability(bp, params, a, b))
    np.testing.assert_allclose(2 * p0 - 1, [ov[i, j].real for i, j in pairs], atol=2e-6)


def test_train_gram_is_symmetric_with_exact_diagonal_and_reproducible():
    bp, params, X = _tiny_encoding()
    K = np.asarray(quantum_gram(bp, params, X), dtype=float)
    ov = hw.state_overlaps(bp, params, X)
    for estimator in hw.ESTIMATORS:
        first = hw.shot_sampled_gram(K, 50, estimator=estimator, seed=1, overlaps=ov)
        again = hw.shot_sampled_gram(K, 50, estimator=estimator, seed=1, overlaps=ov)
        other = hw.shot_sampled_gram(K, 50, estimator=estimator, seed=2, overlaps=ov)
        np.testing.assert_array_equal(first, first.T)
        np.testing.assert_array_equal(np.diag(first), np.diag(K))
        np.testing.assert_array_equal(first, again)
        assert not np.array_equal(first, other)
    # a JAX key works as the seed too, reproducibly
    key_draws = [hw.shot_sampled_gram(K, 50, seed=jax.random.key(3)) for _ in range(2)]
    np.testing.assert_array_equal(key_draws[0], key_draws[1])
    assert not np.array_equal(key_draws[0], hw.shot_sampled_gram(K, 50, seed=jax.random.key(4)))
    # an estimated diagonal under depolarizing noise scatters around (1 - p) + p / 2^n
    noisy = hw.shot_sampled_gram(np.ones((60, 60)), 200, seed=4, estimate_diagonal=True,
                                 depolarizing=0.2, n_qubits=3)
    assert np.diag(noisy).std() > 0
    expected = 0.8 + 0.2 / 8
    assert abs(np.diag(noisy).mean() - expected) < 4.5 * math.sqrt(
        expected * (1 - expected) / 200 / 60)


def test_depolarized_sampling_centres_on_the_global_formula():
    shots, p, n = 100, 0.3, 2
    K = np.full((100, 100), 0.6)
    est = hw.shot_sampled_gram(K, shots, seed=9, symmetric=False, depolarizing=p, n_qubits=n)
    target = (1 - p) * 0.6 + p / 2**n  # Hubregtsen et al., PRA 106, 042431 (2022)
    assert abs(est.mean() - target) < 4.5 * math.sqrt(target * (1 - target) / shots / K.size)
    swap = hw.shot_sampled_gram(K, shots, estimator="swap_test", seed=9, symmetric=False,
                                depolarizing=p)
    # ancilla P0 -> (1 - p) P0 + p / 2 gives k -> (1 - p) k (common practice)
    assert abs(swap.mean() - 0.42) < 4.5 * math.sqrt((1 - 0.42**2) / shots / K.size)


def _bit_flip_channel(n, e):
    # independent symmetric readout flips as a stochastic matrix on 2^n outcomes: the Kronecker
    # product of n copies of [[1 - e, e], [e, 1 - e]] (numpy reference; common practice model)
    one = np.array([[1 - e, e], [e, 1 - e]])
    out = np.ones((1, 1))
    for _ in range(n):
        out = np.kron(out, one)
    return out


@pytest.mark.parametrize("n", [1, 2, 4])
def test_readout_kernel_equals_explicit_bit_flip_channel(n):
    e = 0.07
    flips = _bit_flip_channel(n, e)
    for k in (0.0, 0.3, 0.95, 1.0):
        # outcome distribution: k on all-zeros, the rest evenly on the other outcomes
        distribution = np.full(2**n, (1 - k) / (2**n - 1))
        distribution[0] = k
        observed_zero = (flips @ distribution)[0]
        got = hw.readout_kernel(np.array([[k]]), e, n)[0, 0]
        assert got == pytest.approx(observed_zero, abs=1e-12)


def test_readout_kernel_is_exact_for_one_qubit_and_a_lower_estimate_otherwise(rng):
    # reference: the explicit bit-flip stochastic matrix above (numpy). One qubit: any
    # distribution is "even off zero"; two qubits, all off-zero mass next to all-zeros
    e = 0.05
    assert hw.readout_kernel(np.array([[0.8]]), e, 1)[0, 0] == pytest.approx(
        (_bit_flip_channel(1, e) @ np.array([0.8, 0.2]))[0])
    concentrated = np.array([0.8, 0.2, 0.0, 0.0])  # all off-zero mass one flip away
    exact = (_bit_flip_channel(2, e) @ concentrated)[0]
    assert hw.readout_kernel(np.array([[0.8]]), e, 2)[0, 0] < exact


def test_readout_flips_shift_the_sampled_estimates():
    shots, e, n = 200, 0.05, 3
    K = np.full((80, 80), 0.6)
    est = hw.shot_sampled_gram(K, shots, seed=3, symmetric=False, readout_error=e, n_qubits=n)
    target = hw.readout_kernel(np.array([[0.6]]), e, n)[0, 0]
    assert target < 0.6 - 0.05  # the effect is large enough to be seen
    assert abs(est.mean() - target) < 4.5 * math.sqrt(target * (1 - target) / shots / K.size)
    # ancilla estimators: P0 -> e + (1 - 2e) P0, so the measured value shrinks by (1 - 2e)
    # (symmetric bit-flip channel on one bit; common practice)
    swap = hw.shot_sampled_gram(K, shots, estimator="swap_test", seed=3, symmetric=False,
                                readout_error=e)
    want = (1 - 2 * e) * 0.6
    assert abs(swap.mean() - want) < 4.5 * math.sqrt((1 - want**2) / shots / K.size)
    with pytest.raises(InvalidInputError, match="n_qubits"):
        hw.shot_sampled_gram(K, shots, seed=3, readout_error=e)
    with pytest.raises(InvalidInputError, match="readout_error"):
        hw.shot_sampled_gram(K, shots, seed=3, readout_error=1.5, n_qubits=n)


# --------------------------------------------------------------------------- PSD repair

def _indefinite_gram(rng, n=12):
    X = rng.normal(size=(n, 2))
    K = np.exp(-np.sum((X[:, None] - X[None]) ** 2, axis=-1))
    noise = rng.normal(scale=0.15, size=(n, n))
    K = K + 0.5 * (noise + noise.T)
    assert np.linalg.eigvalsh(K)[0] < -1e-3  # the test needs an indefinite matrix
    return K


def test_clipping_is_the_frobenius_nearest_psd_matrix(rng):
    K = _indefinite_gram(rng)
    out = hw.clip_eigenvalues(K)
    assert np.linalg.eigvalsh(out.matrix)[0] > -1e-10
    # Higham (1988): V max(Lambda, 0) V^T from scipy.linalg.eigh
    w, V = scipy.linalg.eigh(K)
    reference = V @ np.diag(np.clip(w, 0, None)) @ V.T
    np.testing.assert_allclose(out.matrix, reference, atol=1e-12)
    distance = np.linalg.norm(K - out.matrix)
    assert out.frobenius_change == pytest.approx(distance)
    assert out.relative_change == pytest.approx(distance / np.linalg.norm(K))
    # the distance equals the norm of the clipped negative eigenvalues (Higham 1988)
    assert distance == pytest.approx(np.linalg.norm(w[w < 0]))
    # no random PSD matrix (near the answer or anywhere) is closer
    for _ in range(200):
        G = rng.normal(size=K.shape)
        candidate = out.matrix + rng.uniform(1e-4, 0.1) * (G @ G.T) / K.shape[0]
        assert np.linalg.norm(K - candidate) >= distance - 1e-12
        B = rng.normal(size=(K.shape[0], 3))
        assert np.linalg.norm(K - B @ B.T) >= distance


def test_clipping_uses_the_symmetric_part_of_a_nonsymmetric_matrix(rng):
    A = _indefinite_gram(rng) + 0.05 * rng.normal(size=(12, 12))
    w, V = scipy.linalg.eigh(0.5 * (A + A.T))
    reference = (V * np.clip(w, 0, None)) @ V.T
    np.testing.assert_allclose(hw.clip_eigenvalues(A).matrix, reference, atol=1e-12)


def test_clipping_leaves_a_psd_matrix_unchanged(rng):
    B = rng.normal(size=(6, 6))
    K = B @ B.T
    out = hw.clip_eigenvalues(K)
    np.testing.assert_allclose(out.matrix, K)
    assert out.relative_change < 1e-14


def test_shift_spectrum_adds_the_smallest_eigenvalue(rng):
    K = _indefinite_gram(rng)
    smallest = scipy.linalg.eigh(K, eigvals_only=True)[0]
    out = hw.shift_spectrum(K)
    np.testing.assert_allclose(out.matrix, K - smallest * np.eye(12), atol=1e-12)
    assert abs(np.linalg.eigvalsh(out.matrix)[0]) < 1e-10
    assert out.frobenius_change == pytest.approx(abs(smallest) * math.sqrt(12))
    psd = K @ K.T
    np.testing.assert_allclose(hw.shift_spectrum(psd).matrix, psd)


def test_restore_unit_diagonal_keeps_psd(rng):
    B = rng.normal(size=(8, 8))
    K = B @ B.T + 0.1 * np.eye(8)
    out = hw.restore_unit_diagonal(K)
    np.testing.assert_allclose(np.diag(out.matrix), 1.0)
    d = np.sqrt(np.diag(K))
    np.testing.assert_allclose(out.matrix, K / np.outer(d, d))
    assert np.linalg.eigvalsh(out.matrix)[0] > 0
    assert out.relative_change == pytest.approx(np.linalg.norm(out.matrix - K)
                                                / np.linalg.norm(K))
    with pytest.raises(InvalidInputError, match="diagonal"):
        hw.restore_unit_diagonal(np.array([[0.0, 0.1], [0.1, 1.0]]))


def test_repair_by_name(rng):
    K = _indefinite_gram(rng)
    for method in hw.REPAIR_METHODS:
        out = hw.repair_gram(K, method)
        np.testing.assert_allclose(out.matrix, out.matrix.T)
        if method != "none":
            assert np.linalg.eigvalsh(out.matrix)[0] > -1e-10
    np.testing.assert_allclose(np.diag(hw.repair_gram(K, "clip_unit").matrix), 1.0)
    with pytest.raises(InvalidInputError, match="did you mean 'clip'"):
        hw.repair_gram(K, "clipp")
    with pytest.raises(InvalidInputError, match="square"):
        hw.clip_eigenvalues(np.ones((3, 4)))


# --------------------------------------------------------------------------- device noise

def _pauli_twirl(rho, qubits, error, n, dense):
    """(1 - e) rho + e / 4^k sum_P P rho P over the 4^k Paulis on ``qubits``: the
    depolarizing channel written as a Pauli sum (common practice)."""
    paulis = (dense.I2, dense.X, dense.Y, dense.Z)
    total = np.zeros_like(rho)
    for choice in itertools.product(paulis, repeat=len(qubits)):
        P = dense.embed(dict(zip(qubits, choice)), n)
        total += P @ rho @ P.conj().T
    return (1 - error) * rho + error * total / 4 ** len(qubits)


def rule_angle(rule, params, x):
    """Angle of a step from its documented rule (hilbertune.circuits docstring)."""
    c = math.exp(float(params["log_bandwidth"]))
    w = float(np.asarray(params["weights"])[rule.slot]) if rule.slot >= 0 else 0.0
    b = float(np.asarray(params["biases"])[rule.slot]) if rule.slot >= 0 else 0.0
    if rule.source == "constant":
        return float(rule.value)
    if rule.source == "feature":
        return w * c * x[rule.features[0]] + b
    if rule.source == "pair":
        f, g = rule.features
        return w * (math.pi - c * x[f]) * (math.pi - c * x[g]) + b
    return b


def _dense_noisy_kernel(bp, params, x, x_prime, e1, e2, dense):
    """Reference: full 2^n x 2^n density matrices, gates from the conftest simulator."""
    n = bp.n_qubits
    rho = np.zeros((2**n, 2**n), complex)
    rho[0, 0] = 1
    for step in bp.steps:
        angle = rule_angle(step.angle, params, x) if step.angle is not None else 0.0
        G = dense.gate(step, angle, n)
        rho = _pauli_twirl(G @ rho @ G.conj().T, step.qubits,
                           e1 if len(step.qubits) == 1 else e2, n, dense)
    for step in reversed(bp.steps):
        angle = rule_angle(step.angle, params, x_prime) if step.angle is not None else 0.0
        G = dense.gate(step, angle, n).conj().T
        rho = _pauli_twirl(G @ rho @ G.conj().T, step.qubits,
                           e1 if len(step.qubits) == 1 else e2, n, dense)
    return rho[0, 0].real


def test_local_channels_match_an_independent_dense_simulation(dense, rng):
    steps = (Step("h", (0,)), Step("ry", (1,), AngleRule("feature", (1,), 0)),
             Step("zz", (0, 1), AngleRule("pair", (0, 1), 1)), Step("cnot", (1, 2)),
             Step("rx", (2,), AngleRule("feature", (0,), 2)), Step("cz", (0, 2)),
             Step("unitary", (1,), matrix=dense.random_unitary_2x2(rng)))
    bp = Blueprint(3, 2, steps, (1.0, 0.5, -1.0))
    params = dense.random_params(bp, rng)
    X = rng.uniform(-1, 1, size=(3, 2))
    got = hw.density_matrix_kernel(bp, params, X, one_qubit_error=0.02, two_qubit_error=0.07)
    for i, j in itertools.product(range(3), repeat=2):
        ref = _dense_noisy_kernel(bp, params, X[i], X[j], 0.02, 0.07, dense)
        assert got[i, j] == pytest.approx(ref, abs=2e-6)


@pytest.mark.parametrize("family, options", [("iqp", {"layers": 2}),
                                             ("layered", {"layers": 2, "entangler_gate": "cnot"})])
def test_zero_error_density_matrix_equals_statevector_kernel(family, options, rng):
    bp = build_encoding(family, 3, **options)
    params = initial_params(bp, bandwidth=0.9)
    X_a = rng.uniform(-1, 1, size=(4, 3))
    X_b = rng.uniform(-1, 1, size=(3, 3))
    np.testing.assert_allclose(hw.density_matrix_kernel(bp, params, X_a),
                               np.asarray(quantum_gram(bp, params, X_a)), atol=2e-6)
    np.testing.assert_allclose(hw.density_matrix_kernel(bp, params, X_a, X_b),
                               np.asarray(quantum_gram(bp, params, X_a, X_b)), atol=2e-6)


def test_global_channel_equals_the_per_entry_formula():
    bp, params, X = _tiny_encoding()
    K = np.asarray(quantum_gram(bp, params, X), dtype=float)
    for p in (0.0, 0.1, 0.6):
        got = hw.density_matrix_kernel(bp, params, X, final_depolarizing=p)
        # k -> (1 - p) k + p / 2^n  (Hubregtsen et al., PRA 106, 042431 (2022))
        np.testing.assert_allclose(got, (1 - p) * K + p / 8, atol=2e-6)
    np.testing.assert_array_equal(hw.depolarize_kernel(K, 0.0, 3), K)


def test_per_gate_global_channels_compose_to_the_gate_count_formula():
    bp, params, X = _tiny_encoding()
    K = np.asarray(quantum_gram(bp, params, X), dtype=float)
    e1, e2 = 0.01, 0.04
    p = hw.inversion_test_depolarizing(bp, one_qubit_error=e1, two_qubit_error=e2)
    counts = bp.n_qubits * 2, 3  # 3 Hadamards + 3 RZ, 3 ZZ per layer (iqp, layers=1)
    assert p == pytest.approx(1 - (1 - e1) ** (2 * counts[0]) * (1 - e2) ** (2 * counts[1]))
    got = hw.density_matrix_kernel(bp, params, X, one_qubit_error=e1, two_qubit_error=e2,
                                   channel="global")
    np.testing.assert_allclose(got, hw.depolarize_kernel(K, p, 3), atol=2e-6)
    # local channels differ from the global model on entangled circuits, but the diagonal
    # still drops below 1
    local = hw.density_matrix_kernel(bp, params, X, one_qubit_error=e1, two_qubit_error=e2)
    assert np.all(np.diag(local) < 1 - 1e-3)
    assert np.abs(local - hw.depolarize_kernel(K, p, 3)).max() > 1e-4


def test_single_qubit_local_noise_is_global():
    # on one qubit the local channel is the global one, so the gate-count formula is exact
    bp = Blueprint(1, 1, (Step("h", (0,)), Step("rz", (0,), AngleRule("feature", (0,), 0)),
                          Step("ry", (0,), AngleRule("feature", (0,), 1))), (1.0, 0.5))
    params = initial_params(bp)
    X = np.linspace(-2, 2, 4)[:, None]
    K = np.asarray(quantum_gram(bp, params, X), dtype=float)
    p = hw.inversion_test_depolarizing(bp, one_qubit_error=0.05, two_qubit_error=0.5)
    assert p == pytest.approx(1 - 0.95**6)
    got = hw.density_matrix_kernel(bp, params, X, one_qubit_error=0.05, two_qubit_error=0.5)
    np.testing.assert_allclose(got, (1 - p) * K + p / 2, atol=2e-6)


def test_depolarizing_probability_limits():
    assert hw.depolarizing_from_gates(10, 5, one_qubit_error=0.0, two_qubit_error=0.0) == 0.0
    assert hw.depolarizing_from_gates(1, 0, one_qubit_error=1.0, two_qubit_error=0.0) == 1.0
    assert hw.depolarizing_from_gates(0, 0, one_qubit_error=0.3, two_qubit_error=0.3) == 0.0
    with pytest.raises(InvalidInputError, match="amplitude"):
        hw.inversion_test_depolarizing(build_encoding("amplitude", 4), one_qubit_error=0.1,
                                          two_qubit_error=0.1)


def test_density_matrix_refuses_more_than_eight_qubits():
    bp = build_encoding("angle", 9)
    with pytest.raises(ResourceLimitError, match="8 qubits.*depolarize_kernel"):
        hw.density_matrix_kernel(bp, initial_params(bp), np.zeros((1, 9)))
    assert issubclass(ResourceLimitError, InvalidInputError)
    with pytest.raises(InvalidInputError, match="amplitude"):
        hw.density_matrix_kernel(build_encoding("amplitude", 4), {}, np.ones((1, 4)))
    with pytest.raises(InvalidInputError, match="channel"):
        hw.density_matrix_kernel(build_encoding("angle", 2), initial_params(
            build_encoding("angle", 2)), np.zeros((1, 2)), channel="everywhere")


# --------------------------------------------------------------------------- shot budget

@pytest.fixture(scope="module")
def iris_kernels():
    # scikit-learn's bundled iris data, classes 0 and 1, standardized on the train part
    X, y = load_iris(return_X_y=True)
    keep = y < 2
    X, y = X[keep], y[keep]
    order = np.random.default_rng(0).permutation(len(y))
    train, test = order[:24], order[24:44]
    mean, std = X[train].mean(0), X[train].std(0)
    X = (X - mean) / std
    bp = build_encoding("iqp", 4, layers=1)
    params = initial_params(bp, bandwidth=0.5)
    K_train = np.asarray(quantum_gram(bp, params, X[train]), dtype=float)
    K_test = np.asarray(quantum_gram(bp, params, X[test], X[train]), dtype=float)
    return bp, params, X[train], X[test], K_train, K_test, y[train], y[test]


def test_shot_budget_curve_converges_to_the_exact_kernel(iris_kernels):
    _, _, _, _, K_train, K_test, y_train, y_test = iris_kernels
    grid = (4, 40, 400, 40000)
    result = hw.shot_budget(K_train, K_test, y_train, y_test, seed=0, shots_grid=grid,
                            repeats=4, tolerance=0.05)
    json.dumps(result)  # JSON-able
    curve = result["curve"]
    assert [point["shots"] for point in curve] == list(grid)
    errors = [point["relative_gram_error_mean"] for point in curve]
    assert all(a > b for a, b in zip(errors, errors[1:]))
    # at high shots E||K_hat - K||_F^2 = sum_{i != j} k (1 - k) / s  (binomial variance)
    off = ~np.eye(len(K_train), dtype=bool)
    expected = math.sqrt(np.sum(K_train[off] * (1 - K_train[off])) / 40000)
    assert errors[-1] == pytest.approx(expected / np.linalg.norm(K_train), rel=0.1)
    exact = result["exact"]["test_accuracy"]
    accuracies = [point["test_accuracy_mean"] for point in curve]
    assert accuracies[-1] >= accuracies[0]
    assert accuracies[-1] >= exact - 1.0 / len(y_test)
    align = [point["alignment_mean"] for point in curve]
    assert abs(align[-1] - result["exact"]["alignment"]) < abs(align[0]
                                                               - result["exact"]["alignment"])
    # the empirical count follows its stated rule
    tol = result["tolerance"]
    if result["empirical_shots"] is not None:
        start = grid.index(result["empirical_shots"])
        assert all(p["test_accuracy_mean"] >= exact - tol for p in curve[start:])
        assert start == 0 or curve[start - 1]["test_accuracy_mean"] < exact - tol
    # total executions: (N(N-1)/2 + N_test N) * shots
    n, n_test = len(y_train), len(y_test)
    assert result["entries"] == {"train": n * (n - 1) // 2, "prediction": n_test * n}
    assert curve[1]["total_executions"] == (n * (n - 1) // 2 + n_test * n) * 40


def test_analytic_shots_follow_the_variance_rule(iris_kernels):
    _, _, _, _, K_train, K_test, y_train, y_test = iris_kernels
    result = hw.shot_budget(K_train, K_test, y_train, y_test, seed=1, shots_grid=(100,),
                            repeats=1, spread_fraction=0.2)
    rows, cols = np.triu_indices(len(K_train), 1)
    k = K_train[rows, cols]
    target = 0.2 * k.std()
    s = result["analytic_shots"]
    # inversion test: rms std = sqrt(mean k (1 - k) / s)  (binomial)
    assert math.sqrt(np.mean(k * (1 - k)) / s) <= target
    assert math.sqrt(np.mean(k * (1 - k)) / (s - 1)) > target
    assert result["total_executions"]["analytic"] == (len(k) + K_test.size) * s


def test_shot_budget_with_the_hadamard_test(iris_kernels):
    bp, params, X_train, X_test, K_train, K_test, y_train, y_test = iris_kernels
    with pytest.raises(InvalidInputError, match="overlaps"):
        hw.shot_budget(K_train, K_test, y_train, y_test, seed=0, estimator="hadamard_test")
    result = hw.shot_budget(
        K_train, K_test, y_train, y_test, seed=0, shots_grid=(20, 20000), repeats=2,
        estimator="hadamard_test", n_qubits=4,
        overlaps_train=hw.state_overlaps(bp, params, X_train),
        overlaps_test=hw.state_overlaps(bp, params, X_test, X_train))
    assert result["circuits_per_entry"] == 2
    assert result["qubits_per_circuit"] == 5
    n = len(y_train)
    assert result["curve"][0]["total_executions"] == 2 * 20 * (n * (n - 1) // 2 + K_test.size)
    errors = [p["relative_gram_error_mean"] for p in result["curve"]]
    assert errors[1] < errors[0] / 10


# --------------------------------------------------------------------------- bad input

@pytest.mark.parametrize("shots", [0, -5, 2.5, True, "100", float("nan")])
def test_bad_shots_rejected(shots):
    with pytest.raises(InvalidInputError, match="shots must be a positive whole number.*pass"):
        hw.shot_sampled_gram(np.eye(2), shots, seed=0)


@pytest.mark.parametrize("rate", [-0.1, 1.5, "high"])
def test_bad_error_rates_rejected(rate):
    with pytest.raises(InvalidInputError, match="one_qubit_error"):
        hw.depolarizing_from_gates(3, 1, one_qubit_error=rate, two_qubit_error=0.01)
    bp = build_encoding("angle", 2)
    with pytest.raises(InvalidInputError, match="two_qubit_error"):
        hw.density_matrix_kernel(bp, initial_params(bp), np.zeros((1, 2)), two_qubit_error=rate)


def test_other_bad_inputs_rejected():
    K = np.full((3, 3), 0.5)
    with pytest.raises(InvalidInputError, match="did you mean 'swap_test'"):
        hw.shot_sampled_gram(K, 10, estimator="swap-test", seed=0)
    with pytest.raises(InvalidInputError, match="at least 2 shots"):
        hw.shot_sampled_gram(K, 1, estimator="hadamard_test", seed=0, overlaps=np.sqrt(K))
    with pytest.raises(InvalidInputError, match="seed=0"):
        hw.shot_sampled_gram(K, 10, seed=None)
    with pytest.raises(InvalidInputError, match="probabilities in \\[0, 1\\]"):
        hw.shot_sampled_gram(K + 1.0, 10, seed=0)
    with pytest.raises(InvalidInputError, match="n_qubits"):
        hw.shot_sampled_gram(K, 10, seed=0, depolarizing=0.1)
    with pytest.raises(InvalidInputError, match="disagree"):
        hw.shot_sampled_gram(K, 10, estimator="hadamard_test", seed=0, overlaps=K)
    with pytest.raises(InvalidInputError, match="square"):
        hw.shot_sampled_gram(np.full((2, 3), 0.5), 10, seed=0, symmetric=True)
    y = np.array([0, 1, 0])
    with pytest.raises(InvalidInputError, match="strictly increasing"):
        hw.shot_budget(K, K, y, y, seed=0, shots_grid=(100, 10))
    with pytest.raises(InvalidInputError, match="single class"):
        hw.shot_budget(K, K, np.zeros(3), y, seed=0)
    with pytest.raises(InvalidInputError, match="K_test must be"):
        hw.shot_budget(K, np.full((2, 4), 0.5), y, y[:2], seed=0)


def test_density_matrix_memory_is_checked_before_allocating():
    # 20000 samples x 4^8 x 16 bytes ~ 19.5 GiB: refused with the estimate, nothing allocated
    from hilbertune import build_encoding, initial_params
    from hilbertune.errors import ResourceLimitError
    from hilbertune.hardware import density_matrix_kernel

    blueprint = build_encoding("iqp", 8)
    X = np.zeros((20000, 8))
    with pytest.raises(ResourceLimitError, match="GiB"):
        density_matrix_kernel(blueprint, initial_params(blueprint), X, X[:2])


# --------------------------------------------------------------------------- projected kernels
# (issue 15 c: a projected kernel is measured as single-qubit Pauli expectations)

def _dense_bloch_vectors(bp, params, x, error, dense, *, final_flip=0.0):
    """Reference: the encoding as full density matrices (conftest simulator), a GLOBAL
    depolarizing channel (1 - e) rho + e I / 2^n after every gate (Nielsen & Chuang 2000,
    Eq. 8.102 on all qubits), then <P_q> = Tr(rho P_q) with P_q embedded by np.kron."""
    n = bp.n_qubits
    rho = np.zeros((2**n, 2**n), complex)
    rho[0, 0] = 1
    for step in bp.steps:
        angle = rule_angle(step.angle, params, x) if step.angle is not None else 0.0
        G = dense.gate(step, angle, n)
        e = error[len(step.qubits) - 1]
        rho = (1 - e) * (G @ rho @ G.conj().T) + e * np.eye(2**n) / 2**n
    return np.array([[np.trace(rho @ dense.embed({q: P}, n)).real
                      for P in (dense.X, dense.Y, dense.Z)] for q in range(n)])


def test_global_depolarizing_shrinks_every_bloch_vector_by_one_minus_p(dense, rng):
    bp = build_encoding("iqp", 3, layers=2)
    params = dense.random_params(bp, rng)
    X = rng.uniform(-1, 1, size=(3, 3))
    e1, e2 = 0.01, 0.05
    exact = np.asarray(hw.density_matrix_expectations(bp, params, X))
    p = hw.projected_depolarizing(bp, one_qubit_error=e1, two_qubit_error=e2)
    shrink = hw.projected_shrink(p, n_qubits=3)
    np.testing.assert_allclose(shrink, 1 - p)  # no basis rotation noise, no readout error
    for i, x in enumerate(X):
        reference = _dense_bloch_vectors(bp, params, x, (e1, e2), dense)
        np.testing.assert_allclose((1 - p) * exact[i], reference, atol=2e-6)  # float32 angles
    # the simulator in hardware.py agrees with the dense reference and the formula
    noisy = hw.density_matrix_expectations(bp, params, X, one_qubit_error=e1,
                                           two_qubit_error=e2, channel="global")
    np.testing.assert_allclose(noisy, (1 - p) * exact, atol=1e-8)
    # its noiseless expectations are the ones the projected kernel is built from
    from hilbertune.kernels import encoding_expectations
    np.testing.assert_allclose(exact, np.asarray(encoding_expectations(bp, params, X)),
                               atol=2e-5)
    # local channels on an entangling circuit are not exactly the global model, but close
    local = hw.density_matrix_expectations(bp, params, X, one_qubit_error=e1,
                                           two_qubit_error=e2)
    assert 1e-6 < np.abs(local - (1 - p) * exact).max() < 0.1


def test_basis_rotations_and_readout_flips_shrink_as_derived():
    # one global channel e1 per basis-change rotation (one per qubit) for X and Y; a bit
    # read wrongly with probability e: P(+1) -> (1 - e) P(+1) + e (1 - P(+1)), so
    # <P> = 2 P(+1) - 1 -> (1 - 2e) <P>  (exact, written out here)
    p, e1, e, n = 0.2, 0.01, 0.03, 4
    shrink = hw.projected_shrink(p, n_qubits=n, one_qubit_error=e1, readout_error=e)
    plus = 0.5 * (1 + 0.6)
    flipped = (1 - e) * plus + e * (1 - plus)
    assert (2 * flipped - 1) / 0.6 == pytest.approx(1 - 2 * e)
    np.testing.assert_allclose(shrink, (1 - p) * (1 - 2 * e) * np.array(
        [(1 - e1) ** n, (1 - e1) ** n, 1.0]))


def test_sampled_expectations_are_binomial_means_of_plus_minus_one_outcomes():
    E = np.array([[[0.5, -0.2, 0.9]]])
    shots = 50
    draws = np.stack([hw.sample_expectations(E, shots, seed=s) for s in range(4000)])
    # <P>_hat = 2 m / s - 1, m ~ Binomial(s, (1 + <P>) / 2): mean <P>, var (1 - <P>^2) / s
    np.testing.assert_allclose(draws.mean(0), E, atol=0.01)
    np.testing.assert_allclose(draws.var(0), (1 - E**2) / shots, rtol=0.1)
    np.testing.assert_array_equal(hw.sample_expectations(E, shots, seed=3),
                                  hw.sample_expectations(E, shots, seed=3))


def test_projected_entry_variance_matches_monte_carlo_with_device_noise():
    rng = np.random.default_rng(2)
    E = rng.uniform(-1, 1, size=(6, 2, 3))
    gamma, shots, shrink = 0.7, 400, np.array([0.8, 0.8, 0.9])
    samples = []
    for s in range(3000):
        est = hw.sample_expectations(E, shots, seed=s, shrink=shrink).reshape(6, -1)
        samples.append(np.exp(-gamma / 2 * ((est[:, None] - est[None]) ** 2).sum(-1)))
    variance = hw.projected_entry_variance(E, gamma=gamma, shots=shots, shrink=shrink)
    off = ~np.eye(6, dtype=bool)
    np.testing.assert_allclose(variance[off], np.var(samples, axis=0)[off], rtol=0.15)
    assert np.all(np.diag(variance) == 0) and np.all(np.var(samples, axis=0).diagonal() == 0)
    # the Gram-only bound holds
    K = hw.projected_kernel_from_expectations(E * shrink, gamma=gamma)
    bound = hw.projected_variance_bound(K, gamma=gamma, n_qubits=2, shots=shots)
    assert np.all(variance[off] <= bound[off] * (1 + 1e-12))


def test_projected_estimate_counts_three_circuits_per_sample(iris_kernels):
    bp, params, X_train, X_test, _, _, y_train, y_test = iris_kernels
    from hilbertune.kernels import projected_gram

    settings = {"estimator": "inversion_test", "shots_grid": [100, 1000], "tolerance": 0.05,
                "one_qubit_error": 0.001, "two_qubit_error": 0.01, "readout_error": 0.02}
    k_train = np.asarray(projected_gram(bp, params, X_train, gamma=0.5), float)
    k_test = np.asarray(projected_gram(bp, params, X_test, X_train, gamma=0.5), float)
    out = hw.run_estimate(settings, bp, params, X_train, X_test, k_train, k_test, y_train,
                          y_test, C=1.0, seed=0, kind="projected", gamma=0.5)
    json.dumps(out, allow_nan=False)
    budget = out["shot_budget"]
    n, n_test = len(y_train), len(y_test)
    # 3 bases per sample, 3 (N + N_test) circuits, not one circuit per pair
    assert out["estimator"] == "pauli_expectations"
    assert budget["circuits"] == {"train": 3 * n, "prediction": 3 * n_test}
    assert [p["total_executions"] for p in budget["curve"]] == [3 * (n + n_test) * s
                                                                for s in (100, 1000)]
    # the exact reference is the projected kernel the SVM used
    from sklearn.svm import SVC
    model = SVC(kernel="precomputed", C=1.0).fit(k_train, y_train)
    assert budget["exact"]["test_accuracy"] == pytest.approx(model.score(k_test, y_test))
    noise = out["device_noise"]
    p = hw.projected_depolarizing(bp, one_qubit_error=0.001, two_qubit_error=0.01)
    assert noise["depolarizing_probability"] == pytest.approx(p)
    assert noise["shrink_per_basis"]["Z"] == pytest.approx((1 - p) * (1 - 2 * 0.02))
    if noise["empirical_shots_with_noise"] is not None:
        assert noise["total_executions_with_noise"] == \
            3 * (n + n_test) * noise["empirical_shots_with_noise"]
    # the fidelity path keeps one circuit per kernel entry
    k_f = np.asarray(quantum_gram(bp, params, X_train), float)
    k_ft = np.asarray(quantum_gram(bp, params, X_test, X_train), float)
    fid = hw.run_estimate(settings, bp, params, X_train, X_test, k_f, k_ft, y_train, y_test,
                          C=1.0, seed=0)
    assert fid["shot_budget"]["entries"] == {"train": n * (n - 1) // 2,
                                             "prediction": n * n_test}
    assert fid["kind"] == "fidelity"


def test_iris_example_needs_450_projected_circuits():
    # issue 15: the whole iris data (150 rows) needs 3 x 150 = 450 circuits, not 10185
    X, y = load_iris(return_X_y=True)
    bp = build_encoding("angle", 4)
    params = initial_params(bp, bandwidth=0.3)
    from hilbertune.kernels import encoding_expectations
    E = np.asarray(encoding_expectations(bp, params, X), float)
    out = hw.projected_shot_budget(E[:105], E[105:], y[:105], y[105:], gamma=1.0, seed=0,
                                   shots_grid=(10,), repeats=1)
    assert sum(out["circuits"].values()) == 450


def test_projected_bad_input_is_refused():
    with pytest.raises(InvalidInputError, match="shape"):
        hw.projected_entry_variance(np.zeros((3, 2)), gamma=1.0, shots=10)
    with pytest.raises(InvalidInputError, match="gamma"):
        hw.projected_kernel_from_expectations(np.zeros((3, 2, 3)), gamma=-1.0)
    with pytest.raises(InvalidInputError, match="kind"):
        hw.run_estimate({}, None, None, None, None, None, None, None, None, C=1.0, seed=0,
                        kind="fidelty")
