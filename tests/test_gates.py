"""Gate matrices and batched gate application against outside references.

References: scipy.linalg.expm of the Pauli generators (RX, RY, RZ, ZZ); textbook matrices of
H, X, CNOT, CZ (common practice); dense np.kron operators for the batched application.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import jax
import jax.numpy as jnp

from hilbertune import gates

ANGLES = np.array([-2.7, -0.4, 0.0, 0.3, 1.1, np.pi, 5.9])


@pytest.mark.parametrize("axis", ["x", "y", "z"])
def test_rotation_equals_expm_of_pauli_generator(axis, dense):
    pauli = {"x": dense.X, "y": dense.Y, "z": dense.Z}[axis]
    got = np.asarray(gates.rotation_matrices(axis, jnp.asarray(ANGLES)))
    assert got.shape == (len(ANGLES), 2, 2)
    for t, m in zip(ANGLES, got):
        # RP(t) = exp(-i t P / 2)  (scipy.linalg.expm)
        np.testing.assert_allclose(m, scipy.linalg.expm(-0.5j * t * pauli), atol=2e-6)


def test_rotation_dtype_follows_request():
    assert gates.rotation_matrices("y", np.array([0.5]), dtype=jnp.complex64).dtype == \
        jnp.complex64
    with jax.enable_x64(True):
        m = gates.rotation_matrices("y", np.array([0.5]), dtype=jnp.complex128)
        assert m.dtype == jnp.complex128
        # complex128 keeps double precision: RY(0.5)[0, 0] = cos(0.25) (math.cos)
        assert abs(complex(m[0, 0, 0]) - np.cos(0.25)) < 1e-15


def test_rotation_unknown_axis_rejected():
    with pytest.raises(ValueError, match="axis"):
        gates.rotation_matrices("w", np.array([0.1]))


def test_fixed_matrices_are_the_textbook_ones():
    # H = (X + Z)/sqrt(2), X = [[0,1],[1,0]] (common practice)
    np.testing.assert_allclose(gates.HADAMARD, np.array([[1, 1], [1, -1]]) / np.sqrt(2))
    np.testing.assert_allclose(gates.PAULI_X, [[0, 1], [1, 0]])
    # Y = i X Z (Pauli algebra, common practice)
    np.testing.assert_allclose(gates.PAULI_Y, 1j * gates.PAULI_X @ gates.PAULI_Z)
    np.testing.assert_allclose(gates.PAULI_Z, [[1, 0], [0, -1]])


@pytest.mark.parametrize("pair, n", [((0, 1), 2), ((1, 0), 2), ((0, 2), 3), ((2, 1), 3)])
def test_zz_phase_layer_equals_expm(pair, n, dense, rng):
    t = rng.uniform(-4, 4, size=3)
    states = (rng.normal(size=(3, 2**n)) + 1j * rng.normal(size=(3, 2**n))).astype(np.complex64)
    signs = gates.parity_signs(n, [pair]).astype(np.float32)
    got = np.asarray(gates.apply_phases(jnp.asarray(states), jnp.asarray(t[:, None],
                                                                          jnp.float32),
                                        jnp.asarray(signs)))
    zz = dense.embed({pair[0]: dense.Z, pair[1]: dense.Z}, n)
    for b in range(3):
        # ZZ(t) = exp(-i t Z(x)Z / 2)  (scipy.linalg.expm)
        want = scipy.linalg.expm(-0.5j * t[b] * zz) @ states[b]
        np.testing.assert_allclose(got[b], want, atol=1e-5)


def test_phase_layer_of_several_strings_equals_product_of_expms(dense, rng):
    n = 3
    sets = [(0,), (1, 2), (0, 2), (2,)]
    t = rng.uniform(-3, 3, size=(2, len(sets)))
    states = (rng.normal(size=(2, 8)) + 1j * rng.normal(size=(2, 8))).astype(np.complex64)
    fixed = gates.cz_signs(n, [(0, 1)])
    got = np.asarray(gates.apply_phases(jnp.asarray(states), jnp.asarray(t, jnp.float32),
                                        jnp.asarray(gates.parity_signs(n, sets), jnp.float32),
                                        jnp.asarray(fixed, jnp.float32)))
    cz = np.diag([1, 1, 1, -1]).astype(complex)
    for b in range(2):
        u = np.kron(cz, np.eye(2))  # CZ on qubits (0, 1), qubit 0 leftmost
        for k, qs in enumerate(sets):
            z_string = dense.embed({q: dense.Z for q in qs}, n)
            u = scipy.linalg.expm(-0.5j * t[b, k] * z_string) @ u  # scipy.linalg.expm
        np.testing.assert_allclose(got[b], u @ states[b], atol=1e-5)


def test_cz_signs_is_textbook_cz():
    # CZ = diag(1, 1, 1, -1) (common practice); symmetric in its two qubits
    np.testing.assert_array_equal(gates.cz_signs(2, [(0, 1)]), [1, 1, 1, -1])
    np.testing.assert_array_equal(gates.cz_signs(2, [(1, 0)]), [1, 1, 1, -1])
    # on qubits (0, 2) of 3: minus sign exactly where bits 0 and 2 are both set: |101>, |111>
    np.testing.assert_array_equal(gates.cz_signs(3, [(0, 2)]), [1, 1, 1, 1, 1, -1, 1, -1])


@pytest.mark.parametrize("control, target, n", [(0, 1, 2), (1, 0, 2), (0, 2, 3), (2, 0, 3),
                                                (1, 2, 3)])
def test_cnot_permutation_equals_textbook_cnot(control, target, n, dense, rng):
    perm = gates.cnot_permutation(n, control, target)
    state = rng.normal(size=2**n) + 1j * rng.normal(size=2**n)
    # CNOT = |0><0|_c (x) I + |1><1|_c (x) X_t (common practice), built with np.kron
    p0 = np.diag([1, 0]).astype(complex)
    p1 = np.diag([0, 1]).astype(complex)
    cnot = dense.embed({control: p0}, n) + dense.embed({control: p1, target: dense.X}, n)
    np.testing.assert_allclose(state[perm], cnot @ state)


def test_cnot_on_two_qubits_is_the_textbook_matrix():
    # control 0 (most significant), target 1: swaps |10> and |11> (common practice)
    textbook = np.array([[1, 0, 0, 0], [0, 1, 0, 0], [0, 0, 0, 1], [0, 0, 1, 0]])
    perm = gates.cnot_permutation(2, 0, 1)
    np.testing.assert_array_equal(np.eye(4)[perm], textbook)


@pytest.mark.parametrize("qubit, n", [(0, 1), (0, 3), (1, 3), (2, 3), (3, 5)])
def test_general_2x2_step_equals_kron_embedding(qubit, n, dense, rng):
    u = np.array(dense.random_unitary_2x2(rng))
    states = (rng.normal(size=(4, 2**n)) + 1j * rng.normal(size=(4, 2**n))).astype(np.complex64)
    got = np.asarray(gates.apply_one_qubit(jnp.asarray(states), jnp.asarray(u, jnp.complex64),
                                           qubit, n))
    full = dense.embed({qubit: u}, n)  # I (x) .. (x) U (x) .. (x) I  (np.kron)
    np.testing.assert_allclose(got, states @ full.T, atol=1e-5)


def test_batched_2x2_steps_one_matrix_per_state(dense, rng):
    n, qubit = 3, 1
    mats = np.stack([np.array(dense.random_unitary_2x2(rng)) for _ in range(3)])
    states = (rng.normal(size=(3, 8)) + 1j * rng.normal(size=(3, 8))).astype(np.complex64)
    got = np.asarray(gates.apply_one_qubit(jnp.asarray(states), jnp.asarray(mats, jnp.complex64),
                                           qubit, n))
    for b in range(3):
        np.testing.assert_allclose(got[b], dense.embed({qubit: mats[b]}, n) @ states[b],
                                   atol=1e-5)


def test_basis_bits_qubit_zero_is_most_significant():
    # index 6 = binary 110 -> qubit 0 = 1, qubit 1 = 1, qubit 2 = 0 (convention of the module)
    bits = gates.basis_bits(3)
    assert bits.shape == (8, 3)
    np.testing.assert_array_equal(bits[6], [1, 1, 0])
    np.testing.assert_array_equal(bits[1], [0, 0, 1])
    # every index is recovered from its bits
    np.testing.assert_array_equal(bits @ (2 ** np.arange(2, -1, -1)), np.arange(8))


def test_parity_signs_are_diagonals_of_z_strings(dense):
    sets = [(0,), (1,), (0, 1, 2), (2, 0)]
    signs = gates.parity_signs(3, sets)
    for k, qs in enumerate(sets):
        z_string = dense.embed({q: dense.Z for q in qs}, 3)
        np.testing.assert_array_equal(signs[k], np.real(np.diag(z_string)))


@pytest.mark.parametrize("shared", [False, True])
@pytest.mark.parametrize("qubit", [0, 2, 4])
def test_hand_written_reverse_pass_equals_jax_autodiff(qubit, shared, rng):
    # reference: JAX's own reverse-mode autodiff of the plain contraction (library), for a
    # real loss of complex states so that both the state and the matrix cotangents matter
    n, batch = 5, 3
    states = jnp.asarray(rng.normal(size=(batch, 2**n)) + 1j * rng.normal(size=(batch, 2**n)),
                         jnp.complex64)
    shape = (2, 2) if shared else (batch, 2, 2)
    matrices = jnp.asarray(rng.normal(size=shape) + 1j * rng.normal(size=shape), jnp.complex64)
    weights = jnp.asarray(rng.normal(size=(batch, 2**n)) + 1j * rng.normal(size=(batch, 2**n)),
                          jnp.complex64)

    def loss(apply):
        return lambda s, m: jnp.sum(jnp.abs(weights * apply(s, m, qubit, n)) ** 2)

    ours = jax.grad(loss(gates.apply_one_qubit), argnums=(0, 1))(states, matrices)
    plain = jax.grad(loss(gates._contract), argnums=(0, 1))(states, matrices)
    for got, want in zip(ours, plain):
        assert got.shape == want.shape
        np.testing.assert_allclose(np.asarray(got), np.asarray(want), rtol=2e-5, atol=2e-5)
