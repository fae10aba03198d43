"""Encoding families against closed forms and published circuit definitions."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg

from hilbertune import circuits, encodings, kernels
from hilbertune.errors import InvalidInputError


def _gram(bp, X, Y=None, **kw):
    params = circuits.initial_params(bp, **kw)
    return np.asarray(kernels.quantum_gram(bp, params, X, Y))


# --------------------------------------------------------------------------- angle

@pytest.mark.parametrize("axis", ["y", "x", "z"])
@pytest.mark.parametrize("method", ["product", "statevector"])
def test_angle_encoding_kernel_is_product_of_cos_squared(axis, method, rng):
    n, c = 4, 0.7
    bp = encodings.single_axis_rotations(n, axis=axis)
    X = rng.uniform(-3, 3, size=(6, n))
    Y = rng.uniform(-3, 3, size=(5, n))
    params = circuits.initial_params(bp, bandwidth=c)
    got = np.asarray(kernels.quantum_gram(bp, params, X, Y, method=method))
    # k(x, x') = prod_i cos^2(c (x_i - x'_i) / 2) (common practice; for RY: <0|RY(a)^+ RY(b)|0>
    # = cos((b - a)/2); the same for RX, and for RZ after H)
    want = np.prod(np.cos(c * (X[:, None, :] - Y[None, :, :]) / 2) ** 2, axis=-1)
    np.testing.assert_allclose(got, want, atol=2e-6)


def test_angle_encoding_is_a_product_encoding():
    bp = encodings.single_axis_rotations(3)
    assert circuits.is_product(bp)
    assert bp.n_qubits == 3 and bp.family == "angle"
    with pytest.raises(InvalidInputError, match="axis"):
        encodings.single_axis_rotations(3, axis="q")


# --------------------------------------------------------------------------- amplitude

@pytest.mark.parametrize("n_features", [2, 3, 4, 5])
def test_amplitude_fidelity_is_squared_cosine(n_features, rng):
    bp = encodings.amplitude_state(n_features)
    assert bp.n_qubits == max(1, math.ceil(math.log2(n_features)))
    X = rng.normal(size=(5, n_features))
    Y = rng.normal(size=(4, n_features))
    got = _gram(bp, X, Y)
    u = X / np.linalg.norm(X, axis=1, keepdims=True)
    v = Y / np.linalg.norm(Y, axis=1, keepdims=True)
    # |<x|x'>|^2 = (x.x')^2 for unit vectors (common practice)
    np.testing.assert_allclose(got, (u @ v.T) ** 2, atol=2e-6)


@pytest.mark.parametrize("copies", [2, 3])
def test_repeated_amplitude_fidelity_is_power_2d(copies, rng):
    bp = encodings.amplitude_state(3, copies=copies)
    assert bp.n_qubits == 2 * copies
    X = rng.normal(size=(4, 3))
    Y = rng.normal(size=(3, 3))
    got = _gram(bp, X, Y)
    u = X / np.linalg.norm(X, axis=1, keepdims=True)
    v = Y / np.linalg.norm(Y, axis=1, keepdims=True)
    # d copies: <x|^(x)d |x'>^(x)d = (x.x')^d, fidelity (x.x')^(2d) (common practice)
    np.testing.assert_allclose(got, (u @ v.T) ** (2 * copies), atol=2e-6)


def test_amplitude_states_are_the_padded_unit_vectors():
    bp = encodings.amplitude_state(3)
    x = np.array([[3.0, 0.0, 4.0]])
    states = np.asarray(circuits.encode_states(bp, circuits.initial_params(bp), x))
    # 3-4-5 triangle: (0.6, 0, 0.8) padded with one zero (worked by hand)
    np.testing.assert_allclose(states[0], [0.6, 0.0, 0.8, 0.0], atol=1e-7)


def test_amplitude_zero_row_rejected():
    bp = encodings.amplitude_state(2)
    with pytest.raises(InvalidInputError, match="all-zero row"):
        _gram(bp, np.array([[1.0, 0.0], [0.0, 0.0]]))


# --------------------------------------------------------------------------- basis

def test_basis_kernel_is_kronecker_delta():
    bp = encodings.bit_flips(3)
    X = np.array([[0, 0, 0], [1, 0, 1], [1, 1, 1], [0, 1, 0], [1, 0, 1]], dtype=float)
    got = _gram(bp, X)
    # distinct bit strings are orthogonal basis states: k = delta(x, x') (common practice)
    want = (X[:, None, :] == X[None, :, :]).all(-1).astype(float)
    np.testing.assert_allclose(got, want, atol=1e-6)


def test_basis_states_are_computational_basis_states():
    bp = encodings.bit_flips(3)
    states = np.asarray(circuits.encode_states(bp, circuits.initial_params(bp),
                                               np.array([[1.0, 0.0, 1.0]])))
    # bits 101 -> index 5 (qubit 0 most significant)
    probs = np.abs(states[0]) ** 2
    np.testing.assert_allclose(probs, np.eye(8)[5], atol=1e-6)


@pytest.mark.parametrize("bad", [0.5, 2.0, -1.0])
def test_basis_rejects_non_binary(bad):
    bp = encodings.bit_flips(2)
    with pytest.raises(InvalidInputError, match="binary"):
        _gram(bp, np.array([[0.0, bad]]))


# --------------------------------------------------------------------------- IQP-style

@pytest.mark.parametrize("pairs, layers", [("all", 2), ("linear", 1), ("ring", 2)])
def test_iqp_style_equals_havlicek_formula(pairs, layers, dense, rng):
    n, c = 3, 0.8
    bp = encodings.iqp_style(n, layers=layers, pairs=pairs)
    params = circuits.initial_params(bp, bandwidth=c)
    X = rng.uniform(-2, 2, size=(3, n))
    got = np.asarray(circuits.encode_states(bp, params, X))
    pair_list = {"all": [(0, 1), (0, 2), (1, 2)], "linear": [(0, 1), (1, 2)],
                 "ring": [(0, 1), (1, 2), (2, 0)]}[pairs]
    hadamards = dense.embed({q: dense.H for q in range(n)}, n)
    for b in range(3):
        xs = c * X[b]
        # U_Phi(x) = exp(i sum_i phi_i Z_i + i sum_(i,j) phi_ij Z_i Z_j), phi_i = x_i,
        # phi_ij = (pi - x_i)(pi - x_j); state (U_Phi H^n)^layers |0> (Havlicek et al., Nature
        # 567, 209 (2019), Eq. 2 and the feature map below it); matrix exponential by scipy
        generator = sum(xs[i] * dense.embed({i: dense.Z}, n) for i in range(n))
        generator = generator + sum((math.pi - xs[i]) * (math.pi - xs[j]) *
                                    dense.embed({i: dense.Z, j: dense.Z}, n)
                                    for i, j in pair_list)
        u_phi = scipy.linalg.expm(1j * generator)
        state = np.eye(2**n)[:, 0].astype(complex)
        for _ in range(layers):
            state = u_phi @ (hadamards @ state)
        np.testing.assert_allclose(got[b], state, atol=2e-5)


def test_iqp_style_counts():
    bp = encodings.iqp_style(4, layers=2, pairs="linear")
    counts = circuits.resource_counts(bp)
    assert counts["two_qubit_gates"] == 2 * 3  # layers * (n - 1) ZZ on a line
    assert counts["one_qubit_gates"] == 2 * (4 + 4)  # layers * (H + RZ per qubit)
    assert not circuits.is_product(bp)


# --------------------------------------------------------------------------- layered

@pytest.mark.parametrize("entangler, n_pairs", [("none", 0), ("linear", 3), ("ring", 4),
                                                 ("all", 6)])
def test_layered_entangler_patterns(entangler, n_pairs):
    bp = encodings.reuploading_layers(4, layers=2, entangler=entangler)
    assert circuits.resource_counts(bp)["two_qubit_gates"] == 2 * n_pairs
    assert circuits.is_product(bp) == (n_pairs == 0)


def test_layered_two_qubit_ring_has_one_pair():
    # a ring on 2 qubits would repeat the pair (1, 0); the family uses it once
    bp = encodings.reuploading_layers(2, layers=1, entangler="ring")
    assert [s.qubits for s in bp.steps if s.gate == "cz"] == [(0, 1)]


def test_layered_feature_assignment():
    # fewer features than qubits: features cycle over the qubits
    bp = encodings.reuploading_layers(2, n_qubits=5, layers=1, axes=("y",), entangler="none")
    assert [s.angle.features[0] for s in bp.steps] == [0, 1, 0, 1, 0]
    # more features than qubits: qubit q takes f with f % n == q
    bp = encodings.reuploading_layers(5, n_qubits=2, layers=1, axes=("y",), entangler="none")
    assert [(s.qubits[0], s.angle.features[0]) for s in bp.steps] == [
        (0, 0), (0, 2), (0, 4), (1, 1), (1, 3)]
    assert bp.n_slots == 5 and len(set(s.angle.slot for s in bp.steps)) == 5


def test_layered_with_cnot_equals_dense_reference(dense, rng):
    bp = encodings.reuploading_layers(3, layers=2, entangler="ring", entangler_gate="cnot",
                                      axes=("z", "x"))
    params = dense.random_params(bp, rng)
    X = rng.uniform(-2, 2, size=(3, 3))
    np.testing.assert_allclose(np.asarray(circuits.encode_states(bp, params, X)),
                               dense.states(bp, params, X), atol=2e-5)  # numpy reference


@pytest.mark.parametrize("options, fragment", [
    ({"entangler": "rign"}, "did you mean 'ring'"),
    ({"entangler_gate": "swap"}, "entangler_gate"),
    ({"axes": ()}, "axes"),
    ({"axes": ("y", "w")}, "axes"),
    ({"layers": 0}, "layers"),
    ({"n_qubits": 1.5}, "n_qubits"),
])
def test_layered_bad_options(options, fragment):
    with pytest.raises(InvalidInputError, match=fragment):
        encodings.reuploading_layers(3, **options)


# --------------------------------------------------------------------------- dispatch

def test_build_encoding_dispatches_every_family():
    for family, builder in encodings.FAMILIES.items():
        assert encodings.build_encoding(family, 3) == builder(3)


def test_unknown_family_suggests_closest():
    with pytest.raises(InvalidInputError, match="did you mean 'angle'"):
        encodings.build_encoding("anlge", 3)
    with pytest.raises(InvalidInputError, match="use one of"):
        encodings.build_encoding("zzzzzz", 3)


def test_unknown_option_is_invalid_input():
    with pytest.raises(InvalidInputError, match="iqp"):
        encodings.build_encoding("iqp", 3, depth=4)


@pytest.mark.parametrize("bad", [0, -2, 2.0, True])
def test_n_features_must_be_positive_int(bad):
    with pytest.raises(InvalidInputError, match="n_features"):
        encodings.build_encoding("angle", bad)


def test_blueprints_are_hashable_and_equal_by_value():
    a = encodings.build_encoding("layered", 3, layers=2)
    b = encodings.build_encoding("layered", 3, layers=2)
    assert a == b and hash(a) == hash(b)
    assert a != encodings.build_encoding("layered", 3, layers=3)


@pytest.mark.parametrize("family, options", [("layered", {"n_qubits": 3, "layers": 3}),
                                             ("iqp", {"layers": 3, "pairs": "ring"})])
@pytest.mark.parametrize("sharing", ["across_layers", "across_qubits"])
def test_shared_weights_equal_the_unshared_circuit_with_tied_values(family, options, sharing):
    # Independent check: copy each shared slot's value into every slot of the unshared
    # circuit that it stands for; both circuits must then give the same Gram.
    from hilbertune import build_encoding
    from hilbertune.kernels import quantum_gram

    free = build_encoding(family, 3, **options)
    tied = build_encoding(family, 3, weight_sharing=sharing, **options)
    layers = options["layers"]
    assert tied.n_slots < free.n_slots
    if sharing == "across_layers":
        assert tied.n_slots * layers == free.n_slots
    assert len(free.steps) == len(tied.steps)
    rng = np.random.default_rng(3)
    shared = {"weights": rng.normal(size=tied.n_slots).astype(np.float32),
              "biases": rng.normal(size=tied.n_slots).astype(np.float32),
              "log_bandwidth": np.float32(0.3)}
    mapping = np.zeros(free.n_slots, dtype=int)
    for a, b in zip(free.steps, tied.steps):
        assert a.gate == b.gate and a.qubits == b.qubits
        if a.angle is not None:
            mapping[a.angle.slot] = b.angle.slot
    expanded = {"weights": shared["weights"][mapping], "biases": shared["biases"][mapping],
                "log_bandwidth": shared["log_bandwidth"]}
    X = rng.uniform(-1, 1, size=(7, 3))
    np.testing.assert_allclose(np.asarray(quantum_gram(tied, shared, X)),
                               np.asarray(quantum_gram(free, expanded, X)), atol=2e-6)


def test_unknown_weight_sharing_is_refused_with_a_hint():
    from hilbertune import build_encoding

    with pytest.raises(InvalidInputError, match="did you mean 'across_layers'"):
        build_encoding("layered", 2, weight_sharing="across_layer")
