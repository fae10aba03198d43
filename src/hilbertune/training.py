"""Learning the encoding: an optax loop over the differentiable Gram and an objective.

Data flow: features + labels -> stratified validation split (from the seed) -> initial
parameters (bandwidth by a median heuristic) -> per step: a class-balanced batch, the Gram
``training_gram`` (fidelity Gram with a symmetric custom derivative), a loss from
``objectives.OBJECTIVES``, ``jax.value_and_grad``, an optax update (one jitted function)
-> early stopping on the validation objective ->
``TrainingResult``. Optional checkpoints (atomic ``.npz`` without pickle + a small JSON) let
an interrupted run resume to exactly the parameters of an uninterrupted one.

One integer seed drives everything: the split and the bandwidth subsample use
``numpy.random.default_rng(seed)``; random biases and every mini-batch use keys derived from
``jax.random.key(seed)`` (the batch of step t uses ``fold_in(batch_key, t)``, so a resumed
run draws the same batches). File I/O happens only when ``checkpoint_dir`` is given and
printing only when ``progress=True``.
"""

from __future__ import annotations

import difflib
import functools
import hashlib
import json
import math
import os
import time
import zipfile
from typing import NamedTuple

import numpy as np
import jax
import jax.numpy as jnp
import optax

from hilbertune import artifacts
from hilbertune.circuits import (PARAM_NAMES, Blueprint, compile_blueprint, encode_states,
                                 initial_params, is_product, validate_features)
from hilbertune.errors import ArtifactError, InvalidInputError, ResourceLimitError, TrainingError
from hilbertune.kernels import (EXACT, device_path, encoding_expectations, gram_for_training,
                                herk_upper, projected_gram_from_expectations,
                                resolve_memory_budget)
from hilbertune import objectives

OPTIMIZERS = ("adam", "sgd", "rmsprop", "adamw")
SCHEDULES = ("constant", "cosine", "warmup_cosine")
KERNELS = ("fidelity", "projected")
CHECKPOINT_NPZ = "checkpoint.npz"
CHECKPOINT_JSON = "checkpoint.json"
CHECKPOINT_FORMAT = 1


class TrainingSettings(NamedTuple):
    """Hyperparameters of ``train_encoding`` (plain data, hashable)."""

    objective: str = "centered_alignment"  # a key of objectives.OBJECTIVES
    steps: int = 100  # number of optimizer updates
    learning_rate: float = 0.05  # peak learning rate of the schedule
    optimizer: str = "adam"  # one of OPTIMIZERS (optax)
    schedule: str = "constant"  # one of SCHEDULES
    clip_norm: float = 1.0  # clip the global gradient norm to this; 0 disables clipping
    batch_size: int = 512  # samples per step, class-balanced; 0 (or >= train size) = full
    #                        batch. 512: full batch on small tables, and on large ones a step
    #                        costs O(512^2) kernel entries (O(512^3) for ridge LOO), not O(N^3)
    validation_fraction: float = 0.2  # stratified hold-out for early stopping; 0 disables
    patience: int = 20  # stop after this many steps without validation improvement; 0 = never
    l2_penalty: float = 0.0  # strength of sum ||p - p_initial||^2 over the trained parameters
    ridge_lambda: float = 0.1  # ridge of the "ridge_loo" / "ridge_kfold" objectives
    folds: int = 5  # folds of "ridge_kfold"
    freeze: tuple = ()  # parameter names left alone, in addition to blueprint.frozen
    checkpoint_every: int = 25  # steps between checkpoints (with checkpoint_dir); 0 = at the end
    bandwidth: float | None = None  # initial bandwidth c; None = median heuristic
    bias_scale: float = 0.0  # initial biases ~ N(0, bias_scale^2)
    weight_decay: float = 1e-4  # decoupled weight decay of "adamw"
    min_improvement: float = 1e-6  # a validation loss must drop by more than this to count
    kernel: str = "fidelity"  # the kernel that is trained: "fidelity" or "projected"
    gamma: float = 1.0  # bandwidth of the projected kernel (kernel == "projected")
    bandwidth_range: float = 0.0  # keep c within [c0 / r, c0 * r] of its start c0; 0 = unbounded


class TrainingResult(NamedTuple):
    """What ``train_encoding`` returns (every array is numpy)."""

    params: dict  # best parameters (lowest validation loss; the last good ones without validation)
    initial_params: dict  # parameters before the first update
    history: list  # one dict per evaluated step, see ``train_encoding``
    stop_reason: str  # why the loop ended, in words
    best_step: int  # step whose parameters are ``params``
    classes: np.ndarray  # label values; class k of the objective is classes[k]
    initial_bandwidth: float  # c = exp(log_bandwidth) before training
    snapshots: dict = {}  # step s -> best parameters among steps 0..s (``snapshots=`` argument)


class _StaticConfig(NamedTuple):
    # everything that shapes the compiled step (hashable, so compiled steps are reused)
    objective: str
    n_classes: int
    ridge_lambda: float
    folds: int
    validation_folds: int
    l2_penalty: float
    trainable: tuple
    optimizer: str
    learning_rate: float
    schedule: str
    steps: int
    clip_norm: float
    weight_decay: float
    batch_counts: tuple | None  # samples per class in a mini-batch; None = full batch
    validation: bool
    quick_compile: bool  # small problem: compile fast rather than optimize (see below)
    kernel: str = "fidelity"  # "fidelity" or "projected"
    gamma: float = 1.0  # projected-kernel bandwidth
    log_bandwidth_bound: float = -1.0  # |log c - log c0| <= this after each update; < 0: none


# --------------------------------------------------------------------------- validation

def _closest(value, options):
    close = difflib.get_close_matches(str(value), options, n=1)
    return f" (did you mean {close[0]!r}?)" if close else ""


def check_settings(settings: TrainingSettings, blueprint: Blueprint | None = None) -> None:
    """Refuse settings that cannot work, with the fix in the message."""
    if not isinstance(settings, TrainingSettings):
        raise InvalidInputError(f"settings must be a TrainingSettings, got "
                                f"{type(settings).__name__}; build one with "
                                "TrainingSettings(objective=..., steps=...)")
    objectives.resolve_objective(settings.objective)
    if settings.optimizer not in OPTIMIZERS:
        raise InvalidInputError(f"unknown optimizer {settings.optimizer!r}"
                                f"{_closest(settings.optimizer, OPTIMIZERS)}; use one of "
                                f"{', '.join(OPTIMIZERS)}")
    if settings.schedule not in SCHEDULES:
        raise InvalidInputError(f"unknown learning-rate schedule {settings.schedule!r}"
                                f"{_closest(settings.schedule, SCHEDULES)}; use one of "
                                f"{', '.join(SCHEDULES)}")

    def integer(name, minimum):
        value = getattr(settings, name)
        if not isinstance(value, (int, np.integer)) or isinstance(value, bool) or value < minimum:
            raise InvalidInputError(f"{name} must be an integer >= {minimum}, got {value!r}")

    def number(name, low, *, strict=False, below=None):
        value = getattr(settings, name)
        ok = isinstance(value, (int, float, np.number)) and math.isfinite(value) and (
            value > low if strict else value >= low) and (below is None or value < below)
        if not ok:
            bound = f"> {low}" if strict else f">= {low}"
            if below is not None:
                bound += f" and < {below}"
            raise InvalidInputError(f"{name} must be a finite number {bound}, got {value!r}")

    integer("steps", 0)
    integer("batch_size", 0)
    integer("patience", 0)
    integer("folds", 2)
    integer("checkpoint_every", 0)
    number("learning_rate", 0.0, strict=True)
    number("clip_norm", 0.0)
    number("validation_fraction", 0.0, below=1.0)
    number("l2_penalty", 0.0)
    number("ridge_lambda", 0.0, strict=True)
    number("bias_scale", 0.0)
    number("weight_decay", 0.0)
    number("min_improvement", 0.0)
    number("gamma", 0.0, strict=True)
    if settings.kernel not in KERNELS:
        raise InvalidInputError(f"unknown kernel {settings.kernel!r}"
                                f"{_closest(settings.kernel, KERNELS)}; use one of "
                                f"{', '.join(KERNELS)}")
    value = settings.bandwidth_range
    if not (isinstance(value, (int, float, np.number)) and math.isfinite(value)
            and (value == 0 or value >= 1)):
        raise InvalidInputError(f"bandwidth_range must be 0 (unbounded) or a factor >= 1, got "
                                f"{value!r}")
    if settings.bandwidth is not None:
        number("bandwidth", 0.0, strict=True)
    freeze = settings.freeze
    if isinstance(freeze, str) or not all(name in PARAM_NAMES for name in freeze):
        raise InvalidInputError(f"freeze must be a tuple of parameter names from "
                                f"{PARAM_NAMES}, got {freeze!r}")


def encode_labels(y, n_samples: int | None = None):
    """Map any labels (numbers, strings) to 0..C-1 with ``np.unique``.

    Returns:
      (classes [C], y_int int32 [N]); raises for NaN/missing labels or a single class.
    """
    y = np.asarray(y)
    if y.ndim == 2 and y.shape[1] == 1:
        y = y[:, 0]
    if y.ndim != 1:
        raise InvalidInputError(f"y must be 1-D (one label per sample), got shape {y.shape}; "
                                "pass a single label column")
    if n_samples is not None and y.shape[0] != n_samples:
        raise InvalidInputError(f"X has {n_samples} samples but y has {y.shape[0]} labels; "
                                "pass one label per row of X")
    if y.dtype.kind == "f" and np.isnan(y).any():
        rows = np.nonzero(np.isnan(y))[0][:5].tolist()
        raise InvalidInputError(f"y contains NaN labels (rows {rows}...); drop those samples "
                                "or fill the labels")
    if y.dtype.kind == "O":
        missing = [i for i, v in enumerate(y) if v is None or (isinstance(v, float)
                                                               and math.isnan(v))]
        if missing:
            raise InvalidInputError(f"y contains missing labels (rows {missing[:5]}...); drop "
                                    "those samples or fill the labels")
    try:
        classes, y_int = np.unique(y, return_inverse=True)
    except TypeError:
        raise InvalidInputError("y mixes label types that cannot be sorted (e.g. numbers and "
                                "strings); convert all labels to one type") from None
    if classes.shape[0] < 2:
        raise InvalidInputError(f"y contains only one class ({classes[0]!r}); a classifier "
                                "needs samples of at least 2 classes")
    return classes, y_int.reshape(-1).astype(np.int32)


# --------------------------------------------------------------------------- data preparation

def stratified_split(y_int, fraction: float, rng: np.random.Generator):
    """Indices (train, validation), each ordered by class and shuffled within a class.

    Each class puts ``round(fraction * n_c)`` samples (at least 1, at most n_c - 1) into the
    validation part. Ordering by class makes positional folds (``i % folds``) stratified.
    """
    train, validation = [], []
    for c in range(int(y_int.max()) + 1):
        members = rng.permutation(np.nonzero(y_int == c)[0])
        if fraction > 0:
            if members.shape[0] < 2:
                raise InvalidInputError(f"class {c} has only {members.shape[0]} sample(s), too "
                                        "few for a validation split; add samples or set "
                                        "validation_fraction=0")
            n_val = min(max(1, int(round(fraction * members.shape[0]))), members.shape[0] - 1)
        else:
            n_val = 0
        validation.append(members[:n_val])
        train.append(members[n_val:])
    return np.concatenate(train), np.concatenate(validation)


def median_heuristic_bandwidth(X, rng: np.random.Generator, *, max_rows: int = 256) -> float:
    """Bandwidth c with ``c * median ||x - x'|| = sqrt(2)``.

    Rule (documented choice): for small angle differences every angle-type encoding gives
    ``k ~ exp(-c^2 ||x - x'||^2 / 4)`` (from ``cos^2(a/2) ~ exp(-a^2/4)``), so this c gives
    the median pair a kernel value near ``exp(-1/2)``, the median heuristic of Gaussian
    kernels (common practice, e.g. Schoelkopf & Smola 2002). Uses at most ``max_rows`` rows
    drawn from ``rng``; returns 1.0 when all rows coincide.
    """
    X = np.asarray(X, dtype=np.float64)
    if X.shape[0] > max_rows:
        X = X[rng.choice(X.shape[0], max_rows, replace=False)]
    sq = np.sum(X * X, axis=1)
    d2 = np.maximum(sq[:, None] + sq[None, :] - 2.0 * X @ X.T, 0.0)
    upper = np.sqrt(d2[np.triu_indices(X.shape[0], k=1)])
    upper = upper[upper > 1e-12]
    if upper.size == 0:
        return 1.0
    return float(math.sqrt(2.0) / np.median(upper))


# XLA options for small problems, where compiling the training step costs more than running
# it. Measured on the CPU for a 3-qubit layered step on 32 samples: 5.4 s of compilation with
# the defaults, 0.85 s with these, and no slower steps; at 8 qubits x 512 samples the steps
# run ~17% slower, so larger problems keep the defaults. Options this jaxlib does not know
# are dropped (``quick_compile_options``).
_QUICK_COMPILE_WISHES = (("xla_backend_optimization_level", 0),
                         ("xla_cpu_use_fusion_emitters", False))
QUICK_COMPILE_AMPLITUDES = 2**16  # padded rows * 2**n_qubits up to which compiling is quick


@functools.lru_cache(maxsize=1)
def quick_compile_options() -> dict:
    """The subset of the quick-compile XLA options this jaxlib accepts (probed once)."""
    accepted = {}
    for name, value in _QUICK_COMPILE_WISHES:
        try:
            jax.jit(lambda x: x + 1, compiler_options={name: value}).lower(1.0).compile()
        except Exception:  # an unknown option name raises; keep going without it
            continue
        accepted[name] = value
    return accepted


def quick_compile(n_rows: int, n_qubits: int) -> bool:
    """True when a problem is small enough that fast compilation beats optimized code."""
    return padded_size(n_rows) * 2**n_qubits <= QUICK_COMPILE_AMPLITUDES


def padded_size(n: int) -> int:
    """Row count after padding: n rounded up to a multiple of ``max(32, 2**(floor(log2 n) - 2))``.

    From 128 rows on that adds less than 25% rows (below, up to 31 rows); shapes then repeat
    across data sets of similar size, so a grid search or cross-validation compiles one step
    per size bucket. Sizes above 4096 are not padded.
    """
    if n > 4096:
        return n
    granularity = max(32, 2 ** (max(n, 1).bit_length() - 3))
    return -(-n // granularity) * granularity


def _pad_rows(X, y):
    """Pad to ``padded_size`` with copies of row 0 and label -1 (masked out by the loss)."""
    extra = padded_size(X.shape[0]) - X.shape[0]
    if extra == 0:
        return X, y
    return (np.concatenate([X, np.repeat(X[:1], extra, axis=0)]),
            np.concatenate([y, np.full(extra, -1, dtype=y.dtype)]))


def _batch_counts(y_train, n_classes, batch_size):
    """Samples per class of a class-balanced batch, or None for full batch."""
    counts = np.bincount(y_train, minlength=n_classes)
    if batch_size == 0 or batch_size >= y_train.shape[0]:
        return None
    per_class = max(1, batch_size // n_classes)
    return tuple(int(min(n, per_class)) for n in counts)


def training_memory_bytes(blueprint: Blueprint, batch_rows: int, validation_rows: int) -> int:
    """Rough peak memory of one training step, in bytes.

    Reverse mode keeps about two statevector copies per compiled circuit stage for the
    backward pass (complex64: 8 bytes per amplitude), plus a few Gram-sized matrices
    (the complex overlap kept for the derivative and real temporaries). Product encodings
    never form statevectors.
    """
    grams = 24 * (batch_rows**2 + validation_rows**2)
    if is_product(blueprint) or blueprint.state_kind != "gates":
        return grams + 64 * (batch_rows + validation_rows) * blueprint.n_qubits
    stages = len(compile_blueprint(blueprint).stages)
    amplitudes = (batch_rows * (2 * stages + 4) + 4 * validation_rows) * 2**blueprint.n_qubits
    return grams + 8 * amplitudes


# --------------------------------------------------------------------------- compiled step

def balanced_batch_indices(key, members, class_sizes, counts):
    """Row indices of a class-balanced mini-batch, ordered by class.

    From class c it takes ``counts[c]`` distinct members, a uniform subset without
    replacement: the rows with the ``counts[c]`` smallest of i.i.d. uniform draws. Class
    order makes positional folds (``i % folds``) stratified.

    Args:
      key: PRNG key.
      members: tuple of int arrays, one per class, each [M_c] (padded beyond the class size).
      class_sizes: int array [C], the real size of each class (entries beyond are padding).
      counts: tuple of Python ints, rows per class (static).

    Returns:
      int array of shape [sum(counts)].
    """
    keys = jax.random.split(key, len(members))
    picks = []
    for c, (rows, class_key, count) in enumerate(zip(members, keys, counts)):
        draws = jax.random.uniform(class_key, rows.shape)
        draws = jnp.where(jnp.arange(rows.shape[0]) < class_sizes[c], draws, 2.0)  # padding
        picks.append(rows[jnp.argsort(draws)[:count]])
    return jnp.concatenate(picks)


def _learning_rate_schedule(config: _StaticConfig):
    lr = config.learning_rate
    if config.schedule == "constant":
        return optax.constant_schedule(lr)
    decay_steps = max(1, config.steps)
    if config.schedule == "cosine":
        return optax.cosine_decay_schedule(lr, decay_steps)
    warmup = max(1, decay_steps // 10)
    return optax.warmup_cosine_decay_schedule(0.0, lr, warmup, max(decay_steps, warmup + 1))


def _optimizer(config: _StaticConfig):
    schedule = _learning_rate_schedule(config)
    if config.optimizer == "adam":
        base = optax.adam(schedule)
    elif config.optimizer == "sgd":
        base = optax.sgd(schedule)
    elif config.optimizer == "rmsprop":
        base = optax.rmsprop(schedule)
    else:
        base = optax.adamw(schedule, weight_decay=config.weight_decay)
    if config.clip_norm > 0:
        base = optax.chain(optax.clip_by_global_norm(config.clip_norm), base)
    return base, schedule


def _host_overlap(states):
    """O = S S^H on the host with BLAS ``herk`` (half the work of a general product).

    ``kernels.herk_upper`` gives the upper triangle U of ``conj(S S^H)`` with zeros below;
    O is Hermitian, so O = conj(U) + U^T with the (real) diagonal counted once.
    """
    upper = herk_upper(np.ascontiguousarray(states))
    overlap = np.empty(upper.shape, upper.dtype)  # C order, as XLA expects it back
    np.conjugate(upper, out=overlap)
    overlap += upper.T
    np.fill_diagonal(overlap, upper.diagonal().real)
    return overlap


def _overlap_on_host(states):
    shape = jax.ShapeDtypeStruct((states.shape[0], states.shape[0]), states.dtype)
    return jax.pure_callback(_host_overlap, shape, states)


def _overlap_in_xla(states):
    return jnp.matmul(states, jnp.conj(states).T, precision=EXACT)


def planar_matmul(weights, real, imag):
    """``W @ (A + iB)`` for a complex W as three real products (Gauss's trick).

    ``T1 = Re W @ A``, ``T2 = Im W @ B``, ``T3 = (Re W + Im W) @ (A + B)``; then
    ``Re = T1 - T2`` and ``Im = T3 - T1 - T2`` (Knuth, TAOCP vol. 2, 4.6.4: three real
    multiplications per complex one). Three real float32 products instead of the four a
    complex product costs; XLA's CPU float32 product runs at OpenBLAS ``sgemm`` speed, so
    this needs no host callback. 2000 x 2000 by 2000 x 4096 on a 2-core machine: 0.54 s
    against 0.81 s for one ``cgemm`` in a standalone timing; between a tie and 0.9x in
    experiments/bench_training.py (``ratio_three_real_products_to_cgemm``).

    Args:
      weights: complex array of shape [N, N].
      real, imag: real arrays of shape [N, D].

    Returns:
      (real part, imaginary part), real arrays of shape [N, D].
    """
    w_real, w_imag = jnp.real(weights), jnp.imag(weights)
    # full float32 products (kernels.EXACT): TF32 on a GPU would round the gradient's inputs
    t1 = jnp.matmul(w_real, real, precision=EXACT)
    t2 = jnp.matmul(w_imag, imag, precision=EXACT)
    t3 = jnp.matmul(w_real + w_imag, real + imag, precision=EXACT)
    return t1 - t2, t3 - t1 - t2


def _fidelity_with(overlap_fn):
    """|S S^H|^2 as a function of complex states S with the symmetric custom derivative."""

    @jax.custom_vjp
    def fidelity(states):
        return forward(states)[0]

    def forward(states):
        overlap = overlap_fn(states)
        return jnp.real(overlap) ** 2 + jnp.imag(overlap) ** 2, (states, overlap)

    def backward(residuals, cotangent):
        # K = |O|^2 with O = S S^H, S = A + iB. K is symmetric, so only the symmetric part
        # G_s of the cotangent matters, and dL/dA + i dL/dB = 4 (G_s * O) S (derivation:
        # R = Re O = A A^T + B B^T, I = Im O = B A^T - A B^T, K = R^2 + I^2). One complex
        # product (done as three real ones) instead of the two complex products that
        # differentiating S @ conj(S).T operand by operand costs. JAX's cotangent of a
        # complex input of a real function is dL/dA - i dL/dB.
        states, overlap = residuals
        symmetric = 0.5 * (cotangent + cotangent.T)
        weights = 4.0 * symmetric.astype(overlap.dtype) * overlap
        d_real, d_imag = planar_matmul(weights, jnp.real(states), jnp.imag(states))
        return (jax.lax.complex(d_real, -d_imag),)

    fidelity.defvjp(forward, backward)
    return fidelity


_fidelity_on_host = _fidelity_with(_overlap_on_host)
_fidelity_in_xla = _fidelity_with(_overlap_in_xla)

# complex multiply-adds of S S^H from which the host herk pays off (a callback costs a
# fixed overhead; small products stay inside the compiled XLA graph)
HOST_PRODUCT_WORK = 2**27


def symmetric_fidelity_gram(states):
    """Train Gram ``K_ij = |<s_i|s_j>|^2`` with a derivative of one complex product.

    Same values as ``kernels.gram_for_training`` on states. The derivative uses that K is
    symmetric (see ``_fidelity_with``), where differentiating ``S @ conj(S).T`` operand by
    operand costs two products; that product is done as three real float32 products
    (``planar_matmul``). Large problems (N^2 * 2^n >= HOST_PRODUCT_WORK) compute the
    forward overlap on the host through ``jax.pure_callback`` with BLAS ``herk`` (half the
    work of a general product; XLA's CPU complex product was 1.85x slower than OpenBLAS
    here, 2000 x 4096 states: 3.5 s vs 1.9 s, herk 1.0 s). On the device path
    (``kernels.device_path()``, e.g. on a GPU) the overlap always stays in XLA: no callback,
    no host copy of the states. Not differentiable twice.

    Args:
      states: complex array of shape [N, 2**n].

    Returns:
      real array of shape [N, N].
    """
    n_rows, dim = states.shape
    large = n_rows * n_rows * dim >= HOST_PRODUCT_WORK
    fidelity = _fidelity_on_host if large and not device_path() else _fidelity_in_xla
    return fidelity(states)


def training_gram(blueprint: Blueprint, params: dict, X, *, kernel: str = "fidelity",
                  gamma: float = 1.0):
    """Differentiable train Gram [N, N] of the kernel that the SVM will use.

    ``kernel="fidelity"``: the closed form for product encodings
    (``kernels.gram_for_training``), otherwise states and ``symmetric_fidelity_gram``.
    ``kernel="projected"``: the projected quantum kernel from the per-qubit Pauli
    expectations (``kernels.encoding_expectations``, differentiable), so training optimizes
    the same Gram that ``kernels.projected_gram`` gives the SVM.
    """
    if kernel == "projected":
        expectations = encoding_expectations(blueprint, params, X)
        return projected_gram_from_expectations(expectations, expectations, gamma)
    if is_product(blueprint) or blueprint.state_kind != "gates":
        return gram_for_training(blueprint, params, X)
    return symmetric_fidelity_gram(encode_states(blueprint, params, X))


def training_loss_function(blueprint: Blueprint, config: _StaticConfig):
    """``loss(trainable, fixed, reference, X, y_int) -> (loss, metrics)`` for value_and_grad.

    ``metrics`` = (objective loss without penalty, penalty, alignment, centered alignment),
    all float arrays of shape []. Rows with label -1 are padding and masked out.
    """
    objective = objectives.resolve_objective(config.objective)

    def loss(trainable, fixed, reference, X, y_padded):
        params = {**fixed, **trainable}
        mask = y_padded >= 0
        y_int = jnp.maximum(y_padded, 0)
        gram = training_gram(blueprint, params, X, kernel=config.kernel, gamma=config.gamma)
        value = objective(gram, y_int, config.n_classes, config.ridge_lambda, config.folds,
                          mask)
        penalty = (objectives.weight_penalty(trainable, reference, config.l2_penalty)
                   if config.l2_penalty > 0 else jnp.zeros((), value.dtype))
        target = jax.lax.stop_gradient(objectives.target_matrix(y_int, config.n_classes))
        gram_const = jax.lax.stop_gradient(gram)
        metrics = (value, penalty, objectives.kernel_alignment(gram_const, target, mask),
                   objectives.centered_alignment(gram_const, target, mask))
        return value + penalty, metrics

    return loss


@functools.lru_cache(maxsize=32)
def _compiled_step(blueprint: Blueprint, config: _StaticConfig):
    """Build (and cache per configuration) the jitted training step and its optimizer."""
    optimizer, schedule = _optimizer(config)
    loss = training_loss_function(blueprint, config)
    objective = objectives.resolve_objective(config.objective)

    def step(trainable, opt_state, fixed, reference, X_train, y_train, members, class_sizes,
             X_val, y_val, key):
        if config.batch_counts is None:
            X, y = X_train, y_train
        else:
            index = balanced_batch_indices(key, members, class_sizes, config.batch_counts)
            X, y = X_train[index], y_train[index]
        (_, metrics), grads = jax.value_and_grad(loss, has_aux=True)(
            trainable, fixed, reference, X, y)
        grad_norm = optax.tree.norm(grads)
        if config.validation:
            params = {**fixed, **trainable}
            gram_val = training_gram(blueprint, params, X_val, kernel=config.kernel,
                                     gamma=config.gamma)
            validation = objective(gram_val, jnp.maximum(y_val, 0), config.n_classes,
                                   config.ridge_lambda, config.validation_folds, y_val >= 0)
        else:
            validation = jnp.full((), jnp.nan, jnp.float32)
        updates, new_state = optimizer.update(grads, opt_state, trainable)
        new_trainable = optax.apply_updates(trainable, updates)
        if config.log_bandwidth_bound >= 0 and "log_bandwidth" in new_trainable:
            # projection onto the allowed bandwidth interval around the start
            start = reference["log_bandwidth"]
            new_trainable["log_bandwidth"] = jnp.clip(new_trainable["log_bandwidth"],
                                                      start - config.log_bandwidth_bound,
                                                      start + config.log_bandwidth_bound)
        return new_trainable, new_state, metrics + (grad_norm, validation)

    options = quick_compile_options() if config.quick_compile else None
    return jax.jit(step, compiler_options=options), optimizer, schedule


# --------------------------------------------------------------------------- checkpoints

def _fingerprint(blueprint, settings, seed, X, y_int, classes, start_params, snapshots=()):
    digest = hashlib.sha256()
    digest.update(repr(tuple(snapshots)).encode())
    digest.update(repr(blueprint).encode())
    digest.update(repr(settings._replace(checkpoint_every=0)).encode())
    digest.update(str(int(seed)).encode())
    digest.update(np.ascontiguousarray(X).tobytes())
    digest.update(np.ascontiguousarray(y_int).tobytes())
    digest.update(repr(classes.tolist()).encode())
    if start_params is not None:
        for name in sorted(start_params):
            digest.update(name.encode())
            digest.update(np.ascontiguousarray(start_params[name]).tobytes())
    return digest.hexdigest()


def _save_checkpoint(directory, *, fingerprint, seed, objective, state, opt_state) -> None:
    os.makedirs(directory, exist_ok=True)
    arrays = {}
    for group in ("params", "best", "initial"):
        for name, value in state[group].items():
            arrays[f"{group}/{name}"] = np.asarray(value)
    for step, values in state["snapshots"].items():
        for name, value in values.items():
            arrays[f"snapshot{step}/{name}"] = np.asarray(value)
    for i, leaf in enumerate(jax.tree_util.tree_leaves(opt_state)):
        arrays[f"opt/{i:04d}"] = np.asarray(leaf)
    meta = {key: state[key] for key in ("next_step", "best_step", "best_loss", "since_best",
                                         "history", "stop_reason", "elapsed",
                                         "initial_bandwidth")}
    meta.update(format=CHECKPOINT_FORMAT, fingerprint=fingerprint)
    arrays["meta_json"] = np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8)
    arrays["batch_key_data"] = np.asarray(jax.random.key_data(state["batch_key"]))
    npz_path = os.path.join(directory, CHECKPOINT_NPZ)
    artifacts.write_npz(npz_path, arrays)
    with open(npz_path, "rb") as stream:
        sha = hashlib.sha256(stream.read()).hexdigest()
    summary = {"format": CHECKPOINT_FORMAT, "step": state["next_step"], "seed": int(seed),
               "objective": objective, "best_step": state["best_step"],
               "stop_reason": state["stop_reason"], "fingerprint": fingerprint,
               "npz_sha256": sha}
    artifacts.write_bytes(os.path.join(directory, CHECKPOINT_JSON),
                          json.dumps(summary, indent=2).encode())


def checkpoint_problem(directory) -> str | None:
    """Why the checkpoint in ``directory`` cannot be trusted, or None (also when absent).

    Like run artifacts, a checkpoint is checked against the SHA-256 recorded beside it
    (``checkpoint.json``). A mismatch is accepted only when the archive reads back whole
    (every member's CRC) and is newer than the record: a kill between the two atomic writes
    of ``_save_checkpoint`` leaves exactly that.
    """
    path = os.path.join(directory, CHECKPOINT_NPZ)
    if not os.path.exists(path):
        return None
    try:
        with open(os.path.join(directory, CHECKPOINT_JSON), encoding="utf-8") as stream:
            record = json.load(stream)
        expected = record.get("npz_sha256") if isinstance(record, dict) else None
    except (OSError, ValueError):
        record, expected = {}, None
    if expected is not None and artifacts.sha256_file(path) == expected:
        return None
    try:
        with np.load(path, allow_pickle=False) as data:
            meta = json.loads(data["meta_json"].tobytes().decode())
            for key in data.files:
                data[key]  # reads the member: zipfile checks its CRC-32
    except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile) as exc:
        return f"checkpoint {path} is damaged ({' '.join(str(exc).split())})"
    step = record.get("step") if isinstance(record, dict) else None
    if expected is None or not isinstance(step, int) or meta.get("next_step", -1) <= step:
        return f"checkpoint {path} is damaged (its SHA-256 differs from {CHECKPOINT_JSON})"
    return None


def _load_checkpoint(directory, fingerprint, opt_template):
    path = os.path.join(directory, CHECKPOINT_NPZ)
    if not os.path.exists(path):
        return None
    problem = checkpoint_problem(directory)
    if problem:
        raise ArtifactError(f"{problem}; delete it or pass resume=False")
    try:
        with np.load(path, allow_pickle=False) as data:
            arrays = {key: data[key] for key in data.files}
    except (OSError, ValueError, zipfile.BadZipFile) as exc:
        raise ArtifactError(f"checkpoint {path} cannot be read ({exc}); delete it or pass "
                            "resume=False") from None
    meta = json.loads(arrays["meta_json"].tobytes().decode())
    if meta.get("format") != CHECKPOINT_FORMAT:
        raise ArtifactError(f"checkpoint {path} has format {meta.get('format')!r}, this "
                            f"version reads {CHECKPOINT_FORMAT}; delete it or pass resume=False")
    if meta["fingerprint"] != fingerprint:
        raise ArtifactError(f"checkpoint {path} belongs to other data, settings or seed; use "
                            "another checkpoint_dir, delete the checkpoint or pass resume=False")
    state = {key: meta[key] for key in ("next_step", "best_step", "best_loss", "since_best",
                                         "history", "stop_reason", "elapsed",
                                         "initial_bandwidth")}
    for group in ("params", "best", "initial"):
        state[group] = {key.split("/", 1)[1]: value for key, value in arrays.items()
                        if key.startswith(group + "/")}
    state["snapshots"] = {}
    for key, value in arrays.items():
        if key.startswith("snapshot"):
            group, name = key.split("/", 1)
            state["snapshots"].setdefault(int(group[len("snapshot"):]), {})[name] = value
    leaves, treedef = jax.tree_util.tree_flatten(opt_template)
    stored = [arrays[f"opt/{i:04d}"] for i in range(len(leaves))]
    opt_state = jax.tree_util.tree_unflatten(
        treedef, [jnp.asarray(s, dtype=jnp.asarray(t).dtype) for s, t in zip(stored, leaves)])
    state["batch_key"] = jax.random.wrap_key_data(jnp.asarray(arrays["batch_key_data"]))
    return state, opt_state


# --------------------------------------------------------------------------- the loop

def _numpy_params(params):
    return {name: np.asarray(value) for name, value in params.items()}


def _progress_bar(enabled, total):
    if not enabled:
        return None
    from rich.progress import Progress  # only imported when a display is wanted
    bar = Progress(transient=False)
    bar.start()
    bar.add_task("training", total=total)
    return bar


def train_encoding(blueprint: Blueprint, X, y, settings: TrainingSettings = TrainingSettings(),
                   *, seed: int, params: dict | None = None, checkpoint_dir: str | None = None,
                   progress: bool = False, resume: bool = True,
                   pause_after: int | None = None, memory_budget=None,
                   snapshots=()) -> TrainingResult:
    """Learn the encoding's weights, biases and bandwidth on labelled data.

    Args:
      blueprint: the encoding circuit.
      X: float array of shape [N, F]; y: labels of shape [N] (any values, e.g. strings).
      settings: hyperparameters (``TrainingSettings``).
      seed: the one integer that fixes the split, the initialisation and every batch.
      params: starting parameters (dict as from ``initial_params``); None = the family's
        initial weights, biases ~ N(0, bias_scale^2) and the bandwidth of ``settings``.
      checkpoint_dir: write ``checkpoint.npz`` / ``checkpoint.json`` here every
        ``settings.checkpoint_every`` steps and at the end.
      progress: show a rich progress bar.
      resume: continue from a matching checkpoint in ``checkpoint_dir`` (exact resume).
      pause_after: stop after this many steps in this call (writing a checkpoint); calling
        again with the same arguments continues.
      memory_budget: bytes or a string such as "4GiB" (None: half the memory, at most 8 GiB);
        a step whose estimate (``training_memory_bytes``) exceeds it is refused up front.
      snapshots: step counts s; ``result.snapshots[s]`` holds the parameters that training
        stopped at step s would have returned (the best ones among steps 0..s; the final
        best ones when the loop ended earlier). Points of the trajectory for selection.

    Returns:
      ``TrainingResult``. ``history[t]`` describes the parameters after t updates: ``step``,
      ``objective`` (the loss being minimized on the training batch: the negated alignment
      for alignment objectives, penalty excluded), ``penalty``, ``alignment`` (uncentered
      kernel-target alignment on the training batch), ``centered_alignment``,
      ``validation_objective`` (same loss on the validation part; None without one),
      ``grad_norm`` (before clipping), ``learning_rate`` (of the update made at this step),
      ``wall_time`` (seconds since the start; the only field that differs between
      identical runs).
    """
    check_settings(settings, blueprint)
    if not isinstance(seed, (int, np.integer)) or isinstance(seed, bool) or seed < 0:
        raise InvalidInputError(f"seed must be a non-negative integer, got {seed!r}")
    X = validate_features(blueprint, X)
    classes, y_int = encode_labels(y, X.shape[0])
    n_classes = int(classes.shape[0])
    rng = np.random.default_rng(int(seed))
    train_idx, val_idx = stratified_split(y_int, settings.validation_fraction, rng)
    X_train, y_train = X[train_idx], y_int[train_idx]
    X_val, y_val = X[val_idx], y_int[val_idx]
    batch_counts = _batch_counts(y_train, n_classes, settings.batch_size)
    batch_total = y_train.shape[0] if batch_counts is None else sum(batch_counts)
    is_kfold = settings.objective == "ridge_kfold"
    if is_kfold and batch_total < settings.folds:
        raise InvalidInputError(f"ridge_kfold needs at least folds={settings.folds} samples per "
                                f"batch, got {batch_total}; lower folds, raise batch_size or "
                                "add samples")
    validation = val_idx.shape[0] > 0
    validation_folds = max(2, min(settings.folds, val_idx.shape[0]))
    budget = resolve_memory_budget(memory_budget)
    need = training_memory_bytes(blueprint, padded_size(batch_total),
                                 padded_size(val_idx.shape[0]) if validation else 0)
    if need > budget:
        raise ResourceLimitError(
            f"a training step on {batch_total} samples ({blueprint.n_qubits} qubits) needs "
            f"about {need / 2**30:.2f} GiB but the memory budget is {budget / 2**30:.2f} GiB; "
            "set batch_size (e.g. 64), use fewer qubits or raise memory_budget")

    root = jax.random.key(int(seed))
    init_key, batch_key = jax.random.split(root)
    frozen_names = set(blueprint.frozen) | set(settings.freeze)
    if params is None:
        start = _default_start(blueprint, settings, X_train, rng, init_key)
    else:
        missing = [name for name in PARAM_NAMES if name not in params]
        if missing:
            raise InvalidInputError(f"params lacks {missing}; start from "
                                    "hilbertune.initial_params(blueprint, key)")
        start = {name: jnp.asarray(np.asarray(params[name], dtype=np.float32))
                 for name in PARAM_NAMES}
    start_np = _numpy_params(start)
    trainable_names = tuple(name for name in PARAM_NAMES
                            if name not in frozen_names and start_np[name].size > 0)
    config = _StaticConfig(settings.objective, n_classes, float(settings.ridge_lambda),
                           int(settings.folds), int(validation_folds),
                           float(settings.l2_penalty), trainable_names, settings.optimizer,
                           float(settings.learning_rate), settings.schedule,
                           # a constant schedule does not depend on the step count: leaving
                           # it out lets runs of different lengths share one compiled step
                           0 if settings.schedule == "constant" else int(settings.steps),
                           float(settings.clip_norm),
                           float(settings.weight_decay), batch_counts, validation,
                           quick_compile(max(X_train.shape[0], X_val.shape[0]),
                                         blueprint.n_qubits),
                           settings.kernel, float(settings.gamma),
                           math.log(settings.bandwidth_range) if settings.bandwidth_range
                           else -1.0)
    step_fn, optimizer, schedule = _compiled_step(blueprint, config)

    fixed = {n: jnp.asarray(v) for n, v in start_np.items() if n not in trainable_names}
    reference = {n: jnp.asarray(start_np[n]) for n in trainable_names}
    trainable = dict(reference)
    opt_state = optimizer.init(trainable)
    snapshots = tuple(sorted({int(s) for s in snapshots}))
    if any(s < 0 for s in snapshots):
        raise InvalidInputError(f"snapshots must be step counts >= 0, got {snapshots!r}")
    fingerprint = _fingerprint(blueprint, settings, seed, X, y_int, classes,
                               None if params is None else start_np, snapshots)
    state = {"next_step": 0, "best_step": 0, "best_loss": None, "since_best": 0,
             "history": [], "stop_reason": None, "elapsed": 0.0, "params": start_np,
             "best": start_np, "initial": start_np, "batch_key": batch_key, "snapshots": {},
             "initial_bandwidth": float(math.exp(float(start_np["log_bandwidth"])))}
    if checkpoint_dir is not None and resume:
        loaded = _load_checkpoint(checkpoint_dir, fingerprint, opt_state)
        if loaded is not None:
            state, opt_state = loaded
            trainable = {n: jnp.asarray(state["params"][n]) for n in trainable_names}

    def result():
        taken = {s: state["snapshots"].get(s, state["best"]) for s in snapshots}
        return TrainingResult(state["best"], state["initial"], state["history"],
                              state["stop_reason"], state["best_step"], classes,
                              state["initial_bandwidth"], taken)

    if state["stop_reason"] is not None:  # the checkpoint holds a finished run
        return result()

    X_train_padded, y_train_padded = _pad_rows(X_train, y_train)
    X_val_padded, y_val_padded = _pad_rows(X_val, y_val) if validation else (X_train[:1],
                                                                             y_train[:1])
    members = [np.nonzero(y_train == c)[0].astype(np.int32) for c in range(n_classes)]
    args = (jnp.asarray(X_train_padded, jnp.float32), jnp.asarray(y_train_padded),
            tuple(jnp.asarray(np.pad(m, (0, padded_size(m.shape[0]) - m.shape[0])))
                  for m in members),
            jnp.asarray([m.shape[0] for m in members], jnp.int32),
            jnp.asarray(X_val_padded, jnp.float32), jnp.asarray(y_val_padded))
    if not trainable_names:
        state["history"] = [_evaluate_only(blueprint, config, start, args, validation)]
        state["stop_reason"] = "nothing to train: every parameter is frozen"
        return result()
    bar = _progress_bar(progress, settings.steps + 1 - state["next_step"])
    started = time.perf_counter() - state["elapsed"]
    calls = 0
    try:
        while state["stop_reason"] is None:
            t = state["next_step"]
            key = jax.random.fold_in(state["batch_key"], t)
            new_trainable, new_opt_state, metrics = step_fn(trainable, opt_state, fixed,
                                                            reference, *args, key)
            value, penalty, align, centered, grad_norm, val_loss = (
                float(m) for m in jax.device_get(metrics))
            finite = all(math.isfinite(v) for v in (value, penalty, grad_norm)) and (
                not validation or math.isfinite(val_loss))
            if not finite:
                if t == 0:
                    raise TrainingError(
                        "the objective or its gradient is not finite at the initial "
                        "parameters; try another bandwidth, a larger ridge_lambda or another "
                        "objective")
                state["stop_reason"] = (f"non-finite objective or gradient at step {t}; kept "
                                        f"the parameters of step {state['best_step']}")
                break
            current = state["params"]  # the parameters after t updates, as numpy
            state["history"].append({
                "step": t, "objective": value, "penalty": penalty, "alignment": align,
                "centered_alignment": centered,
                "validation_objective": val_loss if validation else None,
                "grad_norm": grad_norm,
                "learning_rate": float(schedule(t)) if t < settings.steps else 0.0,
                "wall_time": time.perf_counter() - started})
            monitored = val_loss if validation else value
            if not validation or state["best_loss"] is None or \
                    monitored < state["best_loss"] - settings.min_improvement:
                state["best_loss"], state["best_step"], state["best"] = monitored, t, current
                state["since_best"] = 0
            else:
                state["since_best"] += 1
            if t in snapshots:
                state["snapshots"][t] = state["best"]
            calls += 1
            if bar is not None:
                bar.update(bar.task_ids[0], advance=1,
                           description=f"step {t} objective {value:+.4f}")
            if t >= settings.steps:
                state["stop_reason"] = f"completed {settings.steps} steps"
            elif validation and settings.patience and state["since_best"] >= settings.patience:
                state["stop_reason"] = (f"early stop: validation objective did not improve for "
                                        f"{settings.patience} steps")
            else:
                trainable, opt_state = new_trainable, new_opt_state
                state["next_step"] = t + 1
                state["params"] = _numpy_params({**fixed, **trainable})
            state["elapsed"] = time.perf_counter() - started
            if state["stop_reason"] is not None:
                break
            pausing = pause_after is not None and calls >= pause_after
            if checkpoint_dir is not None and (pausing or (
                    settings.checkpoint_every
                    and state["next_step"] % settings.checkpoint_every == 0)):
                _save_checkpoint(checkpoint_dir, fingerprint=fingerprint, seed=seed,
                                 objective=settings.objective, state=state, opt_state=opt_state)
            if pausing:
                note = ("call again with the same arguments to resume"
                        if checkpoint_dir is not None else "no checkpoint_dir, so it cannot "
                        "resume")
                return result()._replace(
                    stop_reason=f"paused before step {state['next_step']}; {note}")
    finally:
        if bar is not None:
            bar.stop()
    if checkpoint_dir is not None:
        _save_checkpoint(checkpoint_dir, fingerprint=fingerprint, seed=seed,
                         objective=settings.objective, state=state, opt_state=opt_state)
    return result()


def _default_start(blueprint, settings, X_train, rng, init_key):
    frozen_names = set(blueprint.frozen) | set(settings.freeze)
    if settings.bandwidth is not None:
        bandwidth = float(settings.bandwidth)
    elif "log_bandwidth" in frozen_names:
        bandwidth = 1.0  # a frozen bandwidth keeps the family's scale (e.g. basis encoding)
    else:
        bandwidth = median_heuristic_bandwidth(X_train, rng)
    return initial_params(blueprint, init_key, bandwidth=bandwidth,
                          bias_scale=settings.bias_scale)


def starting_params(blueprint: Blueprint, X, y, settings: TrainingSettings = TrainingSettings(),
                    *, seed: int) -> dict:
    """The parameters ``train_encoding(blueprint, X, y, settings, seed=seed)`` starts from
    (same split, same bandwidth heuristic, same random biases), as numpy arrays.

    This is the untrained encoding of a run: the kernel that selection always keeps as a
    candidate.
    """
    check_settings(settings, blueprint)
    X = validate_features(blueprint, X)
    _, y_int = encode_labels(y, X.shape[0])
    rng = np.random.default_rng(int(seed))
    train_idx, _ = stratified_split(y_int, settings.validation_fraction, rng)
    init_key, _ = jax.random.split(jax.random.key(int(seed)))
    return _numpy_params(_default_start(blueprint, settings, X[train_idx], rng, init_key))


def _evaluate_only(blueprint, config, params, args, validation):
    """History entry for an encoding without trainable parameters."""
    started = time.perf_counter()
    loss = training_loss_function(blueprint, config)
    objective_fn = objectives.resolve_objective(config.objective)

    def evaluate(params, X, y, X_val, y_val):
        _, metrics = loss({}, params, {}, X, y)
        gram = training_gram(blueprint, params, X_val, kernel=config.kernel,
                             gamma=config.gamma)
        return metrics + (objective_fn(gram, jnp.maximum(y_val, 0), config.n_classes,
                                       config.ridge_lambda, config.validation_folds,
                                       y_val >= 0),)

    options = quick_compile_options() if config.quick_compile else None
    objective, penalty, align, centered, val = jax.jit(evaluate, compiler_options=options)(
        params, args[0], args[1], args[4], args[5])
    val = float(val) if validation else None
    return {"step": 0, "objective": float(objective), "penalty": float(penalty),
            "alignment": float(align), "centered_alignment": float(centered),
            "validation_objective": val, "grad_norm": 0.0, "learning_rate": 0.0,
            "wall_time": time.perf_counter() - started}


# --------------------------------------------------------------------------- SVM hand-off

class SvmChoice(NamedTuple):
    """Result of ``tune_svm_c``."""

    C: float  # the regularization constant with the best mean CV accuracy
    cv_accuracy: float  # its mean accuracy over the folds
    scores: dict  # C -> mean CV accuracy for every grid value
    folds: int  # number of stratified folds used


def tune_svm_c(K_train, y, c_grid=(0.1, 1.0, 10.0, 100.0), cv: int = 5,
               seed: int = 0) -> SvmChoice:
    """Choose the SVM constant C by stratified k-fold CV on a precomputed train Gram.

    Uses scikit-learn's ``GridSearchCV`` over ``SVC(kernel="precomputed")`` (it slices the
    Gram rows and columns per fold). ``cv`` is lowered to the smallest class count when a
    class has fewer samples.

    Args:
      K_train: float array of shape [N, N]; y: labels [N]; c_grid: positive values of C.
    """
    from sklearn.model_selection import GridSearchCV, StratifiedKFold
    from sklearn.svm import SVC

    K_train = np.asarray(K_train, dtype=np.float64)
    if K_train.ndim != 2 or K_train.shape[0] != K_train.shape[1]:
        raise InvalidInputError(f"K_train must be a square train Gram, got shape "
                                f"{K_train.shape}; pass the kernel of the training set with "
                                "itself")
    _, y_int = encode_labels(y, K_train.shape[0])
    grid = [float(c) for c in c_grid]
    if not grid or not all(c > 0 and math.isfinite(c) for c in grid):
        raise InvalidInputError(f"c_grid must hold positive numbers, got {c_grid!r}")
    folds = int(min(cv, np.bincount(y_int).min()))
    if folds < 2:
        raise InvalidInputError("a class has a single sample, too few for cross-validated C; "
                                "add samples or pass C explicitly")
    splitter = StratifiedKFold(folds, shuffle=True, random_state=int(seed))
    search = GridSearchCV(SVC(kernel="precomputed"), {"C": grid}, cv=splitter,
                          scoring="accuracy")
    search.fit(K_train, np.asarray(y).reshape(-1))
    means = search.cv_results_["mean_test_score"]
    scores = {c: float(s) for c, s in zip(grid, means)}
    return SvmChoice(float(search.best_params_["C"]), float(search.best_score_), scores, folds)
