"""Benchmark of the statevector core against its physical limits; prints one JSON object.

Three comparisons, each timed side by side in one process (the two sides alternate inside
every repeat, so both see the same machine load; figures are medians over repeats, after
one untimed warm-up call that pays for XLA compilation):

1. fidelity Gram of the layered encoding (12 qubits, 2000 samples, 2 layers), states + Gram,
   against one bare complex64 matrix product of the same shapes ([2000, 4096] x
   [4096, 2000]) in numpy and in jax.numpy; the faster bare product is the baseline.
   Target: ratio <= 1.3.
2. the same kind of Gram (10 qubits, 1000 samples) against simulating the inversion-test
   circuit per pair (``kernels.inversion_test_probability``, jit-compiled and batched over
   pairs, which favours the per-pair path); its time on a subsample of pairs is extrapolated
   linearly to all N (N - 1) / 2 pairs. Target: speed-up >= 500. For information, also one
   jit-compiled call per pair (batch of one), extrapolated the same way.
3. closed-form product kernel (angle encoding, 200 qubits = features, 5000 samples) against
   a numpy RBF Gram of the same size (squared distances by one GEMM, then exp).
   Target: ratio <= 2.

Usage: ``python experiments/bench_gram.py [--quick] [--repeats R] [--seed S] [--device-path]``.
``--quick`` shrinks every size (CI smoke test); its ratios are not the targets' figures.
The JSON names the backend and the engine path measured (``engine``): on a CPU the host
path (BLAS ``herk``/``gemm``, numpy tiles), on a GPU the device path (pure XLA).
``--device-path`` measures everything twice, first on the host path, then on the device
path forced (``kernels.engine_path``; on a CPU this times the GPU code's XLA programs),
each against its own baselines timed in the same block, and prints the ratios side by
side (``paths_side_by_side``).
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import platform
import statistics
import sys
import time

import numpy as np
import jax
import jax.numpy as jnp

from hilbertune import circuits, encodings, kernels

FULL = {"layered": {"n_qubits": 12, "n_samples": 2000, "layers": 2},
        "per_pair": {"n_qubits": 10, "n_samples": 1000, "layers": 2, "pairs": 2048,
                     "pair_batch": 256, "single_calls": 64},
        "product": {"n_qubits": 200, "n_samples": 5000}}
QUICK = {"layered": {"n_qubits": 8, "n_samples": 300, "layers": 2},
         "per_pair": {"n_qubits": 6, "n_samples": 200, "layers": 2, "pairs": 256,
                      "pair_batch": 128, "single_calls": 16},
         "product": {"n_qubits": 40, "n_samples": 500}}


def _timed(fn):
    start = time.perf_counter()
    out = fn()
    jax.block_until_ready(out)
    return time.perf_counter() - start


def _side_by_side(named: dict, repeats: int) -> dict:
    """Median seconds of each callable; one warm-up each, then alternate within repeats."""
    first = {name: _timed(fn) for name, fn in named.items()}
    samples = {name: [] for name in named}
    for _ in range(repeats):
        for name, fn in named.items():
            samples[name].append(_timed(fn))
    return {name: {"median_s": statistics.median(times), "min_s": min(times),
                   "first_call_s": first[name]} for name, times in samples.items()}


def _features(rng, n_samples, n_features):
    return rng.uniform(-np.pi / 2, np.pi / 2, size=(n_samples, n_features))


def bench_layered(cfg, repeats, rng):
    n, m = cfg["n_qubits"], cfg["n_samples"]
    bp = encodings.reuploading_layers(n, layers=cfg["layers"])
    params = circuits.initial_params(bp, jax.random.key(0), bias_scale=0.1)
    X = _features(rng, m, n)
    # the bare product: random complex64 operands of the states' shapes
    a_np = (rng.normal(size=(m, 2**n)) + 1j * rng.normal(size=(m, 2**n))).astype(np.complex64)
    b_np = np.ascontiguousarray(a_np.conj().T)
    a_j, b_j = jnp.asarray(a_np), jnp.asarray(b_np)
    jnp_matmul = jax.jit(jnp.matmul)
    states = circuits.encode_states(bp, params, X)
    timings = _side_by_side({
        "total_states_and_gram": lambda: kernels.quantum_gram(bp, params, X),
        "stage_states": lambda: circuits.encode_states(bp, params, X),
        "stage_gram_from_states": lambda: kernels.fidelity_gram(states),
        "bare_matmul_numpy": lambda: a_np @ b_np,
        "bare_matmul_jnp": lambda: jnp_matmul(a_j, b_j),
    }, repeats)
    bare = {k: timings[k]["median_s"] for k in ("bare_matmul_numpy", "bare_matmul_jnp")}
    baseline = min(bare, key=bare.get)
    total = timings["total_states_and_gram"]["median_s"]
    return {
        "n_qubits": n, "n_samples": m, "layers": cfg["layers"],
        "bare_shapes": f"[{m}, {2**n}] x [{2**n}, {m}] complex64",
        "timings": timings,
        "baseline": baseline + " (the faster of the two bare products)",
        "ratio_total_over_baseline": total / bare[baseline],
        "ratio_total_over_numpy_matmul": total / bare["bare_matmul_numpy"],
        "ratio_total_over_jnp_matmul": total / bare["bare_matmul_jnp"],
        "target": "ratio_total_over_baseline <= 1.3",
        "target_met": bool(total / bare[baseline] <= 1.3),
    }


def bench_per_pair(cfg, repeats, rng):
    n, m = cfg["n_qubits"], cfg["n_samples"]
    bp = encodings.reuploading_layers(n, layers=cfg["layers"])
    params = circuits.initial_params(bp, jax.random.key(1), bias_scale=0.1)
    X = _features(rng, m, n)
    n_pairs = cfg["pairs"]
    i = rng.integers(0, m, size=n_pairs)
    j = rng.integers(0, m, size=n_pairs)
    xa = jnp.asarray(X[i], jnp.float32)
    xb = jnp.asarray(X[j], jnp.float32)
    batch = cfg["pair_batch"]
    per_pair = jax.jit(kernels.inversion_test_probability, static_argnums=0)

    def run_pairs():
        return [per_pair(bp, params, xa[s:s + batch], xb[s:s + batch])
                for s in range(0, n_pairs, batch)]

    # agreement check on the subsample (both paths compute the same kernel entries)
    gram = np.asarray(kernels.quantum_gram(bp, params, X))
    reference = np.concatenate([np.asarray(r) for r in run_pairs()])
    max_abs_diff = float(np.max(np.abs(reference - gram[i, j])))
    # the literal reading: one circuit simulation call per pair (jit-compiled, batch of 1)
    singles = cfg["single_calls"]

    def run_single_calls():
        return [per_pair(bp, params, xa[s:s + 1], xb[s:s + 1]) for s in range(singles)]

    states = circuits.encode_states(bp, params, X)
    if not kernels.device_path():  # the host path's input: numpy states, as a fit has them
        states = np.asarray(states)
    timings = _side_by_side({"gram": lambda: kernels.quantum_gram(bp, params, X),
                             "stage_gram_from_states": lambda: kernels.fidelity_gram(states),
                             "per_pair_subsample": run_pairs,
                             "per_pair_one_call_each": run_single_calls}, repeats)
    all_pairs = m * (m - 1) // 2
    per_pair_total = timings["per_pair_subsample"]["median_s"] / n_pairs * all_pairs
    speedup = per_pair_total / timings["gram"]["median_s"]
    single_total = timings["per_pair_one_call_each"]["median_s"] / singles * all_pairs
    return {
        "n_qubits": n, "n_samples": m, "layers": cfg["layers"],
        "timings": timings,
        "per_pair_method": (f"inversion_test_probability, jit-compiled, batches of {batch} "
                            f"pairs; timed on {n_pairs} random pairs and extrapolated "
                            f"linearly to N(N-1)/2 = {all_pairs} pairs"),
        "per_pair_extrapolated_s": per_pair_total,
        "max_abs_diff_gram_vs_per_pair": max_abs_diff,
        "speedup": speedup,
        # Both paths run the same gate engine, so speeding it up speeds both; the batched
        # ratio cannot exceed per-pair time / matrix-product time (the Gram if its states
        # cost nothing), about N times (per-pair cost of one circuit / herk cost per row).
        "speedup_ceiling_if_states_were_free": (
            per_pair_total / timings["stage_gram_from_states"]["median_s"]),
        "one_call_per_pair_extrapolated_s": single_total,
        "speedup_vs_one_call_per_pair": single_total / timings["gram"]["median_s"],
        "target": "speedup >= 500 against a per-pair simulation",
        "target_met_one_call_per_pair": bool(single_total / timings["gram"]["median_s"] >= 500),
        "target_met_batched_pairs": bool(speedup >= 500),
    }


def _numpy_rbf(X, gamma):
    # squared distances by one GEMM, then exp (common practice)
    sq = np.einsum("ij,ij->i", X, X)
    d2 = sq[:, None] + sq[None, :] - 2.0 * (X @ X.T)
    np.maximum(d2, 0.0, out=d2)
    return np.exp(-gamma * d2)


def bench_product(cfg, repeats, rng):
    n, m = cfg["n_qubits"], cfg["n_samples"]
    bp = encodings.single_axis_rotations(n)
    params = circuits.initial_params(bp, bandwidth=0.1)
    X = _features(rng, m, n)
    X32 = X.astype(np.float32)
    factors = circuits.product_factors(bp, params, X)
    timings = _side_by_side({
        "product_kernel_total": lambda: kernels.quantum_gram(bp, params, X),
        "stage_factors": lambda: circuits.product_factors(bp, params, X),
        "stage_gram_from_factors": lambda: kernels.product_gram(factors),
        "rbf_numpy_float32": lambda: _numpy_rbf(X32, 1.0 / n),
        "rbf_numpy_float64": lambda: _numpy_rbf(X, 1.0 / n),
    }, repeats)
    total = timings["product_kernel_total"]["median_s"]
    rbf = timings["rbf_numpy_float32"]["median_s"]
    return {
        "n_qubits": n, "n_samples": m,
        "timings": timings,
        "baseline": "rbf_numpy_float32 (same precision as the quantum Gram)",
        "ratio_total_over_rbf": total / rbf,
        "ratio_total_over_rbf_float64": total / timings["rbf_numpy_float64"]["median_s"],
        "target": "ratio_total_over_rbf <= 2",
        "target_met": bool(total / rbf <= 2),
    }


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small sizes (CI smoke test)")
    parser.add_argument("--repeats", type=int, default=None, help="timed repeats per side")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--only", choices=["layered", "per_pair", "product"], default=None)
    parser.add_argument("--device-path", action="store_true",
                        help="measure the host path and the forced device path side by side")
    args = parser.parse_args(argv)
    sizes = QUICK if args.quick else FULL
    repeats = args.repeats or (2 if args.quick else 5)
    result = {
        "mode": "quick" if args.quick else "full",
        "repeats": repeats,
        "statistic": "median over repeats after one warm-up call; sides alternate per repeat",
        "machine": {"platform": platform.platform(), "python": platform.python_version(),
                    "cpu_count": os.cpu_count(), "jax": jax.__version__,
                    "jax_backend": jax.default_backend(), "numpy": np.__version__,
                    "load_average_at_start": list(os.getloadavg())},
    }
    benches = {"layered": bench_layered, "per_pair": bench_per_pair, "product": bench_product}
    # one block per path (switching paths clears JAX's caches, so they cannot alternate
    # call by call); each block times its own baselines, so its ratios are side by side
    paths = [("", "host"), ("_device_path", "device")] if args.device_path else [("", None)]
    result["engine"] = {"backend": jax.default_backend(),
                        "paths": [path or ("device" if kernels.device_path() else "host")
                                  for _, path in paths]}
    for suffix, path in paths:
        with kernels.engine_path(path) if path else contextlib.nullcontext():
            result["engine"]["compute_device" + suffix] = kernels.compute_device()
            rng = np.random.default_rng(args.seed)  # the same data on both paths
            for name, bench in benches.items():
                if args.only in (None, name):
                    result[name + suffix] = bench(sizes[name], repeats, rng)
    if args.device_path:
        keys = {"layered": "ratio_total_over_baseline", "per_pair": "speedup",
                "product": "ratio_total_over_rbf"}
        result["paths_side_by_side"] = {
            f"{name}.{key}": {"host": result[name][key],
                              "device": result[name + "_device_path"][key]}
            for name, key in keys.items() if name in result}
    result["machine"]["load_average_at_end"] = list(os.getloadavg())
    json.dump(result, sys.stdout, indent=2)
    sys.stdout.write("\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
