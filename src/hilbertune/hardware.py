"""Hardware realism: finite shots, device noise, PSD repair and shot budgets.

Place in the data flow: after the kernel (an exact simulated Gram from ``kernels.py``) and
before the report. These functions turn an exact Gram into what a quantum computer would
return (finite-shot estimates, depolarized entries), repair the result so that an SVM can
use it, and size the number of shots a learned kernel needs. Pure numpy on top of the core's
states; every random draw comes from an explicit seed (or numpy ``Generator``) argument.

Estimators of one kernel entry ``k = |<psi(x)|psi(x')>|^2`` (``s`` = shots per circuit):

* ``inversion_test``: run ``U(x')^dagger U(x)`` on n qubits and count all-zeros outcomes
  ``m ~ Binomial(s, k)``; ``k_hat = m / s``, unbiased, ``var = k (1 - k) / s`` (binomial).
* ``swap_test``: two registers plus one ancilla (2n + 1 qubits), ``P0 = 1/2 + k/2``;
  ``k_hat = 2 m / s - 1``, unbiased, ``var = (1 - k^2) / s``.
* ``hadamard_test`` (one-ancilla interference, n + 1 qubits): it measures the *overlap*,
  not k. Two circuits per entry, each with ``s`` shots: the real-part circuit has
  ``P0 = 1/2 + Re<psi|phi>/2``, the imaginary-part circuit (S^dagger on the ancilla)
  ``P0 = 1/2 + Im<psi|phi>/2``. With ``R = 2 m_re / s - 1`` and ``I = 2 m_im / s - 1``
  (each unbiased) we report the unbiased estimate of ``k = Re^2 + Im^2``

      k_hat = (s (R^2 + I^2) - 2) / (s - 1),                    (needs s >= 2)

  because ``E[R^2] = Re^2 + (1 - Re^2) / s``. Its exact variance is derived from the first
  four binomial moments (see ``_squared_estimate_variance``); to leading order
  ``var ~ 4 (Re^2 (1 - Re^2) + Im^2 (1 - Im^2)) / s``. It costs 2 s circuit executions.
"""

from __future__ import annotations

import difflib
import math
from typing import NamedTuple

import numpy as np
import jax
import jax.numpy as jnp

from hilbertune import gates
from hilbertune.circuits import (Blueprint, compile_blueprint, encode_states, resource_counts,
                                 step_angles, validate_features)
from hilbertune.errors import InvalidInputError, ResourceLimitError

ESTIMATORS = ("inversion_test", "hadamard_test", "swap_test")
REPAIR_METHODS = ("clip", "shift", "clip_unit", "none")
DENSITY_MATRIX_MAX_QUBITS = 8
CHANNELS = ("local", "global")

# slack for kernel values that rounding pushed a little outside [0, 1]
_PROBABILITY_SLACK = 1e-4


# --------------------------------------------------------------------------- validation

def _check_estimator(estimator: str) -> str:
    if estimator not in ESTIMATORS:
        close = difflib.get_close_matches(str(estimator), ESTIMATORS, n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        if estimator == "compute_uncompute":
            hint = " (renamed to 'inversion_test')"
        raise InvalidInputError(f"unknown estimator {estimator!r}{hint}; use one of "
                                f"{', '.join(ESTIMATORS)}")
    return estimator


def _check_shots(shots, estimator: str = "inversion_test", *, name: str = "shots") -> int:
    ok = not isinstance(shots, bool) and isinstance(shots, (int, float, np.integer, np.floating))
    if ok:
        ok = math.isfinite(float(shots)) and float(shots).is_integer() and shots > 0
    if not ok:
        raise InvalidInputError(f"{name} must be a positive whole number, got {shots!r}; "
                                f"pass e.g. {name}=1000")
    shots = int(shots)
    if estimator == "hadamard_test" and shots < 2:
        raise InvalidInputError("the hadamard_test estimator needs at least 2 shots per circuit "
                                "(its unbiased estimate divides by shots - 1); raise shots")
    return shots


def _check_rate(value, name: str) -> float:
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise InvalidInputError(f"{name} must be a number in [0, 1], got {value!r}") from None
    if not (0.0 <= value <= 1.0):
        raise InvalidInputError(f"{name} must be a probability in [0, 1], got {value!r}; "
                                "give error rates as fractions (0.001 for 0.1 %)")
    return value


def _check_count(value, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
        raise InvalidInputError(f"{name} must be a non-negative integer, got {value!r}")
    return int(value)


def _generator(seed) -> np.random.Generator:
    """A numpy Generator from an int, a Generator, or a JAX PRNG key (its key data seeds it)."""
    if isinstance(seed, np.random.Generator):
        return seed
    if isinstance(seed, (int, np.integer)) and not isinstance(seed, bool) and seed >= 0:
        return np.random.default_rng(int(seed))
    if isinstance(seed, jax.Array):
        if jax.dtypes.issubdtype(seed.dtype, jax.dtypes.prng_key) and seed.ndim == 0:
            return np.random.default_rng(np.asarray(jax.random.key_data(seed)).ravel().tolist())
        if seed.dtype == jnp.uint32 and seed.shape == (2,):  # raw uint32 key
            return np.random.default_rng(np.asarray(seed).tolist())
    raise InvalidInputError(f"seed must be a non-negative integer, a numpy Generator or a "
                            f"single JAX PRNG key, got {seed!r}; pass seed=0 (or any fixed "
                            "integer) for reproducible sampling")


def _as_matrix(K, name: str) -> np.ndarray:
    try:
        K = np.asarray(K, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError(f"{name} must be a real numeric matrix") from None
    if K.ndim != 2 or K.size == 0:
        raise InvalidInputError(f"{name} must be a non-empty 2-D matrix, got shape {K.shape}")
    if not np.isfinite(K).all():
        raise InvalidInputError(f"{name} contains NaN or infinite values; recompute the Gram")
    return K


def _as_kernel_values(K, name: str = "K") -> np.ndarray:
    """A matrix of fidelity-kernel values, checked to lie in [0, 1] (rounding clipped)."""
    K = _as_matrix(K, name)
    if K.min() < -_PROBABILITY_SLACK or K.max() > 1 + _PROBABILITY_SLACK:
        raise InvalidInputError(f"{name} has entries in [{K.min():.4g}, {K.max():.4g}] but "
                                "fidelity-kernel values are probabilities in [0, 1]; pass the "
                                "exact Gram from quantum_gram, not a repaired or shifted one")
    return np.clip(K, 0.0, 1.0)


def _as_square(K, name: str) -> np.ndarray:
    K = _as_matrix(K, name)
    if K.shape[0] != K.shape[1]:
        raise InvalidInputError(f"{name} must be square [N, N], got shape {K.shape}; PSD "
                                "repair applies to the train Gram only")
    return K


def _as_overlaps(overlaps, K: np.ndarray) -> np.ndarray:
    if overlaps is None:
        raise InvalidInputError("the hadamard_test estimator needs the complex overlaps "
                                "<psi(a_i)|psi(b_j)>: pass overlaps=state_overlaps(blueprint, "
                                "params, X_a, X_b)")
    try:
        overlaps = np.asarray(overlaps, dtype=np.complex128)
    except (TypeError, ValueError):
        raise InvalidInputError("overlaps must be a complex numeric matrix") from None
    if overlaps.shape != K.shape:
        raise InvalidInputError(f"overlaps has shape {overlaps.shape} but K has {K.shape}; "
                                "compute both from the same samples")
    if not np.isfinite(overlaps).all():
        raise InvalidInputError("overlaps contains NaN or infinite values; recompute them")
    if np.abs(np.abs(overlaps) ** 2 - K).max() > 1e-3:
        raise InvalidInputError("K and overlaps disagree (K must equal |overlaps|^2); compute "
                                "both from the same encoding, parameters and samples")
    return overlaps


def _is_symmetric(K: np.ndarray, symmetric) -> bool:
    if symmetric is None:
        return K.shape[0] == K.shape[1] and np.allclose(K, K.T, atol=1e-6)
    if symmetric and K.shape[0] != K.shape[1]:
        raise InvalidInputError(f"symmetric=True needs a square Gram, got shape {K.shape}")
    return bool(symmetric)


# --------------------------------------------------------------------------- estimators

def estimator_qubits(estimator: str, n_qubits: int) -> int:
    """Qubits of one estimation circuit: n (inversion test), n + 1 (Hadamard test),
    2 n + 1 (swap test)."""
    _check_estimator(estimator)
    n = _check_count(n_qubits, "n_qubits")
    return {"inversion_test": n, "hadamard_test": n + 1, "swap_test": 2 * n + 1}[estimator]


def circuits_per_entry(estimator: str) -> int:
    """Distinct circuits per kernel entry: 2 for the Hadamard test (real and imaginary part),
    1 otherwise."""
    return 2 if _check_estimator(estimator) == "hadamard_test" else 1


def _squared_estimate_variance(mu: np.ndarray, shots: int) -> np.ndarray:
    """Exact variance of ``R^2`` where ``R = 2 m / s - 1``, ``m ~ Binomial(s, (1 + mu) / 2)``.

    With ``D = R - mu``: ``Var(R^2) = 4 mu^2 c2 + 4 mu c3 + c4 - c2^2`` where ``c_k`` are the
    central moments of R, obtained from the binomial central moments (variance ``s p q``,
    third ``s p q (q - p)``, fourth ``s p q (1 + 3 (s - 2) p q)``; common practice, e.g.
    scipy.stats.binom) scaled by ``(2 / s)^k``. With ``a = 1 - mu^2`` this simplifies to
    ``a (4 mu^2 / s + (2 a - 8 mu^2) / s^2 + (6 mu^2 - 2) / s^3)``.
    """
    mu2 = mu * mu
    a = 1.0 - mu2
    s = float(shots)
    return a * (4.0 * mu2 / s + (2.0 * a - 8.0 * mu2) / s**2 + (6.0 * mu2 - 2.0) / s**3)


def shot_variance(K, shots, *, estimator: str = "inversion_test", overlaps=None):
    """Exact variance of each entry's finite-shot estimate.

    Args:
      K: kernel values in [0, 1], array of shape [N_a, N_b] (the values the circuit
        measures, i.e. already depolarized if device noise is modelled).
      shots: shots per circuit (positive integer).
      estimator: one of ``ESTIMATORS``.
      overlaps: complex array [N_a, N_b] of ``<psi(a_i)|psi(b_j)>``; hadamard_test only.

    Returns:
      float64 array of shape [N_a, N_b].

    References:
      Binomial variance ``k (1 - k) / s`` (inversion test) and ``(1 - k^2) / s`` (swap
      test, from ``P0 = 1/2 + k/2``): common practice, e.g. Buhrman, Cleve, Watrous & de Wolf,
      Phys. Rev. Lett. 87, 167902 (2001) for the swap test.
    """
    _check_estimator(estimator)
    shots = _check_shots(shots, estimator)
    K = _as_kernel_values(K)
    if estimator == "inversion_test":
        return K * (1.0 - K) / shots
    if estimator == "swap_test":
        return (1.0 - K * K) / shots
    overlaps = _as_overlaps(overlaps, K)
    scale = (shots / (shots - 1.0)) ** 2
    return scale * (_squared_estimate_variance(overlaps.real, shots)
                    + _squared_estimate_variance(overlaps.imag, shots))


def _require_qubits(estimator, depolarizing, readout_error, n_qubits) -> None:
    if estimator == "inversion_test" and n_qubits is None and (depolarizing > 0
                                                               or readout_error > 0):
        raise InvalidInputError("device noise on the inversion test needs n_qubits (the "
                                "all-zeros probability depends on it); pass "
                                "n_qubits=blueprint.n_qubits")


def _measured_values(K, overlaps, estimator, depolarizing, n_qubits, readout_error=0.0):
    """What the circuit measures after global depolarizing (p) and readout flips (e).

    A global depolarizing channel before the measurement mixes the outcome distribution with
    that of the maximally mixed state: ``P -> (1 - p) P + p P_mixed``. For the inversion test
    ``P_mixed(all zeros) = 1 / 2^n``, so ``k -> (1 - p) k + p / 2^n`` (Hubregtsen et al.,
    Phys. Rev. A 106, 042431 (2022)); for the ancilla circuits ``P_mixed(0) = 1/2``, so the
    swap test sees ``(1 - p) k`` and the Hadamard test ``(1 - p) <psi|phi>``.

    Readout flips act on the measured bits afterwards. One ancilla bit read wrongly with
    probability e turns ``P0`` into ``e + (1 - 2 e) P0``, so ``2 P0 - 1`` shrinks by
    ``1 - 2 e`` (exact; common practice); the inversion test follows ``readout_kernel``.
    """
    if depolarizing > 0.0:
        if estimator == "inversion_test":
            K = depolarize_kernel(K, depolarizing, n_qubits)
        elif estimator == "swap_test":
            K = (1.0 - depolarizing) * K
        else:
            K, overlaps = (1.0 - depolarizing) ** 2 * K, (1.0 - depolarizing) * overlaps
    if readout_error > 0.0:
        shrink = 1.0 - 2.0 * readout_error
        if estimator == "inversion_test":
            K = readout_kernel(K, readout_error, n_qubits)
        elif estimator == "swap_test":
            K = shrink * K
        else:
            K, overlaps = shrink**2 * K, shrink * overlaps
    return K, overlaps


def shot_sampled_gram(K, shots, *, estimator: str = "inversion_test", seed,
                      symmetric: bool | None = None, estimate_diagonal: bool = False,
                      overlaps=None, depolarizing: float = 0.0, n_qubits: int | None = None,
                      readout_error: float = 0.0):
    """Finite-shot estimate of every kernel entry, as a quantum computer would return it.

    Args:
      K: exact kernel values in [0, 1], array of shape [N_a, N_b].
      shots: shots per circuit (the Hadamard test runs two circuits per entry).
      estimator: ``"inversion_test"``, ``"hadamard_test"`` or ``"swap_test"`` (see the
        module docstring for what each estimates).
      seed: int or numpy Generator; the only source of randomness.
      symmetric: True for a train Gram (only i < j is sampled and mirrored, so the output is
        exactly symmetric); None detects a square symmetric K.
      estimate_diagonal: for a symmetric Gram, sample the diagonal too; otherwise it is
        copied from K (``k(x, x) = 1`` needs no circuit).
      overlaps: complex array [N_a, N_b] of ``<psi(a_i)|psi(b_j)>``, needed by hadamard_test
        (see ``state_overlaps``).
      depolarizing: global depolarizing probability p of the whole estimation circuit
        (0 = noiseless); the estimates then scatter around the depolarized values
        (see ``_measured_values``).
      n_qubits: qubits of the encoding; needed by inversion_test when depolarizing or
        readout_error > 0.
      readout_error: probability that a measured bit is read wrongly (independent,
        symmetric), applied after depolarizing; no mitigation is applied.

    Returns:
      float64 array of shape [N_a, N_b]. The hadamard_test estimate is unbiased and may
      fall slightly below 0; the others lie in [0, 1] (swap test: [-1, 1]).

    References:
      Binomial shot model: common practice (each shot an independent Bernoulli trial).
    """
    _check_estimator(estimator)
    shots = _check_shots(shots, estimator)
    depolarizing = _check_rate(depolarizing, "depolarizing")
    readout_error = _check_rate(readout_error, "readout_error")
    K = _as_kernel_values(K)
    symmetric = _is_symmetric(K, symmetric)
    rng = _generator(seed)
    if estimator == "hadamard_test":
        overlaps = _as_overlaps(overlaps, K)
    _require_qubits(estimator, depolarizing, readout_error, n_qubits)
    measured, measured_overlaps = _measured_values(K, overlaps, estimator, depolarizing,
                                                   n_qubits, readout_error)
    if symmetric:
        rows, cols = np.triu_indices(K.shape[0], k=0 if estimate_diagonal else 1)
    else:
        rows, cols = np.indices(K.shape).reshape(2, -1)
    if estimator == "inversion_test":
        values = rng.binomial(shots, measured[rows, cols]) / shots
    elif estimator == "swap_test":
        p0 = np.clip(0.5 + 0.5 * measured[rows, cols], 0.0, 1.0)
        values = 2.0 * rng.binomial(shots, p0) / shots - 1.0
    else:
        ov = measured_overlaps[rows, cols]
        p_re = np.clip(0.5 + 0.5 * ov.real, 0.0, 1.0)
        p_im = np.clip(0.5 + 0.5 * ov.imag, 0.0, 1.0)
        real_part = 2.0 * rng.binomial(shots, p_re) / shots - 1.0
        imag_part = 2.0 * rng.binomial(shots, p_im) / shots - 1.0
        values = (shots * (real_part**2 + imag_part**2) - 2.0) / (shots - 1.0)
    out = np.array(K, dtype=np.float64, copy=True)
    out[rows, cols] = values
    if symmetric:
        out[cols, rows] = values
    return out


def state_overlaps(blueprint: Blueprint, params: dict, X_a, X_b=None):
    """Complex overlaps ``<psi(a_i)|psi(b_j)>`` (what the Hadamard test measures).

    Args:
      X_a: float array [N_a, F]; X_b: [N_b, F] or None (then X_b = X_a).

    Returns:
      complex128 numpy array of shape [N_a, N_b]; ``|overlaps|^2`` is the fidelity Gram.
    """
    s_a = np.asarray(encode_states(blueprint, params, X_a), dtype=np.complex128)
    s_b = s_a if X_b is None else np.asarray(encode_states(blueprint, params, X_b),
                                             dtype=np.complex128)
    return s_a.conj() @ s_b.T


# --------------------------------------------------------------------------- device noise

def depolarizing_from_gates(one_qubit_gates: int, two_qubit_gates: int, *,
                            one_qubit_error: float, two_qubit_error: float) -> float:
    """Global depolarizing probability of a circuit: ``p = 1 - (1 - e1)^g1 (1 - e2)^g2``.

    Exact when each gate is followed by a depolarizing channel on *all* qubits (these
    commute with unitaries, so their survival probabilities multiply); a common
    approximation otherwise.

    References:
      Hubregtsen, Wierichs, Gil-Fuster, Derks, Faehrmann & Meyer, Phys. Rev. A 106, 042431
      (2022) (global depolarizing model of kernel entries).
    """
    g1 = _check_count(one_qubit_gates, "one_qubit_gates")
    g2 = _check_count(two_qubit_gates, "two_qubit_gates")
    e1 = _check_rate(one_qubit_error, "one_qubit_error")
    e2 = _check_rate(two_qubit_error, "two_qubit_error")
    return float(1.0 - (1.0 - e1) ** g1 * (1.0 - e2) ** g2)


def inversion_test_depolarizing(blueprint: Blueprint, *, one_qubit_error: float,
                                two_qubit_error: float) -> float:
    """Depolarizing probability of the inversion-test circuit ``U(x')^dagger U(x)``.

    That circuit has twice the encoding's gates (the encoding and its inverse), so
    ``g1 = 2 * one_qubit_gates`` and ``g2 = 2 * two_qubit_gates`` of
    ``circuits.resource_counts`` (no gate cancellation between the halves is assumed).
    """
    if blueprint.state_kind != "gates":
        raise InvalidInputError("amplitude encoding has no gate decomposition, so its gate "
                                "noise is unknown; call depolarizing_from_gates with your "
                                "state-preparation gate counts")
    counts = resource_counts(blueprint)
    return depolarizing_from_gates(2 * counts["one_qubit_gates"], 2 * counts["two_qubit_gates"],
                                   one_qubit_error=one_qubit_error,
                                   two_qubit_error=two_qubit_error)


def depolarize_kernel(K, p: float, n_qubits: int):
    """Kernel entries under global depolarizing noise: ``k -> (1 - p) k + p / 2^n``.

    Args:
      K: kernel values, array of shape [N_a, N_b].
      p: depolarizing probability in [0, 1].
      n_qubits: qubits of the inversion-test circuit.

    Returns:
      float64 array of shape [N_a, N_b].

    References:
      Hubregtsen et al., Phys. Rev. A 106, 042431 (2022).
    """
    p = _check_rate(p, "p")
    n = _check_count(n_qubits, "n_qubits")
    return (1.0 - p) * _as_matrix(K, "K") + p / 2.0**n


def readout_kernel(K, readout_error: float, n_qubits: int):
    """Observed all-zeros frequency of the inversion test under readout bit flips.

    Each of the n measured bits is read wrongly with probability e, independently and
    symmetrically (common practice model). The all-zeros count then keeps a true all-zeros
    outcome with probability ``f = (1 - e)^n`` and picks up other outcomes. Assuming the
    non-zero outcomes share the remaining probability ``1 - k`` evenly (as the depolarized
    part does), each flips into all-zeros with average probability ``(1 - f) / (2^n - 1)``:

        k -> f k + (1 - k) (1 - f) / (2^n - 1)

    Exact for one qubit and for outcome distributions that are uniform off all-zeros; for
    concentrated distributions (neighbouring bit strings more likely) the pick-up term is a
    lower estimate.

    Args:
      K: kernel values (or already depolarized values), array of shape [N_a, N_b].
      readout_error: flip probability e per measured bit, in [0, 1].
      n_qubits: measured qubits of the inversion-test circuit.

    Returns:
      float64 array of shape [N_a, N_b].
    """
    e = _check_rate(readout_error, "readout_error")
    n = _check_count(n_qubits, "n_qubits")
    K = _as_matrix(K, "K")
    keep = (1.0 - e) ** n
    others = math.ldexp(1.0, n) - 1.0 if n < 1024 else math.inf
    return keep * K + (1.0 - K) * (1.0 - keep) / others


def _one_qubit_matrix(step, angles) -> np.ndarray:
    """Batched 2x2 matrix of a 1-qubit step: [B, 2, 2] (complex128)."""
    batch = angles.shape[0]
    if step.gate in ("rx", "ry", "rz"):
        # exp(-i t P / 2) = cos(t/2) I - i sin(t/2) P since P^2 = I (common practice)
        pauli = {"rx": gates.PAULI_X, "ry": gates.PAULI_Y, "rz": gates.PAULI_Z}[step.gate]
        c = np.cos(angles / 2)[:, None, None]
        s = np.sin(angles / 2)[:, None, None]
        return c * np.eye(2) - 1j * s * pauli
    fixed = {"h": gates.HADAMARD, "x": gates.PAULI_X}.get(step.gate)
    if fixed is None:
        fixed = np.asarray(step.matrix, dtype=complex)
    return np.broadcast_to(np.asarray(fixed, dtype=complex), (batch, 2, 2))


def _apply_one_qubit(rho, matrix, q, n):
    """``rho -> M rho M^dagger`` with M on qubit q; rho: complex [B, 2^n, 2^n], M: [B, 2, 2].

    Rows get M and columns conj(M), since ``(M rho M^dagger)_ij = sum M_ia rho_ab conj(M_jb)``;
    both are plain reshapes (qubit 0 is the most significant bit, as in ``gates``).
    """
    batch, dim = rho.shape[0], 2**n
    left, right = 2**q, 2 ** (n - q - 1)
    rows = _combine_halves(matrix, rho.reshape(batch, left, 2, right * dim))
    cols = _combine_halves(np.conj(matrix), rows.reshape(batch, dim * left, 2, right))
    return cols.reshape(batch, dim, dim)


def _combine_halves(matrix, view):
    """``out[:, :, a] = sum_c M[:, a, c] view[:, :, c]`` for view [B, L, 2, R], M [B, 2, 2].

    Written elementwise: batched matmuls of 2x2 blocks are far slower in numpy.
    """
    m = np.asarray(matrix)[:, :, :, None, None]  # [B, 2, 2, 1, 1]
    out = np.empty_like(view)
    out[:, :, 0] = m[:, 0, 0] * view[:, :, 0] + m[:, 0, 1] * view[:, :, 1]
    out[:, :, 1] = m[:, 1, 0] * view[:, :, 0] + m[:, 1, 1] * view[:, :, 1]
    return out


def _apply_two_qubit(rho, step, angles, n):
    """CNOT as an index permutation, CZ and ZZ as diagonal phases (as in ``circuits``)."""
    a, b = step.qubits
    if step.gate == "cnot":
        perm = gates.cnot_permutation(n, a, b)
        return rho[:, perm][:, :, perm]
    if step.gate == "cz":
        diagonal = np.broadcast_to(gates.cz_signs(n, [(a, b)]).astype(complex),
                                   (rho.shape[0], 2**n))
    else:  # zz: exp(-i t/2 Z_a Z_b) is diagonal with the parity signs of (a, b)
        signs = gates.parity_signs(n, [(a, b)])[0]
        diagonal = np.exp(-0.5j * angles[:, None] * signs[None, :])
    return rho * diagonal[:, :, None] * np.conj(diagonal)[:, None, :]


def _apply_step(rho, step, angles, n, inverse=False):
    """One blueprint step on a batch of density matrices (``inverse``: its adjoint)."""
    if len(step.qubits) == 1:
        matrix = _one_qubit_matrix(step, angles)
        if inverse:
            matrix = np.conj(np.swapaxes(matrix, -1, -2))
        return _apply_one_qubit(rho, matrix, step.qubits[0], n)
    # CNOT and CZ are self-inverse; the adjoint of ZZ(t) is ZZ(-t)
    return _apply_two_qubit(rho, step, -angles if inverse else angles, n)


def _fully_mix(rho, q, n):
    """``Tr_q(rho) (x) I / 2`` on qubit q (the 1-qubit completely depolarizing channel)."""
    batch, left, right = rho.shape[0], 2**q, 2 ** (n - q - 1)
    view = rho.reshape(batch, left, 2, right, left, 2, right)
    half_trace = 0.5 * (view[:, :, 0, :, :, 0, :] + view[:, :, 1, :, :, 1, :])
    mixed = np.zeros_like(view)
    mixed[:, :, 0, :, :, 0, :] = half_trace
    mixed[:, :, 1, :, :, 1, :] = half_trace
    return mixed.reshape(rho.shape)


def _depolarize(rho, qubits, error, n):
    """``rho -> (1 - e) rho + e Tr_Q(rho) (x) I_Q / 2^|Q|`` (depolarizing channel on Q).

    References:
      Nielsen & Chuang, Quantum Computation and Quantum Information (2000), Eq. (8.102)
      (one qubit); applying the full 1-qubit depolarization to each qubit of Q in turn
      gives ``Tr_Q(rho) (x) I / 2^|Q|``.
    """
    if error == 0.0:
        return rho
    mixed = rho
    for q in qubits:
        mixed = _fully_mix(mixed, q, n)
    return (1.0 - error) * rho + error * mixed


def _encoded_density_matrices(blueprint, angles, noise):
    """``U(x) |0><0| U(x)^dagger`` with ``noise(rho, step)`` after every step: [N, 2^n, 2^n]."""
    n = blueprint.n_qubits
    rho = np.zeros((angles.shape[0], 2**n, 2**n), dtype=np.complex128)
    rho[:, 0, 0] = 1.0
    for k, step in enumerate(blueprint.steps):
        rho = noise(_apply_step(rho, step, angles[:, k], n), step)
    return rho


def density_matrix_kernel(blueprint: Blueprint, params: dict, X_a, X_b=None, *,
                          one_qubit_error: float = 0.0, two_qubit_error: float = 0.0,
                          channel: str = "local", final_depolarizing: float = 0.0,
                          pairs_per_chunk: int = 64):
    """Noisy inversion-test kernel ``<0|rho|0>`` from a density-matrix simulation.

    For each pair the circuit ``U(x_b)^dagger U(x_a)`` is applied step by step to
    ``rho = |0><0|`` as ``U rho U^dagger``; after every step a depolarizing channel with the
    gate's error rate acts on the gate's qubits (``channel="local"``) or on all qubits
    (``channel="global"``). ``final_depolarizing`` adds one global channel before the
    measurement. Feasible up to ``DENSITY_MATRIX_MAX_QUBITS`` qubits.

    Args:
      X_a: float array [N_a, F]; X_b: [N_b, F] or None (symmetric train Gram: the pairs
        i <= j are simulated and mirrored; the diagonal is simulated, it is below 1 under
        noise).
      one_qubit_error, two_qubit_error: depolarizing probability per 1- / 2-qubit gate.
      pairs_per_chunk: pairs simulated at once (bounds memory: 16 * 4^n bytes per pair).

    Returns:
      float64 array of shape [N_a, N_b].

    References:
      Depolarizing channel: Nielsen & Chuang (2000), Eq. (8.102). Global model:
      Hubregtsen et al., Phys. Rev. A 106, 042431 (2022).
    """
    e1 = _check_rate(one_qubit_error, "one_qubit_error")
    e2 = _check_rate(two_qubit_error, "two_qubit_error")
    final = _check_rate(final_depolarizing, "final_depolarizing")
    if channel not in CHANNELS:
        raise InvalidInputError(f"channel must be 'local' or 'global', got {channel!r}")
    if blueprint.state_kind != "gates":
        raise InvalidInputError("amplitude encoding has no gate sequence to simulate with gate "
                                "noise; use depolarize_kernel on its exact Gram instead")
    n = blueprint.n_qubits
    if n > DENSITY_MATRIX_MAX_QUBITS:
        raise ResourceLimitError(
            f"density-matrix simulation is limited to {DENSITY_MATRIX_MAX_QUBITS} qubits (a "
            f"2^n x 2^n matrix per pair) but the encoding has {n}; use the global model "
            "depolarize_kernel(K, inversion_test_depolarizing(...), n_qubits) instead")
    if isinstance(pairs_per_chunk, bool) or not isinstance(pairs_per_chunk, int) \
            or pairs_per_chunk < 1:
        raise InvalidInputError(f"pairs_per_chunk must be a positive integer, got "
                                f"{pairs_per_chunk!r}")
    X_a = validate_features(blueprint, X_a, name="X_a")
    symmetric = X_b is None
    X_b = X_a if symmetric else validate_features(blueprint, X_b, name="X_b")
    program = compile_blueprint(blueprint)
    angles_a = np.asarray(step_angles(program, params, X_a), dtype=np.float64)
    angles_b = np.asarray(step_angles(program, params, X_b), dtype=np.float64)
    everything = tuple(range(n))

    def noise(rho, step):
        error = e1 if len(step.qubits) == 1 else e2
        return _depolarize(rho, everything if channel == "global" else step.qubits, error, n)

    # first half U(x_a) once per row sample
    from hilbertune.kernels import resolve_memory_budget

    need = X_a.shape[0] * 16 * 4**n + pairs_per_chunk * 16 * 4**n
    budget = resolve_memory_budget(None)
    if need > budget:
        raise ResourceLimitError(
            f"density matrices of {X_a.shape[0]} samples on {n} qubits need "
            f"{need / 2**30:.2f} GiB but the memory budget is {budget / 2**30:.2f} GiB; pass "
            "fewer samples (X_a) or use depolarize_kernel, the per-entry formula")
    rho_a = _encoded_density_matrices(blueprint, angles_a, noise)

    if symmetric:
        rows, cols = np.triu_indices(X_a.shape[0])
    else:
        rows, cols = np.indices((X_a.shape[0], X_b.shape[0])).reshape(2, -1)
    values = np.empty(rows.shape[0])
    for start in range(0, rows.shape[0], pairs_per_chunk):
        r = rows[start:start + pairs_per_chunk]
        c = cols[start:start + pairs_per_chunk]
        rho = rho_a[r]
        for k in reversed(range(len(blueprint.steps))):
            step = blueprint.steps[k]
            rho = noise(_apply_step(rho, step, angles_b[c, k], n, inverse=True), step)
        if final > 0:
            rho = _depolarize(rho, everything, final, n)
        values[start:start + r.shape[0]] = rho[:, 0, 0].real
    out = np.empty((X_a.shape[0], X_b.shape[0]))
    out[rows, cols] = values
    if symmetric:
        out[cols, rows] = values
    return out


# --------------------------------------------------------------------------- PSD repair

class RepairOutcome(NamedTuple):
    """A repaired Gram and how far the repair moved it."""

    matrix: np.ndarray  # float64 [N, N], symmetric
    frobenius_change: float  # ||K_repaired - K||_F
    relative_change: float  # ||K_repaired - K||_F / ||K||_F (0 when K is all zeros)


def _outcome(K, repaired) -> RepairOutcome:
    change = float(np.linalg.norm(repaired - K))
    norm = float(np.linalg.norm(K))
    return RepairOutcome(repaired, change, change / norm if norm > 0 else 0.0)


def clip_eigenvalues(K) -> RepairOutcome:
    """Frobenius-nearest positive semidefinite matrix: clip negative eigenvalues to zero.

    For any square A the nearest symmetric PSD matrix in the Frobenius norm is obtained from
    the symmetric part ``B = (A + A^T) / 2`` by setting its negative eigenvalues to zero.

    Args:
      K: array of shape [N, N].

    References:
      Higham, "Computing a nearest symmetric positive semidefinite matrix", Linear Algebra
      Appl. 103, 103-118 (1988), Theorem 2.1.
    """
    K = _as_square(K, "K")
    sym = 0.5 * (K + K.T)
    values, vectors = np.linalg.eigh(sym)
    if values[0] >= 0:  # already PSD: only the symmetrization changes K
        return _outcome(K, sym)
    repaired = (vectors * np.maximum(values, 0.0)) @ vectors.T
    return _outcome(K, 0.5 * (repaired + repaired.T))


def shift_spectrum(K) -> RepairOutcome:
    """Tikhonov shift: add ``|lambda_min| I`` to the symmetric part when lambda_min < 0.

    Keeps every eigenvector and the gaps between eigenvalues; changes the diagonal.

    Args:
      K: array of shape [N, N].
    """
    K = _as_square(K, "K")
    sym = 0.5 * (K + K.T)
    smallest = float(np.linalg.eigvalsh(sym)[0])
    repaired = sym + (-smallest if smallest < 0 else 0.0) * np.eye(K.shape[0])
    return _outcome(K, repaired)


def restore_unit_diagonal(K) -> RepairOutcome:
    """Rescale to unit diagonal: ``D^-1/2 K D^-1/2`` with ``D = diag(K)`` (keeps PSD).

    Undoes a uniform shrinkage of a fidelity Gram whose diagonal was measured (or depolarized)
    below 1; a congruence, so positive semidefiniteness is preserved.

    Args:
      K: array of shape [N, N] with a positive diagonal.
    """
    K = _as_square(K, "K")
    diagonal = np.diag(K)
    if (diagonal <= 0).any():
        raise InvalidInputError("cannot restore a unit diagonal: the Gram has non-positive "
                                "diagonal entries; clip eigenvalues first or estimate the "
                                "diagonal with more shots")
    scale = 1.0 / np.sqrt(diagonal)
    repaired = K * scale[:, None] * scale[None, :]
    return _outcome(K, 0.5 * (repaired + repaired.T))


def repair_gram(K, method: str = "clip") -> RepairOutcome:
    """Repair a noisy train Gram by name: ``"clip"`` (eigenvalue clipping), ``"shift"``
    (Tikhonov shift), ``"clip_unit"`` (clip, then restore the unit diagonal) or
    ``"none"`` (symmetrize only)."""
    if method not in REPAIR_METHODS:
        close = difflib.get_close_matches(str(method), REPAIR_METHODS, n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        raise InvalidInputError(f"unknown repair method {method!r}{hint}; use one of "
                                f"{', '.join(REPAIR_METHODS)}")
    K = _as_square(K, "K")
    if method == "clip":
        return clip_eigenvalues(K)
    if method == "shift":
        return shift_spectrum(K)
    if method == "clip_unit":
        clipped = clip_eigenvalues(K).matrix
        if (np.diag(clipped) <= 0).any():
            return _outcome(K, clipped)
        return _outcome(K, restore_unit_diagonal(clipped).matrix)
    return _outcome(K, 0.5 * (K + K.T))


# --------------------------------------------------------------------------- shot budget

def _alignment(K: np.ndarray, labels: np.ndarray) -> float:
    """Kernel-target alignment ``<K, Y>_F / (||K||_F ||Y||_F)``.

    ``Y_ij = 1`` for equal labels, ``-1 / (C - 1)`` otherwise (``y y^T`` for two classes;
    the multiclass form is common practice).

    References:
      Cristianini, Shawe-Taylor, Elisseeff & Kandola, NIPS 2001.
    """
    classes = np.unique(labels)
    same = labels[:, None] == labels[None, :]
    other = -1.0 / (len(classes) - 1) if len(classes) > 1 else -1.0
    target = np.where(same, 1.0, other)
    denominator = np.linalg.norm(K) * np.linalg.norm(target)
    return float(np.sum(K * target) / denominator) if denominator > 0 else 0.0


def _svm_accuracy(K_train, K_test, y_train, y_test, C) -> float:
    from sklearn.svm import SVC  # heavy import only where the budget is computed

    model = SVC(C=C, kernel="precomputed")
    model.fit(K_train, y_train)
    return float(np.mean(model.predict(K_test) == y_test))


def _analytic_shots(K_train, overlaps_train, estimator, fraction, depolarizing, n_qubits,
                    readout_error=0.0):
    """Smallest shots with RMS entry std <= fraction * std of the off-diagonal entries.

    Rule (ours): the shot noise is negligible for the SVM when the typical (root-mean-square)
    standard deviation of an estimated off-diagonal train entry is a small fraction of how
    much those entries differ from each other. Variances are evaluated at the measured
    (noisy) values.
    """
    rows, cols = np.triu_indices(K_train.shape[0], k=1)
    if rows.size < 2:
        return None, None
    spread = float(np.std(K_train[rows, cols]))
    if spread == 0.0:
        return None, 0.0
    measured, measured_overlaps = _measured_values(K_train, overlaps_train, estimator,
                                                   depolarizing, n_qubits, readout_error)
    measured = np.clip(measured, 0.0, 1.0)
    target = fraction * spread
    ov = None if measured_overlaps is None else measured_overlaps[rows, cols]

    def rms_std(shots):
        variance = shot_variance(measured[rows, cols][None, :], shots, estimator=estimator,
                                 overlaps=None if ov is None else ov[None, :])
        return math.sqrt(float(np.mean(variance)))

    low = 2 if estimator == "hadamard_test" else 1
    if rms_std(low) <= target:
        return low, spread
    high = low
    while rms_std(high) > target:
        high *= 2
        if high > 2**50:
            return None, spread
    while high - low > 1:
        middle = (low + high) // 2
        if rms_std(middle) <= target:
            high = middle
        else:
            low = middle
    return high, spread


def _check_budget_inputs(y_train, shots_grid, repeats, estimator: str = "inversion_test"):
    """Shared boundary checks of the shot budgets; returns the shot grid as ints."""
    if len(np.unique(y_train)) < 2:
        raise InvalidInputError("y_train has a single class; an SVM needs at least two")
    try:
        grid = [_check_shots(s, estimator, name="shots_grid entry") for s in shots_grid]
    except TypeError:
        raise InvalidInputError("shots_grid must be a list of positive whole numbers") from None
    if not grid or sorted(set(grid)) != grid:
        raise InvalidInputError(f"shots_grid must be non-empty and strictly increasing, got "
                                f"{list(shots_grid)!r}")
    if isinstance(repeats, bool) or not isinstance(repeats, int) or repeats < 1:
        raise InvalidInputError(f"repeats must be a positive integer, got {repeats!r}")
    return grid


def shot_budget(K_train, K_test, y_train, y_test, *, seed, shots_grid=(10, 100, 1000, 10000),
                C: float = 1.0, tolerance: float = 0.02, repeats: int = 5,
                estimator: str = "inversion_test", overlaps_train=None, overlaps_test=None,
                repair: str = "clip", depolarizing: float = 0.0, n_qubits: int | None = None,
                spread_fraction: float = 0.1, readout_error: float = 0.0) -> dict:
    """How many shots a learned kernel needs before its SVM accuracy stops suffering.

    For each shot count: sample the train Gram (symmetric, diagonal exact) and the test Gram
    with ``shot_sampled_gram``, repair the train Gram (``repair_gram``; the rectangular test
    Gram is used as sampled), fit ``sklearn.svm.SVC(kernel="precomputed", C=C)``, and record
    test accuracy, kernel-target alignment of the repaired train Gram and its relative
    Frobenius error; averaged over ``repeats`` independent draws.

    Args:
      K_train: exact train Gram [N, N]; K_test: exact test-vs-train Gram [N_test, N].
      y_train: labels [N]; y_test: labels [N_test].
      seed: int or numpy Generator (all draws come from it, in a fixed order).
      shots_grid: increasing shot counts per circuit.
      tolerance: accuracy loss accepted relative to the exact kernel.
      overlaps_train, overlaps_test: complex overlaps, needed by hadamard_test.
      depolarizing, n_qubits, readout_error: optional device noise of each estimation
        circuit (see ``shot_sampled_gram``); the reference stays the noiseless exact kernel.
      spread_fraction: the analytic rule's fraction (see ``_analytic_shots``).

    Returns:
      JSON-able dict: ``exact`` (accuracy, alignment), ``curve`` (per shot count: means and
      standard deviations, total circuit executions), ``empirical_shots`` (smallest grid
      count from which every larger count keeps the mean accuracy within tolerance; None if
      none), ``analytic_shots``, ``entries`` and ``total_executions`` for both counts
      (``(N (N - 1) / 2 + N_test N) * shots * circuits_per_entry``).
    """
    _check_estimator(estimator)
    rng = _generator(seed)
    K_train = _as_kernel_values(K_train, "K_train")
    K_test = _as_kernel_values(K_test, "K_test")
    n_train = K_train.shape[0]
    if K_train.shape != (n_train, n_train):
        raise InvalidInputError(f"K_train must be square [N, N], got shape {K_train.shape}")
    if K_test.shape[1] != n_train:
        raise InvalidInputError(f"K_test must be [N_test, {n_train}] (test rows vs train "
                                f"columns), got shape {K_test.shape}")
    y_train, y_test = np.asarray(y_train), np.asarray(y_test)
    if y_train.shape != (n_train,) or y_test.shape != (K_test.shape[0],):
        raise InvalidInputError(f"labels must be 1-D with one entry per row: y_train "
                                f"{y_train.shape} for {n_train} rows, y_test {y_test.shape} "
                                f"for {K_test.shape[0]} rows")
    grid = _check_budget_inputs(y_train, shots_grid, repeats, estimator)
    if not (isinstance(C, (int, float)) and C > 0):
        raise InvalidInputError(f"C must be a positive number, got {C!r}")
    if not (0 <= tolerance < 1):
        raise InvalidInputError(f"tolerance must be an accuracy difference in [0, 1), got "
                                f"{tolerance!r}")
    if not (0 < spread_fraction):
        raise InvalidInputError(f"spread_fraction must be positive, got {spread_fraction!r}")
    depolarizing = _check_rate(depolarizing, "depolarizing")
    readout_error = _check_rate(readout_error, "readout_error")
    if repair not in REPAIR_METHODS:
        repair_gram(K_train, repair)  # raises with the list of methods
    if estimator == "hadamard_test":
        overlaps_train = _as_overlaps(overlaps_train, K_train)
        overlaps_test = _as_overlaps(overlaps_test, K_test)
    _require_qubits(estimator, depolarizing, readout_error, n_qubits)

    exact_accuracy = _svm_accuracy(K_train, K_test, y_train, y_test, C)
    exact_alignment = _alignment(K_train, y_train)
    n_test = K_test.shape[0]
    train_entries = n_train * (n_train - 1) // 2
    test_entries = n_test * n_train
    per_entry = circuits_per_entry(estimator)
    train_norm = float(np.linalg.norm(K_train))

    def executions(shots):
        return int((train_entries + test_entries) * shots * per_entry)

    curve = []
    for shots in grid:
        accuracy, alignment, error, change = [], [], [], []
        for _ in range(repeats):
            noisy_train = shot_sampled_gram(K_train, shots, estimator=estimator, seed=rng,
                                            symmetric=True, overlaps=overlaps_train,
                                            depolarizing=depolarizing, n_qubits=n_qubits,
                                            readout_error=readout_error)
            noisy_test = shot_sampled_gram(K_test, shots, estimator=estimator, seed=rng,
                                           symmetric=False, overlaps=overlaps_test,
                                           depolarizing=depolarizing, n_qubits=n_qubits,
                                           readout_error=readout_error)
            repaired = repair_gram(noisy_train, repair)
            accuracy.append(_svm_accuracy(repaired.matrix, noisy_test, y_train, y_test, C))
            alignment.append(_alignment(repaired.matrix, y_train))
            error.append(float(np.linalg.norm(repaired.matrix - K_train)) / train_norm)
            change.append(repaired.relative_change)
        curve.append({
            "shots": shots,
            "test_accuracy_mean": float(np.mean(accuracy)),
            "test_accuracy_std": float(np.std(accuracy)),
            "alignment_mean": float(np.mean(alignment)),
            "alignment_std": float(np.std(alignment)),
            "relative_gram_error_mean": float(np.mean(error)),
            "repair_relative_change_mean": float(np.mean(change)),
            "total_executions": executions(shots),
        })

    empirical = None
    for point in reversed(curve):
        if point["test_accuracy_mean"] >= exact_accuracy - tolerance:
            empirical = point["shots"]
        else:
            break
    analytic, spread = _analytic_shots(K_train, overlaps_train, estimator, spread_fraction,
                                       depolarizing, n_qubits, readout_error)
    result = {
        "estimator": estimator,
        "circuits_per_entry": per_entry,
        "repair": repair,
        "depolarizing": depolarizing,
        "readout_error": readout_error,
        "repeats": repeats,
        "tolerance": float(tolerance),
        "C": float(C),
        "exact": {"test_accuracy": exact_accuracy, "alignment": exact_alignment},
        "curve": curve,
        "empirical_shots": empirical,
        "analytic_shots": analytic,
        "analytic_rule": (f"smallest shots with root-mean-square std of the off-diagonal train "
                          f"entries <= {spread_fraction} x their standard deviation"),
        "off_diagonal_spread": spread,
        "entries": {"train": train_entries, "prediction": test_entries},
        "total_executions": {
            "empirical": None if empirical is None else executions(empirical),
            "analytic": None if analytic is None else executions(analytic),
        },
    }
    if n_qubits is not None:
        result["qubits_per_circuit"] = estimator_qubits(estimator, n_qubits)
    return result


# --------------------------------------------------------------------------- projected kernels

#: Measurement bases of a projected kernel: all qubits of one circuit are measured in X, in
#: Y or in Z (after one basis-change rotation per qubit for X and Y).
PAULI_BASES = ("X", "Y", "Z")


def _as_expectations(E, name: str) -> np.ndarray:
    try:
        E = np.asarray(E, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError(f"{name} must be a real numeric array") from None
    if E.ndim != 3 or E.shape[2] != 3 or E.shape[0] == 0:
        raise InvalidInputError(f"{name} must have shape [N, n_qubits, 3] (per-qubit <X>, <Y>, "
                                f"<Z>), got {E.shape}; see kernels.encoding_expectations")
    if not np.isfinite(E).all() or np.abs(E).max() > 1 + _PROBABILITY_SLACK:
        raise InvalidInputError(f"{name} must hold Pauli expectations in [-1, 1]")
    return np.clip(E, -1.0, 1.0)


def _check_gamma(gamma) -> float:
    if isinstance(gamma, bool) or not isinstance(gamma, (int, float, np.number)) \
            or not (gamma > 0 and math.isfinite(gamma)):
        raise InvalidInputError(f"gamma must be a positive number, got {gamma!r}")
    return float(gamma)


def _shrink_vector(shrink) -> np.ndarray:
    shrink = np.broadcast_to(np.asarray(1.0 if shrink is None else shrink, float), (3,))
    if np.any(shrink < 0) or np.any(shrink > 1):
        raise InvalidInputError(f"shrink factors must lie in [0, 1], got {shrink.tolist()}")
    return shrink


def projected_kernel_from_expectations(E_a, E_b=None, *, gamma: float) -> np.ndarray:
    """``k = exp(-gamma sum_q ||rho_q - rho'_q||_F^2)``, ``||rho - rho'||_F^2 = 1/2 sum_P
    (<P> - <P>')^2`` (Huang et al., Nat. Commun. 12, 2631 (2021)), in float64 numpy.

    Args:
      E_a: Pauli expectations [N_a, n, 3]; E_b: [N_b, n, 3] or None (= E_a).
    """
    a = _as_expectations(E_a, "E_a").reshape(np.shape(E_a)[0], -1)
    b = a if E_b is None else _as_expectations(E_b, "E_b").reshape(np.shape(E_b)[0], -1)
    squared = np.sum((a[:, None, :] - b[None, :, :]) ** 2, axis=-1)
    return np.exp(-_check_gamma(gamma) * 0.5 * squared)


def projected_entry_variance(E_a, E_b=None, *, gamma: float, shots, shrink=None):
    """Shot-noise variance of each projected-kernel entry (delta method).

    Each expectation ``<P>`` is estimated from ``shots`` outcomes +-1 of its basis circuit:
    unbiased, variance ``(1 - <P>^2) / shots`` (binomial, common practice). With ``d_j`` the
    differences of the 3n expectations of the two samples and ``v_j`` the sum of their two
    variances, ``k = exp(-gamma/2 sum_j d_j^2)`` has, to second order (delta method, common
    practice; Gaussian errors, whose third moment vanishes),

        Var(k_hat) ~ gamma^2 k^2 (sum_j d_j^2 v_j + 1/2 sum_j v_j^2).

    The first term vanishes when the two samples agree, the second (the spread of the
    squared noise) does not. Evaluated at the measured, i.e. shrunk, expectations
    ``shrink_P <P>`` (device noise, see ``projected_shrink``). For a train Gram (``E_b``
    None) the diagonal is 0: both sides use the same estimate, so ``k(x, x) = 1`` exactly.

    Args:
      E_a: [N_a, n, 3]; E_b: [N_b, n, 3] or None; shrink: factor per basis (X, Y, Z) or one
        number (default 1: no device noise).

    Returns:
      float64 array [N_a, N_b].
    """
    shots = _check_shots(shots)
    shrink = _shrink_vector(shrink)
    gamma = _check_gamma(gamma)
    a = _as_expectations(E_a, "E_a") * shrink
    b = a if E_b is None else _as_expectations(E_b, "E_b") * shrink
    K = projected_kernel_from_expectations(a, b, gamma=gamma)
    a, b = a.reshape(a.shape[0], -1), b.reshape(b.shape[0], -1)
    var_a, var_b = (1.0 - a * a) / shots, (1.0 - b * b) / shots
    v = var_a[:, None, :] + var_b[None, :, :]
    d2 = (a[:, None, :] - b[None, :, :]) ** 2
    out = gamma**2 * K**2 * (np.sum(d2 * v, -1) + 0.5 * np.sum(v * v, -1))
    if E_b is None:
        np.fill_diagonal(out, 0.0)
    return out


def projected_variance_bound(K, *, gamma: float, n_qubits: int, shots):
    """Upper bound of ``projected_entry_variance`` from the Gram alone.

    Every expectation variance is at most ``1 / shots`` (at ``<P> = 0``), so ``v_j <= 2 /
    shots``; and ``sum_j d_j^2 = -2 ln(k) / gamma``. Hence
    ``Var(k_hat) <= k^2 (-4 gamma ln(k) / shots + 6 n gamma^2 / shots^2)``.

    Args:
      K: projected-kernel values in (0, 1], [N_a, N_b].
    """
    shots = _check_shots(shots)
    gamma = _check_gamma(gamma)
    n = _check_count(n_qubits, "n_qubits")
    K = np.clip(_as_matrix(K, "K"), 1e-300, 1.0)
    return K**2 * (-4.0 * gamma * np.log(K) / shots + 6.0 * n * gamma**2 / shots**2)


def sample_expectations(E, shots, *, seed, shrink=None) -> np.ndarray:
    """Finite-shot estimates of Pauli expectations, as a quantum computer returns them.

    ``<P>_hat = 2 m / shots - 1`` with ``m ~ Binomial(shots, (1 + s_P <P>) / 2)`` the count of
    +1 outcomes (``s_P``: device-noise shrink factor of the basis). Each qubit's marginal
    is exact; the correlation between qubits measured in the same circuit is not modelled
    (exact for product encodings).

    Args:
      E: exact expectations [N, n, 3]; seed: int or numpy Generator.

    Returns:
      float64 array [N, n, 3].
    """
    shots = _check_shots(shots)
    measured = _as_expectations(E, "E") * _shrink_vector(shrink)
    rng = _generator(seed)
    counts = rng.binomial(shots, np.clip(0.5 * (1.0 + measured), 0.0, 1.0))
    return 2.0 * counts / shots - 1.0


def projected_depolarizing(blueprint: Blueprint, *, one_qubit_error: float,
                           two_qubit_error: float) -> float:
    """Global depolarizing probability of the encoding circuit alone (projected kernel).

    A projected kernel runs only ``U(x)`` (no inverse), so ``p = 1 - (1 - e1)^g1 (1 -
    e2)^g2`` with the encoding's own gate counts (``depolarizing_from_gates``).
    """
    if blueprint.state_kind != "gates":
        raise InvalidInputError("amplitude encoding has no gate decomposition, so its gate "
                                "noise is unknown")
    counts = resource_counts(blueprint)
    return depolarizing_from_gates(counts["one_qubit_gates"], counts["two_qubit_gates"],
                                   one_qubit_error=one_qubit_error,
                                   two_qubit_error=two_qubit_error)


def projected_shrink(p: float, *, n_qubits: int, one_qubit_error: float = 0.0,
                     readout_error: float = 0.0) -> np.ndarray:
    """Factor by which device noise shrinks each measured expectation, per basis (X, Y, Z).

    Derivation (global depolarizing model): ``rho -> (1 - p) rho + p I / 2^n``. Its
    one-qubit marginal is ``(1 - p) rho_q + p I / 2``, and since ``rho_q = (I + r . sigma) /
    2``, the Bloch vector becomes ``(1 - p) r``: every expectation shrinks by ``1 - p``.
    Measuring in X or Y takes one basis-change rotation per qubit first; with a global
    channel of rate e1 after each, they shrink the X and Y expectations by another
    ``(1 - e1)^n``. A readout flip with probability e maps ``P(+1) -> e + (1 - 2e) P(+1)``,
    so ``<P> -> (1 - 2 e) <P>`` (exact). Checked against the density-matrix simulation
    (``density_matrix_expectations``) in the tests.

    Returns:
      float64 array [3].
    """
    p = _check_rate(p, "p")
    n = _check_count(n_qubits, "n_qubits")
    e1 = _check_rate(one_qubit_error, "one_qubit_error")
    e = _check_rate(readout_error, "readout_error")
    rotation = (1.0 - e1) ** n
    return (1.0 - p) * (1.0 - 2.0 * e) * np.array([rotation, rotation, 1.0])


def density_matrix_expectations(blueprint: Blueprint, params: dict, X, *,
                                one_qubit_error: float = 0.0, two_qubit_error: float = 0.0,
                                channel: str = "local") -> np.ndarray:
    """Per-qubit ``<X>, <Y>, <Z>`` of the noisy encoded state ``rho(x)`` (density matrices).

    The encoding ``U(x)`` is applied step by step to ``|0><0|``, each step followed by a
    depolarizing channel on the gate's qubits (``"local"``) or on all qubits
    (``"global"``), as in ``density_matrix_kernel``; then ``<P_q> = Tr(rho P_q)``.

    Returns:
      float64 array [N, n, 3].
    """
    e1 = _check_rate(one_qubit_error, "one_qubit_error")
    e2 = _check_rate(two_qubit_error, "two_qubit_error")
    if channel not in CHANNELS:
        raise InvalidInputError(f"channel must be 'local' or 'global', got {channel!r}")
    if blueprint.state_kind != "gates":
        raise InvalidInputError("amplitude encoding has no gate sequence to simulate")
    n = blueprint.n_qubits
    if n > DENSITY_MATRIX_MAX_QUBITS:
        raise ResourceLimitError(f"density-matrix simulation is limited to "
                                 f"{DENSITY_MATRIX_MAX_QUBITS} qubits, the encoding has {n}")
    X = validate_features(blueprint, X, name="X")
    angles = np.asarray(step_angles(compile_blueprint(blueprint), params, X), dtype=np.float64)
    everything = tuple(range(n))

    def noise(rho, step):
        error = e1 if len(step.qubits) == 1 else e2
        return _depolarize(rho, everything if channel == "global" else step.qubits, error, n)

    rho = _encoded_density_matrices(blueprint, angles, noise)
    out = np.empty((X.shape[0], n, 3))
    for q in range(n):
        left, right = 2**q, 2 ** (n - q - 1)
        view = rho.reshape(-1, left, 2, right, left, 2, right)
        reduced = np.einsum("biajicj->bac", view)  # partial trace to qubit q: [N, 2, 2]
        out[:, q, 0] = 2.0 * reduced[:, 0, 1].real
        out[:, q, 1] = -2.0 * reduced[:, 0, 1].imag
        out[:, q, 2] = (reduced[:, 0, 0] - reduced[:, 1, 1]).real
    return out


def _smallest_shots(rms_std, target, low: int = 1):
    """Smallest whole shots >= low with ``rms_std(shots) <= target`` (rms_std decreasing);
    None beyond 2^50."""
    if rms_std(low) <= target:
        return low
    high = low
    while rms_std(high) > target:
        low, high = high, high * 2
        if high > 2**50:
            return None
    while high - low > 1:
        middle = (low + high) // 2
        if rms_std(middle) <= target:
            high = middle
        else:
            low = middle
    return high


def projected_shot_budget(E_train, E_test, y_train, y_test, *, gamma: float, seed,
                          shots_grid=(10, 100, 1000, 10000), C: float = 1.0,
                          tolerance: float = 0.02, repeats: int = 5, shrink=None,
                          spread_fraction: float = 0.1) -> dict:
    """``shot_budget`` for a projected kernel: shots per measurement basis and sample.

    Hardware runs ``3 (N + N_test)`` circuits (each sample in the X, Y and Z basis), each
    with ``shots`` shots, not one circuit per pair of samples. For each shot count the
    expectations of every sample are sampled (``sample_expectations``, with device noise
    through ``shrink``), the train and test Grams are computed from the estimates (a train
    Gram of estimated features is PSD by construction: no repair), and the SVM is fitted.
    The analytic rule is ``_analytic_shots``'s, with ``projected_entry_variance``.

    Args:
      E_train: exact expectations [N, n, 3]; E_test: [N_test, n, 3].
      gamma: the projected kernel's bandwidth.
      shrink: device-noise factor per basis (``projected_shrink``); None: noiseless.

    Returns:
      JSON-able dict with the keys of ``shot_budget`` (``entries`` replaced by
      ``circuits``; ``circuits_per_sample`` = 3).
    """
    rng = _generator(seed)
    gamma = _check_gamma(gamma)
    E_train = _as_expectations(E_train, "E_train")
    E_test = _as_expectations(E_test, "E_test")
    if E_test.shape[1] != E_train.shape[1]:
        raise InvalidInputError("E_train and E_test must have the same number of qubits")
    y_train, y_test = np.asarray(y_train), np.asarray(y_test)
    if y_train.shape != (E_train.shape[0],) or y_test.shape != (E_test.shape[0],):
        raise InvalidInputError("labels must be 1-D with one entry per sample")
    grid = _check_budget_inputs(y_train, shots_grid, repeats)
    shrink = _shrink_vector(shrink)
    K_train = projected_kernel_from_expectations(E_train, gamma=gamma)
    K_test = projected_kernel_from_expectations(E_test, E_train, gamma=gamma)
    exact_accuracy = _svm_accuracy(K_train, K_test, y_train, y_test, C)
    train_norm = float(np.linalg.norm(K_train))
    n_train, n_test = E_train.shape[0], E_test.shape[0]
    bases = len(PAULI_BASES)

    def executions(shots):
        return int(bases * (n_train + n_test) * shots)

    curve = []
    for shots in grid:
        accuracy, alignment, error = [], [], []
        for _ in range(repeats):
            noisy_train = sample_expectations(E_train, shots, seed=rng, shrink=shrink)
            noisy_test = sample_expectations(E_test, shots, seed=rng, shrink=shrink)
            gram = projected_kernel_from_expectations(noisy_train, gamma=gamma)
            gram_test = projected_kernel_from_expectations(noisy_test, noisy_train, gamma=gamma)
            accuracy.append(_svm_accuracy(gram, gram_test, y_train, y_test, C))
            alignment.append(_alignment(gram, y_train))
            error.append(float(np.linalg.norm(gram - K_train)) / train_norm)
        curve.append({"shots": shots, "test_accuracy_mean": float(np.mean(accuracy)),
                      "test_accuracy_std": float(np.std(accuracy)),
                      "alignment_mean": float(np.mean(alignment)),
                      "alignment_std": float(np.std(alignment)),
                      "relative_gram_error_mean": float(np.mean(error)),
                      "total_executions": executions(shots)})
    empirical = None
    for point in reversed(curve):
        if point["test_accuracy_mean"] >= exact_accuracy - tolerance:
            empirical = point["shots"]
        else:
            break
    rows, cols = np.triu_indices(n_train, k=1)
    spread = float(np.std(K_train[rows, cols])) if rows.size >= 2 else None
    analytic = None
    if spread:
        def rms_std(shots):
            variance = projected_entry_variance(E_train, gamma=gamma, shots=shots,
                                                shrink=shrink)
            return math.sqrt(float(np.mean(variance[rows, cols])))

        analytic = _smallest_shots(rms_std, spread_fraction * spread)
    return {
        "estimator": "pauli_expectations",
        "shots_unit": "shots per circuit (one measurement basis of one sample)",
        "circuits_per_sample": bases,
        "shrink": [float(v) for v in shrink],
        "repeats": repeats, "tolerance": float(tolerance), "C": float(C),
        "gamma": gamma,
        "exact": {"test_accuracy": exact_accuracy, "alignment": _alignment(K_train, y_train)},
        "curve": curve,
        "empirical_shots": empirical,
        "analytic_shots": analytic,
        "analytic_rule": (f"smallest shots per circuit with root-mean-square std of the "
                          f"off-diagonal train entries (delta method) <= {spread_fraction} x "
                          "their standard deviation"),
        "off_diagonal_spread": spread,
        "circuits": {"train": bases * n_train, "prediction": bases * n_test},
        "total_executions": {
            "empirical": None if empirical is None else executions(empirical),
            "analytic": None if analytic is None else executions(analytic)},
        "qubits_per_circuit": int(E_train.shape[1]),
    }


def _noise_settings(hw: dict) -> dict:
    return {"one_qubit_error": hw["one_qubit_error"], "two_qubit_error": hw["two_qubit_error"],
            "readout_error": hw["readout_error"]}


def _curve_executions(curve, shots):
    for point in curve or ():
        if point["shots"] == shots:
            return point["total_executions"]
    return None


def _projected_estimate(hw: dict, blueprint, params, X_train, X_test, y_train, y_test, *,
                        C, seed, gamma) -> dict:
    """Projected kernel: Pauli expectations per sample, 3 (N + N_test) circuits."""
    from hilbertune.kernels import encoding_expectations

    E_train = np.asarray(encoding_expectations(blueprint, params, X_train), dtype=np.float64)
    E_test = np.asarray(encoding_expectations(blueprint, params, X_test), dtype=np.float64)
    common = dict(gamma=gamma, seed=seed, shots_grid=sorted(hw["shots_grid"]), C=C,
                  tolerance=hw["tolerance"])
    budget = projected_shot_budget(E_train, E_test, y_train, y_test, **common)
    out = {"estimator": "pauli_expectations", "kind": "projected", "shot_budget": budget}
    if blueprint.state_kind == "gates":
        p = projected_depolarizing(blueprint, one_qubit_error=hw["one_qubit_error"],
                                   two_qubit_error=hw["two_qubit_error"])
        shrink = projected_shrink(p, n_qubits=blueprint.n_qubits,
                                  one_qubit_error=hw["one_qubit_error"],
                                  readout_error=hw["readout_error"])
        noisy = projected_shot_budget(E_train, E_test, y_train, y_test, shrink=shrink, **common)
        with_noise = noisy["empirical_shots"]
        out["device_noise"] = {
            "model": ("global depolarizing of the encoding circuit shrinks every Bloch vector: "
                      "<P> -> (1-p) <P> (derived in hardware.projected_shrink); the X and Y "
                      "basis rotations add (1-e1)^n"
                      + ("; readout flips shrink it by (1-2e)" if hw["readout_error"] > 0
                         else "")),
            "p_from": "gate counts of the encoding circuit alone (a projected kernel runs no "
                      "inverse)",
            **_noise_settings(hw),
            "depolarizing_probability": p,
            "shrink_per_basis": {b: float(v) for b, v in zip(PAULI_BASES, shrink)},
            "test_accuracy_at_most_shots": noisy["curve"][-1]["test_accuracy_mean"],
            "empirical_shots_with_noise": with_noise,
            "total_executions_with_noise": _curve_executions(noisy["curve"], with_noise),
            "curve": noisy["curve"],
        }
    return out


def run_estimate(hw: dict, blueprint, params, X_train, X_test, k_train, k_test, y_train,
                 y_test, *, C: float, seed: int, kind: str = "fidelity",
                 gamma: float = 1.0) -> dict:
    """Shot budget (noiseless and under device noise) of a run's kernel (JSON-able dict).

    A fidelity kernel is estimated entry by entry with ``hw["estimator"]`` (one circuit per
    pair of samples); a projected kernel from single-qubit Pauli expectations (3 circuits
    per sample, ``projected_shot_budget``), whatever ``hw["estimator"]`` says.

    Args:
      hw: the ``[hardware]`` section of a resolved configuration.
      k_train, k_test: the exact Grams of the SVM (fidelity; the projected path recomputes
        them from the Pauli expectations).
      kind, gamma: the kernel the SVM uses ("fidelity" or "projected") and the projected
        bandwidth.

    Returns:
      {"estimator", "kind", "shot_budget", "device_noise" (gate encodings only)}; the
      device-noise part holds ``empirical_shots_with_noise`` and
      ``total_executions_with_noise``.
    """
    if kind not in ("fidelity", "projected"):
        raise InvalidInputError(f"kind must be 'fidelity' or 'projected', got {kind!r}")
    if kind == "projected":
        return _projected_estimate(hw, blueprint, params, X_train, X_test, y_train, y_test,
                                   C=C, seed=seed, gamma=gamma)
    estimator = hw["estimator"]
    overlaps = {}
    if estimator == "hadamard_test":  # estimates Re and Im of the overlap, needs the phase
        overlaps = {"overlaps_train": state_overlaps(blueprint, params, X_train),
                    "overlaps_test": state_overlaps(blueprint, params, X_test, X_train)}
    common = dict(seed=seed, shots_grid=sorted(hw["shots_grid"]), C=C,
                  tolerance=hw["tolerance"], estimator=estimator, n_qubits=blueprint.n_qubits,
                  **overlaps)
    budget = shot_budget(k_train, k_test, y_train, y_test, **common)
    budget["shots_unit"] = "shots per circuit (one kernel entry)"
    out = {"estimator": estimator, "kind": "fidelity", "shot_budget": budget}
    if blueprint.state_kind == "gates":
        p = inversion_test_depolarizing(
            blueprint, one_qubit_error=hw["one_qubit_error"],
            two_qubit_error=hw["two_qubit_error"])
        noisy = shot_budget(k_train, k_test, y_train, y_test, depolarizing=p,
                            readout_error=hw["readout_error"], **common)
        readout = ("; then readout flips: k -> f k + (1-k)(1-f)/(2^n-1), f = (1-e)^n "
                   "(non-zero outcomes assumed even)" if estimator == "inversion_test"
                   else "; then readout flips shrink it by (1-2e)")
        with_noise = noisy.get("empirical_shots")
        out["device_noise"] = {
            "model": {"inversion_test": "global depolarizing per kernel entry, k -> "
                                        "(1-p) k + p/2^n (Hubregtsen et al. 2022)",
                      "swap_test": "global depolarizing shrinks the measured value: k -> "
                                   "(1-p) k",
                      "hadamard_test": "global depolarizing shrinks the measured overlap by "
                                       "(1-p)"}[estimator]
            + (readout if hw["readout_error"] > 0 else ""),
            "p_from": "gate counts of the inversion-test circuit (encoding and its "
                      "inverse); for the ancilla estimators an approximation, since their "
                      "controlled circuits have more gates",
            **_noise_settings(hw),
            "depolarizing_probability": p,
            "test_accuracy_at_most_shots": noisy["curve"][-1]["test_accuracy_mean"]
            if noisy.get("curve") else None,
            "empirical_shots_with_noise": with_noise,
            "total_executions_with_noise": _curve_executions(noisy.get("curve"), with_noise),
            "curve": noisy.get("curve"),
        }
    return out
