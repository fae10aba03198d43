"""Gate matrices and their batched application to statevectors.

First stage of the data flow after the encoding description: everything here acts on a
batch of states ``states: complex array of shape [batch, 2**n]`` and never builds a full
``2**n x 2**n`` matrix. Qubit 0 is the most significant bit of the basis index.

Conventions (common practice): ``RX(t) = exp(-i t X / 2)``, ``RY(t) = exp(-i t Y / 2)``,
``RZ(t) = exp(-i t Z / 2)``, ``ZZ(t) = exp(-i t Z(x)Z / 2)``, ``CZ = diag(1, 1, 1, -1)``.
"""

from __future__ import annotations

import functools

import numpy as np
import jax
import jax.numpy as jnp

HADAMARD = np.array([[1.0, 1.0], [1.0, -1.0]]) / np.sqrt(2.0)
PAULI_X = np.array([[0.0, 1.0], [1.0, 0.0]])
PAULI_Y = np.array([[0.0, -1.0j], [1.0j, 0.0]])
PAULI_Z = np.array([[1.0, 0.0], [0.0, -1.0]])

# Every matrix product that forms kernel values, amplitudes or angles runs at full float32
# precision on every backend. XLA's default float32 product on a GPU rounds its operands to
# TF32 (10-bit mantissa): Gram entries then differed from a float64 reference by up to 5e-4
# on an H200 (issue 17), more than the 2**-n off-diagonal values of concentration studies.
# On the CPU this changes nothing (XLA CPU multiplies float32 in full precision anyway).
EXACT = jax.lax.Precision.HIGHEST


def rotation_matrices(axis: str, angles, dtype=jnp.complex64):
    """Batched rotation matrices.

    Args:
      axis: one of ``"x"``, ``"y"``, ``"z"``.
      angles: real array of shape [batch].
      dtype: complex dtype of the result.

    Returns:
      complex array of shape [batch, 2, 2].
    """
    half = angles / 2
    c = jnp.cos(half).astype(dtype)
    s = jnp.sin(half).astype(dtype)
    zero = jnp.zeros_like(c)
    if axis == "x":
        rows = [[c, -1j * s], [-1j * s, c]]
    elif axis == "y":
        rows = [[c, -s], [s, c]]
    elif axis == "z":
        rows = [[c - 1j * s, zero], [zero, c + 1j * s]]
    else:
        raise ValueError(f"unknown rotation axis {axis!r}; use 'x', 'y' or 'z'")
    return jnp.stack([jnp.stack(r, axis=-1) for r in rows], axis=-2)


def apply_one_qubit(states, matrices, qubit: int, n_qubits: int):
    """Apply a 2x2 gate (one per state, or one shared) to ``qubit``.

    Reshape-and-contract: the state is viewed as [batch, 2**qubit, 2, 2**(n-qubit-1)] and
    only the middle axis is contracted, so the cost is O(batch * 2**n). Differentiable in
    reverse mode (``jax.grad``, ``jax.vjp``) with a hand-written reverse pass (see
    ``_reverse``); forward mode (``jax.jvp``, ``jax.jacfwd``) is not supported.

    Args:
      states: complex array of shape [batch, 2**n].
      matrices: complex array of shape [batch, 2, 2] or [2, 2].
    """
    return _apply_differentiable(states, matrices, qubit, n_qubits)


def _contract(states, matrices, qubit, n_qubits):
    batch = states.shape[0]
    view = states.reshape(batch, 2**qubit, 2, 2 ** (n_qubits - qubit - 1))
    low, high = view[:, :, 0, :], view[:, :, 1, :]
    # two explicit terms per output half: XLA fuses this into one elementwise pass, where a
    # batched 2x2 einsum becomes a slow batched matrix product
    m = matrices if matrices.ndim == 2 else matrices[:, None, None]
    m00, m01, m10, m11 = m[..., 0, 0], m[..., 0, 1], m[..., 1, 0], m[..., 1, 1]
    out = jnp.stack([m00 * low + m01 * high, m10 * low + m11 * high], axis=2)
    return out.reshape(batch, 2**n_qubits)


@functools.partial(jax.custom_vjp, nondiff_argnums=(2, 3))
def _apply_differentiable(states, matrices, qubit, n_qubits):
    return _contract(states, matrices, qubit, n_qubits)


def _forward(states, matrices, qubit, n_qubits):
    return _contract(states, matrices, qubit, n_qubits), (states, matrices)


def _reverse(qubit, n_qubits, residuals, cotangent):
    # y = M x is linear in x and in M; JAX's reverse pass is the transpose (no conjugate):
    # dx = M^T dy, dM_ac = sum dy_a x_c over the other axes. Autodiff of the slicing above
    # pads both halves back to full size and materializes the products (circuit forward +
    # reverse, 12 qubits x 2000 states: 1.13 s -> 0.79 s with this).
    states, matrices = residuals
    d_states = _contract(cotangent, jnp.swapaxes(matrices, -1, -2), qubit, n_qubits)
    d_matrices = _cross_matrices(cotangent, states, qubit, matrices.ndim == 2)
    return d_states, d_matrices.astype(matrices.dtype)


def _cross_matrices(cotangent, states, qubit, shared):
    """``sum dy_a x_c`` over all axes but the gate's (and the batch's, unless ``shared``).

    One variadic reduce of the four products: XLA's CPU backend then reads both arrays
    once, where four separate sums (or a batched einsum) each make their own pass. The
    matrix cotangent of one gate, 2000 states of 12 qubits, timed on its own: 65 ms ->
    15 ms.
    """
    batch = states.shape[0]
    dy = cotangent.reshape(batch, 2**qubit, 2, -1)
    x = states.reshape(batch, 2**qubit, 2, -1)
    products = tuple(dy[:, :, a] * x[:, :, c] for a in (0, 1) for c in (0, 1))
    zero = jnp.zeros((), states.dtype)
    axes = (0, 1, 2) if shared else (1, 2)
    sums = jax.lax.reduce(products, (zero,) * 4,
                          lambda u, v: tuple(p + r for p, r in zip(u, v)), axes)
    return jnp.stack(sums, axis=-1).reshape(sums[0].shape + (2, 2))


_apply_differentiable.defvjp(_forward, _reverse)


def basis_bits(n_qubits: int) -> np.ndarray:
    """Bits of every basis index: int array of shape [2**n, n], qubit 0 most significant."""
    index = np.arange(2**n_qubits)
    shifts = np.arange(n_qubits - 1, -1, -1)
    return (index[:, None] >> shifts[None, :]) & 1


def parity_signs(n_qubits: int, qubit_sets) -> np.ndarray:
    """Eigenvalues of Z-strings on every basis state.

    Args:
      qubit_sets: sequence of K tuples of qubits; each names the Z-string prod_{q in set} Z_q.

    Returns:
      float array of shape [K, 2**n] with entries +1 / -1.
    """
    bits = basis_bits(n_qubits)
    signs = np.empty((len(qubit_sets), 2**n_qubits))
    for k, qubits in enumerate(qubit_sets):
        parity = bits[:, list(qubits)].sum(axis=1) % 2
        signs[k] = 1.0 - 2.0 * parity
    return signs


def cz_signs(n_qubits: int, pairs) -> np.ndarray:
    """Diagonal of a product of CZ gates on ``pairs``: float array of shape [2**n]."""
    bits = basis_bits(n_qubits)
    diagonal = np.ones(2**n_qubits)
    for a, b in pairs:
        diagonal *= 1.0 - 2.0 * (bits[:, a] & bits[:, b])
    return diagonal


def cnot_permutation(n_qubits: int, control: int, target: int) -> np.ndarray:
    """Index map of a CNOT: ``new_state = state[perm]``; int array of shape [2**n]."""
    index = np.arange(2**n_qubits)
    control_bit = (index >> (n_qubits - 1 - control)) & 1
    return index ^ (control_bit << (n_qubits - 1 - target))


def apply_phases(states, angles, signs, fixed_diagonal=None):
    """Apply a whole layer of commuting diagonal gates as one phase vector.

    The layer is ``prod_k exp(-i angles_k / 2 * Z-string_k)`` (times a fixed +-1 diagonal
    for CZ gates); its diagonal is ``exp(-i/2 * angles @ signs)``, one real matrix product.

    Args:
      states: complex array of shape [batch, 2**n].
      angles: real array of shape [batch, K].
      signs: +-1 array of shape [K, 2**n] (see ``parity_signs``).
      fixed_diagonal: optional real array of shape [2**n].
    """
    # full float32 product (EXACT): the phases are angles, and TF32 would round them to
    # about 3 decimal digits
    phase = -0.5 * jnp.matmul(angles, signs, precision=EXACT)
    diagonal = jnp.exp(1j * phase).astype(states.dtype)
    if fixed_diagonal is not None:
        diagonal = diagonal * fixed_diagonal.astype(states.dtype)
    return states * diagonal
