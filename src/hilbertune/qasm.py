"""OpenQASM 3 export of a learned encoding and of its kernel-estimation circuit.

Last stage of the data flow: a frozen ``Blueprint`` plus trained parameters become program
text for hardware toolchains. Features are program inputs (``input float[64] x0;``); the
trained weights and biases are baked in as literals and the bandwidth as a constant, so every
rotation angle is an expression of the inputs. Only gates of ``stdgates.inc`` (rx, ry, rz,
h, x, cx, cz) and the built-in ``U`` are used. Pure string building, no I/O.

Gate mapping (OpenQASM 3 specification, stdgates.inc; from memory):

* RX/RY/RZ(t) = exp(-i t P / 2) map to ``rx``/``ry``/``rz`` with the same angle (stdgates.inc
  defines ``rz`` with a compensating global phase, so it is exactly exp(-i t Z / 2)).
* ZZ(t) = exp(-i t Z(x)Z / 2) becomes ``cx a, b; rz(t) b; cx a, b;`` (stdgates.inc has no
  ZZ rotation): the CNOTs put the parity of a and b on b, where rz applies the phase.
* a general 2x2 unitary ``M`` becomes ``U(theta, phi, lambda)`` with
  ``M = exp(i gamma) U(theta, phi, lambda)``; the global phase gamma is written as a comment
  (no measurement can see it).
* CNOT is ``cx``, CZ is ``cz``, H is ``h``, X is ``x``.
"""

from __future__ import annotations

import cmath
import math
from typing import NamedTuple

import numpy as np

from hilbertune.circuits import Blueprint, gate_counts, resource_counts, validate_blueprint
from hilbertune.errors import InvalidInputError

BANDWIDTH_NAME = "bandwidth"
REGISTER_NAME = "q"
OUTCOME_NAME = "outcome"


class _Instruction(NamedTuple):
    name: str  # stdgates.inc gate name, or "U"
    arguments: tuple  # angle expressions as program text
    qubits: tuple  # qubit indices
    comment: str = ""


def _number(value) -> str:
    value = float(value)
    if not math.isfinite(value):
        raise InvalidInputError(f"cannot export a non-finite parameter ({value}); the "
                                "training diverged; retrain or restore a checkpoint")
    return repr(value)


def _plain_params(blueprint: Blueprint, params: dict) -> dict:
    """Parameters as float64 numpy arrays, checked against the blueprint."""
    try:
        weights = np.asarray(params["weights"], dtype=np.float64).reshape(-1)
        biases = np.asarray(params["biases"], dtype=np.float64).reshape(-1)
        log_bandwidth = float(np.asarray(params["log_bandwidth"], dtype=np.float64))
    except (KeyError, TypeError, ValueError):
        raise InvalidInputError("params must be a dict with 'weights', 'biases' and "
                                "'log_bandwidth' (as returned by initial_params or training)"
                                ) from None
    if not (np.isfinite(weights).all() and np.isfinite(biases).all()
            and math.isfinite(log_bandwidth)):
        raise InvalidInputError("cannot export non-finite parameters (NaN or infinity): the "
                                "training diverged; retrain or restore a checkpoint")
    p = blueprint.n_slots
    if weights.shape != (p,) or biases.shape != (p,):
        raise InvalidInputError(f"params do not fit the encoding: it has {p} trainable slots "
                                f"but weights/biases have {weights.size}/{biases.size}; use "
                                "the parameters trained for this blueprint")
    return {"weights": weights, "biases": biases, "log_bandwidth": log_bandwidth}


def _angle_expression(rule, params: dict, prefix: str) -> str:
    """Program text of a step's angle (the rule of ``circuits.AngleRule``)."""
    if rule.source == "constant":
        return _number(rule.value)
    w = params["weights"][rule.slot]
    b = params["biases"][rule.slot]
    if rule.source == "free":
        return _number(b)
    if rule.source == "feature":
        driver = f"({BANDWIDTH_NAME} * {prefix}{rule.features[0]})"
    else:  # "pair"
        f, g = rule.features
        driver = (f"(pi - {BANDWIDTH_NAME} * {prefix}{f}) * "
                  f"(pi - {BANDWIDTH_NAME} * {prefix}{g})")
    text = f"{_number(w)} * {driver}"
    if b > 0:
        text += f" + {_number(b)}"
    elif b < 0:
        text += f" - {_number(-b)}"
    return text


def unitary_angles(matrix) -> tuple:
    """Angles of ``M = exp(i gamma) U(theta, phi, lambda)`` for a 2x2 unitary M.

    ``U(theta, phi, lambda) = [[cos(theta/2), -exp(i lambda) sin(theta/2)],
    [exp(i phi) sin(theta/2), exp(i (phi + lambda)) cos(theta/2)]]`` (OpenQASM 3
    specification, built-in gate U; from memory).

    Returns:
      (theta, phi, lambda, gamma) as floats.
    """
    m = np.asarray(matrix, dtype=np.complex128)
    cos_half, sin_half = abs(m[0, 0]), abs(m[1, 0])
    theta = 2.0 * math.atan2(sin_half, cos_half)
    tiny = 1e-12
    if sin_half < tiny:  # diagonal: only phi + lambda matters
        gamma = cmath.phase(m[0, 0])
        phi, lam = 0.0, cmath.phase(m[1, 1]) - gamma
    elif cos_half < tiny:  # anti-diagonal: only phi - lambda matters
        lam = 0.0
        gamma = cmath.phase(-m[0, 1])
        phi = cmath.phase(m[1, 0]) - gamma
    else:
        gamma = cmath.phase(m[0, 0])
        phi = cmath.phase(m[1, 0]) - gamma
        lam = cmath.phase(-m[0, 1]) - gamma
    return theta, phi, lam, gamma


def _step_instructions(step, params: dict, prefix: str, inverse: bool) -> list:
    q = step.qubits
    if step.gate in ("rx", "ry", "rz"):
        angle = _angle_expression(step.angle, params, prefix)
        return [_Instruction(step.gate, (f"-({angle})" if inverse else angle,), q)]
    if step.gate == "zz":
        angle = _angle_expression(step.angle, params, prefix)
        angle = f"-({angle})" if inverse else angle
        return [_Instruction("cx", (), q, "ZZ rotation as cx, rz, cx"),
                _Instruction("rz", (angle,), (q[1],)), _Instruction("cx", (), q)]
    if step.gate == "unitary":
        matrix = np.asarray(step.matrix, dtype=np.complex128)
        if inverse:
            matrix = matrix.conj().T
        theta, phi, lam, gamma = unitary_angles(matrix)
        note = f"global phase exp(i * {_number(gamma)}) omitted"
        return [_Instruction("U", (_number(theta), _number(phi), _number(lam)), q, note)]
    name = {"h": "h", "x": "x", "cnot": "cx", "cz": "cz"}[step.gate]
    return [_Instruction(name, (), q)]


def _instructions(blueprint: Blueprint, params: dict, prefix: str, *, inverse=False) -> list:
    steps = reversed(blueprint.steps) if inverse else blueprint.steps
    out = []
    for step in steps:
        out += _step_instructions(step, params, prefix, inverse)
    return out


def _check_exportable(blueprint: Blueprint) -> None:
    if blueprint.state_kind != "gates":
        raise InvalidInputError("amplitude encoding cannot be exported to OpenQASM: it is exact "
                                "state assignment with no gate decomposition; choose a gate "
                                "family (angle, iqp, layered, basis) to export")
    validate_blueprint(blueprint)


def _uses_bandwidth(blueprint: Blueprint) -> bool:
    return any(step.angle is not None and step.angle.source in ("feature", "pair")
               for step in blueprint.steps)


def _render(instruction: _Instruction) -> str:
    args = f"({', '.join(instruction.arguments)})" if instruction.arguments else ""
    qubits = ", ".join(f"{REGISTER_NAME}[{i}]" for i in instruction.qubits)
    line = f"{instruction.name}{args} {qubits};"
    return f"{line}  // {instruction.comment}" if instruction.comment else line


def _program(blueprint: Blueprint, params: dict, title: list, prefixes: tuple,
             body: list, measure: bool) -> str:
    lines = ["OPENQASM 3.0;", 'include "stdgates.inc";']
    lines += [f"// {text}" for text in title]
    lines += [f"// hilbertune export: family {blueprint.family}, {blueprint.n_qubits} qubits, "
              f"{blueprint.n_features} features; q[0] is hilbertune's qubit 0 (most "
              "significant bit of the basis index)"]
    for prefix in prefixes:
        lines += [f"input float[64] {prefix}{j};" for j in range(blueprint.n_features)]
    if _uses_bandwidth(blueprint):
        lines.append(f"const float[64] {BANDWIDTH_NAME} = "
                     f"{_number(math.exp(params['log_bandwidth']))};")
    lines.append(f"qubit[{blueprint.n_qubits}] {REGISTER_NAME};")
    if measure:
        lines.append(f"bit[{blueprint.n_qubits}] {OUTCOME_NAME};")
    lines += [_render(instruction) for instruction in body]
    if measure:
        lines.append(f"{OUTCOME_NAME} = measure {REGISTER_NAME};")
    return "\n".join(lines) + "\n"


def encoding_to_qasm3(blueprint: Blueprint, params: dict) -> str:
    """OpenQASM 3 program that prepares ``|psi(x)> = U(x)|0...0>``.

    Inputs ``x0 .. x{F-1}`` are the (preprocessed) features; angles follow the blueprint's
    rules with the trained weights, biases and bandwidth baked in.

    Args:
      blueprint: a gate-based encoding (amplitude encoding is refused).
      params: dict with ``weights`` [P], ``biases`` [P], ``log_bandwidth`` [].

    Returns:
      program text.

    References:
      OpenQASM 3 language specification (Cross et al., ACM Trans. Quantum Comput. 3, 12
      (2022)); stdgates.inc.
    """
    _check_exportable(blueprint)
    plain = _plain_params(blueprint, params)
    body = _instructions(blueprint, plain, "x")
    return _program(blueprint, plain, ["data-encoding circuit U(x) acting on |0...0>"],
                    ("x",), body, measure=False)


def kernel_circuit_to_qasm3(blueprint: Blueprint, params: dict) -> str:
    """OpenQASM 3 inversion-test circuit estimating one kernel entry ``k(x, y)``.

    Applies ``U(x)`` then ``U(y)^dagger`` (the inverse encoding: steps reversed, rotation
    angles negated, U gates inverted) and measures every qubit; the frequency of the
    all-zeros outcome estimates ``k(x, y) = |<psi(y)|psi(x)>|^2``. Inputs ``x0..`` and
    ``y0..``.

    Returns:
      program text.
    """
    _check_exportable(blueprint)
    plain = _plain_params(blueprint, params)
    body = (_instructions(blueprint, plain, "x")
            + _instructions(blueprint, plain, "y", inverse=True))
    title = ["kernel estimation: U(y)^dagger U(x) |0...0>, then measure all qubits;",
             "the all-zeros frequency estimates k(x, y) = |<psi(y)|psi(x)>|^2"]
    return _program(blueprint, plain, title, ("x", "y"), body, measure=True)


def _count(instructions: list, n_qubits: int) -> dict:
    return gate_counts([instruction.qubits for instruction in instructions], n_qubits)


def export_resource_counts(blueprint: Blueprint) -> dict:
    """Resources of the encoding and of the kernel-estimation circuit, before and after export.

    Returns:
      dict with ``encoding`` and ``kernel_circuit`` (``circuits.resource_counts`` of the
      blueprint's steps; the kernel circuit is the steps followed by their inverses) and
      ``exported`` (counts of the emitted stdgates.inc instructions, where a ZZ rotation
      costs two cx and one rz). Amplitude encoding gives only ``encoding`` and a note.
    """
    counts = {"encoding": resource_counts(blueprint)}
    if blueprint.state_kind != "gates":
        counts["note"] = "amplitude encoding is not exportable (no gate decomposition)"
        return counts
    validate_blueprint(blueprint)
    mirrored = blueprint._replace(steps=tuple(blueprint.steps) + tuple(reversed(blueprint.steps)))
    counts["kernel_circuit"] = resource_counts(mirrored)
    zeros = {"weights": np.zeros(blueprint.n_slots), "biases": np.zeros(blueprint.n_slots),
             "log_bandwidth": 0.0}
    forward = _instructions(blueprint, zeros, "x")
    backward = _instructions(blueprint, zeros, "y", inverse=True)
    counts["exported"] = {"encoding": _count(forward, blueprint.n_qubits),
                          "kernel_circuit": _count(forward + backward, blueprint.n_qubits)}
    return counts
