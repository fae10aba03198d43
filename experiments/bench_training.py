"""Benchmark: cost of one training step against one forward Gram, and mini-batch throughput.

Usage: python experiments/bench_training.py [--quick] [--repeats R]

Measures, side by side in one process (interleaved, medians over R repeats, after one
warm-up call that compiles):
  * forward_gram_s: the fidelity Gram of N training rows as the tool computes it for an
    SVM, ``kernels.quantum_gram`` (jitted states + BLAS herk, half a general product);
  * forward_gram_xla_s: the same values from the jitted ``kernels.gram_for_training``
    (states + one XLA complex product);
  * forward_training_gram_s: the same values through ``training.training_gram`` (the
    function training differentiates: BLAS herk forward, three real products backward);
  * value_and_grad_s: one training step's objective value and gradient (centered
    alignment) with respect to weights, biases and bandwidth, full batch;
  * optimizer_step_s: the whole compiled step of ``train_encoding`` (value, gradient,
    global-norm clipping, Adam update), full batch, no validation split;
  * minibatch_steps_per_s: compiled steps per second with class-balanced batches of 64;
  * step_parts: the circuit forward pass alone and with its reverse pass (cotangent given
    as an argument), both also with all rows in one batch instead of cache-sized chunks;
    the host herk; the backward product W @ S as three real products and, side by side,
    the same product as one OpenBLAS ``cgemm``; one real float32 product of the same
    shape (the unit in which herk costs two and the backward three). From them: the
    ratio of a step made of nothing but the products and the circuit; the ratio a step
    could reach if the circuit's reverse pass cost no more than its forward pass; and the
    ratio of the two products alone (the floor if the circuit cost nothing).
Default problem: 12 qubits, N = 2000, layered encoding with 2 layers (target ratio
value_and_grad / forward <= 2.5). ``--quick``: 8 qubits, N = 256 (a smoke check).
Prints one JSON object, naming the engine path measured (``engine_path``: "host" for
BLAS ``herk`` through a callback, the default on a CPU; "device" for pure XLA, the
default on a GPU). ``--device-path`` measures everything on the host path, then again on
the forced device path (``device_path`` in the JSON), with the main ratios side by side
(``paths_side_by_side``); the ``host_overlap_herk`` and ``reference_host_cgemm`` parts
stay host references on both.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import sys
import time

import numpy as np
import jax
import jax.numpy as jnp
from scipy.linalg import blas

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "src"))

from hilbertune import build_encoding, initial_params  # noqa: E402
from hilbertune.kernels import (compute_device, device_path, engine_path,  # noqa: E402
                                gram_for_training, quantum_gram)
from hilbertune.circuits import encode_states  # noqa: E402
from hilbertune.training import (_compiled_step, _host_overlap, _StaticConfig,  # noqa: E402
                                 planar_matmul, training_gram, training_loss_function)


def timed(function, *args):
    start = time.perf_counter()
    jax.block_until_ready(function(*args))
    return time.perf_counter() - start


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="8 qubits, N = 256")
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--qubits", type=int, default=None)
    parser.add_argument("--samples", type=int, default=None)
    parser.add_argument("--device-path", action="store_true",
                        help="measure the host path and the forced device path side by side")
    args = parser.parse_args(argv)
    n_qubits = args.qubits or (8 if args.quick else 12)
    n_samples = args.samples or (256 if args.quick else 2000)
    if not args.device_path:
        report = measure(n_qubits, n_samples, args.repeats)
        report["engine_path"] = "device" if device_path() else "host"
        report["compute_device"] = compute_device()
        print(json.dumps(report, indent=2))
        return
    # one block per path (switching paths clears JAX's caches, so they cannot alternate
    # call by call); every ratio's two sides are timed in the same block
    with engine_path("host"):
        report = measure(n_qubits, n_samples, args.repeats)
        report["engine_path"], report["compute_device"] = "host", compute_device()
    with engine_path("device"):
        device = measure(n_qubits, n_samples, args.repeats)
        device["engine_path"], device["compute_device"] = "device", compute_device()
    report["device_path"] = device
    report["paths_side_by_side"] = {
        key: {"host": report[key], "device": device[key]}
        for key in ("ratio_value_and_grad_to_forward", "ratio_optimizer_step_to_forward",
                    "ratio_value_and_grad_to_forward_pairwise_median",
                    "ratio_value_and_grad_to_forward_xla", "forward_gram_s",
                    "value_and_grad_s", "minibatch_steps_per_s")}
    print(json.dumps(report, indent=2))


def measure(n_qubits: int, n_samples: int, repeats: int) -> dict:
    """Every timing and ratio of the module docstring, on the current engine path."""
    rng = np.random.default_rng(0)  # invented data: uniform features, random balanced labels
    X = jnp.asarray(rng.uniform(-1.0, 1.0, size=(n_samples, n_qubits)), jnp.float32)
    y = jnp.asarray(rng.permutation(np.arange(n_samples) % 2), jnp.int32)
    blueprint = build_encoding("layered", n_qubits, n_qubits=n_qubits, layers=2)
    params = initial_params(blueprint, jax.random.key(0), bandwidth=1.0, bias_scale=0.1)
    names = ("weights", "biases", "log_bandwidth")
    config = _StaticConfig("centered_alignment", 2, 0.1, 5, 5, 0.0, names, "adam", 0.05,
                           "constant", 0, 1.0, 1e-4, None, False, False)

    forward = lambda p, X: quantum_gram(blueprint, p, X)  # noqa: E731
    forward_xla = jax.jit(lambda p, X: gram_for_training(blueprint, p, X))
    forward_training = jax.jit(lambda p, X: training_gram(blueprint, p, X))
    loss = training_loss_function(blueprint, config)
    value_and_grad = jax.jit(jax.value_and_grad(lambda p, X, y: loss(p, {}, p, X, y)[0]))
    step, optimizer, _ = _compiled_step(blueprint, config)
    opt_state = optimizer.init(params)
    members = tuple(jnp.asarray(np.nonzero(np.asarray(y) == c)[0], jnp.int32) for c in (0, 1))
    sizes = jnp.asarray([m.shape[0] for m in members], jnp.int32)
    step_args = (params, opt_state, {}, params, X, y, members, sizes, X[:1], y[:1],
                 jax.random.key(1))

    # where a step's time goes: the circuit forward and reverse passes, the host products
    circuit = jax.jit(lambda p, X: encode_states(blueprint, p, X))
    circuit_and_reverse = jax.jit(
        lambda p, X, c: jax.vjp(lambda q: encode_states(blueprint, q, X), p)[1](c))
    whole = n_samples  # side by side: all rows in one batch instead of cache-sized chunks
    circuit_whole = jax.jit(lambda p, X: encode_states(blueprint, p, X, chunk_size=whole))
    circuit_and_reverse_whole = jax.jit(lambda p, X, c: jax.vjp(
        lambda q: encode_states(blueprint, q, X, chunk_size=whole), p)[1](c))
    states = np.asarray(circuit(params, X))
    cotangent = jnp.asarray(np.random.default_rng(1).normal(size=states.shape), states.dtype)
    weights = _host_overlap(states)
    weights_j, real, imag = jnp.asarray(weights), jnp.real(states), jnp.imag(states)
    backward = jax.jit(planar_matmul)
    one_product = jax.jit(jnp.matmul)  # one of the backward's three real products
    w_real = jnp.real(weights_j)
    parts = {"circuit_forward": lambda: circuit(params, X),
             "circuit_forward_and_reverse": lambda: circuit_and_reverse(params, X, cotangent),
             "circuit_forward_unchunked": lambda: circuit_whole(params, X),
             "circuit_forward_and_reverse_unchunked":
                 lambda: circuit_and_reverse_whole(params, X, cotangent),
             "host_overlap_herk": lambda: _host_overlap(states),
             "backward_three_real_products": lambda: backward(weights_j, real, imag),
             "one_real_product": lambda: one_product(w_real, real),
             "reference_host_cgemm": lambda: blas.cgemm(1.0, states.T, weights.T)}

    compile_s = {"forward": timed(forward, params, X),
                 "forward_xla": timed(forward_xla, params, X),
                 "forward_training_gram": timed(forward_training, params, X),
                 "value_and_grad": timed(value_and_grad, params, X, y),
                 "optimizer_step": timed(step, *step_args)}
    for fn in parts.values():
        timed(fn)  # compile / warm up
    times = {"forward": [], "forward_xla": [], "forward_training_gram": [],
             "value_and_grad": [], "optimizer_step": []}
    part_times = {k: [] for k in parts}
    # one loop: every repeat times everything, so the parts and the whole see the same load
    for _ in range(repeats):
        times["forward"].append(timed(forward, params, X))
        times["value_and_grad"].append(timed(value_and_grad, params, X, y))
        times["forward_xla"].append(timed(forward_xla, params, X))
        times["forward_training_gram"].append(timed(forward_training, params, X))
        times["optimizer_step"].append(timed(step, *step_args))
        for k, fn in parts.items():
            part_times[k].append(timed(fn))
    medians = {k: statistics.median(v) for k, v in times.items()}
    part_medians = {k + "_s": statistics.median(v) for k, v in part_times.items()}
    # a step needs at least: circuit forward + a reverse pass (>= one more forward),
    # herk forward and the N x N x 2^n backward product
    floor = (2 * part_medians["circuit_forward_s"] + part_medians["host_overlap_herk_s"]
             + part_medians["backward_three_real_products_s"])

    batch_config = config._replace(batch_counts=(32, 32))
    batch_step, _, _ = _compiled_step(blueprint, batch_config)
    compile_s["minibatch_step"] = timed(batch_step, *step_args)
    batch_times = []
    for t in range(max(20, 4 * repeats)):
        batch_args = step_args[:-1] + (jax.random.key(100 + t),)
        batch_times.append(timed(batch_step, *batch_args))

    report = {
        "n_qubits": n_qubits, "n_samples": n_samples, "family": "layered", "layers": 2,
        "objective": "centered_alignment", "repeats": repeats,
        "forward_gram_s": medians["forward"],
        "forward_gram_xla_s": medians["forward_xla"],
        "forward_training_gram_s": medians["forward_training_gram"],
        "value_and_grad_s": medians["value_and_grad"],
        "optimizer_step_s": medians["optimizer_step"],
        "ratio_value_and_grad_to_forward": medians["value_and_grad"] / medians["forward"],
        "ratio_optimizer_step_to_forward": medians["optimizer_step"] / medians["forward"],
        "ratio_value_and_grad_to_forward_xla": medians["value_and_grad"] / medians["forward_xla"],
        # each repeat times forward and value_and_grad back to back: the median of these
        # per-repeat ratios is less sensitive to load from other processes
        "ratio_value_and_grad_to_forward_pairwise_median": statistics.median(
            g / f for g, f in zip(times["value_and_grad"], times["forward"])),
        "target_ratio": 2.5,
        "step_parts": part_medians,
        "ratio_floor_if_reverse_pass_cost_one_forward": floor / medians["forward"],
        # the products alone: (herk + backward product) / herk, the ratio a step would have
        # if the circuit and its reverse pass cost nothing
        "ratio_floor_if_circuit_cost_nothing": (
            (part_medians["host_overlap_herk_s"] + part_medians["backward_three_real_products_s"])
            / part_medians["host_overlap_herk_s"]),
        # the products in units of one real float32 product of the backward's shape
        # (N x N by N x 2^n): herk does the work of two, the backward of three
        "herk_in_real_products": (part_medians["host_overlap_herk_s"]
                                  / part_medians["one_real_product_s"]),
        "backward_in_real_products": (part_medians["backward_three_real_products_s"]
                                      / part_medians["one_real_product_s"]),
        # the step if it were nothing but herk, the backward product and the circuit's
        # forward and reverse passes (no elementwise work, no callback, no objective)
        "ratio_if_only_products_and_circuit": statistics.median(
            (h + b + c) / f for h, b, c, f in zip(
                part_times["host_overlap_herk"], part_times["backward_three_real_products"],
                part_times["circuit_forward_and_reverse"], times["forward"])),
        "ratio_chunked_to_unchunked_circuit_forward_and_reverse": (
            part_medians["circuit_forward_and_reverse_s"]
            / part_medians["circuit_forward_and_reverse_unchunked_s"]),
        "ratio_three_real_products_to_cgemm": (part_medians["backward_three_real_products_s"]
                                               / part_medians["reference_host_cgemm_s"]),
        "minibatch_size": 64,
        "minibatch_step_s": statistics.median(batch_times),
        "minibatch_steps_per_s": 1.0 / statistics.median(batch_times),
        "compile_s": compile_s,
        "all_times_s": times,
        "platform": platform.platform(), "cpu_count": os.cpu_count(),
        "jax": jax.__version__, "backend": jax.default_backend(),
    }
    return report


if __name__ == "__main__":
    main()
