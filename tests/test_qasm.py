"""OpenQASM 3 export: every program parses with the reference parser, and a small interpreter
of ours for the exported subset reproduces the source circuit's kernel values.

References: ``openqasm3.parse`` (the reference OpenQASM 3 parser); gate semantics of the
OpenQASM 3 specification (Cross et al., ACM Trans. Quantum Comput. 3, 12 (2022)): the built-in
``U(theta, phi, lambda)`` matrix and the stdgates.inc definitions rx = U(t, -pi/2, pi/2),
ry = U(t, 0, 0), rz = gphase(-t/2) U(0, 0, t), h = U(pi/2, 0, pi), x = U(pi, 0, pi),
cx / cz = controlled x / z (from memory).
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
import openqasm3
import pytest
from openqasm3 import ast

from hilbertune import build_encoding, encode_states, initial_params, quantum_gram
from hilbertune.circuits import AngleRule, Blueprint, Step, resource_counts
from hilbertune.errors import InvalidInputError
from hilbertune.qasm import (encoding_to_qasm3, export_resource_counts,
                             kernel_circuit_to_qasm3, unitary_angles)

STDGATES_SUBSET = {"rx", "ry", "rz", "h", "x", "cx", "cz", "U"}


# --------------------------------------------------------------------------- interpreter

def spec_u(theta, phi, lam):
    """OpenQASM 3 built-in U (specification, from memory)."""
    c, s = math.cos(theta / 2), math.sin(theta / 2)
    return np.array([[c, -np.exp(1j * lam) * s],
                     [np.exp(1j * phi) * s, np.exp(1j * (phi + lam)) * c]])


def one_qubit_gate(name, args):
    if name == "U":
        return spec_u(*args)
    if name == "rx":
        return spec_u(args[0], -math.pi / 2, math.pi / 2)
    if name == "ry":
        return spec_u(args[0], 0.0, 0.0)
    if name == "rz":
        return np.exp(-0.5j * args[0]) * spec_u(0.0, 0.0, args[0])
    if name == "h":
        return spec_u(math.pi / 2, 0.0, math.pi)
    if name == "x":
        return spec_u(math.pi, 0.0, math.pi)
    raise AssertionError(f"gate {name!r} is outside the exported subset")


def full_operator(name, args, qubits, n):
    """Dense 2^n x 2^n operator, q[0] the most significant bit (as the export states)."""
    eye = np.eye(2)

    def kron_all(factors):
        out = np.eye(1)
        for q in range(n):
            out = np.kron(out, factors.get(q, eye))
        return out

    if name in ("cx", "cz"):
        control, target = qubits
        p0, p1 = np.diag([1.0, 0.0]), np.diag([0.0, 1.0])
        flip = one_qubit_gate("x", ()) if name == "cx" else np.diag([1.0, -1.0])
        return kron_all({control: p0}) + kron_all({control: p1, target: flip})
    assert len(qubits) == 1
    return kron_all({qubits[0]: one_qubit_gate(name, args)})


def evaluate(node, names):
    if isinstance(node, (ast.FloatLiteral, ast.IntegerLiteral)):
        return float(node.value)
    if isinstance(node, ast.Identifier):
        return names[node.name]
    if isinstance(node, ast.UnaryExpression):
        assert node.op == ast.UnaryOperator["-"]
        return -evaluate(node.expression, names)
    if isinstance(node, ast.BinaryExpression):
        a, b = evaluate(node.lhs, names), evaluate(node.rhs, names)
        ops = {"+": a + b, "-": a - b, "*": a * b, "/": a / b if b else math.nan}
        return ops[node.op.name]
    raise AssertionError(f"expression {type(node).__name__} is outside the exported subset")


def interpret(program, inputs):
    """Run an exported program (text or parsed AST): returns (final statevector, measured
    register name or None)."""
    if isinstance(program, str):
        program = openqasm3.parse(program)
    names = {"pi": math.pi}
    declared_inputs, state, n, measured = [], None, None, None
    for statement in program.statements:
        if isinstance(statement, ast.Include):
            assert statement.filename == "stdgates.inc"
        elif isinstance(statement, ast.IODeclaration):
            assert statement.io_identifier == ast.IOKeyword.input
            assert isinstance(statement.type, ast.FloatType)
            name = statement.identifier.name
            declared_inputs.append(name)
            names[name] = float(inputs[name])
        elif isinstance(statement, ast.ConstantDeclaration):
            names[statement.identifier.name] = evaluate(statement.init_expression, names)
        elif isinstance(statement, ast.QubitDeclaration):
            n = statement.size.value
            state = np.zeros(2**n, complex)
            state[0] = 1.0
        elif isinstance(statement, ast.ClassicalDeclaration):
            assert isinstance(statement.type, ast.BitType) and statement.type.size.value == n
        elif isinstance(statement, ast.QuantumGate):
            assert not statement.modifiers
            name = statement.name.name
            assert name in STDGATES_SUBSET
            args = [evaluate(a, names) for a in statement.arguments]
            qubits = [q.indices[0][0].value for q in statement.qubits]
            assert all(q.name.name == "q" for q in statement.qubits)
            state = full_operator(name, args, qubits, n) @ state
        elif isinstance(statement, ast.QuantumMeasurementStatement):
            assert statement.measure.qubit.name == "q"
            measured = statement.target.name
        else:
            raise AssertionError(f"unexpected statement {type(statement).__name__}")
    assert sorted(declared_inputs) == sorted(inputs)
    return state, measured


def _inputs(prefix, x):
    return {f"{prefix}{j}": float(v) for j, v in enumerate(x)}


# --------------------------------------------------------------------------- encodings under test

def _random_unitary(rng):
    # QR of a complex Gaussian with the phases of R's diagonal divided out (common practice)
    z = rng.normal(size=(2, 2)) + 1j * rng.normal(size=(2, 2))
    q, r = np.linalg.qr(z)
    return q * (np.diag(r) / np.abs(np.diag(r)))


def _random_params(bp, rng):
    return {"weights": rng.normal(size=bp.n_slots).astype(np.float32),
            "biases": rng.normal(size=bp.n_slots).astype(np.float32),
            "log_bandwidth": np.float32(math.log(rng.uniform(0.5, 1.5)))}


def _custom_blueprint(rng):
    as_tuple = lambda m: tuple(tuple(complex(v) for v in row) for row in m)  # noqa: E731
    steps = (Step("unitary", (0,), matrix=as_tuple(_random_unitary(rng))),
             Step("ry", (1,), AngleRule("feature", (1,), 0)),
             Step("zz", (0, 1), AngleRule("pair", (0, 1), 1)),
             Step("rx", (2,), AngleRule("free", (), 2)),
             Step("rz", (2,), AngleRule("constant", (), -1, 0.7)),
             Step("cnot", (2, 0)), Step("x", (1,)), Step("cz", (1, 2)),
             Step("unitary", (2,), matrix=((0, 1j), (1j, 0))),  # anti-diagonal case
             Step("unitary", (1,), matrix=((1, 0), (0, complex(np.exp(0.4j))))),  # diagonal
             Step("h", (2,)), Step("rx", (0,), AngleRule("feature", (2,), 3)))
    return Blueprint(3, 3, steps, (1.0, -0.5, 0.0, 2.0))


CASES = [
    ("angle", {"axis": "y"}), ("angle", {"axis": "z"}), ("iqp", {"layers": 2, "pairs": "all"}),
    ("iqp", {"layers": 1, "pairs": "linear"}), ("layered", {"layers": 2, "entangler": "ring"}),
    ("layered", {"layers": 1, "entangler_gate": "cnot", "axes": ("x", "z")}),
]


class _Case(NamedTuple):
    label: str
    blueprint: Blueprint
    params: dict
    X: np.ndarray  # [5, 3] samples
    gram: np.ndarray  # quantum_gram on X (the source circuit's kernel values)
    states: np.ndarray  # encode_states on X


@pytest.fixture(scope="module")
def cases():
    rng = np.random.default_rng(31)
    X = rng.uniform(-1.5, 1.5, size=(5, 3))
    built = [(f"{family}{options}", build_encoding(family, 3, **options))
             for family, options in CASES] + [("custom", _custom_blueprint(rng))]
    out = []
    for label, bp in built:
        params = _random_params(bp, rng)
        out.append(_Case(label, bp, params, X, np.asarray(quantum_gram(bp, params, X)),
                         np.asarray(encode_states(bp, params, X), dtype=complex)))
    return out


def test_every_exported_program_parses_and_uses_only_stdgates(cases):
    for case in cases:
        for text in (encoding_to_qasm3(case.blueprint, case.params),
                     kernel_circuit_to_qasm3(case.blueprint, case.params)):
            assert text.startswith('OPENQASM 3.0;\ninclude "stdgates.inc";\n'), case.label
            program = openqasm3.parse(text)  # the reference parser
            gate_names = {s.name.name for s in program.statements
                          if isinstance(s, ast.QuantumGate)}
            assert gate_names <= STDGATES_SUBSET, case.label
            assert "input float[64] x0;" in text


def test_encoding_program_reproduces_the_kernel(cases):
    for case in cases:
        program = openqasm3.parse(encoding_to_qasm3(case.blueprint, case.params))
        states = np.stack([interpret(program, _inputs("x", x))[0] for x in case.X])
        gram = np.abs(states.conj() @ states.T) ** 2
        np.testing.assert_allclose(gram, case.gram, atol=1e-5, err_msg=case.label)
        # each state equals the core's state up to a global phase
        fidelity = np.abs(np.sum(states.conj() * case.states, axis=1))
        np.testing.assert_allclose(fidelity, 1.0, atol=1e-5, err_msg=case.label)


def test_kernel_circuit_reproduces_the_gram_entries(cases):
    for case in cases:
        program = openqasm3.parse(kernel_circuit_to_qasm3(case.blueprint, case.params))
        for i in range(3):
            for j in range(2, 5):
                x, y = case.X[i], case.X[j]
                state, measured = interpret(program, {**_inputs("x", x), **_inputs("y", y)})
                assert measured == "outcome"
                # P(all zeros) estimates k(x, y)
                assert abs(state[0]) ** 2 == pytest.approx(case.gram[i, j], abs=1e-5), \
                    case.label


def test_basis_encoding_exports_bit_flips():
    bp = build_encoding("basis", 3)
    params = initial_params(bp)
    text = openqasm3.parse(kernel_circuit_to_qasm3(bp, params))
    bits = np.array([[0, 1, 1], [1, 0, 1]], dtype=float)
    for a in bits:
        for b in bits:
            state, _ = interpret(text, {**_inputs("x", a), **_inputs("y", b)})
            # delta kernel (basis encoding)
            assert abs(state[0]) ** 2 == pytest.approx(float(np.array_equal(a, b)), abs=1e-6)


def test_unitary_angles_reconstruct_the_matrix_up_to_global_phase(rng, dense):
    matrices = [_random_unitary(rng) for _ in range(20)]
    matrices += [np.diag([np.exp(0.3j), np.exp(-1.1j)]), np.array([[0, np.exp(0.2j)],
                                                                    [np.exp(0.9j), 0]]),
                 np.eye(2), dense.X, dense.Y, dense.Z, dense.H]
    for m in matrices:
        theta, phi, lam, gamma = unitary_angles(m)
        np.testing.assert_allclose(np.exp(1j * gamma) * spec_u(theta, phi, lam), m, atol=1e-12)


def test_resource_counts_match_the_parsed_program(cases):
    for label, bp, params, *_ in cases:
        counts = export_resource_counts(bp)
        assert counts["encoding"] == resource_counts(bp)
        kernel = counts["kernel_circuit"]
        assert kernel["one_qubit_gates"] == 2 * counts["encoding"]["one_qubit_gates"]
        assert kernel["two_qubit_gates"] == 2 * counts["encoding"]["two_qubit_gates"]
        for key, text in (("encoding", encoding_to_qasm3(bp, params)),
                          ("kernel_circuit", kernel_circuit_to_qasm3(bp, params))):
            gates = [s for s in openqasm3.parse(text).statements
                     if isinstance(s, ast.QuantumGate)]
            exported = counts["exported"][key]
            assert exported["one_qubit_gates"] == sum(len(g.qubits) == 1 for g in gates), label
            assert exported["two_qubit_gates"] == sum(len(g.qubits) == 2 for g in gates), label
            assert exported["qubits"] == bp.n_qubits
            assert exported["depth"] >= counts[key]["depth"]
    # a ZZ rotation costs two cx and one rz
    zz = Blueprint(2, 2, (Step("zz", (0, 1), AngleRule("pair", (0, 1), 0)),), (1.0,))
    assert export_resource_counts(zz)["exported"]["encoding"] == {
        "qubits": 2, "depth": 3, "one_qubit_gates": 1, "two_qubit_gates": 2}


def test_amplitude_encoding_is_refused():
    bp = build_encoding("amplitude", 4)
    params = initial_params(bp)
    for export in (encoding_to_qasm3, kernel_circuit_to_qasm3):
        with pytest.raises(InvalidInputError, match="amplitude encoding cannot be exported"):
            export(bp, params)
    assert "kernel_circuit" not in export_resource_counts(bp)


def test_bad_parameters_are_refused():
    bp = build_encoding("angle", 2)
    params = initial_params(bp)
    with pytest.raises(InvalidInputError, match="2 trainable slots"):
        encoding_to_qasm3(bp, {**params, "weights": np.ones(3)})
    with pytest.raises(InvalidInputError, match="non-finite"):
        encoding_to_qasm3(bp, {**params, "biases": np.array([0.0, np.nan])})
    with pytest.raises(InvalidInputError, match="weights"):
        kernel_circuit_to_qasm3(bp, {"weights": params["weights"]})
