"""Kernels against outside references: standard identities, closed forms, the dense numpy
simulator of tests/conftest.py, Huang et al. (2021) and scikit-learn."""

from __future__ import annotations

import math

import numpy as np
import pytest
import jax
import jax.numpy as jnp
from sklearn.datasets import load_iris
from sklearn.svm import SVC

from hilbertune import circuits, encodings, kernels
from hilbertune.circuits import AngleRule, Blueprint, Step
from hilbertune.errors import InvalidInputError, ResourceLimitError


def _layered(n=3, layers=2, gate="cz"):
    return encodings.reuploading_layers(n, layers=layers, entangler="ring",
                                        entangler_gate=gate)


# --------------------------------------------------------------------------- circuit identities

@pytest.mark.parametrize("part", ["real", "imag"])
def test_hadamard_test_gives_real_and_imaginary_overlap(part, dense, rng):
    bp = _layered(3, gate="cnot")
    params = dense.random_params(bp, rng)
    X = rng.uniform(-2, 2, size=(4, 3))
    Y = rng.uniform(-2, 2, size=(4, 3))
    got = np.asarray(kernels.interference_zero_probability(bp, params, X, Y, part=part))
    psi, phi = dense.states(bp, params, X), dense.states(bp, params, Y)  # numpy reference
    overlap = np.sum(psi.conj() * phi, axis=1)
    # P(0) = 1/2 + 1/2 Re<psi|phi> ; with S^dagger on the ancilla 1/2 + 1/2 Im<psi|phi>
    # (Hadamard test, standard identity, common practice)
    part_value = overlap.real if part == "real" else overlap.imag
    np.testing.assert_allclose(got, 0.5 + 0.5 * part_value, atol=2e-5)
    # the imaginary part is not trivially zero here, so the check has teeth
    assert np.abs(overlap.imag).max() > 1e-2


def test_hadamard_test_single_pair_is_scalar(dense, rng):
    bp = _layered(2)
    params = dense.random_params(bp, rng)
    x, y = rng.uniform(-2, 2, size=2), rng.uniform(-2, 2, size=2)
    got = kernels.interference_zero_probability(bp, params, x, y)
    assert np.shape(got) == ()
    psi, phi = dense.states(bp, params, [x])[0], dense.states(bp, params, [y])[0]
    assert abs(float(got) - (0.5 + 0.5 * np.vdot(psi, phi).real)) < 2e-5


def test_hadamard_test_rejects_bad_part_and_amplitude_encoding():
    bp = _layered(2)
    with pytest.raises(InvalidInputError, match="part"):
        kernels.interference_zero_probability(bp, circuits.initial_params(bp), [0, 0], [0, 0],
                                              part="phase")
    amp = encodings.amplitude_state(4)
    with pytest.raises(InvalidInputError, match="amplitude"):
        kernels.interference_zero_probability(amp, circuits.initial_params(amp),
                                              [1, 0, 0, 0], [0, 1, 0, 0])


@pytest.mark.parametrize("family", ["layered", "iqp"])
def test_inversion_test_equals_fidelity_gram(family, dense, rng):
    bp = encodings.build_encoding(family, 3)
    params = dense.random_params(bp, rng)
    X = rng.uniform(-2, 2, size=(5, 3))
    gram = np.asarray(kernels.quantum_gram(bp, params, X))
    i, j = np.triu_indices(5, k=1)
    per_pair = np.asarray(kernels.inversion_test_probability(bp, params, X[i], X[j]))
    # |<0|U(x')^+ U(x)|0>|^2 = |<psi(x')|psi(x)>|^2 (definition of the fidelity kernel)
    np.testing.assert_allclose(per_pair, gram[i, j], atol=2e-5)
    same = np.asarray(kernels.inversion_test_probability(bp, params, X, X))
    np.testing.assert_allclose(same, 1.0, atol=2e-5)


# --------------------------------------------------------------------------- projected kernel

@pytest.mark.parametrize("family", ["layered", "angle"])
def test_projected_kernel_equals_partial_trace_formula(family, dense, rng):
    n, gamma = 3, 0.7
    bp = encodings.build_encoding(family, n)
    params = dense.random_params(bp, rng)
    X = rng.uniform(-2, 2, size=(4, n))
    Y = rng.uniform(-2, 2, size=(3, n))
    got = np.asarray(kernels.projected_gram(bp, params, X, Y, gamma=gamma))
    sx, sy = dense.states(bp, params, X), dense.states(bp, params, Y)  # numpy reference
    want = np.empty((4, 3))
    for a in range(4):
        for b in range(3):
            # k = exp(-gamma sum_q ||rho_q(x) - rho_q(x')||_F^2)  (Huang et al., Nat. Commun.
            # 12, 2631 (2021)); rho_q by an explicit numpy partial trace
            dist = sum(np.linalg.norm(dense.partial_trace(sx[a], q, n)
                                      - dense.partial_trace(sy[b], q, n), "fro") ** 2
                       for q in range(n))
            want[a, b] = math.exp(-gamma * dist)
    np.testing.assert_allclose(got, want, atol=2e-5)
    sym = np.asarray(kernels.projected_gram(bp, params, X, gamma=gamma))
    np.testing.assert_allclose(np.diag(sym), 1.0, atol=1e-5)


def test_pauli_expectations_equal_traces_with_paulis(dense, rng):
    bp = _layered(3)
    params = dense.random_params(bp, rng)
    X = rng.uniform(-2, 2, size=(2, 3))
    states = dense.states(bp, params, X)
    got = np.asarray(kernels.pauli_expectations(jnp.asarray(states, jnp.complex64), 3))
    for b in range(2):
        for q in range(3):
            for k, pauli in enumerate((dense.X, dense.Y, dense.Z)):
                # <P_q> = <psi| P_q |psi> with P_q embedded by np.kron (numpy reference)
                want = np.vdot(states[b], dense.embed({q: pauli}, 3) @ states[b]).real
                assert abs(got[b, q, k] - want) < 2e-5


def test_projected_gamma_must_be_positive():
    bp = _layered(2)
    with pytest.raises(InvalidInputError, match="gamma"):
        kernels.projected_gram(bp, circuits.initial_params(bp), np.zeros((2, 2)), gamma=0.0)


# --------------------------------------------------------------------------- concentration

@pytest.mark.parametrize("n, method", [(4, "auto"), (3, "statevector")])
def test_exponential_concentration_of_product_ry(n, method, rng):
    # Derivation: k = prod_i cos^2(D_i / 2) with D_i i.i.d. uniform on [0, 2 pi).
    # cos^2(D/2) = (1 + cos D)/2, so E = 1/2; cos^4(D/2) = (1 + 2 cos D + cos^2 D)/4, so
    # E = (1 + 0 + 1/2)/4 = 3/8. Independence: E[k] = (1/2)^n, E[k^2] = (3/8)^n,
    # Var[k] = (3/8)^n - (1/4)^n (exponential concentration; cf. Thanasilp, Wang, Cerezo,
    # Holmes, "Exponential concentration in quantum kernel methods", 2022).
    m = 20000 if method == "auto" else 4000
    bp = encodings.single_axis_rotations(n, axis="y")
    X = rng.uniform(0, 2 * np.pi, size=(m, n))  # D_i = x_i - 0 with x' = 0
    k = np.asarray(kernels.quantum_gram(bp, circuits.initial_params(bp), X, np.zeros((1, n)),
                                        method=method))[:, 0].astype(np.float64)
    mean_want = 0.5**n
    var_want = (3 / 8) ** n - 0.25**n
    mean_se = math.sqrt(var_want / m)
    assert abs(k.mean() - mean_want) < 4 * mean_se
    centred = k - k.mean()
    # standard error of the sample variance: sqrt((mu_4 - sigma^4) / m) (common practice)
    var_se = math.sqrt((np.mean(centred**4) - np.var(k) ** 2) / m)
    assert abs(np.var(k, ddof=1) - var_want) < 4 * var_se


# --------------------------------------------------------------------------- Gram properties

GRAM_CASES = [
    ("layered", {"layers": 2}),
    ("layered", {"layers": 1, "entangler_gate": "cnot", "entangler": "all"}),
    ("iqp", {"layers": 2}),
    ("angle", {}),
    ("amplitude", {}),
]


@pytest.mark.parametrize("family, options", GRAM_CASES)
def test_gram_is_a_valid_fidelity_gram(family, options, dense, rng):
    n_features = 4
    bp = encodings.build_encoding(family, n_features, **options)
    params = dense.random_params(bp, rng) if bp.n_slots else circuits.initial_params(bp)
    X = rng.uniform(-1.5, 1.5, size=(12, n_features))
    gram = np.asarray(kernels.quantum_gram(bp, params, X), dtype=np.float64)
    assert gram.shape == (12, 12)
    np.testing.assert_array_equal(gram, gram.T)  # symmetric
    np.testing.assert_array_equal(np.diag(gram), 1.0)  # unit diagonal
    assert gram.min() >= -1e-6 and gram.max() <= 1 + 1e-5  # fidelities lie in [0, 1]
    # PSD: a fidelity Gram is a Gram matrix of rho_i = |psi_i><psi_i| under the Hilbert-
    # Schmidt inner product (common practice); numpy.linalg.eigvalsh within tolerance
    assert np.linalg.eigvalsh(gram).min() > -1e-5
    states = np.asarray(circuits.encode_states(bp, params, X))
    np.testing.assert_allclose(np.linalg.norm(states, axis=1), 1.0, atol=1e-5)  # normalized
    # the unforced diagonal agrees: |<psi|psi>|^2 = 1 for normalized states
    np.testing.assert_allclose(np.abs(np.sum(states.conj() * states, 1)) ** 2, 1.0, atol=2e-5)
    # test-versus-train Gram equals the corresponding block of the full Gram
    train, test = np.arange(0, 8), np.arange(8, 12)
    block = np.asarray(kernels.quantum_gram(bp, params, X[test], X[train]))
    np.testing.assert_allclose(block, gram[np.ix_(test, train)], atol=2e-6)


def test_gram_for_training_matches_quantum_gram(dense, rng):
    for bp in (_layered(3), encodings.single_axis_rotations(3)):
        params = dense.random_params(bp, rng)
        X = rng.uniform(-2, 2, size=(6, 3)).astype(np.float32)
        Y = rng.uniform(-2, 2, size=(4, 3)).astype(np.float32)
        full = np.asarray(kernels.quantum_gram(bp, params, X))
        np.testing.assert_allclose(np.asarray(kernels.gram_for_training(bp, params, X)),
                                   full, atol=2e-5)
        np.testing.assert_allclose(np.asarray(kernels.gram_for_training(bp, params, Y, X)),
                                   np.asarray(kernels.quantum_gram(bp, params, Y, X)),
                                   atol=2e-5)


def test_gram_gradient_matches_finite_differences_of_reference(dense, rng):
    bp = _layered(2, layers=2)
    params = dense.random_params(bp, rng)
    X = rng.uniform(-2, 2, size=(4, 2)).astype(np.float32)
    weights = rng.normal(size=(4, 4))

    def loss_core(p):
        return jnp.sum(weights * kernels.gram_for_training(bp, p, X))

    grad = jax.grad(loss_core)({k: jnp.asarray(v) for k, v in params.items()})

    def loss_reference(p):
        s = dense.states(bp, p, X)  # float64 numpy reference
        return np.sum(weights * np.abs(s.conj() @ s.T) ** 2)

    def shifted(name, index, h):
        p = {k: np.array(v, dtype=np.float64) for k, v in params.items()}
        if p[name].ndim == 0:
            p[name] = p[name] + h
        else:
            p[name][index] += h
        return p

    h = 1e-5
    for name, index in (("log_bandwidth", None), ("weights", 0), ("weights", 3),
                        ("biases", 2)):
        # central difference of the float64 reference (common practice)
        numeric = (loss_reference(shifted(name, index, h))
                   - loss_reference(shifted(name, index, -h))) / (2 * h)
        analytic = float(grad[name] if index is None else grad[name][index])
        assert abs(analytic - numeric) < 2e-3 * max(1.0, abs(numeric))


# --------------------------------------------------------------------------- closed form

def _random_product_blueprint(n, rng):
    steps, weights = [], []
    for q in range(n):
        if rng.random() < 0.5:
            steps.append(Step("h", (q,)))
        for axis in rng.choice(["x", "y", "z"], size=2, replace=True):
            steps.append(Step("r" + axis, (q,), AngleRule("feature", (int(rng.integers(n)),),
                                                         len(weights))))
            weights.append(float(rng.normal()))
        if rng.random() < 0.7:
            z = rng.normal(size=(2, 2)) + 1j * rng.normal(size=(2, 2))
            u, _ = np.linalg.qr(z)
            steps.append(Step("unitary", (q,), None, tuple(tuple(complex(v) for v in row)
                                                           for row in u)))
        steps.append(Step("ry", (q,), AngleRule("free", (), len(weights))))
        weights.append(1.0)
    return Blueprint(n, n, tuple(steps), tuple(weights))


@pytest.mark.parametrize("n", [4, 10])
def test_closed_form_product_path_equals_statevector_path(n, dense, rng):
    bp = _random_product_blueprint(n, rng)
    assert circuits.is_product(bp)
    params = dense.random_params(bp, rng)
    X = rng.uniform(-2, 2, size=(6, n))
    Y = rng.uniform(-2, 2, size=(3, n))
    for args in ((X,), (X, Y)):
        product = np.asarray(kernels.quantum_gram(bp, params, *args, method="product"))
        statevector = np.asarray(kernels.quantum_gram(bp, params, *args,
                                                      method="statevector"))
        np.testing.assert_allclose(product, statevector, atol=5e-6)
    if n <= 4:  # and both equal the dense numpy reference
        s = dense.states(bp, params, X)
        np.testing.assert_allclose(np.asarray(kernels.quantum_gram(bp, params, X)),
                                   np.abs(s.conj() @ s.T) ** 2, atol=5e-6)


def test_closed_form_scales_to_hundreds_of_qubits(rng):
    n, c = 200, 0.05
    bp = encodings.single_axis_rotations(n)
    X = rng.normal(size=(5, n))
    gram = np.asarray(kernels.quantum_gram(bp, circuits.initial_params(bp, bandwidth=c), X))
    # prod_i cos^2(c (x_i - x'_i)/2) in float64 logs (common practice closed form)
    want = np.exp(np.sum(np.log(np.cos(c * (X[:, None] - X[None]) / 2) ** 2), axis=-1))
    np.testing.assert_allclose(gram, want, rtol=2e-4, atol=1e-7)


@pytest.mark.parametrize("axis", ["x", "y", "z"])
def test_tiled_product_kernel_across_tile_and_pass_boundaries(axis, rng, monkeypatch):
    # Small tiles so that 150 x 131 samples need a 3 x 3 grid with padded edges, and 23
    # qubits so that the 20-qubit passes need padding. Any single-axis angle encoding gives
    # prod_i cos^2(c (x_i - x'_i) / 2) (common practice closed form; float64 numpy).
    monkeypatch.setattr(kernels, "_TILE_EDGE", 64)
    n, c = 23, 0.7
    bp = encodings.single_axis_rotations(n, axis=axis)
    params = circuits.initial_params(bp, bandwidth=c)
    X, Y = rng.uniform(-2, 2, size=(150, n)), rng.uniform(-2, 2, size=(131, n))

    def closed_form(A, B):
        return np.prod(np.cos(c * (A[:, None] - B[None]) / 2) ** 2, axis=-1)

    train = kernels.quantum_gram(bp, params, X)
    np.testing.assert_allclose(train, closed_form(X, X), atol=2e-6)
    assert np.array_equal(train, train.T) and np.all(np.diag(train) == 1.0)
    np.testing.assert_allclose(kernels.quantum_gram(bp, params, X, Y), closed_form(X, Y),
                               atol=2e-6)


def test_product_method_refused_for_entangling_encoding():
    bp = _layered(2)
    with pytest.raises(InvalidInputError, match="entangling"):
        kernels.quantum_gram(bp, circuits.initial_params(bp), np.zeros((2, 2)),
                             method="product")
    with pytest.raises(InvalidInputError, match="method"):
        kernels.quantum_gram(bp, circuits.initial_params(bp), np.zeros((2, 2)),
                             method="exact")


# --------------------------------------------------------------------------- memory

def test_states_that_do_not_fit_are_refused_with_the_estimate():
    bp = encodings.reuploading_layers(2, n_qubits=30, layers=1)
    X = np.zeros((100, 2))
    need = 100 * 2**30 * 8  # N * 2**n * 8 bytes for complex64 (DESIGN.md)
    with pytest.raises(ResourceLimitError, match=f"{need / 2**30:.2f} GiB") as info:
        kernels.quantum_gram(bp, circuits.initial_params(bp), X, memory_budget="1GiB")
    assert "fewer qubits" in str(info.value)
    assert isinstance(info.value, InvalidInputError)  # exit code 2 in the CLI


def test_output_matrix_counts_against_the_budget():
    bp = _layered(2)
    X = np.zeros((100, 2))
    states = 100 * 4 * 8
    with pytest.raises(ResourceLimitError, match="Gram"):
        kernels.quantum_gram(bp, circuits.initial_params(bp), X, memory_budget=states + 100)


def test_blocked_gram_equals_unblocked(dense, rng):
    bp = _layered(3)
    params = dense.random_params(bp, rng)
    X = rng.uniform(-2, 2, size=(20, 3))
    unblocked = np.asarray(kernels.quantum_gram(bp, params, X))
    states, output = 20 * 8 * 8, 20 * 20 * 4
    # room for about 2 rows of the [rows, 20] complex temporary -> 10 blocks
    tight = np.asarray(kernels.quantum_gram(bp, params, X,
                                            memory_budget=states + output + 500))
    np.testing.assert_allclose(tight, unblocked, atol=1e-6)
    s = circuits.encode_states(bp, params, X)
    for rows in (1, 3, 7):
        np.testing.assert_allclose(np.asarray(kernels.fidelity_gram(s, block_rows=rows)),
                                   unblocked, atol=1e-6)


@pytest.mark.parametrize("text, want", [("2GiB", 2 * 2**30), ("500MB", 500 * 10**6),
                                        ("1.5 kib", 1536), (" 64 mib ", 64 * 2**20),
                                        ("4096", 4096), (4096, 4096), ("3gb", 3 * 10**9)])
def test_resolve_memory_budget_parses_units(text, want):
    assert kernels.resolve_memory_budget(text) == want


def test_resolve_memory_budget_default_and_bad_values():
    default = kernels.resolve_memory_budget(None)
    assert 0 < default <= 8 * 2**30
    for bad in ("2 parsecs", "GiB", "-1GiB", 0, -5):
        with pytest.raises(InvalidInputError, match="budget"):
            kernels.resolve_memory_budget(bad)


# --------------------------------------------------------------------------- scikit-learn

def _iris_two_classes():
    # scikit-learn bundled dataset (sklearn.datasets.load_iris), classes 1 vs 2
    data = load_iris()
    keep = data.target > 0
    X, y = data.data[keep], data.target[keep]
    X = (X - X.min(0)) / (X.max(0) - X.min(0)) * np.pi  # scale to [0, pi]
    order = np.random.default_rng(0).permutation(len(y))
    X, y = X[order], y[order]
    return X[:60], y[:60], X[60:], y[60:]


@pytest.mark.parametrize("family", ["layered", "angle"])
def test_precomputed_svc_and_callable_svc_agree(family):
    X_train, y_train, X_test, y_test = _iris_two_classes()
    bp = encodings.build_encoding(family, 4)
    params = circuits.initial_params(bp, bandwidth=0.8)
    gram_train = np.asarray(kernels.quantum_gram(bp, params, X_train), dtype=np.float64)
    gram_test = np.asarray(kernels.quantum_gram(bp, params, X_test, X_train), dtype=np.float64)
    # a tight solver tolerance, so that float32 rounding differences between the symmetric
    # and the rectangular Gram path cannot steer libsvm to a different stopping point
    precomputed = SVC(kernel="precomputed", tol=1e-9).fit(gram_train, y_train)
    frozen = kernels.FrozenKernel(bp, params)
    with_callable = SVC(kernel=frozen, tol=1e-9).fit(X_train, y_train)
    np.testing.assert_array_equal(precomputed.predict(gram_test),
                                  with_callable.predict(X_test))
    np.testing.assert_allclose(precomputed.decision_function(gram_test),
                               with_callable.decision_function(X_test), atol=1e-4)
    # a usable kernel on this easy pair of classes (sklearn SVC; loose sanity bound)
    assert precomputed.score(gram_test, y_test) > 0.7
    if family == "angle":
        def closed_form(A, B):  # prod cos^2(c (x - x')/2) (common practice)
            return np.prod(np.cos(0.8 * (A[:, None] - B[None]) / 2) ** 2, axis=-1)
        reference = SVC(kernel=closed_form, tol=1e-9).fit(X_train, y_train)
        np.testing.assert_array_equal(reference.predict(X_test),
                                      with_callable.predict(X_test))


def test_frozen_kernel_outputs_float64_and_projected_kind(rng):
    bp = _layered(3)
    params = circuits.initial_params(bp)
    X = rng.uniform(0, 1, size=(5, 3))
    frozen = kernels.FrozenKernel(bp, params)
    out = frozen(X, X[:2])
    assert out.dtype == np.float64 and out.shape == (5, 2)
    projected = kernels.FrozenKernel(bp, params, kind="projected", gamma=0.5)
    np.testing.assert_allclose(projected(X), np.asarray(kernels.projected_gram(
        bp, params, X, gamma=0.5)), atol=1e-7)
    assert "layered" in repr(frozen)
    with pytest.raises(InvalidInputError, match="kind"):
        kernels.FrozenKernel(bp, params, kind="swap")


# --------------------------------------------------------------------------- boundary checks

@pytest.mark.parametrize("bad, fragment", [
    (np.array([[0.1, np.nan, 0.2]]), "X_a contains NaN"),
    (np.array([0.1, 0.2, 0.3]), "X_a must be 2-D"),
    (np.zeros((0, 3)), "X_a is empty"),
    (np.zeros((2, 7)), "7 features but the encoding takes 3"),
])
def test_quantum_gram_boundary_checks(bad, fragment):
    bp = _layered(3)
    with pytest.raises(InvalidInputError, match=fragment):
        kernels.quantum_gram(bp, circuits.initial_params(bp), bad)
    with pytest.raises(InvalidInputError, match=fragment.replace("X_a", "X_b")):
        kernels.quantum_gram(bp, circuits.initial_params(bp), np.zeros((2, 3)), bad)


def test_complex128_gram_without_x64_is_refused():
    if jax.config.jax_enable_x64:
        pytest.skip("64-bit mode is on globally in this session")
    bp = _layered(2)
    with pytest.raises(InvalidInputError, match="64-bit"):
        kernels.quantum_gram(bp, circuits.initial_params(bp), np.zeros((2, 2)),
                             dtype=jnp.complex128)


def test_complex128_gram_agrees_with_complex64(dense, rng):
    for bp in (_layered(3, gate="cnot"), encodings.single_axis_rotations(3)):
        params = dense.random_params(bp, rng)
        X = rng.uniform(-2, 2, size=(6, 3))
        single = np.asarray(kernels.quantum_gram(bp, params, X))
        with jax.enable_x64(True):  # context manager in jax 0.10 (checked)
            double = np.asarray(kernels.quantum_gram(bp, params, X, dtype=jnp.complex128))
        assert double.dtype == np.float64
        np.testing.assert_allclose(double, single, atol=1e-5)


def test_chunked_gram_equals_unchunked(dense, rng):
    bp = _layered(3)
    params = dense.random_params(bp, rng)
    X = rng.uniform(-2, 2, size=(9, 3))
    np.testing.assert_allclose(np.asarray(kernels.quantum_gram(bp, params, X, chunk_size=4)),
                               np.asarray(kernels.quantum_gram(bp, params, X)), atol=1e-6)
