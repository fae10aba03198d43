"""Shared fixtures: an independent dense statevector simulator and seeded generators.

The dense simulator is the outside reference for the batched core: it builds every gate as
a full ``2**n x 2**n`` matrix with ``np.kron`` (numpy) and multiplies them in circuit order,
computing each angle straight from the documented rule, so it shares no code with
``hilbertune.gates`` / ``hilbertune.circuits`` (no fusion, no phase layers, no permutations).
"""

from __future__ import annotations

import os
import math

import numpy as np
import pytest

# Pauli matrices and the Hadamard written out by hand (textbook definitions, common practice)
_I2 = np.eye(2, dtype=complex)
_X = np.array([[0, 1], [1, 0]], dtype=complex)
_Y = np.array([[0, -1j], [1j, 0]], dtype=complex)
_Z = np.array([[1, 0], [0, -1]], dtype=complex)
_H = np.array([[1, 1], [1, -1]], dtype=complex) / math.sqrt(2)
_P0 = np.array([[1, 0], [0, 0]], dtype=complex)  # |0><0|
_P1 = np.array([[0, 0], [0, 1]], dtype=complex)  # |1><1|


def embed(factors: dict, n_qubits: int) -> np.ndarray:
    """Full operator ``kron_q factors.get(q, I)`` with qubit 0 as the leftmost factor.

    Qubit 0 leftmost in the Kronecker product = most significant bit of the basis index
    (the convention stated in hilbertune.gates).
    """
    full = np.eye(1, dtype=complex)
    for q in range(n_qubits):
        full = np.kron(full, factors.get(q, _I2))
    return full


def dense_gate(step, angle: float, n_qubits: int) -> np.ndarray:
    """Full 2**n x 2**n matrix of one step (numpy reference, no shortcuts)."""
    gate, qubits = step.gate, step.qubits
    c, s = math.cos(angle / 2), math.sin(angle / 2)
    if gate in ("rx", "ry", "rz"):
        # exp(-i t P / 2) = cos(t/2) I - i sin(t/2) P since P^2 = I (common practice)
        pauli = {"rx": _X, "ry": _Y, "rz": _Z}[gate]
        return embed({qubits[0]: c * _I2 - 1j * s * pauli}, n_qubits)
    if gate == "h":
        return embed({qubits[0]: _H}, n_qubits)
    if gate == "x":
        return embed({qubits[0]: _X}, n_qubits)
    if gate == "unitary":
        return embed({qubits[0]: np.asarray(step.matrix, dtype=complex)}, n_qubits)
    a, b = qubits
    if gate == "cnot":
        # |0><0|_c (x) I + |1><1|_c (x) X_t (common practice)
        return embed({a: _P0}, n_qubits) + embed({a: _P1, b: _X}, n_qubits)
    if gate == "cz":
        return embed({a: _P0}, n_qubits) + embed({a: _P1, b: _Z}, n_qubits)
    if gate == "zz":
        zz = embed({a: _Z, b: _Z}, n_qubits)
        return c * np.eye(2**n_qubits) - 1j * s * zz
    raise AssertionError(f"reference simulator does not know gate {gate!r}")


def rule_angle(rule, params: dict, x: np.ndarray) -> float:
    """Angle of a rotation from its AngleRule, as documented in hilbertune.circuits."""
    c = math.exp(float(params["log_bandwidth"]))
    w = float(np.asarray(params["weights"])[rule.slot]) if rule.slot >= 0 else 0.0
    b = float(np.asarray(params["biases"])[rule.slot]) if rule.slot >= 0 else 0.0
    if rule.source == "constant":
        return float(rule.value)
    if rule.source == "feature":
        return w * (c * x[rule.features[0]]) + b
    if rule.source == "pair":
        f, g = rule.features
        return w * (math.pi - c * x[f]) * (math.pi - c * x[g]) + b
    if rule.source == "free":
        return b
    raise AssertionError(f"unknown angle source {rule.source!r}")


def dense_unitary(blueprint, params: dict, x: np.ndarray) -> np.ndarray:
    """U(x) as one dense matrix: the product of every step's full matrix, in order."""
    n = blueprint.n_qubits
    u = np.eye(2**n, dtype=complex)
    for step in blueprint.steps:
        angle = rule_angle(step.angle, params, x) if step.angle is not None else 0.0
        u = dense_gate(step, angle, n) @ u
    return u


def dense_states(blueprint, params: dict, X) -> np.ndarray:
    """Reference statevectors U(x)|0...0> for every row: complex128 [N, 2**n]."""
    X = np.asarray(X, dtype=float)
    return np.stack([dense_unitary(blueprint, params, x)[:, 0] for x in X])


def partial_trace_to_qubit(state: np.ndarray, qubit: int, n_qubits: int) -> np.ndarray:
    """1-qubit reduced density matrix of a pure state by an explicit partial trace (numpy).

    rho = |psi><psi| reshaped to [2]*n x [2]*n and traced over every other qubit with
    np.trace, one axis pair at a time.
    """
    rho = np.outer(state, state.conj()).reshape([2] * (2 * n_qubits))
    keep = n_qubits
    for q in reversed(range(n_qubits)):
        if q == qubit:
            continue
        rho = np.trace(rho, axis1=q, axis2=q + keep)
        keep -= 1
    return rho.reshape(2, 2)


def random_unitary_2x2(rng: np.random.Generator) -> tuple:
    """Haar-ish 2x2 unitary as nested tuples (QR of a complex Gaussian, phases fixed)."""
    z = rng.normal(size=(2, 2)) + 1j * rng.normal(size=(2, 2))
    q, r = np.linalg.qr(z)
    q = q * (np.diag(r) / np.abs(np.diag(r)))
    return tuple(tuple(complex(v) for v in row) for row in q)


def random_params(blueprint, rng: np.random.Generator, *, bandwidth_range=(0.5, 1.5)) -> dict:
    """Random weights, biases and bandwidth (float32, as the core stores them)."""
    p = blueprint.n_slots
    return {"weights": rng.normal(size=p).astype(np.float32),
            "biases": rng.normal(size=p).astype(np.float32),
            "log_bandwidth": np.float32(math.log(rng.uniform(*bandwidth_range)))}


class DenseReference:
    """Namespace handed to tests by the ``dense`` fixture."""

    embed = staticmethod(embed)
    gate = staticmethod(dense_gate)
    unitary = staticmethod(dense_unitary)
    states = staticmethod(dense_states)
    partial_trace = staticmethod(partial_trace_to_qubit)
    random_unitary_2x2 = staticmethod(random_unitary_2x2)
    random_params = staticmethod(random_params)
    X, Y, Z, H, I2 = _X, _Y, _Z, _H, _I2


@pytest.fixture(scope="session")
def dense():
    """The independent dense numpy simulator (see module docstring); stateless."""
    return DenseReference


@pytest.fixture
def rng():
    """A seeded numpy generator; each test gets the same fresh stream."""
    return np.random.default_rng(20240611)


# CI explores the same hypothesis examples on every run (a red CI must be reproducible);
# local runs keep exploring new random examples, which is how they find bugs.
if os.environ.get("CI"):
    from hypothesis import settings as _hypothesis_settings

    _hypothesis_settings.register_profile("ci", derandomize=True)
    _hypothesis_settings.load_profile("ci")
