"""Compiled circuits against an independent dense numpy simulator (tests/conftest.py).

The core fuses 1-qubit gates, moves gates past commuting stages, merges diagonal gates into
phase layers, CNOT runs into permutations and folds leading 1-qubit stages into a product
state. Every one of these rewrites must leave U(x)|0> unchanged; the reference multiplies
full np.kron matrices in the written order (numpy reference), so any scheduling error shows.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import jax
import jax.numpy as jnp
from hypothesis import HealthCheck, given, settings, strategies as st

from hilbertune import circuits, encodings
from hilbertune.circuits import AngleRule, Blueprint, Step
from hilbertune.errors import InvalidInputError

ATOL = 2e-5  # complex64 statevectors of <= 5 qubits after <= 30 gates


# --------------------------------------------------------------------------- random blueprints

@st.composite
def blueprints(draw, max_qubits=5, max_steps=18):
    """Random Blueprints with every gate kind and every angle source."""
    n = draw(st.integers(1, max_qubits))
    n_features = draw(st.integers(1, 4))
    n_slots = draw(st.integers(1, 4))
    gate_names = ["rx", "ry", "rz", "h", "x", "unitary"] + (["cnot", "cz", "zz"] if n > 1
                                                             else [])
    steps = []
    for _ in range(draw(st.integers(0, max_steps))):
        gate = draw(st.sampled_from(gate_names))
        if gate in circuits.TWO_QUBIT_GATES:
            a = draw(st.integers(0, n - 1))
            b = draw(st.integers(0, n - 2))
            qubits = (a, b if b < a else b + 1)
        else:
            qubits = (draw(st.integers(0, n - 1)),)
        angle = matrix = None
        if gate in circuits.ROTATIONS:
            source = draw(st.sampled_from(circuits.ANGLE_SOURCES))
            slot = draw(st.integers(0, n_slots - 1))
            if source == "constant":
                angle = AngleRule("constant", (), -1, draw(st.floats(-6.5, 6.5)))
            elif source == "feature":
                angle = AngleRule("feature", (draw(st.integers(0, n_features - 1)),), slot)
            elif source == "pair":
                f = draw(st.integers(0, n_features - 1))
                g = draw(st.integers(0, n_features - 1))
                angle = AngleRule("pair", (f, g), slot)
            else:
                angle = AngleRule("free", (), slot)
        if gate == "unitary":
            seed = draw(st.integers(0, 2**31 - 1))
            matrix = _unitary_tuple(np.random.default_rng(seed))
        steps.append(Step(gate, qubits, angle, matrix))
    weights = tuple(draw(st.floats(-2, 2)) for _ in range(n_slots))
    return Blueprint(n, n_features, tuple(steps), weights)


def _unitary_tuple(rng):
    z = rng.normal(size=(2, 2)) + 1j * rng.normal(size=(2, 2))
    q, r = np.linalg.qr(z)
    q = q * (np.diag(r) / np.abs(np.diag(r)))
    return tuple(tuple(complex(v) for v in row) for row in q)


def _params(bp, seed):
    r = np.random.default_rng(seed)
    return {"weights": np.asarray(bp.initial_weights, np.float32),
            "biases": r.normal(size=bp.n_slots).astype(np.float32),
            "log_bandwidth": np.float32(math.log(r.uniform(0.5, 1.5)))}


@pytest.mark.slow  # ~0.6 s of XLA compilation per random circuit
@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(bp=blueprints(), seed=st.integers(0, 10**6))
def test_random_circuits_equal_dense_reference(bp, seed, dense):
    params = _params(bp, seed)
    X = np.random.default_rng(seed).uniform(-2, 2, size=(3, bp.n_features))
    got = np.asarray(circuits.encode_states(bp, params, X))
    want = dense.states(bp, params, X)  # numpy reference (tests/conftest.py)
    np.testing.assert_allclose(got, want, atol=ATOL)


@pytest.mark.slow
@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(bp=blueprints(max_qubits=4, max_steps=12), seed=st.integers(0, 10**6))
def test_apply_circuit_forward_and_inverse_match_dense_unitary(bp, seed, dense):
    params = _params(bp, seed)
    r = np.random.default_rng(seed)
    X = r.uniform(-2, 2, size=(2, bp.n_features))
    dim = 2**bp.n_qubits
    psi = r.normal(size=(2, dim)) + 1j * r.normal(size=(2, dim))
    psi /= np.linalg.norm(psi, axis=1, keepdims=True)
    fwd = np.asarray(circuits.apply_circuit(bp, params, X, jnp.asarray(psi, jnp.complex64)))
    inv = np.asarray(circuits.apply_circuit(bp, params, X, jnp.asarray(psi, jnp.complex64),
                                            inverse=True))
    for b in range(2):
        u = dense.unitary(bp, params, X[b])  # numpy reference
        np.testing.assert_allclose(fwd[b], u @ psi[b], atol=ATOL)
        np.testing.assert_allclose(inv[b], u.conj().T @ psi[b], atol=ATOL)


# --------------------------------------------------------------------------- tricky orders

def _rot(gate, q, source="feature", f=0, slot=0, value=0.0):
    """A rotation step; ``q`` is a qubit (or a pair for zz), ``f`` a feature (or a pair)."""
    qubits = q if gate == "zz" else (q,)
    if source == "constant":
        return Step(gate, qubits, AngleRule("constant", (), -1, value))
    if source == "pair":
        return Step(gate, qubits, AngleRule("pair", f, slot))
    features = (f,) if source == "feature" else ()
    return Step(gate, qubits, AngleRule(source, features, slot))


TRICKY = {
    # RZ between two RX on one qubit: fused into one 2x2, order RX RZ RX must be kept
    "rz_between_rx": [_rot("rx", 0), _rot("rz", 0, f=1, slot=1), _rot("rx", 0, slot=2),
                      Step("cz", (0, 1)), _rot("rx", 1, slot=3)],
    # CZ then RX on the same qubit: RX must not move before the phase layer
    "cz_then_rx": [Step("h", (0,)), Step("h", (1,)), Step("cz", (0, 1)), _rot("rx", 0),
                   _rot("ry", 1, f=1, slot=1), Step("cz", (1, 2)), _rot("rx", 2, slot=2)],
    # CNOT chain with 1-qubit gates in between: permutations must not be merged across them
    "cnot_chain": [Step("h", (0,)), Step("cnot", (0, 1)), _rot("ry", 1), Step("cnot", (1, 2)),
                   Step("x", (0,)), Step("cnot", (2, 0)), _rot("rz", 2, f=1, slot=1),
                   Step("cnot", (0, 2)), Step("cnot", (1, 0))],
    # a CNOT on disjoint qubits may move past a 1-qubit gate and join the earlier CNOT
    "cnot_past_disjoint": [Step("h", (0,)), Step("h", (2,)), Step("cnot", (0, 1)),
                           _rot("ry", 3), Step("cnot", (1, 2)), Step("cnot", (2, 3))],
    # ZZ after H: the phase must act after the basis change, not be folded into |0>
    "zz_after_h": [Step("h", (0,)), Step("h", (1,)), _rot("zz", (0, 1), "pair", (0, 1)),
                   Step("h", (0,)), _rot("zz", (1, 0), "free", slot=1), Step("h", (1,))],
    # RZ on a qubit with a pending phase layer joins that layer; RX after it must not
    "rz_joins_phase_layer": [Step("h", (0,)), Step("h", (1,)), Step("cz", (0, 1)),
                             _rot("rz", 0), _rot("rx", 0, slot=1), _rot("rz", 0, slot=2),
                             _rot("zz", (0, 1), "feature", f=1, slot=3)],
    # leading RZ on |0> then H: the product-state prefix must keep the RZ's phase order
    "rz_first_then_h": [_rot("rz", 0), Step("h", (0,)), _rot("rz", 0, f=1, slot=1),
                        Step("h", (0,)), _rot("ry", 1), Step("cnot", (0, 1)),
                        _rot("rz", 1, slot=2)],
    # a gate on a late qubit after entanglers elsewhere: may not join the product prefix
    # only if it does not commute with what came between
    "late_local_after_entangler": [Step("h", (0,)), Step("cnot", (0, 1)), _rot("ry", 2),
                                   Step("cz", (1, 2)), _rot("ry", 2, slot=1),
                                   _rot("rx", 0, slot=2), Step("cnot", (2, 0))],
    # constants, X and a general unitary mixed with diagonal gates on one qubit
    "constants_and_unitary": [Step("unitary", (1,), None, _unitary_tuple(
        np.random.default_rng(3))), _rot("rz", 1, "constant", value=0.7), Step("x", (1,)),
        Step("cz", (0, 1)), _rot("rz", 0, "constant", value=-1.3), Step("h", (0,)),
        _rot("zz", (0, 1), "constant", value=2.1), Step("unitary", (0,), None,
                                                         _unitary_tuple(
                                                             np.random.default_rng(4)))],
}


@pytest.mark.parametrize("name", sorted(TRICKY))
def test_tricky_orders_equal_dense_reference(name, dense):
    steps = tuple(TRICKY[name])
    n = 1 + max(q for s in steps for q in s.qubits)
    bp = Blueprint(n, 2, steps, (1.3, -0.8, 0.6, 1.9))
    params = _params(bp, 7)
    X = np.array([[0.3, -1.2], [2.0, 0.4], [-0.7, 1.6]])
    got = np.asarray(circuits.encode_states(bp, params, X))
    np.testing.assert_allclose(got, dense.states(bp, params, X), atol=ATOL)  # numpy reference


def test_scheduler_actually_fuses(dense):
    # the tricky circuits above would also pass with no fusion at all; check that fusion
    # happens, so the reference comparison really exercises the fused paths
    steps = tuple(TRICKY["rz_between_rx"])
    program = circuits.compile_blueprint(Blueprint(2, 2, steps, (1.0,) * 4))
    kinds = [s.kind for s in program.stages]
    assert kinds.count("local") == 2  # RX RZ RX on qubit 0 fused; RX on qubit 1 alone
    assert program.prefix == 1
    steps = tuple(TRICKY["cnot_past_disjoint"])
    program = circuits.compile_blueprint(Blueprint(4, 2, steps, (1.0,)))
    perms = [s.steps for s in program.stages if s.kind == "permutation"]
    # cnot(1,2) passes the disjoint RY on qubit 3 and joins cnot(0,1); cnot(2,3) cannot
    assert perms == [(2, 4), (5,)]


# --------------------------------------------------------------------------- product factors

@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(bp=blueprints(max_qubits=4), seed=st.integers(0, 10**6))
def test_product_factors_tensor_to_the_states(bp, seed, dense):
    steps = tuple(s for s in bp.steps if s.gate in circuits.ONE_QUBIT_GATES)
    bp = bp._replace(steps=steps)
    params = _params(bp, seed)
    X = np.random.default_rng(seed).uniform(-2, 2, size=(2, bp.n_features))
    factors = np.asarray(circuits.product_factors(bp, params, X))
    assert factors.shape == (2, bp.n_qubits, 2)
    want = dense.states(bp, params, X)  # numpy reference
    for b in range(2):
        full = np.ones(1, complex)
        for q in range(bp.n_qubits):
            full = np.kron(full, factors[b, q])
        np.testing.assert_allclose(full, want[b], atol=ATOL)


def test_product_factors_refuse_entangling_circuits():
    bp = Blueprint(2, 1, (Step("cz", (0, 1)),), ())
    assert not circuits.is_product(bp)
    with pytest.raises(InvalidInputError, match="entangling"):
        circuits.product_factors(bp, circuits.initial_params(bp), np.zeros((1, 1)))


# --------------------------------------------------------------------------- validation

def _angle_bp():
    return Blueprint(2, 2, (Step("ry", (0,), AngleRule("feature", (0,), 0)),
                            Step("ry", (1,), AngleRule("feature", (1,), 1))), (1.0, 1.0))


@pytest.mark.parametrize("X, fragment", [
    (np.array([[0.1, np.nan]]), "NaN or infinite"),
    (np.array([[np.inf, 0.1]]), "NaN or infinite"),
    (np.array([0.1, 0.2]), "reshape"),
    (np.zeros((0, 2)), "empty"),
    (np.zeros((2, 3)), "3 features but the encoding takes 2"),
    (np.zeros((2, 2, 1)), "2-D"),
    ([["a", "b"]], "numeric"),
])
def test_bad_features_raise_invalid_input(X, fragment):
    bp = _angle_bp()
    with pytest.raises(InvalidInputError, match=fragment) as info:
        circuits.encode_states(bp, circuits.initial_params(bp), X)
    message = str(info.value)
    assert "\n" not in message  # one line (project rule)
    assert ";" in message or "must be" in message  # what is wrong, and what it must be


def test_too_many_features_message_names_a_fix():
    bp = _angle_bp()
    with pytest.raises(InvalidInputError, match="PCA"):
        circuits.encode_states(bp, circuits.initial_params(bp), np.zeros((1, 5)))


@pytest.mark.parametrize("steps, fragment", [
    ((Step("swap", (0, 1)),), "unknown gate"),
    ((Step("h", (2,)),), "distinct qubits"),
    ((Step("cz", (1, 1)),), "distinct qubits"),
    ((Step("rx", (0,)),), "AngleRule"),
    ((Step("rx", (0,), AngleRule("feature", (5,), 0)),), "feature index"),
    ((Step("rx", (0,), AngleRule("pair", (0,), 0)),), "needs 2"),
    ((Step("rx", (0,), AngleRule("free", (), 3)),), "slot"),
    ((Step("unitary", (0,), None, ((1, 1), (0, 1))),), "unitary"),
])
def test_bad_blueprints_raise_invalid_input(steps, fragment):
    bp = Blueprint(2, 1, steps, (1.0,))
    with pytest.raises(InvalidInputError, match=fragment):
        circuits.encode_states(bp, circuits.initial_params(bp), np.zeros((1, 1)))


def test_zero_qubits_rejected():
    with pytest.raises(InvalidInputError, match="at least 1 qubit"):
        circuits.validate_blueprint(Blueprint(0, 1))


def test_initial_params_checks():
    bp = _angle_bp()
    p = circuits.initial_params(bp, bandwidth=2.0)
    np.testing.assert_allclose(np.exp(p["log_bandwidth"]), 2.0, rtol=1e-6)
    np.testing.assert_array_equal(p["weights"], [1.0, 1.0])
    np.testing.assert_array_equal(p["biases"], [0.0, 0.0])
    for bad in (0.0, -1.0, float("nan"), float("inf")):
        with pytest.raises(InvalidInputError, match="bandwidth"):
            circuits.initial_params(bp, bandwidth=bad)
    with pytest.raises(InvalidInputError, match="PRNG key"):
        circuits.initial_params(bp, bias_scale=0.1)
    a = circuits.initial_params(bp, jax.random.key(0), bias_scale=0.1)
    b = circuits.initial_params(bp, jax.random.key(0), bias_scale=0.1)
    np.testing.assert_array_equal(a["biases"], b["biases"])  # explicit key: reproducible
    assert np.all(a["biases"] != 0)


def test_chunked_states_equal_unchunked(rng):
    bp = Blueprint(3, 2, (Step("h", (0,)), Step("ry", (1,), AngleRule("feature", (0,), 0)),
                          Step("cnot", (0, 2)), Step("zz", (1, 2), AngleRule("pair", (0, 1), 1)),
                          Step("rx", (2,), AngleRule("feature", (1,), 0))), (0.8, -1.1))
    params = circuits.initial_params(bp)
    X = rng.uniform(-2, 2, size=(11, 2))
    whole = np.asarray(circuits.encode_states(bp, params, X))
    for chunk in (1, 4, 11, 50):
        np.testing.assert_allclose(np.asarray(circuits.encode_states(bp, params, X,
                                                                     chunk_size=chunk)),
                                   whole, atol=1e-6)
    with pytest.raises(InvalidInputError, match="chunk_size"):
        circuits.encode_states(bp, params, X, chunk_size=0)


@pytest.mark.parametrize("n_samples", [1, 255, 256, 2000, 2001, 4097])
def test_automatic_chunks_are_balanced_and_cover_every_row(n_samples):
    # 12 qubits of complex64: 32 KiB a row, so at most 128 rows per 4 MiB chunk
    rows = circuits.automatic_chunk(n_samples, 12)
    chunks = -(-n_samples // rows)
    if n_samples < 256:
        assert rows == n_samples
    else:
        assert rows <= circuits.CACHE_CHUNK_BYTES // 2**15
        assert chunks * rows - n_samples < chunks  # padding: less than one row per chunk
    assert chunks * rows >= n_samples
    if n_samples == 2000:
        assert rows == 125  # 16 chunks of 125 rows: no padding at all


def test_complex128_needs_x64_mode():
    bp = _angle_bp()
    if jax.config.jax_enable_x64:
        pytest.skip("another test session turned on 64-bit mode globally")
    with pytest.raises(InvalidInputError, match="jax_enable_x64"):
        circuits.encode_states(bp, circuits.initial_params(bp), np.zeros((1, 2)),
                               dtype=jnp.complex128)
    with pytest.raises(InvalidInputError, match="complex64 or complex128"):
        circuits.encode_states(bp, circuits.initial_params(bp), np.zeros((1, 2)),
                               dtype=jnp.float32)


def test_complex128_agrees_with_complex64(dense, rng):
    steps = tuple(TRICKY["cnot_chain"]) + tuple(TRICKY["zz_after_h"])
    bp = Blueprint(3, 2, steps, (1.3, -0.8))
    params = _params(bp, 11)
    X = rng.uniform(-2, 2, size=(4, 2))
    single = np.asarray(circuits.encode_states(bp, params, X))
    # jax.enable_x64 is a context manager in jax 0.10 (checked); it scopes 64-bit mode
    with jax.enable_x64(True):
        double = np.asarray(circuits.encode_states(bp, params, X, dtype=jnp.complex128))
    assert single.dtype == np.complex64 and double.dtype == np.complex128
    np.testing.assert_allclose(double, single, atol=1e-5)
    # the double path is truly double: it matches the float64 reference far below 1e-5
    np.testing.assert_allclose(double, dense.states(bp, params, X), atol=1e-9)


# --------------------------------------------------------------------------- resources

def test_resource_counts_by_hand():
    # layers by hand: h0 | h1 -> 1; cnot(0,1) -> 2; rx0 -> 3, cz(1,2) -> 3; rx2 -> 4
    bp = Blueprint(3, 1, (Step("h", (0,)), Step("h", (1,)), Step("cnot", (0, 1)),
                          Step("rx", (0,), AngleRule("feature", (0,), 0)), Step("cz", (1, 2)),
                          Step("rx", (2,), AngleRule("constant", (), -1, 0.2))), (1.0,))
    counts = circuits.resource_counts(bp)
    assert counts["depth"] == 4
    assert counts["one_qubit_gates"] == 4 and counts["two_qubit_gates"] == 2
    assert counts["trainable_parameters"] == 3  # 1 weight + 1 bias + bandwidth
    frozen = circuits.resource_counts(bp._replace(frozen=("weights", "log_bandwidth")))
    assert frozen["trainable_parameters"] == 1


def test_state_memory_bytes():
    # complex64 = 8 bytes per amplitude (numpy itemsize)
    assert circuits.state_memory_bytes(10, 3) == 10 * 8 * np.dtype(np.complex64).itemsize
    assert circuits.state_memory_bytes(10, 3, jnp.complex128) == 10 * 8 * 16


@pytest.mark.parametrize("n_qubits", [7, 8, 11])
def test_product_state_shortcut_equals_gate_by_gate_application(n_qubits):
    # encode_states builds the leading 1-qubit layer as a Kronecker product (from 8 qubits
    # as a batched matrix product of two halves); apply_circuit applies every gate to
    # |0...0> one at a time, as in the dense-matrix checks above
    blueprint = encodings.build_encoding("layered", n_qubits, n_qubits=n_qubits, layers=2)
    params = circuits.initial_params(blueprint, jax.random.key(3), bias_scale=0.3)
    X = np.random.default_rng(n_qubits).uniform(-2.0, 2.0, size=(5, n_qubits))
    zero = jnp.zeros((5, 2**n_qubits), jnp.complex64).at[:, 0].set(1.0)
    reference = circuits.apply_circuit(blueprint, params, jnp.asarray(X, jnp.float32), zero)
    np.testing.assert_allclose(np.asarray(circuits.encode_states(blueprint, params, X)),
                               np.asarray(reference), atol=1e-5)
