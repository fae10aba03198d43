"""Quantum kernels from encoded states: fidelity, closed-form product, projected.

Data flow: ``encode_states`` gives S of shape [N, 2**n] once; the fidelity Gram is then one
complex matrix product ``|S_a S_b^H|**2`` per block of rows, never a circuit per pair.
Encodings without entangling gates use the closed form (a product of per-qubit overlaps),
so hundreds of qubits work. Everything here is pure JAX except ``FrozenKernel`` (a
callable for scikit-learn) and the memory-budget helpers.

Two engine paths give the same numbers (within float32 rounding): on a CPU the host path
hands concrete states to BLAS (``herk``, ``gemm``) and assembles product-kernel tiles in
numpy; on a GPU the device path keeps states, Gram matrices and product kernels on the
device as pure XLA (no callbacks, no host copies of states). ``device_path()`` decides.
"""

from __future__ import annotations

import contextlib
import functools
import os
import re

import numpy as np
import jax
import jax.numpy as jnp

from hilbertune import gates
from hilbertune.gates import EXACT  # full float32 products on every backend (see gates)
from hilbertune.circuits import (Blueprint, apply_circuit, check_dtype, encode_states,
                                 is_product, product_factors, require_state_memory,
                                 validate_features)
from hilbertune.errors import InvalidInputError, ResourceLimitError

# --------------------------------------------------------------------------- where products run

ENGINE_PATHS = ("auto", "host", "device")
COMPUTE_DEVICES = ("auto", "cpu", "gpu")
# The one process-wide setting of the engine (set by ``select_device`` from
# ``compute.device``, or forced by tests and benchmarks through ``engine_path``).
_ENGINE = {"path": "auto"}


def compute_platform() -> str:
    """Platform that JAX computations run on: "cpu", "gpu", "tpu", ... (the default
    device when one is pinned, else JAX's default backend)."""
    pinned = jax.config.jax_default_device
    if pinned is None:
        return jax.default_backend()
    return pinned if isinstance(pinned, str) else pinned.platform


def device_path() -> bool:
    """True when states, Grams and training products stay on the device as pure XLA.

    "auto" (the default) takes the device path on any accelerator and the host (BLAS)
    path on a CPU; ``set_engine_path("device")`` forces the device path on a CPU, so tests
    cover the GPU code without a GPU.
    """
    path = _ENGINE["path"]
    if path == "auto":
        return compute_platform() != "cpu"
    return path == "device"


def set_engine_path(path: str) -> None:
    """Choose the engine path: "auto", "host" (BLAS on concrete states) or "device".

    The training Gram reads the path when it is traced, so a change of the effective path
    clears JAX's compilation caches (compiled training steps are traced again with the
    new path; switch once, not per call).
    """
    if path not in ENGINE_PATHS:
        raise InvalidInputError(f"engine path must be one of {', '.join(ENGINE_PATHS)}, "
                                f"got {path!r}")
    before = device_path()
    _ENGINE["path"] = path
    if device_path() != before:
        jax.clear_caches()


@contextlib.contextmanager
def engine_path(path: str):
    """``with engine_path("device"): ...`` runs the block on that path, then restores."""
    before = _ENGINE["path"]
    set_engine_path(path)
    try:
        yield
    finally:
        set_engine_path(before)


def gpu_devices() -> list:
    """JAX's GPU devices; empty when this jaxlib has no GPU backend or finds no GPU."""
    try:
        return list(jax.devices("gpu"))
    except (RuntimeError, ValueError):
        return []


def select_device(choice: str) -> None:
    """Apply ``compute.device``: "auto" (a GPU when JAX has one), "cpu" or "gpu".

    "cpu" pins JAX to the CPU and the host (BLAS) path even where a GPU exists; "gpu" pins
    the first GPU and the device path, and refuses when there is none.
    """
    if choice not in COMPUTE_DEVICES:
        raise InvalidInputError(f"compute.device must be one of "
                                f"{', '.join(map(repr, COMPUTE_DEVICES))}, got {choice!r}")
    if choice == "gpu":
        found = gpu_devices()
        if not found:
            raise InvalidInputError(
                f"compute.device = 'gpu' but JAX found no GPU (backend: "
                f"{jax.default_backend()}); install jax with CUDA support or set "
                "compute.device = 'auto'")
        jax.config.update("jax_default_device", found[0])
        set_engine_path("device")
    elif choice == "cpu":
        jax.config.update("jax_default_device", jax.devices("cpu")[0])
        set_engine_path("host")
    else:
        jax.config.update("jax_default_device", None)
        set_engine_path("auto")


def _default_device():
    pinned = jax.config.jax_default_device
    if pinned is not None and not isinstance(pinned, str):
        return pinned
    return jax.devices(pinned)[0] if isinstance(pinned, str) else jax.devices()[0]


def compute_device() -> str:
    """The device computations run on and the engine path, in words (for run records),
    e.g. ``"cpu: cpu (host BLAS path)"`` or ``"gpu: NVIDIA H200 (device path)"``."""
    device = _default_device()
    path = "device path" if device_path() else "host BLAS path"
    return f"{device.platform}: {getattr(device, 'device_kind', '?')} ({path})"


def device_memory_available():
    """Free bytes of the default accelerator's memory, or None (a CPU, or no statistics).

    From ``Device.memory_stats()``: ``bytes_limit - bytes_in_use``.
    """
    if compute_platform() == "cpu":
        return None
    try:
        stats = _default_device().memory_stats()
    except Exception:  # a backend without statistics raises; the budget then stands alone
        return None
    if not stats or "bytes_limit" not in stats:
        return None
    return int(stats["bytes_limit"]) - int(stats.get("bytes_in_use", 0))


# --------------------------------------------------------------------------- memory

_UNITS = {"": 1, "b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "kib": 2**10,
          "mib": 2**20, "gib": 2**30}


def resolve_memory_budget(budget=None) -> int:
    """Memory budget in bytes from an int, a string such as ``"2GiB"``, or None.

    None means half the physical memory, at most 8 GiB (common practice: leave room for
    the rest of the process and the copies XLA makes). On an accelerator whose memory
    statistics JAX reports, the budget refers to device memory: None means half the free
    device memory, and a larger budget than the free device memory is lowered to it, so
    the guards refuse work before XLA fails to allocate.
    """
    free = device_memory_available()
    if budget is None and free is not None:
        return max(1, free // 2)
    if budget is None:
        try:
            physical = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
        except (ValueError, OSError, AttributeError):
            physical = 8 * 2**30
        return int(min(8 * 2**30, physical // 2))
    if isinstance(budget, str):
        match = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([a-zA-Z]*)\s*", budget)
        unit = match.group(2).lower() if match else None
        if not match or unit not in _UNITS:
            raise InvalidInputError(f"memory budget {budget!r} not understood; write e.g. "
                                    "'2GiB', '500MB' or a number of bytes")
        budget = float(match.group(1)) * _UNITS[unit]
    try:
        whole = int(budget)
    except (TypeError, ValueError, OverflowError):
        whole = 0
    if not whole >= 1:
        raise InvalidInputError(f"memory budget must be a finite number of bytes >= 1, got "
                                f"{budget!r}; write e.g. '2GiB'")
    return whole if free is None else max(1, min(whole, free))


# --------------------------------------------------------------------------- fidelity

@jax.jit
def _gram_block(states_a, states_b):
    overlap = jnp.matmul(states_a, jnp.conj(states_b).T, precision=EXACT)
    return jnp.real(overlap) ** 2 + jnp.imag(overlap) ** 2


@functools.partial(jax.jit, static_argnames=("block_rows",))
def _device_gram(states_a, states_b, block_rows):
    # Row blocks of one product each (lax.map's batches: the last one may be short), so
    # the complex temporary stays [block_rows, N_b]; nothing leaves the device.
    conj_b = jnp.conj(states_b).T

    def rows(block):
        overlap = jnp.matmul(block, conj_b, precision=EXACT)
        return jnp.real(overlap) ** 2 + jnp.imag(overlap) ** 2

    if block_rows >= states_a.shape[0]:
        return rows(states_a)
    return jax.lax.map(lambda row: rows(row[None])[0], states_a, batch_size=block_rows)


@jax.jit
def _symmetrized(gram):
    # exactly symmetric (addition commutes) with the unit diagonal of normalized states
    gram = 0.5 * (gram + gram.T)
    return gram.at[jnp.diag_indices(gram.shape[0])].set(1.0)


def _abs2(overlap: np.ndarray) -> np.ndarray:
    return np.square(overlap.real) + np.square(overlap.imag)


def herk_upper(states: np.ndarray) -> np.ndarray:
    """Upper triangle of ``conj(S S^H)`` by BLAS ``herk``; the strict lower triangle is 0.

    ``herk`` fills one triangle of ``A^H A`` with half the work of a general product. The
    C-ordered states [N, D] are a Fortran-ordered [D, N] matrix, so ``trans=2`` gives
    ``conj(S S^H)`` without a copy, written into a zero-initialized output.
    """
    from scipy.linalg import blas

    herk = blas.zherk if states.dtype == np.complex128 else blas.cherk
    return herk(1.0, states.T, trans=2, lower=0)


def _numpy_gram(states_a: np.ndarray, states_b, block_rows: int | None) -> np.ndarray:
    """BLAS path (no autodiff needed): ``herk`` for the symmetric Gram, ``gemm`` blocks
    otherwise (|.|^2 is the same for ``conj(S S^H)``)."""
    if states_b is None:
        n = states_a.shape[0]
        if block_rows is None or block_rows >= n:
            # the strict lower triangle of |upper|^2 is 0: one transposed add mirrors it
            upper = _abs2(herk_upper(states_a))
            gram = upper + upper.T
        else:  # memory-bounded: row blocks of the general product
            gram = np.empty((n, n), upper_dtype(states_a))
            for i in range(0, n, block_rows):
                gram[i:i + block_rows] = _abs2(states_a[i:i + block_rows] @ states_a.conj().T)
        np.fill_diagonal(gram, 1.0)
        return gram
    conj_b = states_b.conj().T
    rows = states_a.shape[0] if block_rows is None else block_rows
    gram = np.empty((states_a.shape[0], states_b.shape[0]), upper_dtype(states_a))
    for i in range(0, states_a.shape[0], rows):
        gram[i:i + rows] = _abs2(states_a[i:i + rows] @ conj_b)
    return gram


def upper_dtype(states) -> np.dtype:
    """Real dtype matching a complex state dtype."""
    return np.float64 if states.dtype == np.complex128 else np.float32


def fidelity_gram(states_a, states_b=None, *, block_rows: int | None = None):
    """Fidelity kernel ``K_ij = |<a_i|b_j>|^2`` from states.

    On the host path concrete arrays go through BLAS (``herk`` for the symmetric train
    Gram, ``gemm`` per row block otherwise) and return numpy; on the device path
    (``device_path()``) they stay on the device (XLA products per row block, a jax array);
    traced arrays (inside ``jax.grad``) use one JAX matrix product.

    Args:
      states_a: complex array of shape [N_a, 2**n].
      states_b: complex array of shape [N_b, 2**n]; None for the symmetric train Gram.
      block_rows: rows of ``states_a`` per matrix product (bounds the complex temporary).

    Returns:
      real array of shape [N_a, N_b]; the symmetric Gram is exactly symmetric with unit
      diagonal.
    """
    traced = isinstance(states_a, jax.core.Tracer) or isinstance(states_b, jax.core.Tracer)
    symmetric = states_b is None
    if not traced and not device_path():
        a = np.asarray(states_a)
        b = None if states_b is None else np.asarray(states_b)
        return _numpy_gram(a, b, block_rows)
    if traced:
        gram = _gram_block(states_a, states_a if symmetric else states_b)
    else:
        states_a = jnp.asarray(states_a)
        states_b = states_a if symmetric else jnp.asarray(states_b)
        rows = states_a.shape[0] if block_rows is None else int(block_rows)
        gram = _device_gram(states_a, states_b, rows)
    return _symmetrized(gram) if symmetric else gram


@jax.jit
def bloch_vectors(factors):
    """Bloch vectors of per-qubit states: real array [N, n, 3] from complex [N, n, 2]."""
    a0, a1 = factors[..., 0], factors[..., 1]
    cross = jnp.conj(a0) * a1
    return jnp.stack([2 * jnp.real(cross), 2 * jnp.imag(cross),
                      jnp.abs(a0) ** 2 - jnp.abs(a1) ** 2], axis=-1)


@jax.jit
def _product_block(bloch_a, bloch_b):
    # |<a|b>|^2 = (1 + r_a . r_b) / 2 for pure qubit states (Nielsen & Chuang, Ex. 4.8 / the
    # Bloch-sphere identity tr(rho sigma) = (1 + r.s)/2); the kernel multiplies over qubits.
    # Differentiable form, used under jax.grad; concrete inputs take the tiled path below.
    def one_qubit(acc, q):
        dots = jnp.matmul(bloch_a[:, q, :], bloch_b[:, q, :].T, precision=EXACT)
        return acc * (0.5 + 0.5 * dots), None

    init = jnp.ones((bloch_a.shape[0], bloch_b.shape[0]), bloch_a.dtype)
    out, _ = jax.lax.scan(one_qubit, init, jnp.arange(bloch_a.shape[1]))
    return out


# Qubits multiplied per fused pass, and the tile edge. With 20 qubits per pass XLA keeps
# the tile in registers/cache and streams each qubit's operands once; with fewer it fuses
# the loop's dynamic slicing into the inner loop and runs ~5x slower (measured with
# experiments/bench_gram.py on XLA CPU, jax 0.10).
_QUBITS_PER_PASS = 20
_TILE_EDGE = 1000


@functools.partial(jax.jit, static_argnames=("tile_a", "tile_b", "per_pass"))
def _product_tiles(rows, cols, pairs, tile_a, tile_b, per_pass):
    # rows: [k, n, Na] Bloch components of the row side; cols: [k, n, Nb], already halved,
    # so one qubit's factor is 0.5 + sum_k rows[k] * cols[k]. pairs: [P, 2] tile indices.
    k, n, _ = rows.shape
    chunks = n // per_pass

    def split(side, tile):
        return side.reshape(k, chunks, per_pass, -1, tile).transpose(3, 1, 0, 2, 4)

    row_tiles, col_tiles = split(rows, tile_a), split(cols, tile_b)

    def one_tile(pair):
        def one_pass(acc, operands):
            a, b = operands  # [k, per_pass, tile]
            for q in range(per_pass):
                factor = 0.5
                for c in range(k):
                    factor = factor + a[c, q][:, None] * b[c, q][None, :]
                acc = acc * factor
            return acc, None

        init = jnp.ones((tile_a, tile_b), rows.dtype)
        out, _ = jax.lax.scan(one_pass, init, (row_tiles[pair[0]], col_tiles[pair[1]]))
        return out

    return jax.lax.map(one_tile, pairs)


def _tile_edge(n_samples: int) -> int:
    n_tiles = -(-n_samples // _TILE_EDGE)
    per_tile = -(-n_samples // n_tiles)
    return -(-per_tile // 8) * 8


def _tile_layout(bloch, tile, n_padded, keep, halve):
    # [N, n, 3] -> [k, n_padded, N_padded]; padded qubits contribute a factor of exactly 1
    # (component 0 set to 1 on both sides: 0.5 + 1 * 0.5), padded samples are discarded.
    comps = np.moveaxis(np.asarray(bloch)[..., keep], -1, 0).transpose(0, 2, 1)
    k, n, n_samples = comps.shape
    out = np.zeros((k, n_padded, -(-n_samples // tile) * tile), comps.dtype)
    out[:, :n, :n_samples] = comps
    out[0, n:, :] = 1.0
    return out * 0.5 if halve else out


@functools.partial(jax.jit, static_argnames=("keep", "per_pass"))
def _product_device(bloch_a, bloch_b, keep, per_pass):
    # The device path of the tiled product: the whole [N_a, N_b] matrix is one tile (an
    # accelerator has the memory and the threads for it), laid out by XLA, not numpy.
    def layout(bloch, halve):
        comps = jnp.moveaxis(bloch[..., list(keep)], -1, 0).transpose(0, 2, 1)  # [k, n, N]
        k, n, n_samples = comps.shape
        n_padded = -(-n // per_pass) * per_pass
        pad = jnp.zeros((k, n_padded - n, n_samples), comps.dtype).at[0].set(1.0)
        out = jnp.concatenate([comps, pad], axis=1)
        return out * 0.5 if halve else out

    rows, cols = layout(bloch_a, False), layout(bloch_b, True)
    pairs = jnp.zeros((1, 2), jnp.int32)
    return _product_tiles(rows, cols, pairs, rows.shape[2], cols.shape[2], per_pass)[0]


def product_gram(factors_a, factors_b=None, *, block_rows: int | None = None):
    """Closed-form fidelity kernel of product states: ``prod_q |<a_q|b_q>|^2``.

    Concrete inputs run as square tiles (only the upper triangle for the symmetric Gram),
    each tile a fused product over qubits that never leaves cache, assembled in numpy; on
    the device path (``device_path()``) the same fused product runs over the whole matrix
    on the device and returns a jax array. Traced inputs (inside ``jax.grad``) use a
    differentiable scan over qubits.

    Args:
      factors_a: complex array of shape [N_a, n, 2] (see ``product_factors``).
      factors_b: complex array of shape [N_b, n, 2]; None for the symmetric Gram.
      block_rows: ignored (kept for call compatibility); tiles are sized internally.

    Returns:
      real array of shape [N_a, N_b] (numpy for concrete inputs on the host path); the
      symmetric Gram is exactly symmetric with unit diagonal.
    """
    del block_rows
    symmetric = factors_b is None
    bloch_a = bloch_vectors(factors_a)
    bloch_b = bloch_a if symmetric else bloch_vectors(factors_b)
    if isinstance(bloch_a, jax.core.Tracer) or isinstance(bloch_b, jax.core.Tracer):
        gram = _product_block(bloch_a, bloch_b)
        return _symmetrized(gram) if symmetric else gram
    if device_path():
        # which Bloch components vanish everywhere: three booleans come to the host (the
        # layout's shape depends on them), the vectors stay on the device
        used = np.asarray(jnp.any(bloch_a != 0, axis=(0, 1)) | jnp.any(bloch_b != 0,
                                                                       axis=(0, 1)))
        keep = tuple(c for c in range(3) if used[c]) or (2,)
        per_pass = min(_QUBITS_PER_PASS, bloch_a.shape[1])
        gram = _product_device(bloch_a, bloch_b, keep, per_pass)
        return _symmetrized(gram) if symmetric else gram
    bloch_a, bloch_b = np.asarray(bloch_a), np.asarray(bloch_b)
    # drop Bloch components that vanish everywhere (RY-only encodings have no Y part)
    keep = [c for c in range(3) if np.any(bloch_a[..., c]) or np.any(bloch_b[..., c])] or [2]
    n_a, n_qubits = bloch_a.shape[:2]
    n_b = bloch_b.shape[0]
    per_pass = min(_QUBITS_PER_PASS, n_qubits)
    n_padded = -(-n_qubits // per_pass) * per_pass
    tile_a = _tile_edge(n_a)
    tile_b = tile_a if symmetric else _tile_edge(n_b)
    rows = _tile_layout(bloch_a, tile_a, n_padded, keep, halve=False)
    cols = _tile_layout(bloch_b, tile_b, n_padded, keep, halve=True)
    grid_a, grid_b = rows.shape[2] // tile_a, cols.shape[2] // tile_b
    pairs = [(i, j) for i in range(grid_a) for j in range(i if symmetric else 0, grid_b)]
    tiles = np.asarray(_product_tiles(jnp.asarray(rows), jnp.asarray(cols),
                                      jnp.asarray(pairs, jnp.int32), tile_a, tile_b, per_pass))
    out = np.empty((grid_a * tile_a, grid_b * tile_b), tiles.dtype)
    for (i, j), tile in zip(pairs, tiles):
        if symmetric and i == j:
            tile = np.triu(tile) + np.triu(tile, 1).T
        out[i * tile_a:(i + 1) * tile_a, j * tile_b:(j + 1) * tile_b] = tile
        if symmetric and i != j:
            out[j * tile_b:(j + 1) * tile_b, i * tile_a:(i + 1) * tile_a] = tile.T
    if out.shape != (n_a, n_b):
        out = np.ascontiguousarray(out[:n_a, :n_b])
    if symmetric:
        np.fill_diagonal(out, 1.0)
    return out


def _block_rows_for(n_rows_b: int, budget_bytes: int, itemsize: int) -> int:
    # one complex temporary [rows, N_b] plus the real output rows
    per_row = n_rows_b * (itemsize + itemsize // 2)
    return max(1, int(budget_bytes // max(per_row, 1)))


def quantum_gram(blueprint: Blueprint, params: dict, X_a, X_b=None, *, dtype=jnp.complex64,
                 memory_budget=None, chunk_size: int | None = None, method: str = "auto"):
    """Fidelity Gram of an encoding on data, with the memory budget checked first.

    Args:
      X_a: float array of shape [N_a, F]; X_b: [N_b, F] or None (symmetric train Gram).
      method: "auto" (closed form for product encodings), "statevector" or "product".
      memory_budget: bytes or a string such as "4GiB"; None for the default.

    Returns:
      real array of shape [N_a, N_b].
    """
    dtype = check_dtype(dtype)
    if method not in ("auto", "statevector", "product"):
        raise InvalidInputError(f"method must be 'auto', 'statevector' or 'product', "
                                f"got {method!r}")
    X_a = validate_features(blueprint, X_a, name="X_a")
    X_b = None if X_b is None else validate_features(blueprint, X_b, name="X_b")
    use_product = method == "product" or (method == "auto" and is_product(blueprint))
    if use_product:
        n_b = X_a.shape[0] if X_b is None else X_b.shape[0]
        # tiles plus the assembled matrix, in the real dtype
        need = 2 * X_a.shape[0] * n_b * jnp.dtype(dtype).itemsize // 2
        budget = resolve_memory_budget(memory_budget)
        if need > budget:
            raise ResourceLimitError(
                f"a {X_a.shape[0]} x {n_b} product-kernel Gram needs {need / 2**30:.2f} GiB "
                f"but the budget is {budget / 2**30:.2f} GiB; use Nystroem landmarks, fewer "
                "samples or raise the budget")
        fa = product_factors(blueprint, params, X_a, dtype=dtype)
        fb = None if X_b is None else product_factors(blueprint, params, X_b, dtype=dtype)
        return product_gram(fa, fb)
    budget = resolve_memory_budget(memory_budget)
    n_b = X_a.shape[0] if X_b is None else X_b.shape[0]
    n_states = X_a.shape[0] + (0 if X_b is None else n_b)
    used = require_state_memory(n_states, blueprint, budget, dtype)
    output = X_a.shape[0] * n_b * jnp.dtype(dtype).itemsize // 2
    if used + output > budget:
        raise ResourceLimitError(
            f"a {X_a.shape[0]} x {n_b} Gram on {blueprint.n_qubits} qubits needs "
            f"{(used + output) / 2**30:.2f} GiB (states + matrix) but the budget is "
            f"{budget / 2**30:.2f} GiB; use Nystroem landmarks, fewer samples or raise the "
            "budget")
    rows = _block_rows_for(n_b, budget - used - output, jnp.dtype(dtype).itemsize)
    sa = encode_states(blueprint, params, X_a, dtype=dtype, chunk_size=chunk_size)
    sb = None if X_b is None else encode_states(blueprint, params, X_b, dtype=dtype,
                                                chunk_size=chunk_size)
    return fidelity_gram(sa, sb, block_rows=rows)


def gram_for_training(blueprint: Blueprint, params: dict, X_a, X_b=None):
    """Differentiable Gram for objectives: no validation, states or closed form in JAX.

    ``X_a``/``X_b`` must already be validated float arrays; ``params`` may be traced.
    """
    if is_product(blueprint):
        fa = product_factors(blueprint, params, X_a)
        fb = fa if X_b is None else product_factors(blueprint, params, X_b)
        return _product_block(bloch_vectors(fa), bloch_vectors(fb))
    sa = encode_states(blueprint, params, X_a)
    sb = sa if X_b is None else encode_states(blueprint, params, X_b)
    return _gram_block(sa, sb)


# --------------------------------------------------------------------------- projected

def pauli_expectations(states, n_qubits: int):
    """Per-qubit <X>, <Y>, <Z> of each state: real array [N, n, 3] from [N, 2**n].

    Reads the 1-qubit reduced density matrix rho_q (partial trace over the others):
    rho = (I + <X> X + <Y> Y + <Z> Z) / 2, so <X> = 2 Re rho_01, <Y> = -2 Im rho_01,
    <Z> = rho_00 - rho_11.
    """
    batch = states.shape[0]
    out = []
    for q in range(n_qubits):
        view = states.reshape(batch, 2**q, 2, 2 ** (n_qubits - q - 1))
        rho = jnp.einsum("biaj,bicj->bac", view, jnp.conj(view), precision=EXACT)
        out.append(jnp.stack([2 * jnp.real(rho[:, 0, 1]), -2 * jnp.imag(rho[:, 0, 1]),
                              jnp.real(rho[:, 0, 0] - rho[:, 1, 1])], axis=-1))
    return jnp.stack(out, axis=1)


def encoding_expectations(blueprint: Blueprint, params: dict, X, *, dtype=jnp.complex64,
                          chunk_size: int | None = None):
    """Pauli expectations [N, n, 3] of the encoded states (closed form for product ones)."""
    if is_product(blueprint):
        return bloch_vectors(product_factors(blueprint, params, X, dtype=dtype))
    return pauli_expectations(encode_states(blueprint, params, X, dtype=dtype,
                                            chunk_size=chunk_size), blueprint.n_qubits)


@jax.jit
def projected_gram_from_expectations(exp_a, exp_b, gamma):
    """Projected quantum kernel (Huang et al., Nat. Commun. 12, 2631 (2021), Eq. 9).

    ``k = exp(-gamma * sum_q ||rho_q(x) - rho_q(x')||_F^2)`` with
    ``||rho - rho'||_F^2 = 1/2 * sum_P (<P> - <P>')^2`` for P in X, Y, Z.

    Args:
      exp_a: real array [N_a, n, 3]; exp_b: real array [N_b, n, 3]; gamma: positive float.
    """
    a = exp_a.reshape(exp_a.shape[0], -1)
    b = exp_b.reshape(exp_b.shape[0], -1)
    sq = (jnp.sum(a * a, 1)[:, None] + jnp.sum(b * b, 1)[None, :]
          - 2 * jnp.matmul(a, b.T, precision=EXACT))
    return jnp.exp(-gamma * 0.5 * jnp.maximum(sq, 0.0))


def projected_gram(blueprint: Blueprint, params: dict, X_a, X_b=None, *, gamma: float = 1.0,
                   dtype=jnp.complex64):
    """Projected quantum kernel of an encoding on data: real array [N_a, N_b]."""
    if not gamma > 0:
        raise InvalidInputError(f"gamma must be positive, got {gamma!r}")
    X_a = validate_features(blueprint, X_a, name="X_a")
    e_a = encoding_expectations(blueprint, params, X_a, dtype=dtype)
    e_b = e_a if X_b is None else encoding_expectations(
        blueprint, params, validate_features(blueprint, X_b, name="X_b"), dtype=dtype)
    return projected_gram_from_expectations(e_a, e_b, gamma)


# --------------------------------------------------------------------------- circuits as references

def interference_zero_probability(blueprint: Blueprint, params: dict, x, x_prime, *,
                                  part: str = "real"):
    """P(ancilla = 0) of the one-ancilla interference circuit (Hadamard test).

    Simulates n + 1 qubits: H on the ancilla; U(x) controlled on ancilla = 0 and U(x')
    controlled on ancilla = 1; (S^dagger on the ancilla for the imaginary part); H; measure
    the ancilla. Standard identity: P(0) = 1/2 + 1/2 Re<psi(x)|psi(x')> (Im for part="imag").

    Args:
      x, x_prime: float arrays of shape [F] (or [B, F] for a batch of pairs).

    Returns:
      real array of shape [] (or [B]).
    """
    if part not in ("real", "imag"):
        raise InvalidInputError(f"part must be 'real' or 'imag', got {part!r}")
    x = np.atleast_2d(np.asarray(x, float))
    x_prime = np.atleast_2d(np.asarray(x_prime, float))
    n, batch = blueprint.n_qubits, x.shape[0]
    dim = 2**n
    full = jnp.zeros((batch, 2 * dim), jnp.complex64).at[:, 0].set(1.0)
    full = gates.apply_one_qubit(full, jnp.asarray(gates.HADAMARD, jnp.complex64), 0, n + 1)
    half0 = apply_circuit(blueprint, params, x, full[:, :dim])  # ancilla 0 branch
    half1 = apply_circuit(blueprint, params, x_prime, full[:, dim:])  # ancilla 1 branch
    if part == "imag":
        half1 = -1j * half1
    full = jnp.concatenate([half0, half1], axis=1)
    full = gates.apply_one_qubit(full, jnp.asarray(gates.HADAMARD, jnp.complex64), 0, n + 1)
    p0 = jnp.sum(jnp.abs(full[:, :dim]) ** 2, axis=1)
    return p0 if batch > 1 else p0[0]


def inversion_test_probability(blueprint: Blueprint, params: dict, x, x_prime):
    """|<0|U(x')^dagger U(x)|0>|^2 simulated per pair (the slow reference path).

    Args:
      x, x_prime: float arrays of shape [B, F] (pairs row by row).

    Returns:
      real array of shape [B].
    """
    x = jnp.asarray(x, jnp.float32)
    batch = x.shape[0]
    zero = jnp.zeros((batch, 2**blueprint.n_qubits), jnp.complex64).at[:, 0].set(1.0)
    states = apply_circuit(blueprint, params, x, zero)
    states = apply_circuit(blueprint, params, jnp.asarray(x_prime, jnp.float32), states,
                           inverse=True)
    return jnp.abs(states[:, 0]) ** 2


# --------------------------------------------------------------------------- scikit-learn hand-off

class FrozenKernel:
    """A fixed encoding + parameters as a callable kernel: ``SVC(kernel=FrozenKernel(...))``.

    ``kernel(A, B)`` returns the fidelity Gram as a float64 numpy array of shape
    [len(A), len(B)]; ``kind="projected"`` returns the projected kernel instead.
    """

    def __init__(self, blueprint: Blueprint, params: dict, *, kind: str = "fidelity",
                 gamma: float = 1.0, memory_budget=None):
        if kind not in ("fidelity", "projected"):
            raise InvalidInputError(f"kind must be 'fidelity' or 'projected', got {kind!r}")
        self.blueprint = blueprint
        self.params = jax.tree_util.tree_map(np.asarray, params)
        self.kind = kind
        self.gamma = gamma
        self.memory_budget = memory_budget

    def __call__(self, A, B=None):
        if self.kind == "projected":
            gram = projected_gram(self.blueprint, self.params, A, B, gamma=self.gamma)
        else:
            gram = quantum_gram(self.blueprint, self.params, A, B,
                                memory_budget=self.memory_budget)
        return np.asarray(gram, dtype=np.float64)

    def __repr__(self):
        return (f"FrozenKernel(family={self.blueprint.family!r}, "
                f"qubits={self.blueprint.n_qubits}, kind={self.kind!r})")
