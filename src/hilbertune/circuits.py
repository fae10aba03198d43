"""Declarative circuit description and its compilation into a batched state function.

Data flow: an encoding family (``encodings.py``) produces a ``Blueprint`` (plain, hashable
data) plus initial parameters; ``encode_states`` turns features and parameters into
statevectors of shape [N, 2**n]; ``kernels.py`` turns states into Gram matrices.

A rotation angle is one of (``c = exp(log_bandwidth)`` is the global bandwidth factor,
Shaydulin & Wild 2022; ``w``, ``b`` are the trainable weight and bias of the step's slot):

* ``constant``: a fixed number;
* ``feature``:  ``w * (c * x_f) + b``;
* ``pair``:     ``w * (pi - c * x_f) * (pi - c * x_g) + b`` (IQP-style products);
* ``free``:     ``b`` (a trainable angle that does not depend on the data).

Compilation groups the steps into stages that cost O(N * 2**n) each: all 1-qubit gates on
one qubit between two entangling steps are fused into one 2x2 per sample; runs of diagonal
gates (RZ outside a fused run, ZZ, CZ) become one phase vector; runs of CNOTs become one
index permutation; the leading 1-qubit stages build the product state directly.
"""

from __future__ import annotations

import functools
import math
from typing import NamedTuple

import numpy as np
import jax
import jax.numpy as jnp

from hilbertune import gates
from hilbertune.gates import EXACT  # full float32 products on every backend (see gates)
from hilbertune.errors import InvalidInputError, ResourceLimitError

ONE_QUBIT_GATES = ("rx", "ry", "rz", "h", "x", "unitary")
TWO_QUBIT_GATES = ("cnot", "cz", "zz")
ROTATIONS = ("rx", "ry", "rz", "zz")
ANGLE_SOURCES = ("constant", "feature", "pair", "free")


class AngleRule(NamedTuple):
    """How a step's rotation angle follows from the features and parameters."""

    source: str  # one of ANGLE_SOURCES
    features: tuple = ()  # feature indices: 1 for "feature", 2 for "pair", 0 otherwise
    slot: int = -1  # index into params["weights"] / params["biases"]; -1 if untrained
    value: float = 0.0  # the angle when source == "constant"


class Step(NamedTuple):
    """One gate of the circuit."""

    gate: str  # one of ONE_QUBIT_GATES + TWO_QUBIT_GATES
    qubits: tuple  # (q,) or (control, target) / (a, b)
    angle: AngleRule | None = None  # for rotations
    matrix: tuple | None = None  # for "unitary": ((a, b), (c, d)) of complex numbers


class Blueprint(NamedTuple):
    """A data-encoding circuit as plain data (hashable, so it can be a static jit argument).

    ``state_kind == "amplitude"`` describes exact amplitude encoding (no gates): the
    normalized, zero-padded feature vector, tensored ``copies`` times.
    """

    n_qubits: int
    n_features: int
    steps: tuple = ()
    initial_weights: tuple = ()  # one float per trainable slot
    family: str = "custom"
    state_kind: str = "gates"  # "gates" or "amplitude"
    copies: int = 1
    frozen: tuple = ()  # parameter names that training leaves alone by default
    binary_features: bool = False  # basis encoding: features must be 0 or 1

    @property
    def n_slots(self) -> int:
        return len(self.initial_weights)


PARAM_NAMES = ("weights", "biases", "log_bandwidth")


def initial_params(blueprint: Blueprint, key=None, *, bandwidth: float = 1.0,
                   bias_scale: float = 0.0) -> dict:
    """Initial parameters: the family's weights, biases ~ N(0, bias_scale^2), given bandwidth.

    Returns:
      dict with ``weights`` (float32 [P]), ``biases`` (float32 [P]), ``log_bandwidth``
      (float32 []).
    """
    if not (bandwidth > 0 and math.isfinite(bandwidth)):
        raise InvalidInputError(f"bandwidth must be a positive finite number, got {bandwidth!r}")
    n = blueprint.n_slots
    weights = jnp.asarray(np.asarray(blueprint.initial_weights, dtype=np.float32).reshape(n))
    if bias_scale > 0 and n > 0:
        if key is None:
            raise InvalidInputError("random biases need a PRNG key: pass key=jax.random.key(seed)")
        biases = bias_scale * jax.random.normal(key, (n,), dtype=jnp.float32)
    else:
        biases = jnp.zeros((n,), jnp.float32)
    return {"weights": weights, "biases": biases,
            "log_bandwidth": jnp.asarray(math.log(bandwidth), jnp.float32)}


# --------------------------------------------------------------------------- resources

def is_product(blueprint: Blueprint) -> bool:
    """True when the encoding prepares a product state (no entangling gates)."""
    if blueprint.state_kind != "gates":
        return False
    return all(step.gate in ONE_QUBIT_GATES for step in blueprint.steps)


def resource_counts(blueprint: Blueprint) -> dict:
    """Qubits, depth (as-soon-as-possible layering), gate counts and trainable parameters."""
    if blueprint.state_kind == "amplitude":
        return {"qubits": blueprint.n_qubits, "depth": None, "one_qubit_gates": None,
                "two_qubit_gates": None, "trainable_parameters": 0,
                "note": "amplitude encoding: exact state preparation, not decomposed into gates"}
    frozen = set(blueprint.frozen)
    trainable = sum(blueprint.n_slots for name in ("weights", "biases") if name not in frozen)
    trainable += 0 if "log_bandwidth" in frozen else 1
    counts = gate_counts([step.qubits for step in blueprint.steps], blueprint.n_qubits)
    return {**counts, "trainable_parameters": trainable}


def gate_counts(gate_qubits, n_qubits: int) -> dict:
    """Qubits, depth (as-soon-as-possible layering) and 1-/2-qubit gate counts of a gate list.

    Args:
      gate_qubits: sequence of qubit tuples, one per gate, in circuit order.
    """
    front = [0] * n_qubits
    one = two = 0
    for qubits in gate_qubits:
        layer = max(front[q] for q in qubits) + 1
        for q in qubits:
            front[q] = layer
        if len(qubits) == 1:
            one += 1
        else:
            two += 1
    return {"qubits": n_qubits, "depth": max(front, default=0), "one_qubit_gates": one,
            "two_qubit_gates": two}


def state_memory_bytes(n_samples: int, n_qubits: int, dtype=jnp.complex64) -> int:
    """Bytes needed to hold ``n_samples`` statevectors of ``n_qubits`` qubits."""
    return int(n_samples) * (2 ** int(n_qubits)) * jnp.dtype(dtype).itemsize


# --------------------------------------------------------------------------- validation

def validate_blueprint(blueprint: Blueprint) -> None:
    """Check that every step names valid qubits, gates, features and slots."""
    n, f, p = blueprint.n_qubits, blueprint.n_features, blueprint.n_slots
    if n < 1:
        raise InvalidInputError(f"an encoding needs at least 1 qubit, got {n}")
    for i, step in enumerate(blueprint.steps):
        where = f"step {i} ({step.gate} on {step.qubits})"
        if step.gate not in ONE_QUBIT_GATES + TWO_QUBIT_GATES:
            raise InvalidInputError(f"{where}: unknown gate; use one of "
                                    f"{', '.join(ONE_QUBIT_GATES + TWO_QUBIT_GATES)}")
        arity = 1 if step.gate in ONE_QUBIT_GATES else 2
        if len(step.qubits) != arity or len(set(step.qubits)) != arity or \
                any(not 0 <= q < n for q in step.qubits):
            raise InvalidInputError(f"{where}: needs {arity} distinct qubits in 0..{n - 1}")
        if step.gate in ROTATIONS:
            rule = step.angle
            if rule is None or rule.source not in ANGLE_SOURCES:
                raise InvalidInputError(f"{where}: a rotation needs an AngleRule with source in "
                                        f"{ANGLE_SOURCES}")
            need = {"feature": 1, "pair": 2}.get(rule.source, 0)
            if len(rule.features) != need or any(not 0 <= j < f for j in rule.features):
                raise InvalidInputError(f"{where}: angle source {rule.source!r} needs {need} "
                                        f"feature index(es) in 0..{f - 1}")
            if rule.source != "constant" and not 0 <= rule.slot < p:
                raise InvalidInputError(f"{where}: trainable angle needs a slot in 0..{p - 1}")
        if step.gate == "unitary":
            m = np.asarray(step.matrix, dtype=complex)
            if m.shape != (2, 2) or not np.allclose(m.conj().T @ m, np.eye(2), atol=1e-8):
                raise InvalidInputError(f"{where}: matrix must be a 2x2 unitary")


def validate_features(blueprint: Blueprint, X, *, name: str = "X") -> np.ndarray:
    """Boundary check of a feature matrix; returns it as a float array of shape [N, F]."""
    try:
        X = np.asarray(X, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError(f"{name} must be numeric; convert or drop non-numeric columns")
    if X.ndim == 1:
        raise InvalidInputError(f"{name} must be 2-D [samples, features], got 1-D of length "
                                f"{X.shape[0]}; reshape with X.reshape(-1, 1) for one feature "
                                "or X.reshape(1, -1) for one sample")
    if X.ndim != 2:
        raise InvalidInputError(f"{name} must be 2-D [samples, features], got shape {X.shape}")
    if X.shape[0] == 0:
        raise InvalidInputError(f"{name} is empty (0 samples); pass at least one row")
    if X.shape[1] != blueprint.n_features:
        hint = ("reduce features first (PCA or selection) or choose an encoding with more "
                "qubits" if X.shape[1] > blueprint.n_features else "build the encoding for "
                f"{X.shape[1]} features")
        raise InvalidInputError(f"{name} has {X.shape[1]} features but the encoding takes "
                                f"{blueprint.n_features}; {hint}")
    bad = ~np.isfinite(X)
    if bad.any():
        rows = np.unique(np.nonzero(bad)[0])[:5].tolist()
        raise InvalidInputError(f"{name} contains NaN or infinite values (rows {rows}...); "
                                "drop or impute them first")
    # angles are computed in float32 by default: larger magnitudes overflow to inf / NaN
    if np.abs(X).max() > 1e30:
        raise InvalidInputError(f"{name} has values up to {np.abs(X).max():.3g}, beyond what "
                                "rotation angles can hold; scale the features first")
    if blueprint.binary_features and not np.isin(X, (0.0, 1.0)).all():
        raise InvalidInputError(f"{name}: basis encoding takes binary features (0 or 1 only); "
                                "binarize the data first or use another encoding")
    if blueprint.state_kind == "amplitude" and (np.linalg.norm(X, axis=1) == 0).any():
        raise InvalidInputError(f"{name}: amplitude encoding cannot encode an all-zero row; "
                                "remove it or shift the features")
    return X


# --------------------------------------------------------------------------- compilation

class _Stage(NamedTuple):
    kind: str  # "local", "diagonal", "permutation"
    qubits: frozenset
    steps: tuple  # step indices in application order


def _step_kind(step: Step) -> str:
    if step.gate in ("rz",):
        return "local-diagonal"
    if step.gate in ONE_QUBIT_GATES:
        return "local"
    if step.gate in ("cz", "zz"):
        return "diagonal"
    return "permutation"


def _commutes(stage: _Stage, kind: str, qubits: frozenset) -> bool:
    if not (stage.qubits & qubits):
        return True
    return stage.kind == "diagonal" and kind in ("diagonal", "local-diagonal")


def _schedule(blueprint: Blueprint) -> tuple:
    """Group steps into fused stages, moving a step back only past stages it commutes with."""
    stages: list[_Stage] = []
    for index, step in enumerate(blueprint.steps):
        kind = _step_kind(step)
        qubits = frozenset(step.qubits)
        target = None
        for pos in range(len(stages) - 1, -1, -1):
            stage = stages[pos]
            mergeable = (
                (kind in ("local", "local-diagonal") and stage.kind == "local"
                 and stage.qubits == qubits)
                or (kind in ("diagonal", "local-diagonal") and stage.kind == "diagonal")
                or (kind == "permutation" and stage.kind == "permutation")
            )
            if mergeable:
                target = pos
                break
            if not _commutes(stage, kind, qubits):
                break
        if target is None:
            new_kind = "local" if kind == "local-diagonal" else kind
            stages.append(_Stage(new_kind, qubits, (index,)))
        else:
            stage = stages[target]
            stages[target] = _Stage(stage.kind, stage.qubits | qubits, stage.steps + (index,))
    return tuple(stages)


class _Program(NamedTuple):
    stages: tuple
    prefix: int  # number of leading local stages folded into the initial product state
    angle_source: np.ndarray  # int [S]: index into ANGLE_SOURCES, -1 for non-rotations
    angle_f1: np.ndarray  # int [S]
    angle_f2: np.ndarray  # int [S]
    angle_slot: np.ndarray  # int [S]
    angle_value: np.ndarray  # float [S]
    stage_data: tuple  # per stage: signs / permutation / fixed diagonal (numpy)


@functools.lru_cache(maxsize=64)
def compile_blueprint(blueprint: Blueprint) -> _Program:
    """Validate and schedule a blueprint once; the result is cached per blueprint."""
    validate_blueprint(blueprint)
    n = blueprint.n_qubits
    stages = _schedule(blueprint)
    prefix = 0
    for stage in stages:
        if stage.kind != "local":
            break
        prefix += 1
    steps = blueprint.steps
    source = np.array([ANGLE_SOURCES.index(s.angle.source) if s.angle else -1 for s in steps],
                      dtype=np.int32)
    f1 = np.array([s.angle.features[0] if s.angle and s.angle.features else 0 for s in steps],
                  dtype=np.int32)
    f2 = np.array([s.angle.features[-1] if s.angle and s.angle.features else 0 for s in steps],
                  dtype=np.int32)
    slot = np.array([s.angle.slot if s.angle else -1 for s in steps], dtype=np.int32)
    value = np.array([s.angle.value if s.angle else 0.0 for s in steps], dtype=np.float64)
    data = []
    for stage in stages:
        if stage.kind == "diagonal":
            rotating = [i for i in stage.steps if steps[i].gate in ("rz", "zz")]
            cz_pairs = [steps[i].qubits for i in stage.steps if steps[i].gate == "cz"]
            signs = gates.parity_signs(n, [steps[i].qubits for i in rotating])
            fixed = gates.cz_signs(n, cz_pairs) if cz_pairs else None
            data.append((tuple(rotating), signs, fixed))
        elif stage.kind == "permutation":
            perm = np.arange(2**n)
            for i in stage.steps:
                control, target = steps[i].qubits
                perm = perm[gates.cnot_permutation(n, control, target)]
            data.append(perm)
        else:
            data.append(None)
    return _Program(stages, prefix, source, f1, f2, slot, value, tuple(data))


def _real_dtype(dtype):
    return jnp.float64 if jnp.dtype(dtype) == jnp.complex128 else jnp.float32


def step_angles(program: _Program, params: dict, X, real_dtype=jnp.float32):
    """All rotation angles for a batch: real array of shape [batch, n_steps]."""
    X = jnp.asarray(X, real_dtype)
    c = jnp.exp(jnp.asarray(params["log_bandwidth"], real_dtype))
    xs = c * X
    # index -1 selects an appended zero so that untrained steps need no special case
    w = jnp.concatenate([jnp.asarray(params["weights"], real_dtype), jnp.zeros(1, real_dtype)])
    b = jnp.concatenate([jnp.asarray(params["biases"], real_dtype), jnp.zeros(1, real_dtype)])
    if X.shape[1] == 0:
        xs = jnp.zeros((X.shape[0], 1), real_dtype)
    lin = xs[:, program.angle_f1]
    pair = (jnp.pi - xs[:, program.angle_f1]) * (jnp.pi - xs[:, program.angle_f2])
    source = program.angle_source
    driver = jnp.where(source == 1, lin, jnp.where(source == 2, pair, 0.0))
    trained = w[program.angle_slot] * driver + b[program.angle_slot]
    constant = jnp.asarray(program.angle_value, real_dtype)
    return jnp.where(source == 0, constant, trained)


def _step_matrix(step: Step, angles, dtype):
    """2x2 matrix of a 1-qubit step, batched ([batch, 2, 2]) or shared ([2, 2])."""
    if step.gate in ("rx", "ry", "rz"):
        return gates.rotation_matrices(step.gate[1], angles, dtype)
    if step.gate == "h":
        return jnp.asarray(gates.HADAMARD, dtype)
    if step.gate == "x":
        return jnp.asarray(gates.PAULI_X, dtype)
    return jnp.asarray(np.asarray(step.matrix, dtype=complex), dtype)


def _local_matrix(blueprint, stage, angles, dtype, inverse=False):
    batch = angles.shape[0]
    total = None
    for i in stage.steps:
        m = _step_matrix(blueprint.steps[i], angles[:, i], dtype)
        total = m if total is None else jnp.matmul(m, total, precision=EXACT)
    if total.ndim == 2:
        total = jnp.broadcast_to(total, (batch, 2, 2))
    if inverse:
        total = jnp.conj(jnp.swapaxes(total, -1, -2))
    return total


def _apply_stage(blueprint, program, k, states, angles, inverse=False):
    stage = program.stages[k]
    n = blueprint.n_qubits
    if stage.kind == "local":
        (q,) = stage.qubits
        return gates.apply_one_qubit(states, _local_matrix(blueprint, stage, angles, states.dtype,
                                                           inverse), q, n)
    if stage.kind == "diagonal":
        rotating, signs, fixed = program.stage_data[k]
        if not rotating:  # CZ gates only: a fixed +-1 diagonal, no phases to exponentiate
            return states * jnp.asarray(fixed, states.dtype)
        sign = -1.0 if inverse else 1.0
        theta = sign * angles[:, list(rotating)] if rotating else jnp.zeros((states.shape[0], 0),
                                                                            angles.dtype)
        signs_j = jnp.asarray(signs, angles.dtype)
        fixed_j = None if fixed is None else jnp.asarray(fixed, angles.dtype)
        return gates.apply_phases(states, theta, signs_j, fixed_j)
    perm = program.stage_data[k]
    if inverse:
        perm = np.argsort(perm)
    # int32 indices: an int64 numpy index fails in jax 0.10 once 64-bit mode is toggled
    # in the same process (mixed int32/int64 in its bounds normalisation)
    return states[:, perm.astype(np.int32)]


def _product_prefix(blueprint, program, angles, dtype):
    """Initial state from the leading 1-qubit stages: a batched Kronecker product."""
    batch = angles.shape[0]
    columns = {}
    for stage in program.stages[: program.prefix]:
        (q,) = stage.qubits
        columns[q] = _local_matrix(blueprint, stage, angles, dtype)[:, :, 0]
    zero = jnp.broadcast_to(jnp.asarray([1.0, 0.0], dtype), (batch, 2))

    def kron(qubits):
        state = jnp.ones((batch, 1), dtype)
        for q in qubits:
            state = (state[:, :, None] * columns.get(q, zero)[:, None, :]).reshape(batch, -1)
        return state

    n = blueprint.n_qubits
    if n < 8:
        return kron(range(n))
    # The two halves' outer product as a batched matrix product with a zero second slot
    # (contraction length 2, so XLA keeps it a product): XLA materializes its result once.
    # Written elementwise, XLA fused the whole n-factor product into every consumer and
    # recomputed it there (n - 1 complex products per amplitude, three times in a training
    # step). 12 qubits, 2000 states: circuit forward 0.19 s -> 0.13 s, forward and reverse
    # 0.50 s -> 0.36 s.
    half = n // 2
    head, tail = kron(range(half)), kron(range(half, n))
    head = jnp.stack([head, jnp.zeros_like(head)], axis=-1)  # [batch, 2**half, 2]
    tail = jnp.stack([tail, jnp.zeros_like(tail)], axis=1)  # [batch, 2, 2**(n - half)]
    return jnp.matmul(head, tail, precision=EXACT).reshape(batch, -1)


def _amplitude_states(blueprint, X, dtype):
    X = jnp.asarray(X, _real_dtype(dtype))
    unit = X / jnp.linalg.norm(X, axis=1, keepdims=True)
    width = 2 ** (blueprint.n_qubits // blueprint.copies)
    padded = jnp.pad(unit, ((0, 0), (0, width - X.shape[1]))).astype(dtype)
    state = padded
    for _ in range(blueprint.copies - 1):
        state = (state[:, :, None] * padded[:, None, :]).reshape(X.shape[0], -1)
    return state


def _states_batch(blueprint, params, X, dtype):
    if blueprint.state_kind == "amplitude":
        return _amplitude_states(blueprint, X, dtype)
    program = compile_blueprint(blueprint)
    angles = step_angles(program, params, X, _real_dtype(dtype))
    states = _product_prefix(blueprint, program, angles, dtype)
    for k in range(program.prefix, len(program.stages)):
        states = _apply_stage(blueprint, program, k, states, angles)
    return states


def apply_circuit(blueprint: Blueprint, params: dict, X, states, *, inverse: bool = False):
    """Apply U(x) (or U(x)^dagger) to arbitrary input states, one x per state.

    Slower than ``encode_states`` (no product-state shortcut); used for the per-pair
    inversion-test reference and the interference-circuit simulator.

    Args:
      X: float array of shape [batch, F].
      states: complex array of shape [batch, 2**n].
    """
    if blueprint.state_kind != "gates":
        raise InvalidInputError("amplitude encoding has no gate sequence to apply")
    program = compile_blueprint(blueprint)
    angles = step_angles(program, params, X, _real_dtype(states.dtype))
    order = range(len(program.stages))
    for k in (reversed(order) if inverse else order):
        states = _apply_stage(blueprint, program, k, states, angles, inverse)
    return states


@functools.partial(jax.jit, static_argnames=("blueprint", "dtype", "chunk_size"))
def _encode_jit(blueprint, params, X, dtype, chunk_size):
    n_samples = X.shape[0]
    if chunk_size >= n_samples:
        return _states_batch(blueprint, params, X, dtype)
    n_chunks = -(-n_samples // chunk_size)
    padded = jnp.pad(X, ((0, n_chunks * chunk_size - n_samples), (0, 0)), constant_values=1.0)
    chunks = padded.reshape(n_chunks, chunk_size, X.shape[1])
    # under differentiation the chunk's forward pass is recomputed in the reverse pass
    # while its states are still in cache, instead of storing every intermediate state
    body = jax.checkpoint(lambda xc: _states_batch(blueprint, params, xc, dtype))
    out = jax.lax.map(body, chunks)
    return out.reshape(n_chunks * chunk_size, -1)[:n_samples]


# bytes of states per chunk when the chunk size is automatic: small enough to stay in a
# last-level cache, large enough that each gate is one long vectorized loop. 12 qubits,
# 2000 states, 2-core machine with 32 MiB L3, forward and reverse pass against all states
# at once: 0.42 s vs 1.36 s (experiments/bench_training.py, ``step_parts``).
CACHE_CHUNK_BYTES = 4 * 2**20


def automatic_chunk(n_samples: int, n_qubits: int, dtype=jnp.complex64) -> int:
    """Rows per chunk for ``encode_states``: at most about CACHE_CHUNK_BYTES of states, or
    all rows when there are fewer than two chunks' worth.

    The chunks are balanced: ``ceil(N / chunks)`` rows each, so at most ``chunks - 1``
    rows are padding, and none when the chunk count divides N (2000 rows of 12 qubits: 16
    chunks of 125 rows, where 128-row chunks would pad to 2048 and then copy the 2000
    real rows out of the padded result).
    """
    row_bytes = (2**n_qubits) * jnp.dtype(dtype).itemsize
    rows = max(1, CACHE_CHUNK_BYTES // row_bytes)
    if n_samples < 2 * rows:
        return n_samples
    chunks = -(-n_samples // rows)
    return -(-n_samples // chunks)


def check_dtype(dtype):
    """Return ``dtype`` as a jnp complex dtype, refusing complex128 without x64 mode."""
    dtype = jnp.dtype(dtype)
    if dtype not in (jnp.complex64, jnp.complex128):
        raise InvalidInputError(f"state dtype must be complex64 or complex128, got {dtype}")
    if dtype == jnp.complex128 and not jax.config.jax_enable_x64:
        raise InvalidInputError("complex128 states need JAX's 64-bit mode: call "
                                "jax.config.update('jax_enable_x64', True) before any JAX work")
    return dtype


def encode_states(blueprint: Blueprint, params: dict, X, *, dtype=jnp.complex64,
                  chunk_size: int | None = None, memory_budget=None):
    """Statevectors of the encoding for every row of ``X``.

    Pure and differentiable in ``params`` (inputs are validated only when they are concrete
    arrays, so it can be traced inside ``jax.grad``).

    Args:
      blueprint: the encoding circuit.
      params: dict from ``initial_params``.
      X: float array of shape [N, F].
      dtype: complex64 (default) or complex128.
      chunk_size: process this many samples at a time (None: chunks of about
        ``CACHE_CHUNK_BYTES`` of states, see ``automatic_chunk``).
      memory_budget: bytes or a string such as "4GiB" (None: the default budget); concrete
        inputs whose states would not fit are refused before anything is allocated.

    Returns:
      complex array of shape [N, 2**n].
    """
    dtype = check_dtype(dtype)
    if not isinstance(X, jax.core.Tracer):
        X = validate_features(blueprint, X)
        from hilbertune.kernels import resolve_memory_budget

        require_state_memory(X.shape[0], blueprint, resolve_memory_budget(memory_budget), dtype)
    if chunk_size is not None and chunk_size < 1:
        raise InvalidInputError(f"chunk_size must be a positive integer, got {chunk_size}")
    X = jnp.asarray(X, _real_dtype(dtype))
    if chunk_size is None:
        chunk_size = automatic_chunk(X.shape[0], blueprint.n_qubits, dtype)
    return _encode_jit(blueprint, params, X, dtype, chunk_size)


def product_factors(blueprint: Blueprint, params: dict, X, *, dtype=jnp.complex64):
    """Per-qubit states of a product encoding: complex array of shape [N, n, 2].

    Only for ``is_product(blueprint)``; works for hundreds of qubits because the full
    statevector is never formed.
    """
    if not is_product(blueprint):
        raise InvalidInputError("product_factors needs an encoding without entangling gates")
    dtype = check_dtype(dtype)
    if not isinstance(X, jax.core.Tracer):
        X = validate_features(blueprint, X)
    return _factors_jit(blueprint, params, jnp.asarray(X, _real_dtype(dtype)), dtype)


@functools.partial(jax.jit, static_argnames=("blueprint", "dtype"))
def _factors_jit(blueprint, params, X, dtype):
    # Stages with the same gate sequence (e.g. one RY per qubit) are evaluated together on
    # a [batch, stages] angle array: a handful of vectorized ops instead of one small op per
    # qubit (5000 x 200 angle encoding: 145 ms -> see experiments/bench_gram.py).
    program = compile_blueprint(blueprint)
    angles = step_angles(program, params, X, _real_dtype(dtype))
    batch, n = angles.shape[0], blueprint.n_qubits
    columns = jnp.zeros((batch, n, 2), dtype).at[:, :, 0].set(1.0)
    qubits = [next(iter(stage.qubits)) for stage in program.stages]
    if len(set(qubits)) < len(qubits):  # several stages on one qubit: apply in order
        for stage in program.stages:
            (q,) = stage.qubits
            columns = columns.at[:, q].set(jnp.einsum(
                "bac,bc->ba", _local_matrix(blueprint, stage, angles, dtype), columns[:, q],
                precision=EXACT))
        return columns
    groups: dict = {}
    for stage in program.stages:
        steps = [blueprint.steps[i] for i in stage.steps]
        signature = tuple((st.gate, None if st.matrix is None else i)
                          for st, i in zip(steps, stage.steps))
        groups.setdefault(signature, []).append(stage)
    for signature, stages in groups.items():
        total = None
        for position, (gate, _) in enumerate(signature):
            index = np.array([stage.steps[position] for stage in stages])
            step = blueprint.steps[int(index[0])]
            m = _step_matrix(step, angles[:, index], dtype)  # [batch, G, 2, 2] or [2, 2]
            total = m if total is None else jnp.matmul(m, total, precision=EXACT)
        total = jnp.broadcast_to(total, (batch, len(stages), 2, 2))
        targets = np.array([next(iter(stage.qubits)) for stage in stages])
        columns = columns.at[:, targets].set(total[..., :, 0])  # each gate applied to |0>
    return columns


def require_state_memory(n_samples: int, blueprint: Blueprint, budget_bytes: int,
                         dtype=jnp.complex64) -> int:
    """Refuse (with the estimate and the fixes) states that would not fit in the budget."""
    need = state_memory_bytes(n_samples, blueprint.n_qubits, dtype)
    if need > budget_bytes:
        raise ResourceLimitError(
            f"{n_samples} statevectors of {blueprint.n_qubits} qubits need "
            f"{need / 2**30:.2f} GiB but the memory budget is {budget_bytes / 2**30:.2f} GiB; "
            "use fewer qubits, fewer samples (Nystroem landmarks), a product encoding, "
            "or raise the budget")
    return need
